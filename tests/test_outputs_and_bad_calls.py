"""Nothing a user wrote is overwritten, and a wrong call is one line with exit 2."""

from __future__ import annotations

import hashlib
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from callsieve.classifier.cli import main

ROOT = Path(__file__).resolve().parent.parent


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _one_line_error(capsys, *needles: str) -> str:
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.startswith("callsieve: error:")]
    assert len(lines) == 1 and "Traceback" not in err, err
    for n in needles:
        assert n in lines[0], lines[0]
    return lines[0]


@pytest.fixture
def store(reference, tmp_path):
    db, _ = reference
    copy = tmp_path / "store.db"
    shutil.copy(db, copy)
    return copy


def test_export_onto_its_own_store_is_refused(store, capsys):
    before = _digest(store)
    assert main(["export", str(store), "--out", str(store)]) == 2
    _one_line_error(capsys, "is also an input")
    assert _digest(store) == before


def test_export_never_replaces_a_store_a_model_or_a_user_table(store, sweep_model, labelled, tmp_path, capsys):
    other_store = tmp_path / "other.csv"
    shutil.copy(store, other_store)  # a store under a .csv name: still a store
    model_copy = tmp_path / "model.csv"
    shutil.copy(sweep_model, model_copy)
    _, labels, _ = labelled
    table = tmp_path / "labels.csv"
    shutil.copy(labels, table)
    for target, kind in ((other_store, "detection store"), (model_copy, "model file"), (table, "did not write")):
        before = _digest(target)
        assert main(["export", str(store), "--out", str(target)]) == 2
        _one_line_error(capsys, kind, "--force")
        assert _digest(target) == before
    # --force replaces the user's table, and an earlier export is replaced without it.
    assert main(["export", str(store), "--out", str(table), "--force"]) == 0
    assert table.read_text().startswith("detection_id,")
    assert main(["export", str(store), "--out", str(table)]) == 0


def test_export_refuses_a_format_it_cannot_write(store, tmp_path, capsys):
    assert main(["export", str(store), "--out", str(tmp_path / "x.xlsx")]) == 2
    _one_line_error(capsys, ".csv or .parquet")
    assert not (tmp_path / "x.xlsx").exists()


def test_an_empty_file_is_not_taken_for_a_store(tmp_path, capsys):
    empty = tmp_path / "empty.db"
    empty.write_bytes(b"")
    assert main(["export", str(empty), "--out", str(tmp_path / "d.csv")]) == 2
    _one_line_error(capsys, "empty file")
    assert empty.stat().st_size == 0


def test_a_store_in_a_missing_folder_says_so(tmp_path, capsys):
    assert main(["export", str(tmp_path / "nowhere" / "s.db"), "--out", str(tmp_path / "d.csv")]) == 2
    _one_line_error(capsys, "does not exist")


def test_train_never_replaces_a_store(labelled, store, capsys):
    manifest, labels, config = labelled
    before = _digest(store)
    args = ["train", "--deployment", str(manifest), "--labels", str(labels), "--config", str(config)]
    assert main([*args, "--out", str(store)]) == 2
    _one_line_error(capsys, "detection store", "--force")
    assert _digest(store) == before
    assert main([*args, "--out", str(labels)]) == 2
    _one_line_error(capsys, "is also an input")


def test_export_of_a_class_the_run_does_not_have_says_so(store, tmp_path, capsys):
    assert main(["export", str(store), "--out", str(tmp_path / "d.csv"), "--label", "sideways"]) == 2
    _one_line_error(capsys, "sideways", "up")


@pytest.mark.parametrize("hours", ["nan", "inf", "-1"])
def test_demo_refuses_hours_that_are_not_a_span(tmp_path, capsys, hours):
    assert main(["demo", str(tmp_path / "d"), "--hours", hours, "--no-run"]) == 2
    _one_line_error(capsys, "--hours")


def test_demo_into_a_file_is_refused(tmp_path, capsys):
    f = tmp_path / "notes.txt"
    f.write_text("mine\n")
    assert main(["demo", str(f), "--no-run"]) == 2
    _one_line_error(capsys, "is a file")
    assert f.read_text() == "mine\n"


def test_json_into_a_closed_pipe_is_quiet():
    # `callsieve calibrate --json | head -c 20`: the reader stops early; no traceback.
    cmd = f"{sys.executable} -m callsieve.classifier.cli calibrate --json configs/example/manifest.toml | head -c 20"
    done = subprocess.run(["bash", "-c", cmd], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert done.stdout.startswith("{")
    assert "Traceback" not in done.stderr and "BrokenPipe" not in done.stderr, done.stderr


def test_nan_samples_are_reported_and_lose_no_call_elsewhere(labelled, sweep_model, tmp_path, capsys):
    # 5 NaN samples at 50 s of a float file: counted and reported for that file, scored as
    # zeros, and every detection away from them (beyond a window and the peak-picking's
    # context of windows, 10 s here) is the one the clean file gives. Before, the NaN
    # spread through the minute-long noise floor and removed the calls from 21 s to 77 s.
    import sqlite3

    import soundfile as sf
    from conftest import write_manifest

    manifest, _, _ = labelled
    src = sorted((manifest.parent / "audio").glob("*.wav"))[0]
    x, fs = sf.read(src, dtype="float32")
    sites = {}
    for name, bad in (("clean", False), ("nan", True)):
        site = tmp_path / name
        (site / "audio").mkdir(parents=True)
        write_manifest(site, name=f"{name}-site")
        y = x.copy()
        if bad:
            y[50 * fs : 50 * fs + 5] = np.nan
        sf.write(site / "audio" / src.name, y, fs, subtype="FLOAT")
        db = tmp_path / f"{name}.db"
        assert main(["score", str(sweep_model), "--deployment", str(site / "manifest.toml"), "--db", str(db)]) == 0
        sites[name] = db
    out = capsys.readouterr().out
    assert "warning:" in out and "5 samples are not numbers" in out
    rows = {}
    for name, db in sites.items():
        with sqlite3.connect(db) as con:
            (count,) = con.execute("SELECT nonfinite_samples FROM run_files").fetchone()
            assert count == (5 if name == "nan" else 0)
            rows[name] = [
                r
                for r in con.execute("SELECT start_s, end_s, label, confidence FROM detections ORDER BY start_s")
                if abs(r[0] - 50.0) > 10.0
            ]
    assert len(rows["clean"]) > 10
    assert rows["nan"] == rows["clean"]
