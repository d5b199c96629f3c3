"""Label tables (docs/formats.md): analysts' annotations, read and checked row by row."""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from .deployment import Deployment, shown
from .errors import InputError

__all__ = ["Annotation", "read_label_table", "REQUIRED_COLUMNS", "BACKGROUND"]

REQUIRED_COLUMNS = ("file", "start_s", "end_s", "label")
# The class of windows that hold no labelled call.
BACKGROUND = "background"
# A label may end this far past its file's end (rounding by annotation tools), in s.
_END_TOLERANCE_S = 0.5


@dataclass(frozen=True)
class Annotation:
    """One labelled call: where it is (file, seconds from the file's start) and what."""

    deployment: str
    file: str
    start_s: float
    end_s: float
    label: str
    low_hz: float | None
    high_hz: float | None
    row: int
    # A row of a partial table: only its own stretch is known (docs/formats.md §3).
    partial: bool = False

    @property
    def duration_s(self) -> float:
        """Duration, s."""
        return self.end_s - self.start_s


def _float(row: dict, key: str, where: str) -> float:
    text = (row.get(key) or "").strip()
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"{where}: {key} must be a number, got {text!r}") from None
    if not math.isfinite(value):
        raise InputError(f"{where}: {key} must be finite, got {text!r}")
    return value


def read_label_table(
    path: str | Path, deployments: list[Deployment], unreadable: list[tuple[str, str]] | None = None
) -> list[Annotation]:
    """Read and check a label table against the deployments it describes.

    Parameters
    ----------
    path : str or Path, CSV with columns file, start_s, end_s, label [, low_hz, high_hz,
        deployment]; other columns are kept out of the way
    deployments : list of Deployment
        With more than one, the table needs a ``deployment`` column naming each row's.
    unreadable : list, optional
        Where given, rows in files the deployment could not read are left out and each
        such file is appended once as (file, error); otherwise such a row is refused.

    Returns
    -------
    list of Annotation

    Raises
    ------
    InputError
        For a missing column, and for the first bad row with its row number (the header
        is row 1) and the reason.
    """
    path = Path(path)
    by_name = {d.name: d for d in deployments}
    fh = io.StringIO(read_table_text(path))
    with fh:
        reader = csv.DictReader(fh)
        try:
            columns = reader.fieldnames or []
        except csv.Error as exc:
            raise InputError(f"{path}: row 1: not readable as CSV ({shown(exc)})") from None
        missing = [c for c in REQUIRED_COLUMNS if c not in columns]
        if missing:
            raise InputError(
                f"{path}: missing column(s) {', '.join(missing)}; the first line must name "
                f"at least {','.join(REQUIRED_COLUMNS)}"
            )
        if len(by_name) > 1 and "deployment" not in columns:
            raise InputError(
                f"{path}: covers {len(by_name)} deployments, so it needs a 'deployment' column "
                "with each row's manifest name"
            )
        files = {name: {f.name: f for f in d.files} | {x.name: None for x in d.faults} for name, d in by_name.items()}
        out: list[Annotation] = []
        seen: dict[tuple, int] = {}
        for row_no, row in enumerate(_rows(reader, path), start=2):
            where = f"{path}: row {row_no}"
            if None in row:
                raise InputError(
                    f"{where}: more fields than columns (a comma inside a value? labels are free text without commas)"
                )
            if "deployment" in columns and (row.get("deployment") or "").strip():
                dep_name = row["deployment"].strip()
                if dep_name not in by_name:
                    raise InputError(
                        f"{where}: deployment {dep_name!r} is not one of the manifests given "
                        f"({', '.join(sorted(by_name))})"
                    )
            elif len(by_name) == 1:
                dep_name = next(iter(by_name))
            else:
                raise InputError(f"{where}: deployment is empty")
            name = (row.get("file") or "").strip()
            if name not in files[dep_name]:
                raise InputError(
                    f"{where}: file {name!r} is not in deployment {dep_name!r} "
                    f"({shown(by_name[dep_name].audio_dir)}); check the name and the manifest's glob"
                )
            label = (row.get("label") or "").strip()
            if not label:
                raise InputError(f"{where}: label is empty")
            start, end = _float(row, "start_s", where), _float(row, "end_s", where)
            if start < 0:
                raise InputError(f"{where}: start_s {start:g} is before the file's start")
            if not end > start:
                raise InputError(f"{where}: end_s {end:g} is not after start_s {start:g}")
            rec = files[dep_name][name]
            if rec is None and unreadable is not None:
                error = next(x.error for x in by_name[dep_name].faults if x.name == name)
                if (name, error) not in unreadable:
                    unreadable.append((name, error))
                continue
            if rec is None:
                raise InputError(
                    f"{where}: file {name!r} cannot be read "
                    f"({next(x.error for x in by_name[dep_name].faults if x.name == name)})"
                )
            if end > rec.duration_s + _END_TOLERANCE_S:
                raise InputError(f"{where}: end_s {end:g} is past the end of {name} ({rec.duration_s:g} s)")
            low = _float(row, "low_hz", where) if (row.get("low_hz") or "").strip() else None
            high = _float(row, "high_hz", where) if (row.get("high_hz") or "").strip() else None
            if low is not None and high is not None and not high > low:
                raise InputError(f"{where}: high_hz {high:g} is not above low_hz {low:g}")
            for key, value in (("low_hz", low), ("high_hz", high)):
                if value is not None and value < 0:
                    raise InputError(f"{where}: {key} {value:g} is below 0 Hz")
            # The same call twice would count twice, as an example or as a truth call.
            key = (dep_name, name, start, end, label)
            if key in seen:
                raise InputError(f"{where}: repeats row {seen[key]} (same file, start_s, end_s and label); remove one")
            seen[key] = row_no
            partial = _partial(row, where) if "partial" in columns else False
            if label == BACKGROUND and not partial:
                raise InputError(
                    f"{where}: '{BACKGROUND}' is reserved for unlabelled time; leave such time unannotated "
                    "(in a partial table, mark the row partial=1 for a verified stretch without a call)"
                )
            out.append(Annotation(dep_name, name, start, min(end, rec.duration_s), label, low, high, row_no, partial))
    if not out:
        raise InputError(f"{path}: holds no label rows")
    return out


def _partial(row: dict, where: str) -> bool:
    text = (row.get("partial") or "").strip().lower()
    if text in ("", "0", "no", "false"):
        return False
    if text in ("1", "yes", "true"):
        return True
    raise InputError(f"{where}: partial must be 1 or 0 (yes or no), got {text!r}")


def read_table_text(path: str | Path) -> str:
    """The text of a CSV table (UTF-8, with or without a byte-order mark), or InputError."""
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            return fh.read()
    except OSError as exc:
        raise InputError(f"{path}: cannot read the label table: {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: not UTF-8 text (byte {exc.start}); save the table as CSV in UTF-8") from None


def _rows(reader: csv.DictReader, path: Path) -> Iterator[dict]:
    """The rows of ``reader``; a line the csv module cannot split is refused with its line."""
    try:
        yield from reader
    except csv.Error as exc:  # a field past the csv module's size limit
        raise InputError(f"{path}: line {reader.line_num}: not readable as CSV ({shown(exc)})") from None
