"""Scoring: block-size independence, kill and resume, faults, parallel and Dask, export."""

from __future__ import annotations

import csv
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from datetime import datetime, timedelta

import numpy as np
import pytest
from callsieve.classifier.cli import main
from callsieve.classifier.deployment import load_deployment
from callsieve.classifier.detections import pick_detections
from callsieve.classifier.export import DETECTION_COLUMNS, export_detections
from callsieve.classifier.model import load_model
from callsieve.classifier.scoring import score_deployment, score_file


def _copy_site(labelled, tmp_path):
    manifest, _, _ = labelled
    site = tmp_path / "site"
    shutil.copytree(manifest.parent, site)
    return site / "manifest.toml"


def _detections(db, run_id=None):
    con = sqlite3.connect(db)
    sql = (
        "SELECT f.name, d.start_s, d.end_s, d.low_hz, d.high_hz, d.label, d.confidence, d.received_level_db, "
        "d.snr_db, d.clipped FROM detections d JOIN files f USING (file_id) WHERE d.superseded=0"
    )
    rows = con.execute(sql + ("" if run_id is None else f" AND d.run_id={int(run_id)}")).fetchall()
    con.close()
    return sorted(rows, key=lambda r: (r[0], r[1], r[5]))


def _same(a, b):
    assert len(a) == len(b) and len(a) > 0
    for x, y in zip(a, b, strict=True):
        assert x[0] == y[0] and x[5] == y[5] and x[9] == y[9]
        np.testing.assert_allclose(
            [v if v is not None else np.nan for v in x[1:5] + x[6:9]],
            [v if v is not None else np.nan for v in y[1:5] + y[6:9]],
            rtol=1e-5,
            atol=1e-4,
        )


def test_pick_detections_keeps_two_nearby_calls_apart():
    # Two calls a few windows apart, with a dip between: two detections; one broad rise: one.
    p = np.array([0.0, 0.2, 0.9, 0.95, 0.3, 0.05, 0.4, 0.85, 0.2, 0.0, 0.5, 0.6, 0.7, 0.6, 0.5, 0.0])
    proba = np.column_stack([1 - p, p])
    seg = np.column_stack([np.arange(p.size) * 0.5, np.arange(p.size) * 0.5 + 1.0])
    band = np.tile([80.0, 160.0], (p.size, 1))
    dets = pick_detections(proba, ["background", "up"], seg, band, 0.1)
    assert [d.window for d in dets] == [3, 7, 12]
    assert [round(d.confidence, 2) for d in dets] == [0.95, 0.85, 0.7]
    assert pick_detections(proba, ["background", "up"], seg, band, 0.96) == []


def test_pick_detections_keeps_one_of_two_peaks_on_the_same_trace():
    # Two peaks (a dip between) whose windows both see the same trace at 10.0-11.2 s and
    # 10.2-11.2 s: one call, kept once at the more confident peak; a third peak on a
    # trace that shares only 0.2 s of 1 s with it stays.
    p = np.array([0.0, 0.6, 0.2, 0.9, 0.1, 0.0, 0.7, 0.0])
    proba = np.column_stack([1 - p, p])
    seg = np.array([[0, 1], [10.0, 11.2], [10, 11], [10.2, 11.2], [10, 11], [0, 1], [11.0, 12.0], [0, 1]])
    band = np.tile([80.0, 160.0], (p.size, 1))
    dets = pick_detections(proba, ["background", "up"], seg, band, 0.1)
    assert [d.window for d in dets] == [3, 6]
    assert [d.start_s for d in dets] == [10.2, 11.0]


def test_detections_do_not_depend_on_block_size(labelled, sweep_model):
    manifest, _, _ = labelled
    dep = load_deployment(manifest)
    model = load_model(sweep_model)
    f = dep.files[0]
    a = score_file(model, f.path, f.name, dep.chain, dep.channel, 0.1, block_s=600.0)
    b = score_file(model, f.path, f.name, dep.chain, dep.channel, 0.1, block_s=31.0)
    assert a.windows == b.windows and len(a.rows) > 5
    _same([(f.name, *r) for r in a.rows], [(f.name, *r) for r in b.rows])


def test_detections_find_the_labelled_calls(labelled, reference):
    # The model finds the labelled sweeps it was trained on: most confident detections
    # overlap a labelled call of their class (a sanity check of the whole path).
    _, labels, _ = labelled
    db, _ = reference
    truth = list(csv.DictReader(open(labels)))
    dets = [d for d in _detections(db) if d[6] >= 0.9]
    hits = sum(
        any(
            t["file"] == d[0]
            and t["label"] == d[5]
            and float(t["start_s"]) - 0.5 < d[2]
            and float(t["end_s"]) + 0.5 > d[1]
            for t in truth
        )
        for d in dets
    )
    assert len(dets) > 20 and hits / len(dets) > 0.9


def test_export_writes_the_detection_table(reference, tmp_path):
    db, summary = reference
    out = tmp_path / "d.csv"
    assert main(["export", str(db), "--out", str(out), "--quiet"]) == 0
    rows = list(csv.DictReader(open(out)))
    assert list(rows[0]) == DETECTION_COLUMNS and len(rows) == summary["detections"]
    r = rows[0]
    start = datetime.strptime(r["file"].split("_")[1].split(".")[0], "%Y%m%dT%H%M%SZ")
    expected = start + timedelta(seconds=float(r["start_s"]))
    assert r["start_utc"] == expected.strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"
    assert all(0.1 <= float(x["confidence"]) <= 1.0 for x in rows)
    assert all(float(x["end_s"]) > float(x["start_s"]) and float(x["high_hz"]) > float(x["low_hz"]) for x in rows)
    import pyarrow.parquet as pq

    pq_out = tmp_path / "d.parquet"
    export_detections(db, pq_out, label="up", min_confidence=0.5)
    table = pq.read_table(pq_out)
    assert table.schema.names == DETECTION_COLUMNS
    assert table.num_rows == sum(1 for x in rows if x["label"] == "up" and float(x["confidence"]) >= 0.5)
    assert sqlite3.connect(db).execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_kill_and_resume_gives_the_uninterrupted_result(labelled, sweep_model, reference, tmp_path):
    manifest, _, _ = labelled
    db = tmp_path / "killed.db"
    cmd = [
        sys.executable,
        "-m",
        "callsieve.classifier.cli",
        "score",
        str(sweep_model),
        "--deployment",
        str(manifest),
        "--db",
        str(db),
        "--quiet",
    ]
    rng = np.random.default_rng(int(time.time()))
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    # Wait until the first file is committed, then kill at a random moment after it.
    deadline = time.time() + 60
    while time.time() < deadline and proc.poll() is None:
        if db.exists():
            try:
                if sqlite3.connect(db).execute("SELECT COUNT(*) FROM run_files").fetchone()[0] >= 1:
                    break
            except sqlite3.Error:
                pass
        time.sleep(0.05)
    time.sleep(rng.uniform(0.0, 0.8))
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    done_before = sqlite3.connect(db).execute("SELECT COUNT(*) FROM run_files").fetchone()[0]
    assert subprocess.run(cmd, capture_output=True).returncode == 0
    _same(_detections(db), _detections(reference[0]))
    # Resumed, not restarted: one run, and the files done before the kill were not redone.
    con = sqlite3.connect(db)
    assert con.execute("SELECT COUNT(*) FROM runs").fetchone()[0] == 1
    assert con.execute("SELECT status FROM runs").fetchone()[0] == "finished"
    assert done_before >= 1


def test_bad_files_are_recorded_and_skipped(labelled, sweep_model, reference, tmp_path, capsys):
    site = _copy_site(labelled, tmp_path)
    audio = site.parent / "audio"
    victim = sorted(audio.glob("*.wav"))[2]
    victim.write_bytes(victim.read_bytes()[:20000])  # truncated
    (audio / "unit_20320105T020000Z.wav").write_bytes(b"RIFF not really a wave file")
    db = tmp_path / "faults.db"
    code = main(["score", str(sweep_model), "--deployment", str(site), "--db", str(db), "--quiet"])
    out = capsys.readouterr()
    assert code == 1
    assert victim.name in out.out and "unit_20320105T020000Z.wav" in out.out
    assert "could not be scored" in out.err
    con = sqlite3.connect(db)
    failed = dict(
        con.execute(
            "SELECT f.name, r.error FROM run_files r JOIN files f USING (file_id) WHERE r.status='failed'"
        ).fetchall()
    )
    assert set(failed) == {victim.name, "unit_20320105T020000Z.wav"} and "truncated" in failed[victim.name]
    # The other files are scored exactly as in the reference run.
    ref = [d for d in _detections(reference[0]) if d[0] != victim.name]
    _same(_detections(db), ref)


def test_changed_file_is_scored_again(labelled, sweep_model, tmp_path, capsys):
    site = _copy_site(labelled, tmp_path)
    db = tmp_path / "changed.db"
    score_deployment(sweep_model, site, db)
    first = _detections(db)
    f = sorted((site.parent / "audio").glob("*.wav"))[0]
    os.utime(f, ns=(f.stat().st_atime_ns, f.stat().st_mtime_ns + 10**9))
    lines = []
    summary = score_deployment(sweep_model, site, db, progress=lines.append)
    assert summary["files"] == 1 and summary["skipped"] == 5
    assert any("changed since it was scored" in line and f.name in line for line in lines)
    _same(_detections(db), first)


def test_two_processes_give_the_same_detections(labelled, sweep_model, reference, tmp_path):
    manifest, _, _ = labelled
    db = tmp_path / "jobs2.db"
    score_deployment(sweep_model, manifest, db, jobs=2)
    _same(_detections(db), _detections(reference[0]))


def test_dask_cluster_gives_the_same_detections(labelled, sweep_model, reference, tmp_path):
    distributed = pytest.importorskip("dask.distributed")
    manifest, _, _ = labelled
    db = tmp_path / "dask.db"
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None, host="127.0.0.1"
    ) as cluster:
        summary = score_deployment(sweep_model, manifest, db, scheduler=cluster.scheduler_address)
    assert summary["files"] == 6
    _same(_detections(db), _detections(reference[0]))


def test_score_refuses_bad_calls(labelled, sweep_model, tmp_path, capsys):
    manifest, _, _ = labelled
    assert (
        main(
            [
                "score",
                str(sweep_model),
                "--deployment",
                str(manifest),
                "--db",
                str(tmp_path / "x.db"),
                "--threshold",
                "1.5",
            ]
        )
        == 2
    )
    assert "--threshold" in capsys.readouterr().err
    assert (
        main(["score", str(tmp_path / "none.skops"), "--deployment", str(manifest), "--db", str(tmp_path / "x.db")])
        == 2
    )
    assert "no such model" in capsys.readouterr().err
    assert main(["export", str(tmp_path / "none.db"), "--out", str(tmp_path / "o.csv")]) == 2
    assert "no such detection store" in capsys.readouterr().err


def test_continuous_recording_split_into_files_gives_the_same_detections(labelled, sweep_model, tmp_path):
    # One continuous recording written as one file and as three consecutive files: calls
    # across the joins are found once, at the same times (absolute, UTC) as in one file.
    import soundfile as sf
    from conftest import write_manifest

    manifest, labels, _ = labelled
    src = sorted((manifest.parent / "audio").glob("*.wav"))
    x = np.concatenate([sf.read(p, dtype="int16")[0] for p in src[:3]])  # 12 min of sweeps
    t0 = datetime(2033, 6, 1, 0, 0, 0)
    one, three = tmp_path / "one", tmp_path / "three"
    for folder in (one, three):
        (folder / "audio").mkdir(parents=True)
        write_manifest(folder, name=folder.name)
    sf.write(one / "audio" / f"rec_{t0:%Y%m%dT%H%M%SZ}.wav", x, 2000, subtype="PCM_16")
    # Joins at 200.3 s and 431.7 s, not on any window grid.
    cuts = [0, int(200.3 * 2000), int(431.7 * 2000), x.size]
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        name = f"rec_{t0 + timedelta(seconds=a / 2000):%Y%m%dT%H%M%SZ}.wav"
        sf.write(three / "audio" / name, x[a:b], 2000, subtype="PCM_16")
    # File names carry whole seconds: the joins differ from the names by under a second,
    # within the deployment's tolerance, so the three files are one continuous recording.
    score_deployment(sweep_model, one / "manifest.toml", tmp_path / "one.db")
    score_deployment(sweep_model, three / "manifest.toml", tmp_path / "three.db")

    def absolute(db, folder):
        dep = load_deployment(folder / "manifest.toml")
        offsets, acc = {}, 0
        for f in dep.files:
            offsets[f.name] = acc
            acc += f.info.frames / 2000
        return sorted(
            (round(offsets[r[0]] + r[1], 3), round(offsets[r[0]] + r[2], 3), r[5], round(r[6], 5))
            for r in _detections(db)
        )

    a, b = absolute(tmp_path / "one.db", one), absolute(tmp_path / "three.db", three)
    assert len(a) > 10
    assert a == b
