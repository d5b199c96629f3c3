"""Faults of a long archive and a shared store: nothing lost, nothing doubled, nothing silent.

Each test names the fault it provokes and the behaviour the README's fault table promises.
Most reuse conftest.py's labelled sweep site (six 4-minute files, 25 calls each) and its model.
"""

from __future__ import annotations

import csv
import json
import shutil
import sqlite3
from pathlib import Path

import pytest
from callsieve.classifier.cli import main
from callsieve.classifier.scoring import score_deployment


@pytest.fixture(autouse=True)
def _no_mlflow(monkeypatch, tmp_path):
    # evaluate looks for ./mlflow.db; keep every test away from the working folder's.
    monkeypatch.chdir(tmp_path)


def _site(labelled, folder: Path, names: list[str] | None = None, rename: dict | None = None) -> Path:
    """A copy of the labelled site (all files, or ``names``) under ``folder``; returns its manifest."""
    manifest = labelled[0]
    (folder / "audio").mkdir(parents=True)
    shutil.copy2(manifest, folder / "manifest.toml")
    for p in sorted((manifest.parent / "audio").iterdir()):
        if names is None or p.name in names:
            shutil.copy2(p, folder / "audio" / (rename or {}).get(p.name, p.name))
    return folder / "manifest.toml"


def _audio_names(labelled) -> list[str]:
    return sorted(p.name for p in (labelled[0].parent / "audio").iterdir())


def _rows(db: Path, sql: str, *args) -> list[tuple]:
    con = sqlite3.connect(db)
    try:
        return con.execute(sql, args).fetchall()
    finally:
        con.close()


# --- evaluation with a file deleted after scoring (README "Evaluation") ---


def test_evaluate_leaves_out_a_file_deleted_after_scoring_and_says_so(labelled, sweep_model, tmp_path, capsys):
    """README: a truth file that cannot be read now is reported and left out whole."""
    names = _audio_names(labelled)[:3]
    manifest = _site(labelled, tmp_path / "site", names)
    db = tmp_path / "store.db"
    score_deployment(sweep_model, manifest, db)
    (manifest.parent / "audio" / names[1]).unlink()
    truth = tmp_path / "truth.csv"
    with open(labelled[1]) as fh, open(truth, "w", newline="") as out:
        rows = [r for r in csv.DictReader(fh) if r["file"] in names]
        w = csv.DictWriter(out, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    assert main(["evaluate", str(db), "--truth", str(truth), "--out", str(tmp_path / "e")]) == 0
    assert names[1] in capsys.readouterr().err
    m = json.loads((tmp_path / "e" / "metrics.json").read_text())
    assert m["files_judged"] == 2
    assert sum(c["truth_calls"] for c in m["classes"].values()) == 50  # conftest: 25 calls per file


# --- the same deployment name for another deployment (issue: identity is name and files) ---


def test_a_second_deployment_reusing_a_name_is_refused_naming_both_manifests(labelled, sweep_model, tmp_path, capsys):
    """Two manifests named alike with no file in common are two deployments: refused, exit 2,
    the store unchanged; the same deployment moved elsewhere with its audio carries on."""
    names = _audio_names(labelled)
    first = _site(labelled, tmp_path / "spring", names[:2])
    other = _site(labelled, tmp_path / "autumn", names[2:4])
    db = tmp_path / "store.db"
    assert main(["score", str(sweep_model), "--deployment", str(first), "--db", str(db), "--quiet"]) == 0
    before = _rows(db, "SELECT COUNT(*) FROM detections")[0][0]
    code = main(["score", str(sweep_model), "--deployment", str(other), "--db", str(db), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert str(other) in err[0] and str(first) in err[0] and "its own name" in err[0]
    assert _rows(db, "SELECT COUNT(*) FROM detections")[0][0] == before
    assert _rows(db, "SELECT COUNT(*) FROM files") == [(2,)]
    # The first deployment's folder moved: the same files, so the same deployment and run.
    moved = tmp_path / "moved"
    shutil.copytree(first.parent, moved)
    summary = score_deployment(sweep_model, moved / "manifest.toml", db)
    assert summary["skipped"] == 2 and summary["files"] == 0
    assert _rows(db, "SELECT manifest FROM deployments") == [(str((moved / "manifest.toml").resolve()),)]


# --- copied audio and overlapping spans (docs/formats.md §1, "Copies and overlaps") ---


def test_a_copied_file_is_set_aside_and_detections_are_not_doubled(labelled, sweep_model, reference, tmp_path):
    """A copy under another name (another start time) is the same sound: one is kept."""
    names = _audio_names(labelled)[:2]
    manifest = _site(labelled, tmp_path / "site", names)
    copy = "unit_20320105T050000Z.wav"  # five hours later by its name, same bytes
    shutil.copy2(manifest.parent / "audio" / names[0], manifest.parent / "audio" / copy)
    db = tmp_path / "store.db"
    summary = score_deployment(sweep_model, manifest, db)
    assert [f["file"] for f in summary["set_aside"]] == [copy] and summary["failed"] == []
    assert names[0] in summary["set_aside"][0]["error"] and "copy" in summary["set_aside"][0]["error"]
    ref_db = reference[0]
    expected = _rows(
        ref_db,
        "SELECT COUNT(*) FROM detections d JOIN files f USING (file_id) WHERE f.name IN (?, ?)",
        *names,
    )[0][0]
    assert summary["detections"] == expected  # the copy added none


def test_a_file_with_another_files_start_is_set_aside(labelled, sweep_model, tmp_path):
    """Two different files with the same start time: the span is recorded once."""
    names = _audio_names(labelled)
    manifest = _site(labelled, tmp_path / "site", names[:2])
    # Another file's sound under the first file's start time (the name gives the start).
    twin = names[0].replace(".wav", "_b.wav")
    shutil.copy2(labelled[0].parent / "audio" / names[3], manifest.parent / "audio" / twin)
    db = tmp_path / "store.db"
    summary = score_deployment(sweep_model, manifest, db)
    assert [f["file"] for f in summary["set_aside"]] == [twin] and summary["failed"] == []
    assert "lies within" in summary["set_aside"][0]["error"]
    assert _rows(db, "SELECT COUNT(*) FROM detections d JOIN files f USING (file_id) WHERE f.name=?", twin) == [(0,)]


def test_a_partly_overlapping_file_is_kept_without_its_overlap(labelled, sweep_model, reference, tmp_path):
    """A file starting 60 s before the previous one ends: kept, its first 60 s not scored twice."""
    names = _audio_names(labelled)
    # The labelled files are 4-minute files every 10 minutes; name the second to start 3 min
    # after the first, one minute before the first ends.
    early = names[1].replace("T001000Z", "T000300Z")
    assert early != names[1]
    manifest = _site(labelled, tmp_path / "site", names[:2], rename={names[1]: early})
    db = tmp_path / "store.db"
    summary = score_deployment(sweep_model, manifest, db)
    assert summary["failed"] == []
    starts = [
        r[0] for r in _rows(db, "SELECT start_s FROM detections d JOIN files f USING (file_id) WHERE f.name=?", early)
    ]
    assert starts and min(starts) >= 60.0
    # Beyond the overlap the file is scored as usual: the reference run's detections of the
    # same file after 61 s are there (a second of slack for the window grid).
    ref = _rows(
        reference[0],
        "SELECT COUNT(*) FROM detections d JOIN files f USING (file_id) WHERE f.name=? AND start_s >= 61",
        names[1],
    )[0][0]
    assert sum(s >= 61 for s in starts) == ref


# --- two scoring processes on one store (README fault table: "two writers") ---


def test_two_scoring_processes_share_the_files_of_one_store(labelled, sweep_model, reference, tmp_path):
    """Two real `callsieve score` processes at once: every file scored exactly once, by one of
    them, both exit 0, and the store equals an uninterrupted single run's."""
    import os
    import re
    import subprocess
    import sys

    manifest = labelled[0]
    db = tmp_path / "store.db"
    # A pause after each stored file, so that the two processes overlap in time.
    env = os.environ | {"CALLSIEVE_FAULT_SLOW_STORE_S": "1.5"}
    argv = [sys.executable, "-m", "callsieve.classifier.cli", "score", str(sweep_model)]
    argv += ["--deployment", str(manifest), "--db", str(db)]
    procs = []
    try:
        for _ in range(2):
            procs.append(subprocess.Popen(argv, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True))
        outs = [p.communicate(timeout=240) for p in procs]
    finally:
        for p in procs:  # never leave a process behind
            if p.poll() is None:
                p.kill()
                p.wait()
    assert [p.returncode for p in procs] == [0, 0], [o[1][-500:] for o in outs]
    scored = [int(re.search(r"scored (\d+) files", o[0]).group(1)) for o in outs]
    assert sum(scored) == 6 and min(scored) >= 1, scored  # shared, not done twice
    assert _rows(db, "SELECT COUNT(*) FROM run_files WHERE status='done'") == [(6,)]
    assert _rows(db, "SELECT COUNT(*) FROM claims") == [(0,)]
    assert _rows(db, "SELECT status FROM runs") == [("finished",)]
    sql = (
        "SELECT f.name, start_s, end_s, label, confidence FROM detections d JOIN files f USING (file_id) ORDER BY 1, 2"
    )
    assert _rows(db, sql) == _rows(reference[0], sql)


# --- a read-only store and a full disk (README fault table) ---


def _read_only_connect(monkeypatch, db: Path) -> None:
    """Every connection to ``db`` opens read-only, as on a read-only share (tests run as
    root, for whom file permissions do not stop writes)."""
    from callsieve.classifier import store

    real = sqlite3.connect

    def connect(path, *args, **kwargs):
        if Path(path) == db:
            return real(f"file:{db}?mode=ro", *args, uri=True, **kwargs)
        return real(path, *args, **kwargs)

    monkeypatch.setattr(store.sqlite3, "connect", connect)


def test_scoring_into_a_read_only_store_is_one_line_and_exit_2(
    labelled, sweep_model, reference, tmp_path, capsys, monkeypatch
):
    db = tmp_path / "store.db"
    shutil.copy2(reference[0], db)
    before = db.read_bytes()
    _read_only_connect(monkeypatch, db)
    code = main(["score", str(sweep_model), "--deployment", str(labelled[0]), "--db", str(db), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "cannot be written" in err[0] and "writable" in err[0]
    assert db.read_bytes() == before


def test_a_full_disk_while_scoring_rolls_back_the_file_and_a_rerun_completes(
    labelled, sweep_model, reference, tmp_path, capsys, monkeypatch
):
    """SQLite's page limit stands in for a full disk (SQLITE_FULL, "database or disk is full")."""
    from callsieve.classifier import scoring

    db = tmp_path / "store.db"
    real = scoring.replace_file_result
    calls = []

    def filling(con, *args, **kwargs):
        calls.append(1)
        if len(calls) == 3:  # the disk fills while the third file is stored
            pages = con.execute("PRAGMA page_count").fetchone()[0]
            con.execute(f"PRAGMA max_page_count={pages}")
        return real(con, *args, **kwargs)

    monkeypatch.setattr(scoring, "replace_file_result", filling)
    argv = ["score", str(sweep_model), "--deployment", str(labelled[0]), "--db", str(db), "--quiet"]
    assert main(argv) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "full" in err[0] and "run the same command again" in err[0]
    # The file whose results met the full disk rolled back whole; those before it are kept.
    assert len(calls) >= 3
    assert _rows(db, "SELECT COUNT(*) FROM run_files") == [(len(calls) - 1,)]
    assert _rows(
        db, "SELECT COUNT(*) FROM detections d LEFT JOIN run_files r USING (run_id, file_id) WHERE r.file_id IS NULL"
    ) == [(0,)]
    assert _rows(db, "SELECT COUNT(*) FROM claims") == [(0,)]  # released on the way out
    monkeypatch.setattr(scoring, "replace_file_result", real)
    assert main(argv) == 0
    sql = (
        "SELECT f.name, start_s, end_s, label, confidence FROM detections d JOIN files f USING (file_id) ORDER BY 1, 2"
    )
    assert _rows(db, sql) == _rows(reference[0], sql)


def test_a_read_only_store_can_still_be_exported(reference, tmp_path, monkeypatch):
    db = tmp_path / "store.db"
    shutil.copy2(reference[0], db)
    _read_only_connect(monkeypatch, db)
    out = tmp_path / "detections.csv"
    assert main(["export", str(db), "--out", str(out), "--quiet"]) == 0
    with open(out) as fh:
        rows = [r for r in fh if not r.startswith("#")]
    assert len(rows) - 1 == reference[1]["detections"]
