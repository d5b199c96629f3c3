"""Property-based tests of the parsers: manifests, calibration tables and label tables.

Whatever a user's file holds, the command answers exit 0 (the file is fine) or exit 2 with
exactly one line ``callsieve: error: ...`` (docs/formats.md, exit status): never exit 1,
never a traceback, never a file written or left behind. The broken files are valid ones
with a few mutations (missing and extra columns or fields, values of every type and of no
sense, NaN and infinities, huge numbers, duplicates, unsorted rows, other encodings and
byte-order marks, stray bytes, truncation).

Runs are reproducible (``derandomize``: the same examples every run, no example database)
and bounded in count so that this file runs in well under 30 s on 2 cores. To search
further by hand, ``CALLSIEVE_FUZZ_EXAMPLES=3000 pytest tests/test_parsers_fuzz.py`` draws
that many random examples per property instead.
"""

from __future__ import annotations

import contextlib
import io
import os
import string
import subprocess
import sys
import tempfile
from datetime import date, datetime, timedelta
from pathlib import Path

import pytest
from callsieve.classifier.cli import main
from callsieve.classifier.errors import InputError
from conftest import write_files
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

_EXPLORE = int(os.environ.get("CALLSIEVE_FUZZ_EXAMPLES", "0"))
FUZZ = settings(
    max_examples=_EXPLORE or 120,
    deadline=None,
    derandomize=not _EXPLORE,
    database=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
T0 = datetime(2031, 5, 4, 6, 0, 0)
FILES = [f"testrec_{T0 + timedelta(minutes=k):%Y%m%dT%H%M%SZ}.wav" for k in range(2)]
# What train's stub says when the label table was accepted: parsing is all we test here.
PARSED = "fuzz: label table accepted"


@pytest.fixture(scope="module")
def audio(tmp_path_factory) -> Path:
    """Two 10-s files at 2 kHz, shared by every example (never written to)."""
    folder = tmp_path_factory.mktemp("fuzz-site")
    write_files(folder, [T0, T0 + timedelta(minutes=1)], 10.0)
    return (folder / "audio").resolve()


# --- running the command -------------------------------------------------------------


def _snapshot(*folders: Path) -> set:
    return {
        (str(p), p.stat().st_size, p.stat().st_mtime_ns) for folder in folders for p in folder.rglob("*") if p.is_file()
    }


def run_cli(argv: list[str], *watched: Path) -> tuple[int, str, str]:
    """``main(argv)`` with stdout and stderr captured; no file in ``watched`` may change."""
    before = _snapshot(*watched)
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    assert _snapshot(*watched) == before, "a file was written, changed or left behind"
    return code, out.getvalue(), err.getvalue()


def assert_answered(code: int, out: str, err: str) -> None:
    """Exit 0, or exit 2 with one line and nothing on stdout; never a traceback (formats.md)."""
    assert "Traceback" not in err and "Traceback" not in out
    assert code in (0, 2), f"exit {code}: {err}"
    if code == 2:
        lines = err.splitlines()
        assert len(lines) == 1 and lines[0].startswith("callsieve: error: "), err
        assert out == ""


# --- writing mutated files ------------------------------------------------------------

# Text for values and keys: any character but lone surrogates (which no file can hold).
TEXT = st.text(st.characters(blacklist_categories=("Cs",)), max_size=20)
# Cells of a CSV: numbers of no sense, and text.
ODD_CELLS = [
    "",
    " ",
    "nan",
    "NaN",
    "inf",
    "-inf",
    "1e400",
    "-1e400",
    "9" * 400,
    "abc",
    "1,5",
    '"',
    '""',
    "0",
    "-5",
    "1e308",
    "170",
    "+170",
    "1_000",
    "0x10",
    "\u0661\u0660\u0660",  # Arabic-Indic digits: float() reads them as 100
    "\x00",
    "12\n13",
    "background",
]
CELL = st.one_of(st.sampled_from(ODD_CELLS), st.floats().map(repr), st.integers().map(str), TEXT)
ENCODINGS = ["utf-8", "utf-8-sig", "utf-16", "utf-16-le", "latin-1", "cp1252", "utf-32"]


def _encode(text: str, encoding: str) -> bytes:
    return text.encode(encoding, errors="replace")


@st.composite
def csv_variants(draw, header: list[str], rows: list[list[str]], required: set[str]) -> tuple[bytes, bool]:
    """A mutated CSV table: its bytes and whether it must be refused whatever else holds
    (a ``required`` column dropped, no rows, no bytes).
    """
    header, rows = list(header), [list(r) for r in rows]
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(
            st.sampled_from(
                [
                    "cell",
                    "drop_column",
                    "extra_column",
                    "rename_column",
                    "duplicate_row",
                    "shuffle",
                    "no_rows",
                    "extra_field",
                    "missing_field",
                    "nan",
                ]
            )
        )
        if kind in ("cell", "nan") and rows:
            r = rows[draw(st.integers(0, len(rows) - 1))]
            if r:
                r[draw(st.integers(0, len(r) - 1))] = "nan" if kind == "nan" else draw(CELL)
        elif kind == "drop_column" and header:
            j = draw(st.integers(0, len(header) - 1))
            header.pop(j)
            for r in rows:
                if j < len(r):
                    r.pop(j)
        elif kind == "extra_column":
            header.append(draw(st.sampled_from(["note", "deployment", "file", "x"])))
            for r in rows:
                r.append(draw(CELL))
        elif kind == "rename_column" and header:
            header[draw(st.integers(0, len(header) - 1))] = draw(TEXT)
        elif kind == "duplicate_row" and rows:
            rows.insert(draw(st.integers(0, len(rows))), list(draw(st.sampled_from(rows))))
        elif kind == "shuffle":
            rows = draw(st.permutations(rows))
        elif kind == "no_rows":
            rows = []
        elif kind == "extra_field" and rows:
            rows[draw(st.integers(0, len(rows) - 1))].append(draw(CELL))
        elif kind == "missing_field" and rows:
            r = rows[draw(st.integers(0, len(rows) - 1))]
            if r:
                r.pop()
    must_refuse = bool(required - set(header)) or not rows
    newline = draw(st.sampled_from(["\n", "\r\n"]))
    text = newline.join(",".join(r) for r in [header, *rows]) + newline
    data = _encode(text, draw(st.sampled_from(ENCODINGS)))
    corruption = draw(st.sampled_from(["none", "none", "bytes", "truncate", "huge_field", "empty"]))
    if corruption == "bytes":
        pos = draw(st.integers(0, len(data)))
        data = data[:pos] + draw(st.binary(min_size=1, max_size=8)) + data[pos:]
    elif corruption == "truncate":
        data = data[: draw(st.integers(0, len(data)))]
    elif corruption == "huge_field":  # past the csv module's field limit (131072 characters)
        data = data + b'"' + b"x" * 140_000 + b'"\n'
    elif corruption == "empty":
        data, must_refuse = b"", True
    return data, must_refuse


# --- manifests ---------------------------------------------------------------------------


def _toml_string(text: str) -> str:
    out = []
    for ch in text:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return {"nan": "nan", "inf": "inf", "-inf": "-inf"}.get(repr(value), repr(value))
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, datetime | date):
        return value.isoformat()
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_string(k)} = {_toml_value(v)}" for k, v in value.items()) + "}"
    raise TypeError(value)


def toml_text(doc: dict) -> str:
    """TOML for a document of tables (and top-level values where a table was replaced)."""
    lines = [f"{_toml_string(k)} = {_toml_value(v)}" for k, v in doc.items() if not isinstance(v, dict)]
    for table, body in doc.items():
        if isinstance(body, dict):
            lines.append(f"[{_toml_string(table)}]")
            lines += [f"{_toml_string(k)} = {_toml_value(v)}" for k, v in body.items()]
    return "\n".join(lines) + "\n"


TOML_VALUES = st.one_of(
    st.integers(min_value=-(10**30), max_value=10**30),
    st.floats(),
    TEXT,
    st.booleans(),
    st.lists(st.integers(-5, 5), max_size=3),
    st.dates(),
    st.datetimes(),
    st.dictionaries(st.sampled_from(["a", "b"]), st.integers(), max_size=2),
    st.sampled_from(
        [
            170.0,
            -170.0,
            0,
            -1,
            1e308,
            -1e308,
            2500,
            1e-9,
            "%Y",
            "%Y%Y%m%d",
            "%",
            "%q",
            "%Y%m%dT%H%M%SZ%z",
            "a**b",
            "/abs/*",
            "../*",
            "**/*.wav",
            "\x00",
            "",
            "*.flac",
            "hyd.csv",
            ".",
        ]
    ),
)
KEYS = {
    "deployment": ["name", "audio_dir", "glob", "timestamp_format", "channel"],
    "site": ["latitude", "longitude", "depth_m", "temperature_c", "salinity_psu", "ph"],
    "calibration": [
        "full_scale_volts",
        "preamp_gain_db",
        "preamp_gain_csv",
        "hydrophone_sensitivity_db",
        "hydrophone_sensitivity_csv",
    ],
}


def base_manifest(audio: Path) -> dict:
    return {
        "deployment": {
            "name": "fuzz-site",
            "audio_dir": str(audio),
            "glob": "*.wav",
            "timestamp_format": "%Y%m%dT%H%M%SZ",
            "channel": 0,
        },
        "site": {"depth_m": 40.0, "temperature_c": 10.0},
        "calibration": {"full_scale_volts": 2.5, "preamp_gain_db": 40.0, "hydrophone_sensitivity_db": -170.0},
    }


@st.composite
def manifest_variants(draw, audio: Path) -> bytes:
    doc = base_manifest(audio)
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(["set", "set", "set", "drop", "drop_table", "unknown", "not_a_table"]))
        table = draw(st.sampled_from(sorted(KEYS)))
        if kind == "set" and isinstance(doc.get(table), dict):
            doc[table][draw(st.sampled_from(KEYS[table]))] = draw(TOML_VALUES)
        elif kind == "drop" and isinstance(doc.get(table), dict) and doc[table]:
            doc[table].pop(draw(st.sampled_from(sorted(doc[table]))))
        elif kind == "drop_table":
            doc.pop(table, None)
        elif kind == "unknown":
            where = doc if draw(st.booleans()) else doc.setdefault(table, {})
            if isinstance(where, dict):
                where[draw(TEXT.filter(bool))] = {} if where is doc else draw(TOML_VALUES)
        elif kind == "not_a_table":
            doc[table] = draw(TOML_VALUES.filter(lambda v: not isinstance(v, dict)))
    data = _encode(toml_text(doc), draw(st.sampled_from(ENCODINGS)))
    corruption = draw(st.sampled_from(["none", "none", "bytes", "truncate"]))
    if corruption == "bytes":
        pos = draw(st.integers(0, len(data)))
        data = data[:pos] + draw(st.binary(min_size=1, max_size=8)) + data[pos:]
    elif corruption == "truncate":
        data = data[: draw(st.integers(0, len(data)))]
    return data


@FUZZ
@given(data=st.data())
def test_any_manifest_is_answered_in_one_line(audio, data):
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "hyd.csv").write_text("frequency_hz,sensitivity_db\n10,-172\n1000,-171\n")
        manifest = folder / "manifest.toml"
        manifest.write_bytes(data.draw(manifest_variants(audio)))
        for extra in ([], ["--json"]):
            assert_answered(*run_cli(["calibrate", str(manifest), *extra], folder, audio))


def test_the_unmutated_manifest_is_accepted(audio):
    # The fuzzer's starting point must be valid, or every example would test only refusals.
    with tempfile.TemporaryDirectory() as tmp:
        manifest = Path(tmp) / "manifest.toml"
        manifest.write_text(toml_text(base_manifest(audio)))
        code, out, err = run_cli(["calibrate", str(manifest), "--json"], Path(tmp), audio)
        assert code == 0 and err == "" and '"files": 2' in out


# --- calibration tables ---------------------------------------------------------------

CAL_HEADER = {"hydrophone": ["frequency_hz", "sensitivity_db"], "preamp": ["frequency_hz", "gain_db"]}
CAL_ROWS = {
    "hydrophone": [["10", "-178"], ["50", "-172"], ["200", "-170"], ["1000", "-170.5"]],
    "preamp": [["5", "20"], ["100", "30"], ["1000", "30"]],
}


@FUZZ
@given(data=st.data(), which=st.sampled_from(sorted(CAL_HEADER)))
def test_any_calibration_table_is_answered_in_one_line(audio, data, which):
    table, must_refuse = data.draw(csv_variants(CAL_HEADER[which], CAL_ROWS[which], set(CAL_HEADER[which])))
    doc = base_manifest(audio)
    cal = doc["calibration"]
    if which == "hydrophone":
        del cal["hydrophone_sensitivity_db"]
        cal["hydrophone_sensitivity_csv"] = "table.csv"
    else:
        del cal["preamp_gain_db"]
        cal["preamp_gain_csv"] = "table.csv"
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "table.csv").write_bytes(table)
        (folder / "manifest.toml").write_text(toml_text(doc))
        code, out, err = run_cli(["calibrate", str(folder / "manifest.toml")], folder, audio)
        assert_answered(code, out, err)
        if must_refuse:  # no column, no rows or no bytes: nothing to calibrate with
            assert code == 2 and "table.csv" in err


def test_the_unmutated_calibration_tables_are_accepted(audio):
    for which in CAL_HEADER:
        with tempfile.TemporaryDirectory() as tmp:
            folder = Path(tmp)
            text = "\n".join(",".join(r) for r in [CAL_HEADER[which], *CAL_ROWS[which]]) + "\n"
            (folder / "table.csv").write_text(text)
            doc = base_manifest(audio)
            key = "hydrophone_sensitivity" if which == "hydrophone" else "preamp_gain"
            del doc["calibration"][f"{key}_db"]
            doc["calibration"][f"{key}_csv"] = "table.csv"
            (folder / "manifest.toml").write_text(toml_text(doc))
            assert run_cli(["calibrate", str(folder / "manifest.toml")], folder, audio)[0] == 0


# --- label tables -----------------------------------------------------------------------

LABEL_HEADER = ["file", "start_s", "end_s", "label", "low_hz", "high_hz"]
LABEL_ROWS = [
    [FILES[0], "1.0", "2.5", "up", "80", "160"],
    [FILES[0], "4.0", "5.0", "down", "70", "150"],
    [FILES[1], "0.5", "1.5", "up", "80", "160"],
    [FILES[1], "6.0", "9.5", "down", "", ""],
]


@pytest.fixture(scope="module")
def label_site(audio, tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("fuzz-labels")
    (folder / "manifest.toml").write_text(toml_text(base_manifest(audio)))
    return folder / "manifest.toml"


def _train_argv(manifest: Path, labels: Path, out: Path) -> list[str]:
    return ["train", "--deployment", str(manifest), "--labels", str(labels), "--out", str(out / "m.skops"), "--quiet"]


@pytest.fixture
def parse_only(monkeypatch):
    """`train` that stops after reading the tables: its model fit says the table was accepted."""
    import callsieve.classifier.training as training

    def accepted(*args, **kwargs):
        raise InputError(PARSED)

    monkeypatch.setattr(training, "train_model", accepted)


@FUZZ
@given(data=st.data())
def test_any_label_table_is_answered_in_one_line(audio, label_site, parse_only, data):
    table, must_refuse = data.draw(csv_variants(LABEL_HEADER, LABEL_ROWS, {"file", "start_s", "end_s", "label"}))
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "labels.csv").write_bytes(table)
        (folder / "out").mkdir()
        code, out, err = run_cli(_train_argv(label_site, folder / "labels.csv", folder / "out"), folder, audio)
        assert_answered(code, out, err)
        assert code == 2  # refused, or accepted and stopped by the stub
        if must_refuse:
            assert PARSED not in err and "labels.csv" in err


def test_the_unmutated_label_table_is_accepted(audio, label_site, parse_only, tmp_path):
    text = "\n".join(",".join(r) for r in [LABEL_HEADER, *LABEL_ROWS]) + "\n"
    (tmp_path / "labels.csv").write_text(text)
    (tmp_path / "out").mkdir()
    code, _, err = run_cli(_train_argv(label_site, tmp_path / "labels.csv", tmp_path / "out"), tmp_path, audio)
    assert code == 2 and PARSED in err


# --- failures the fuzzing found, kept as plain cases ------------------------------------


@pytest.mark.parametrize(
    "mutate,expected",
    [
        # tomllib reads UTF-8 only: a manifest saved as UTF-16 raised UnicodeDecodeError (exit 1).
        (lambda doc: _encode(toml_text(doc), "utf-16"), "not UTF-8"),
        # TOML integers have no size limit in tomllib: float(10**30 ...) overflowed (exit 1).
        (lambda doc: toml_text(doc).replace("2.5", "1" + "0" * 400).encode(), "full_scale_volts"),
        # A directive given twice made strptime raise re.error on every name the pattern's
        # digits matched (exit 1).
        (lambda doc: toml_text(doc).replace("%Y%m%dT%H%M%SZ", "%Y%Y").encode(), "directive twice"),
        # An absolute glob: pathlib raises NotImplementedError (exit 1).
        (lambda doc: toml_text(doc).replace('"*.wav"', '"/abs/*.wav"').encode(), "glob"),
        # A key holding a carriage return was echoed raw: two lines on a terminal.
        (lambda doc: (toml_text(doc) + '"\\u000D" = 0\n').encode(), "\\r: unknown field"),
        # An invalid '**': pathlib raises ValueError (exit 1).
        (lambda doc: toml_text(doc).replace('"*.wav"', '"a**b.wav"').encode(), "glob"),
    ],
)
def test_manifest_failures_found_by_fuzzing_are_refused(audio, tmp_path, mutate, expected):
    manifest = tmp_path / "manifest.toml"
    manifest.write_bytes(mutate(base_manifest(audio)))
    code, out, err = run_cli(["calibrate", str(manifest)], tmp_path, audio)
    assert_answered(code, out, err)
    assert code == 2 and expected in err


def test_a_glob_reaching_outside_audio_dir_is_refused(audio, tmp_path):
    # '../audio/*.wav' was accepted, listing files as '../audio/...': names outside the
    # folder the manifest says holds the sound (found while fuzzing; not a crash).
    doc = base_manifest(audio)
    doc["deployment"]["glob"] = "../audio/*.wav"
    (tmp_path / "manifest.toml").write_text(toml_text(doc))
    code, out, err = run_cli(["calibrate", str(tmp_path / "manifest.toml")], tmp_path, audio)
    assert code == 2 and "outside audio_dir" in err


@pytest.mark.parametrize(
    "data,expected",
    [
        # A header and no rows was refused as "found: nothing" (wrong reason).
        (b"frequency_hz,sensitivity_db\n", "holds no rows"),
        # A column name holding a record separator (\x1e, a line break to str.splitlines)
        # was echoed raw.
        (b"\x1e,sensitivity_db\n10,-170\n", "found: \\x1e,sensitivity_db"),
        # Latin-1 bytes raised UnicodeDecodeError (exit 1).
        ("frequency_hz,sensitivity_db,note\n10,-170,caf\u00e9\n".encode("latin-1"), "not UTF-8"),
        # A field past the csv module's limit raised csv.Error (exit 1).
        (b'frequency_hz,sensitivity_db\n10,"' + b"x" * 140_000 + b'"\n', "not a readable CSV"),
    ],
)
def test_calibration_table_failures_found_by_fuzzing_are_refused(audio, tmp_path, data, expected):
    (tmp_path / "hyd.csv").write_bytes(data)
    doc = base_manifest(audio)
    del doc["calibration"]["hydrophone_sensitivity_db"]
    doc["calibration"]["hydrophone_sensitivity_csv"] = "hyd.csv"
    (tmp_path / "manifest.toml").write_text(toml_text(doc))
    code, out, err = run_cli(["calibrate", str(tmp_path / "manifest.toml")], tmp_path, audio)
    assert_answered(code, out, err)
    assert code == 2 and expected in err and "hyd.csv" in err


def _labels(rows: list[list[str]]) -> str:
    return "\n".join(",".join(r) for r in [LABEL_HEADER, *rows]) + "\n"


@pytest.mark.parametrize(
    "data,expected",
    [
        # UTF-16 (a spreadsheet's "Unicode text") raised UnicodeDecodeError (exit 1).
        (_labels(LABEL_ROWS).encode("utf-16"), "not UTF-8"),
        # A field past the csv module's limit raised csv.Error (exit 1).
        (_labels(LABEL_ROWS).encode() + b'"' + b"x" * 140_000 + b'"\n', "not readable as CSV"),
        # The same call twice was accepted, and counted twice.
        (_labels([*LABEL_ROWS, LABEL_ROWS[1]]).encode(), "row 6: repeats row 3"),
        # A negative band edge was accepted.
        (_labels([[FILES[0], "1", "2", "up", "-80", "160"]]).encode(), "low_hz -80 is below 0 Hz"),
    ],
)
def test_label_table_failures_found_by_fuzzing_are_refused(audio, label_site, parse_only, tmp_path, data, expected):
    (tmp_path / "labels.csv").write_bytes(data)
    (tmp_path / "out").mkdir()
    code, out, err = run_cli(_train_argv(label_site, tmp_path / "labels.csv", tmp_path / "out"), tmp_path, audio)
    assert_answered(code, out, err)
    assert code == 2 and expected in err and PARSED not in err


def test_broken_files_through_the_console_command(audio, tmp_path):
    # The real entry point, as a user's shell runs it: exit 2, one line, no traceback.
    manifest = tmp_path / "manifest.toml"
    manifest.write_bytes(_encode(toml_text(base_manifest(audio)), "utf-16"))
    labels = tmp_path / "labels.csv"
    labels.write_bytes(_labels(LABEL_ROWS).encode("latin-1") + b"\xff\xfe\n")
    good = tmp_path / "good.toml"
    good.write_text(toml_text(base_manifest(audio)))
    before = _snapshot(tmp_path)
    for argv in (
        ["calibrate", str(manifest)],
        ["train", "--deployment", str(good), "--labels", str(labels), "--out", str(tmp_path / "m.skops")],
    ):
        run = subprocess.run(
            [sys.executable, "-m", "callsieve.classifier.cli", *argv],
            capture_output=True,
            text=True,
            timeout=120,
            cwd=tmp_path,
        )
        assert run.returncode == 2 and run.stdout == ""
        assert run.stderr.count("\n") == 1 and run.stderr.startswith("callsieve: error: ")
        assert "not UTF-8" in run.stderr
    assert _snapshot(tmp_path) == before


def test_random_printable_text_as_any_input(audio, tmp_path):
    # Not a CSV or TOML at all: a line of printable characters (the smallest such file).
    junk = tmp_path / "junk.txt"
    junk.write_text(string.printable)
    code, out, err = run_cli(["calibrate", str(junk)], tmp_path, audio)
    assert_answered(code, out, err)
    assert code == 2
