"""Where commands write: never over a file the command did not write itself.

A user's label table, a detection store or a model must not be replaced by a CSV or a
model because of a typo in ``--out``. Each writer says which files it may replace (an
earlier output of its own kind), and everything else is refused unless ``--force``.
"""

from __future__ import annotations

import csv
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any

from .errors import InputError

__all__ = ["check_output", "is_sqlite_file", "is_zip_file", "csv_header_is", "write_csv", "write_text"]

_SQLITE_MAGIC = b"SQLite format 3\x00"
_ZIP_MAGIC = b"PK\x03\x04"


def _head(path: Path, n: int) -> bytes:
    try:
        with open(path, "rb") as fh:
            return fh.read(n)
    except OSError:
        return b""


def is_sqlite_file(path: str | Path) -> bool:
    """True when the file starts with SQLite's header (a detection store, or another database)."""
    return _head(Path(path), len(_SQLITE_MAGIC)) == _SQLITE_MAGIC


def is_zip_file(path: str | Path) -> bool:
    """True when the file is a zip archive (a model file is one)."""
    return _head(Path(path), len(_ZIP_MAGIC)) == _ZIP_MAGIC


def check_output(
    out: str | Path,
    *,
    option: str,
    suffixes: tuple[str, ...] | None = None,
    inputs: tuple[str | Path, ...] = (),
    ours: Callable[[Path], bool] | None = None,
    what: str,
    force: bool = False,
) -> Path:
    """Refuse an output path that would destroy something; return it as a Path.

    Parameters
    ----------
    out : the path the user gave
    option : the option's name, for messages (``--out``)
    suffixes : file name endings this writer can write (lower case, with the dot); None: any
    inputs : paths the same command reads; writing over one of them is always refused
    ours : callable, optional; True for an existing file this writer made earlier, which
        may be replaced
    what : what the writer writes, for messages ("a detection table")
    force : replace any other existing file too (never an input)

    Raises
    ------
    InputError
        One line naming the file, what it is, and what to do.
    """
    path = Path(out)
    resolved = path.resolve()
    for source in inputs:
        if Path(source).resolve() == resolved:
            raise InputError(f"{path}: is also an input of this command; choose another {option}")
    if suffixes is not None and not path.name.lower().endswith(suffixes):
        raise InputError(f"{path}: {option} writes {what}; give a name ending in {' or '.join(suffixes)}")
    if not path.parent.is_dir():
        raise InputError(f"{path}: the folder {path.parent} does not exist; create it or choose another {option}")
    if not path.exists():
        return path
    if path.is_dir():
        raise InputError(f"{path}: is a folder; {option} needs a file name")
    if path.stat().st_size == 0 or force or (ours is not None and ours(path)):
        return path  # nothing to lose, an earlier output of this writer, or the user said so
    if is_sqlite_file(path):
        kind = "a detection store (or another database)"
    elif is_zip_file(path):
        kind = "a model file (or another archive)"
    else:
        kind = "a file this command did not write"
    raise InputError(f"{path}: exists and is {kind}; choose another {option}, or add --force to replace it")


def csv_header_is(path: Path, columns: Sequence[str]) -> bool:
    """True when ``path`` is a CSV whose first line names exactly ``columns``: an earlier
    table of the writer that uses these columns, which it may replace."""
    try:
        with open(path, encoding="utf-8", newline="") as fh:
            return next(csv.reader(fh), None) == list(columns)
    except (OSError, UnicodeDecodeError, csv.Error):
        return False


def write_text(path: Path, text: str) -> Path:
    """Write ``text`` (UTF-8) under a temporary name and rename it: a reader never sees half."""
    path = Path(path)
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(path)
    return path


def write_csv(path: Path, columns: Sequence[str], rows: Iterable[dict[str, Any] | Sequence[Any]]) -> int:
    """Write a CSV table under a temporary name and rename it; return the rows written.

    Rows are dicts (keys beyond ``columns`` ignored) or sequences in column order; None
    becomes an empty cell.
    """
    path = Path(path)
    tmp = path.with_name(path.name + ".partial")
    n = 0
    with open(tmp, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(columns)
        for r in rows:
            values = [r.get(c) for c in columns] if isinstance(r, dict) else list(r)
            w.writerow(["" if v is None else v for v in values])
            n += 1
    tmp.replace(path)
    return n
