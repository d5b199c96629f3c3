"""Deployment manifests (docs/formats.md): load, validate, find the files and their times.

One manifest describes one recorder at one place for one stretch of time. Loading it
checks every field, reads the calibration tables, lists the sound files, parses each
file's UTC start from its name and reads its header. Files that cannot be used are
kept as faults, so one bad file never stops the others.
"""

from __future__ import annotations

import csv
import difflib
import hashlib
import re
from collections import Counter
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
from callsieve.features.calibration import PLAUSIBLE, RecordingChain, ResponseCurve
from callsieve.features.propagation import Seawater
from callsieve.features.streaming import AudioInfo, AudioReader, AudioReadError, audio_info

from .errors import InputError, read_toml

__all__ = [
    "Site",
    "RecordedFile",
    "FileFault",
    "Gap",
    "Deployment",
    "load_deployment",
    "parse_file_start",
    "timestamp_regex",
    "read_response_table",
]

_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
_KNOWN = {
    "deployment": {"name", "audio_dir", "glob", "timestamp_format", "channel"},
    "site": {"latitude", "longitude", "depth_m", "temperature_c", "salinity_psu", "ph"},
    "calibration": {
        "full_scale_volts",
        "preamp_gain_db",
        "preamp_gain_csv",
        "hydrophone_sensitivity_db",
        "hydrophone_sensitivity_csv",
    },
}
# Times from file names have one-second resolution at best; differences below this
# between one file's end and the next one's start are neither gaps nor overlaps.
GAP_TOLERANCE_S = 1.0


@dataclass(frozen=True)
class Site:
    """Where the recorder sat, and the water around it (defaults 4 °C, 35 PSU, pH 8)."""

    latitude: float | None = None
    longitude: float | None = None
    depth_m: float | None = None
    temperature_c: float = 4.0
    salinity_psu: float = 35.0
    ph: float = 8.0

    @property
    def water(self) -> Seawater:
        """Water properties for absorption, at the recorder's depth (0 m if unknown)."""
        return Seawater(self.temperature_c, self.salinity_psu, self.ph, self.depth_m or 0.0)


@dataclass(frozen=True)
class RecordedFile:
    """One usable sound file of a deployment.

    Attributes
    ----------
    path : Path
    name : str, path relative to the audio folder (as label tables write it)
    start_utc : datetime, UTC start parsed from the name
    info : AudioInfo
    size_bytes : int
    mtime_ns : int
    head_overlap_s : float, s, time at the file's start that an earlier file already
        recorded; detections starting there are left out (see ``set_aside_repeats``)
    """

    path: Path
    name: str
    start_utc: datetime
    info: AudioInfo
    size_bytes: int
    mtime_ns: int
    head_overlap_s: float = 0.0

    @property
    def duration_s(self) -> float:
        """Duration, s."""
        return self.info.duration_s

    @property
    def end_utc(self) -> datetime:
        """UTC end of the last sample."""
        return self.start_utc + timedelta(seconds=self.duration_s)


@dataclass(frozen=True)
class FileFault:
    """A file that matched the manifest but cannot be used, and why."""

    name: str
    error: str
    # True for a copy or a span already recorded (set_aside_repeats): no sound is lost.
    repeat: bool = False


@dataclass(frozen=True)
class Gap:
    """Time without recording between two consecutive files (negative: an overlap)."""

    after_file: str
    start_utc: datetime
    seconds: float


@dataclass(frozen=True, eq=False)
class Deployment:
    """A loaded, validated manifest with its files in time order.

    Attributes
    ----------
    name : str
    manifest_path : Path
    audio_dir : Path
    glob : str
    timestamp_format : str
    channel : int
    site : Site
    chain : RecordingChain
    files : list of RecordedFile, usable files sorted by start
    faults : list of FileFault, files skipped with the reason
    sample_rate_hz : int, Hz, the rate of the usable files
    warnings : list of str, values that are possible but unusual (calibration, rate,
        sample format), one line each
    """

    name: str
    manifest_path: Path
    audio_dir: Path
    glob: str
    timestamp_format: str
    channel: int
    site: Site
    chain: RecordingChain
    files: list[RecordedFile] = field(default_factory=list)
    faults: list[FileFault] = field(default_factory=list)
    sample_rate_hz: int = 0
    warnings: list[str] = field(default_factory=list)

    @property
    def first_start_utc(self) -> datetime | None:
        """Start of the earliest usable file."""
        return self.files[0].start_utc if self.files else None

    @property
    def last_end_utc(self) -> datetime | None:
        """End of the latest-ending usable file."""
        return max(f.end_utc for f in self.files) if self.files else None

    @property
    def recorded_s(self) -> float:
        """Recording effort, s: the union of all files' time spans (overlaps count once)."""
        total, reach = 0.0, None
        for f in self.files:
            start, end = f.start_utc, f.end_utc
            if reach is None or start >= reach:
                total += (end - start).total_seconds()
                reach = end
            elif end > reach:
                total += (end - reach).total_seconds()
                reach = end
        return total

    def gaps(self, tolerance_s: float = GAP_TOLERANCE_S) -> list[Gap]:
        """Silences longer than ``tolerance_s`` (s) between consecutive files."""
        return [g for g in self._joins() if g.seconds > tolerance_s]

    def overlaps(self, tolerance_s: float = GAP_TOLERANCE_S) -> list[Gap]:
        """Joins where a file starts more than ``tolerance_s`` (s) before the previous ends."""
        return [g for g in self._joins() if g.seconds < -tolerance_s]

    def _joins(self) -> list[Gap]:
        return [
            Gap(a.name, a.end_utc, (b.start_utc - a.end_utc).total_seconds())
            for a, b in zip(self.files, self.files[1:], strict=False)
        ]


# --- timestamps -------------------------------------------------------------------

_DIRECTIVES = {
    "Y": r"\d{4}",
    "y": r"\d{2}",
    "m": r"\d{2}",
    "d": r"\d{2}",
    "H": r"\d{2}",
    "M": r"\d{2}",
    "S": r"\d{2}",
    "j": r"\d{3}",
    "f": r"\d{1,6}",
    "b": r"[A-Za-z]{3}",
    "B": r"[A-Za-z]{3,9}",
    "z": r"(?:Z|[+-]\d{2}:?\d{2})",
    "%": "%",
}


def timestamp_regex(timestamp_format: str) -> re.Pattern[str]:
    """A regular expression that finds ``timestamp_format`` (strftime) inside a name.

    Raises
    ------
    ValueError
        For a directive that cannot appear in a time stamp of a file name.
    """
    parts, i = [], 0
    while i < len(timestamp_format):
        ch = timestamp_format[i]
        if ch == "%":
            if i + 1 >= len(timestamp_format):
                raise ValueError("ends with a lone '%'")
            d = timestamp_format[i + 1]
            if d not in _DIRECTIVES:
                raise ValueError(f"directive %{d} is not supported; use %Y %y %m %d %H %M %S %j %f %z")
            parts.append(_DIRECTIVES[d])
            i += 2
        else:
            parts.append(re.escape(ch))
            i += 1
    if not any(d in timestamp_format for d in ("%Y", "%y")):
        raise ValueError("needs a year (%Y or %y)")
    return re.compile("(?=(" + "".join(parts) + "))")


def parse_file_start(name: str, timestamp_format: str) -> datetime | None:
    """UTC start time found in the file name ``name``, or None if no match parses.

    Times without a zone are taken as UTC; with ``%z`` they are converted to UTC.
    """
    pattern = timestamp_regex(timestamp_format)
    base = Path(name).name
    for match in pattern.finditer(base):
        try:
            stamp = datetime.strptime(match.group(1), timestamp_format)
        except ValueError:
            continue
        if stamp.tzinfo is None:
            return stamp.replace(tzinfo=UTC)
        return stamp.astimezone(UTC)
    return None


# --- the manifest ------------------------------------------------------------------


def read_response_table(
    path: Path,
    value_column: str,
    where: str,
    quantity: str | None = None,
    warnings: list[str] | None = None,
) -> ResponseCurve:
    """Read a calibration table with columns ``frequency_hz`` and ``value_column`` (dB).

    Parameters
    ----------
    path : Path, CSV (UTF-8)
    value_column : str, the column of levels, dB
    where : str, what names the table in messages (the manifest and its field)
    quantity : str, optional; a key of ``PLAUSIBLE`` the levels are checked against
        (with the frequencies, always): impossible values are refused, unusual ones noted
    warnings : list of str, optional; where notes of unusual values are appended

    Raises
    ------
    InputError
        Naming the file, the row and what is wrong.
    """
    name = shown(path)
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            rows = list(reader)
            columns = reader.fieldnames or []
    except OSError as exc:
        raise InputError(f"{where}: cannot read {name}: {exc.strerror}") from None
    except ValueError as exc:  # not UTF-8 (UnicodeDecodeError), a NUL in the path
        raise InputError(f"{where}: cannot read {name}: {_reason(exc)}") from None
    except csv.Error as exc:
        raise InputError(f"{name}: not a readable CSV table ({shown(exc)})") from None
    for col in ("frequency_hz", value_column):
        if col not in columns:
            raise InputError(
                f"{name}: needs the columns frequency_hz,{value_column} in its first line "
                f"(found: {shown(','.join(c or '' for c in columns)) or 'nothing'})"
            )
    if not rows:
        raise InputError(f"{name}: holds no rows under its header; add one row per frequency")
    freq, level = [], []
    for row_no, row in enumerate(rows, start=2):
        try:
            f, v = float(row["frequency_hz"]), float(row[value_column])
        except (TypeError, ValueError):
            raise InputError(f"{name}: row {row_no}: frequency_hz and {value_column} must be numbers") from None
        if not (np.isfinite(f) and np.isfinite(v)) or f <= 0:
            raise InputError(f"{name}: row {row_no}: frequency_hz must be > 0 and values finite")
        if freq and f <= freq[-1]:
            raise InputError(
                f"{name}: row {row_no}: frequency_hz {f:g} does not increase "
                f"(previous row {freq[-1]:g}); sort the table by frequency"
            )
        _plausible("frequency_hz", f, f"{name}: row {row_no}: frequency_hz", None)
        if quantity is not None:
            _plausible(quantity, v, f"{name}: row {row_no}: {value_column}", warnings)
        freq.append(f)
        level.append(v)
    usual = PLAUSIBLE["frequency_hz"]
    if warnings is not None and (freq[0] < usual.usual[0] or freq[-1] > usual.usual[1]):
        warnings.append(
            f"{name}: frequency_hz spans {freq[0]:g} .. {freq[-1]:g} Hz ({usual.usual_text()}); "
            "check that the table is in Hz"
        )
    return ResponseCurve(np.array(freq), np.array(level))


def shown(text: object) -> str:
    """``text`` fit for a one-line message: characters that would break the line escaped.

    File names, keys and columns come from the user's files and may hold any character.
    """
    s = str(text)
    return s if s.isprintable() else "".join(c if c.isprintable() else repr(c)[1:-1] for c in s)


def _reason(exc: Exception) -> str:
    """A file-reading error in words, with the fix for text that is not UTF-8."""
    if isinstance(exc, UnicodeDecodeError):
        return f"not UTF-8 text (byte {exc.start}); save it as UTF-8"
    return str(exc)


def _plausible(quantity: str, value: float, where: str, warnings: list[str] | None) -> None:
    """Refuse a value no recorder has (one line: the value, the file, the usual range);
    note an unusual one in ``warnings``.
    """
    rng = PLAUSIBLE[quantity]
    verdict = rng.judge(value)
    if verdict == "usual":
        return
    if verdict == "unusual":
        if warnings is not None:
            warnings.append(f"{where}: {value:g} {rng.unit} is an unusual {rng.what} ({rng.usual_text()}); check it")
        return
    hint = ""
    if quantity == "hydrophone_sensitivity_db" and rng.judge(-value) == "usual":
        hint = f"; sensitivities are negative: did you mean {-value:g}?"
    elif quantity == "hydrophone_sensitivity_db" and rng.judge(value - 120.0) == "usual":
        hint = f"; if it is in dB re 1 V/Pa, write {value - 120.0:g} (dB re 1 V/µPa)"
    elif quantity == "full_scale_volts" and rng.judge(value / 1000.0) == "usual":
        hint = f"; if it is in millivolts, write {value / 1000.0:g}"
    raise InputError(f"{where}: {value:g} {rng.unit} is not a possible {rng.what} ({rng.usual_text()}){hint}")


def _number(
    table: dict,
    key: str,
    where: str,
    lo: float | None = None,
    hi: float | None = None,
    positive: bool = False,
) -> float:
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(f"{where} {key}: must be a number, got {value!r}")
    try:
        value = float(value)
    except OverflowError:  # TOML integers have no size limit here; floats do
        value = float("inf") if value > 0 else float("-inf")
    if not np.isfinite(value) or (positive and value <= 0):
        raise InputError(f"{where} {key}: must be a finite number{' > 0' if positive else ''}, got {value:g}")
    if (lo is not None and value < lo) or (hi is not None and value > hi):
        raise InputError(f"{where} {key}: {value:g} is outside {lo:g} .. {hi:g}")
    return value


def _curve(
    cal: dict,
    flat_key: str,
    csv_key: str,
    value_column: str,
    base: Path,
    where: str,
    what: str,
    warnings: list[str] | None = None,
) -> ResponseCurve:
    has_flat, has_csv = flat_key in cal, csv_key in cal
    if has_flat and has_csv:
        raise InputError(f"{where} {flat_key} and {csv_key}: give one of them, not both")
    if not (has_flat or has_csv):
        raise InputError(f"{where} {flat_key}: missing; give {flat_key} ({what}) or {csv_key}")
    if has_flat:
        value = _number(cal, flat_key, where)
        _plausible(flat_key, value, f"{where} {flat_key}", warnings)
        return ResponseCurve.flat(value)
    if not isinstance(cal[csv_key], str) or not cal[csv_key]:
        raise InputError(f"{where} {csv_key}: must be a file path in quotes")
    return read_response_table(base / cal[csv_key], value_column, f"{where} {csv_key}", flat_key, warnings)


def _check_chain(chain: RecordingChain, where: str, warnings: list[str]) -> None:
    """Refuse a chain whose clip level no recording could have; note an unusual one.

    Each value may be possible alone and the three together not: the clip level is
    checked at every frequency of the tables (its extremes lie there).
    """
    f = np.union1d(chain.hydrophone_sensitivity.frequency_hz, chain.preamp_gain.frequency_hz)
    clip = chain.clip_level_db(f)
    rng = PLAUSIBLE["clip_level_db"]
    for value in (float(clip.min()), float(clip.max())):
        verdict = rng.judge(value)
        text = (
            f"{where}: full_scale_volts, preamplifier gain and hydrophone sensitivity give a "
            f"{rng.what} of {value:.1f} {rng.unit} ({rng.usual_text()})"
        )
        if verdict == "impossible":
            raise InputError(
                text
                + (": the sea's own noise would be at full scale" if value < rng.possible[0] else "")
                + "; check the three values"
            )
        if verdict == "unusual":
            warnings.append(text + "; check it")
            return


def _check_keys(doc: dict, path: Path) -> None:
    for table, value in doc.items():
        if table not in _KNOWN:
            hint = difflib.get_close_matches(table, _KNOWN, n=1)
            raise InputError(
                f"{path}: [{shown(table)}]: unknown table"
                + (f"; did you mean [{hint[0]}]?" if hint else "; expected [deployment], [site], [calibration]")
            )
        if not isinstance(value, dict):
            raise InputError(f"{path}: {shown(table)}: must be a table ([{shown(table)}])")
        for key in value:
            if key not in _KNOWN[table]:
                hint = difflib.get_close_matches(key, _KNOWN[table], n=1)
                raise InputError(
                    f"{path}: [{table}] {shown(key)}: unknown field"
                    + (f"; did you mean {hint[0]}?" if hint else f"; known: {', '.join(sorted(_KNOWN[table]))}")
                )


def load_deployment(manifest_path: str | Path) -> Deployment:
    """Load and validate a manifest, then list its files with their start times.

    Parameters
    ----------
    manifest_path : str or Path, a TOML file in the manifest format of docs/formats.md

    Returns
    -------
    Deployment
        Usable files sorted by start; unreadable, truncated or wrong-rate files as faults.

    Raises
    ------
    InputError
        For a missing or contradictory field, a bad calibration table, no matching
        file, or a file name without a parseable time.
    """
    path = Path(manifest_path)
    try:
        doc = read_toml(path, "manifest")
    except ValueError as exc:  # bytes that are not UTF-8 (tomllib reads UTF-8 only)
        raise InputError(f"{path}: cannot read the manifest: {_reason(exc)}") from None
    _check_keys(doc, path)
    base = path.resolve().parent

    if "deployment" not in doc:
        raise InputError(f"{path}: [deployment]: missing table; it needs name, audio_dir, timestamp_format")
    dep = doc["deployment"]
    where = f"{path}: [deployment]"
    for key in ("name", "audio_dir", "timestamp_format"):
        if key not in dep:
            raise InputError(f"{where} {key}: missing")
        if not isinstance(dep[key], str) or not dep[key]:
            raise InputError(f"{where} {key}: must be a non-empty string in quotes")
    name = dep["name"]
    if not _NAME.match(name):
        raise InputError(f"{where} name: {name!r} may hold only letters, digits, '.', '_' and '-'")
    glob = dep.get("glob", "*.wav")
    if not isinstance(glob, str) or not glob:
        raise InputError(f'{where} glob: must be a pattern in quotes, e.g. "*.wav"')
    channel = dep.get("channel", 0)
    if isinstance(channel, bool) or not isinstance(channel, int) or channel < 0:
        raise InputError(f"{where} channel: must be an integer >= 0, got {channel!r}")
    fmt = dep["timestamp_format"]
    try:
        timestamp_regex(fmt)
    except ValueError as exc:
        raise InputError(f"{where} timestamp_format: {fmt!r} {shown(exc)}") from None
    try:  # strptime compiles the pattern; a directive given twice breaks it (re.error)
        datetime.strptime(datetime(2001, 2, 3, 4, 5, 6, tzinfo=UTC).strftime(fmt), fmt)
    except re.error:
        raise InputError(f"{where} timestamp_format: {fmt!r} gives a directive twice") from None
    except ValueError:  # a time that does not read back is found (or not) in the names
        pass

    site_doc = doc.get("site", {})
    sw = f"{path}: [site]"
    site = Site(
        latitude=_number(site_doc, "latitude", sw, -90, 90) if "latitude" in site_doc else None,
        longitude=_number(site_doc, "longitude", sw, -180, 360) if "longitude" in site_doc else None,
        depth_m=_number(site_doc, "depth_m", sw, 0, 11000) if "depth_m" in site_doc else None,
        temperature_c=_number(site_doc, "temperature_c", sw, -3, 40) if "temperature_c" in site_doc else 4.0,
        salinity_psu=_number(site_doc, "salinity_psu", sw, 0, 50) if "salinity_psu" in site_doc else 35.0,
        ph=_number(site_doc, "ph", sw, 6, 9.5) if "ph" in site_doc else 8.0,
    )

    if "calibration" not in doc:
        raise InputError(
            f"{path}: [calibration]: missing table; it needs full_scale_volts, a preamp gain "
            "and a hydrophone sensitivity"
        )
    cal = doc["calibration"]
    cw = f"{path}: [calibration]"
    if "full_scale_volts" not in cal:
        raise InputError(f"{cw} full_scale_volts: missing; the 0-to-peak volts of digital full scale")
    warnings: list[str] = []
    full_scale = _number(cal, "full_scale_volts", cw, positive=True)
    _plausible("full_scale_volts", full_scale, f"{cw} full_scale_volts", warnings)
    chain = RecordingChain(
        full_scale,
        _curve(
            cal,
            "hydrophone_sensitivity_db",
            "hydrophone_sensitivity_csv",
            "sensitivity_db",
            base,
            cw,
            "dB re 1 V/µPa",
            warnings,
        ),
        _curve(cal, "preamp_gain_db", "preamp_gain_csv", "gain_db", base, cw, "dB", warnings),
    )
    _check_chain(chain, cw, warnings)

    audio_dir = (base / dep["audio_dir"]).resolve()
    if not audio_dir.is_dir():
        raise InputError(f"{where} audio_dir: {shown(audio_dir)} is not a folder")
    files, faults = _scan(audio_dir, glob, fmt, path)
    deployment = Deployment(name, path, audio_dir, glob, fmt, channel, site, chain)
    if not files and not faults:
        raise InputError(f"{where} glob: no file in {shown(audio_dir)} matches {glob!r}")
    # A rate no sound recorder has is a damaged header: a fault of that file, never the
    # deployment's rate.
    rates = PLAUSIBLE["sample_rate_hz"]
    for f in [f for f in files if rates.judge(f.info.sample_rate_hz) == "impossible"]:
        files.remove(f)
        faults.append(
            FileFault(f.name, f"sample rate {f.info.sample_rate_hz} Hz is not possible ({rates.usual_text()})")
        )
    rate = Counter(f.info.sample_rate_hz for f in files).most_common(1)
    deployment_rate = rate[0][0] if rate else 0
    usable = []
    for f in files:
        if f.info.sample_rate_hz != deployment_rate:
            faults.append(
                FileFault(
                    f.name,
                    f"sample rate {f.info.sample_rate_hz} Hz differs from the deployment's {deployment_rate} Hz",
                )
            )
        elif channel >= f.info.channels:
            faults.append(FileFault(f.name, f"has {f.info.channels} channel(s); channel {channel} does not exist"))
        else:
            usable.append(f)
    usable, repeats = set_aside_repeats(usable)
    faults.extend(repeats)
    object.__setattr__(deployment, "files", usable)
    object.__setattr__(deployment, "faults", sorted(faults, key=lambda x: x.name))
    object.__setattr__(deployment, "sample_rate_hz", deployment_rate)
    object.__setattr__(deployment, "warnings", warnings + _recording_warnings(path, usable, deployment_rate))
    return deployment


# Sample formats with 16 bits or more (libsndfile's names); others hold less dynamic
# range than levels near the noise floor need, or are lossy.
_FULL_FORMATS = {"PCM_16", "PCM_24", "PCM_32", "FLOAT", "DOUBLE"}


def _recording_warnings(manifest: Path, files: list[RecordedFile], rate_hz: int) -> list[str]:
    """Possible but unusual: the deployment's sample rate, sample formats under 16 bits."""
    out = []
    if files and PLAUSIBLE["sample_rate_hz"].judge(rate_hz) == "unusual":
        out.append(
            f"{manifest}: sample rate {rate_hz} Hz is unusual for a sound recorder "
            f"({PLAUSIBLE['sample_rate_hz'].usual_text()}); check the files"
        )
    odd = Counter(f.info.subtype for f in files if f.info.subtype not in _FULL_FORMATS)
    for subtype, n in sorted(odd.items()):
        out.append(
            f"{manifest}: {n} file(s) hold {subtype} samples, not 16-bit or more: levels near the "
            "noise floor and the clip flag are less exact"
        )
    return out


# Bytes read from each end of a file to tell copies apart: with the size, enough to
# catch a copied file without reading months of audio twice. Recorders write files of one
# size, so every file is first told apart by a cheap look at its head (16 KiB, most of it
# sound: two recordings of the sea differ there); only files alike there are read further.
_FINGERPRINT_BYTES = 1 << 20
_HEAD_BYTES = 1 << 14


def content_fingerprint(path: Path, size_bytes: int, nbytes: int = _FINGERPRINT_BYTES) -> str:
    """A hash of a file's size and its first and last ``nbytes`` bytes: equal for copies of one file."""
    h = hashlib.sha256(str(size_bytes).encode())
    with open(path, "rb") as fh:
        h.update(fh.read(nbytes))
        if size_bytes > nbytes:
            fh.seek(max(size_bytes - nbytes, nbytes))
            h.update(fh.read())
    return h.hexdigest()


def set_aside_repeats(
    files: list[RecordedFile], tolerance_s: float = GAP_TOLERANCE_S
) -> tuple[list[RecordedFile], list[FileFault]]:
    """Resolve copied files and overlapping spans, so no stretch of sound is scored twice.

    The rule (docs/formats.md §1, "Copies and overlaps"):

    1. Files of the same size whose first and last MiB hash alike are copies: the first
       in (start, name) order is kept, the others are set aside.
    2. Files are then taken by start (the longer first at equal starts). A file whose
       span lies within what earlier files already cover (to ``tolerance_s``) is set
       aside; one that only starts inside it is kept, with ``head_overlap_s`` saying how
       much of its start was already recorded: detections starting there are left out,
       and effort counts that time once.

    Parameters
    ----------
    files : list of RecordedFile
    tolerance_s : float, s, clock resolution of the file names

    Returns
    -------
    kept : list of RecordedFile, sorted by (start, name)
    set_aside : list of FileFault, each naming the file kept in its place
    """
    order = sorted(files, key=lambda f: (f.start_utc, f.name))
    faults: list[FileFault] = []
    by_size = Counter(f.size_bytes for f in order)
    heads: dict[str, str] = {}
    for f in order:
        if by_size[f.size_bytes] > 1:
            try:
                heads[f.name] = content_fingerprint(f.path, f.size_bytes, _HEAD_BYTES)
            except OSError as exc:
                heads[f.name] = f"unreadable: {exc.strerror}"
    by_head = Counter(heads.values())
    seen: dict[str, str] = {}
    unique = []
    for f in order:
        if by_head[heads.get(f.name, "")] > 1:
            try:
                key = content_fingerprint(f.path, f.size_bytes)
            except OSError as exc:
                faults.append(FileFault(f.name, f"cannot be read ({exc.strerror})"))
                continue
            if key in seen:
                faults.append(FileFault(f.name, f"a copy of {seen[key]} (same size and content); left out", True))
                continue
            seen[key] = f.name
        unique.append(f)
    kept: list[RecordedFile] = []
    reach, holder = None, ""
    for f in sorted(unique, key=lambda f: (f.start_utc, -f.duration_s, f.name)):
        overlap = (reach - f.start_utc).total_seconds() if reach is not None else -1.0
        if overlap > tolerance_s and f.end_utc <= reach + timedelta(seconds=tolerance_s):
            reason = f"its span lies within what {holder} recorded, which is kept; left out"
            faults.append(FileFault(f.name, reason, True))
            continue
        if overlap > tolerance_s:
            f = replace(f, head_overlap_s=overlap)
        kept.append(f)
        if reach is None or f.end_utc > reach:
            reach, holder = f.end_utc, f.name
    kept.sort(key=lambda f: (f.start_utc, f.name))
    return kept, faults


def _scan(audio_dir: Path, glob: str, fmt: str, manifest: Path) -> tuple[list[RecordedFile], list[FileFault]]:
    files, faults = [], []
    try:
        found = sorted(audio_dir.glob(glob))
    except (ValueError, NotImplementedError) as exc:  # '/abs/*', 'a**b'
        raise InputError(f"{manifest}: [deployment] glob: {glob!r} cannot be used ({shown(exc)})") from None
    for p in found:
        if not p.is_file():
            continue
        name = p.relative_to(audio_dir).as_posix()
        if ".." in Path(name).parts:
            raise InputError(
                f"{manifest}: [deployment] glob: {glob!r} reaches outside audio_dir ({name}); "
                "keep the pattern inside the folder"
            )
        start = parse_file_start(name, fmt)
        if start is None:
            raise InputError(
                f"{manifest}: [deployment] timestamp_format: {fmt!r} matches no time in the file "
                f"name {name!r}; fix the pattern or narrow glob"
            )
        try:
            info = audio_info(p)
            if info.format == "FLAC":
                _check_flac_end(p, info.frames)
        except AudioReadError as exc:
            faults.append(FileFault(name, exc.reason))
            continue
        if info.frames == 0:
            faults.append(FileFault(name, "holds no samples"))
            continue
        st = p.stat()
        files.append(RecordedFile(p, name, start, info, st.st_size, st.st_mtime_ns))
    return files, faults


# Samples decoded at the end of each FLAC when listing. A FLAC's header states the length
# of the whole stream, so a copy cut short (a FLAC that loses sync, docs/formats.md §1)
# shows only when its end is decoded; a WAV's is checked against its header instead.
_FLAC_TAIL = 4096


def _check_flac_end(path: Path, frames: int) -> None:
    """Raise AudioReadError ("truncated") when the last samples of a FLAC cannot be decoded."""
    if frames <= 0:
        return
    try:
        with AudioReader(path) as reader:
            reader.read(max(frames - _FLAC_TAIL, 0), frames)
    except AudioReadError as exc:
        reason = exc.reason
        if not reason.startswith("truncated"):
            reason = f"truncated: its end does not decode ({reason})"
        raise AudioReadError(path, reason) from None
