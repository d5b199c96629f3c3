"""`callsieve review import` and `review export`: verdict tables in and out of the store.

The rules pinned here are those of docs/review.md ("Verdict tables"): every row checked
before anything is written, one transaction, a later verdict of the same reviewer replaces
the earlier one, verdicts of different reviewers are all kept, verdicts on superseded
detections stay and are reported.
"""

from __future__ import annotations

import csv
import hashlib
from pathlib import Path

import pytest
from callsieve.classifier.cli import main
from callsieve.classifier.errors import InputError
from callsieve.classifier.review import VERDICT_EXPORT_COLUMNS, import_verdicts, parse_verdicts
from callsieve.classifier.store import open_store
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_review_sample import draw_sample, make_store, rows


@pytest.fixture
def store(tmp_path: Path) -> Path:
    db, _ = make_store(tmp_path, n_det=20, files=2)
    return db


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def verdicts(db: Path) -> list[tuple]:
    return [tuple(r) for r in rows(db, "SELECT detection_id, reviewer, verdict, note FROM verdicts ORDER BY 1, 2")]


def digest(db: Path) -> str:
    """What the verdict table holds, times included."""
    got = rows(db, "SELECT detection_id, reviewer, verdict, note, recorded_utc FROM verdicts ORDER BY 1, 2")
    return hashlib.sha256(repr([tuple(r) for r in got]).encode()).hexdigest()


def test_import_then_export_round_trip(store, tmp_path, capsys):
    src = write(
        tmp_path / "v.csv", "detection_id,verdict,reviewer,note\n1,yes,ana,clear upsweep\n2,no,ana,\n3,unsure,bo,\n"
    )
    assert main(["review", "import", str(store), str(src)]) == 0
    assert "3 new verdicts" in capsys.readouterr().out
    out = tmp_path / "export.csv"
    assert main(["review", "export", str(store), "--out", str(out)]) == 0
    with open(out, newline="") as fh:
        table = list(csv.DictReader(fh))
    assert list(table[0]) == VERDICT_EXPORT_COLUMNS
    assert [(r["detection_id"], r["verdict"], r["reviewer"], r["note"]) for r in table] == [
        ("1", "yes", "ana", "clear upsweep"),
        ("2", "no", "ana", ""),
        ("3", "unsure", "bo", ""),
    ]
    assert all(r["recorded_utc"].endswith("Z") for r in table)
    # The export imports into the same store as a no-op (its times are the store's own).
    before = digest(store)
    r = import_verdicts(store, out)
    assert (r["inserted"], r["replaced"], r["unchanged"]) == (0, 0, 3) and digest(store) == before
    # Into a fresh copy of the store without verdicts, it gives the same verdicts, same times.
    other_dir = tmp_path / "other"
    other_dir.mkdir()
    db2, _ = make_store(other_dir, n_det=20, files=2)
    import_verdicts(db2, out)
    assert digest(db2) == before


def test_export_carries_the_sample_and_stratum(store, tmp_path):
    s = draw_sample(store, tmp_path / "s", n=40, bins=2, render=False)
    det = rows(store, "SELECT detection_id, stratum, inclusion_probability FROM review_items LIMIT 1")[0]
    import_verdicts(store, write(tmp_path / "v.csv", f"detection_id,verdict,reviewer\n{det[0]},yes,ana\n"))
    out = tmp_path / "e.csv"
    assert main(["review", "export", str(store), "--out", str(out)]) == 0
    row = next(csv.DictReader(open(out, newline="")))
    assert (row["sample_id"], row["stratum"]) == (str(s["sample_id"]), str(det[1]))
    assert float(row["inclusion_probability"]) == pytest.approx(det[2])


def test_later_verdict_of_the_same_reviewer_replaces_and_other_reviewers_are_kept(store, tmp_path, capsys):
    import_verdicts(store, write(tmp_path / "a.csv", "detection_id,verdict,reviewer\n1,yes,ana\n1,no,bo\n"))
    r = import_verdicts(store, write(tmp_path / "b.csv", "detection_id,verdict,reviewer,note\n1,no,ana,second look\n"))
    assert r["replaced"] == 1 and r["inserted"] == 0
    # SPEC/docs: one verdict per reviewer and detection, the later one; other reviewers kept.
    assert verdicts(store) == [(1, "ana", "no", "second look"), (1, "bo", "no", None)]
    # Within one file, the last row of a reviewer on a detection counts.
    r = import_verdicts(
        store, write(tmp_path / "c.csv", "detection_id,verdict,reviewer\n2,yes,cy\n2,unsure,cy\n2,no,cy\n")
    )
    assert r["duplicates"] == 2 and ("cy", "no") in [(v[1], v[2]) for v in verdicts(store) if v[0] == 2]


def test_an_older_exported_verdict_does_not_replace_a_newer_one(store, tmp_path):
    import_verdicts(store, write(tmp_path / "a.csv", "detection_id,verdict,reviewer\n1,yes,ana\n"))
    old = write(tmp_path / "old.csv", "detection_id,verdict,reviewer,recorded_utc\n1,no,ana,2020-01-01T00:00:00Z\n")
    r = import_verdicts(store, old)
    assert r["older"] == 1 and verdicts(store) == [(1, "ana", "yes", None)]


def test_import_is_idempotent(store, tmp_path):
    src = write(tmp_path / "v.csv", "detection_id,verdict,reviewer,note\n1,yes,ana,x\n4,no,bo,\n")
    import_verdicts(store, src)
    first = digest(store)
    r = import_verdicts(store, src)
    assert r["unchanged"] == 2 and digest(store) == first


@pytest.mark.parametrize(
    "text, message",
    [
        ("detection_id,verdict\n1,yes\n", "lacks reviewer"),
        ("detection_id,verdict,reviewer\n1,yes,ana\n2,maybe,ana\n", "line 3: verdict 'maybe'"),
        ("detection_id,verdict,reviewer\n1,yes,ana\n999,no,ana\n", "line 3: detection_id 999 is not in"),
        ("detection_id,verdict,reviewer\n1,yes,  \n", "line 2: reviewer is empty"),
        ("detection_id,verdict,reviewer\nx1,yes,ana\n", "line 2: detection_id 'x1'"),
        ("detection_id,verdict,reviewer\n1,yes\n", "line 2: 2 fields where the header has 3"),
        ("detection_id,verdict,reviewer\n1,no,ana\n2,bad,ana\n3,bad,ana\n", "(1 more bad rows)"),
        ("", "empty"),
        ("detection_id,verdict,reviewer,reviewer\n1,yes,a,b\n", "appears twice"),
        ("detection_id,verdict,reviewer,recorded_utc\n1,yes,ana,yesterday\n", "recorded_utc"),
    ],
)
def test_bad_rows_exit_2_naming_the_line_and_nothing_is_written(store, tmp_path, capsys, text, message):
    import_verdicts(store, write(tmp_path / "first.csv", "detection_id,verdict,reviewer\n5,yes,ana\n"))
    before = digest(store)
    src = write(tmp_path / "v.csv", text)
    assert main(["review", "import", str(store), str(src)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("callsieve: error: ") and err.count("\n") == 1 and message in err
    assert str(src) in err
    assert digest(store) == before  # the good rows before the bad one were not written either


def test_missing_or_unreadable_file_exit_2(store, tmp_path, capsys):
    assert main(["review", "import", str(store), str(tmp_path / "nope.csv")]) == 2
    assert "no such verdict table" in capsys.readouterr().err
    (tmp_path / "latin1.csv").write_bytes("detection_id,verdict,reviewer\n1,yes,Jos\xe9\n".encode("latin-1"))
    assert main(["review", "import", str(store), str(tmp_path / "latin1.csv")]) == 2
    assert "not UTF-8" in capsys.readouterr().err


def test_header_with_bom_and_spaces_and_capital_verdicts_are_read(store, tmp_path):
    # Spreadsheet habits (common practice): a byte-order mark, spaces after commas, "Yes".
    (tmp_path / "v.csv").write_bytes("\ufeffdetection_id, verdict, reviewer\n1, Yes, ana\n".encode())
    import_verdicts(store, tmp_path / "v.csv")
    assert verdicts(store) == [(1, "ana", "yes", None)]


def test_verdicts_on_superseded_detections_are_kept_and_reported(store, tmp_path, capsys):
    src = write(tmp_path / "v.csv", "detection_id,verdict,reviewer\n1,yes,ana\n2,no,ana\n")
    import_verdicts(store, src)
    # A rescoring supersedes verified detections (store.replace_file_result keeps them).
    con = open_store(store, create=False)
    con.execute("UPDATE detections SET superseded=1 WHERE detection_id IN (1, 2)")
    con.close()
    later = write(tmp_path / "w.csv", "detection_id,verdict,reviewer\n1,unsure,bo\n")
    assert main(["review", "import", str(store), str(later)]) == 0
    assert "1 verdicts are on detections that a rescoring superseded; they are kept" in capsys.readouterr().out
    assert len(verdicts(store)) == 3
    out = tmp_path / "e.csv"
    assert main(["review", "export", str(store), "--out", str(out)]) == 0
    assert "3 on detections a rescoring superseded" in capsys.readouterr().out
    assert {r["superseded"] for r in csv.DictReader(open(out, newline=""))} == {"1"}


def test_export_refuses_to_overwrite_a_foreign_file(store, tmp_path, capsys):
    mine = write(tmp_path / "notes.csv", "my,own,table\n")
    assert main(["review", "export", str(store), "--out", str(mine)]) == 2
    assert "did not write" in capsys.readouterr().err and mine.read_text() == "my,own,table\n"
    assert main(["review", "export", str(store), "--out", str(store)]) == 2  # never over the store
    out = tmp_path / "e.csv"
    assert main(["review", "export", str(store), "--out", str(out)]) == 0
    assert main(["review", "export", str(store), "--out", str(out)]) == 0  # an earlier export: replaced


# --- property-based: the parser never crashes, never half-writes ------------------------------

_cell = st.text(alphabet=st.characters(codec="utf-8", exclude_categories=("Cs", "Cc", "Zl", "Zp")), max_size=12)
_bad_verdict = st.text(max_size=8).filter(lambda s: s.strip().lower() not in ("yes", "no", "unsure"))


@st.composite
def bad_tables(draw) -> str:
    """A verdict table with at least one row that must be refused (and maybe good rows)."""
    good = draw(st.lists(st.tuples(st.integers(1, 20), st.sampled_from(["yes", "no", "unsure"])), max_size=4))
    lines = ["detection_id,verdict,reviewer,note"] + [f"{i},{v},ana,ok" for i, v in good]
    kind = draw(st.sampled_from(["verdict", "reviewer", "id", "fields", "unknown", "header"]))
    if kind == "verdict":
        bad = f'1,"{draw(_bad_verdict).replace(chr(34), "")}",ana,'
    elif kind == "reviewer":
        bad = f"1,yes,{draw(st.sampled_from(['', '   ', chr(9)]))},"
    elif kind == "id":
        raw = draw(st.text(max_size=6).filter(lambda s: not (s.strip().isascii() and s.strip().isdigit())))
        bad = f'"{raw.replace(chr(34), "")}",yes,ana,'
    elif kind == "fields":
        cells = draw(st.lists(_cell.map(lambda s: s.replace(",", "").replace('"', "")), min_size=1, max_size=2))
        bad = ",".join(cells) if any(c.strip() for c in cells) else "1"
    elif kind == "unknown":
        bad = f"{draw(st.integers(21, 10**12))},no,ana,"
    else:
        lines[0] = draw(st.sampled_from(["detection_id,verdict", "id,verdict,reviewer", "verdict,reviewer,note"]))
        bad = "1,yes,ana"
    pos = draw(st.integers(1, len(lines)))
    lines.insert(pos, bad)
    return "\n".join(lines) + "\n"


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=bad_tables())
def test_every_bad_table_exits_2_with_one_line_and_writes_nothing(store, tmp_path, capsys, text):
    before = digest(store)
    src = write(tmp_path / "h.csv", text)
    assert main(["review", "import", str(store), str(src)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("callsieve: error: ") and err.count("\n") == 1 and "Traceback" not in err
    assert digest(store) == before


@settings(max_examples=150, deadline=None)
@given(data=st.binary(max_size=200) | st.text(max_size=200).map(lambda s: s.encode("utf-8", "surrogatepass")))
def test_the_parser_takes_any_bytes_without_a_traceback(data):
    # Any input is either a table of checked rows or an InputError: never another exception.
    try:
        got = parse_verdicts(data, "x.csv")
    except InputError as exc:
        assert "\n" not in str(exc)
        return
    for r in got:
        assert r.verdict in ("yes", "no", "unsure") and r.reviewer and r.detection_id >= 0
