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
    # Expected windows worked by hand from the rule in README "Detections and the store":
    # local maxima >= floor with prominence >= floor / 2 (scipy.signal.find_peaks semantics).
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
    # trace that shares only 0.2 s of 1 s with it stays. Worked by hand: overlap over the
    # shorter interval > 0.5 is one call (non-maximum suppression; 0.5 is common practice).
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


def _score_command(model, manifest, db):
    return [
        sys.executable,
        "-m",
        "callsieve.classifier.cli",
        "score",
        str(model),
        "--deployment",
        str(manifest),
        "--db",
        str(db),
        "--quiet",
    ]


@pytest.fixture(scope="module")
def short_site(labelled, sweep_model, tmp_path_factory):
    """The labelled site cut to the first 40 s of each file (six files, about four calls
    each) and an uninterrupted run over it: the crash tests at a sixth of the audio."""
    import soundfile as sf

    manifest, _, _ = labelled
    site = tmp_path_factory.mktemp("short-site")
    shutil.copy(manifest, site / "manifest.toml")
    (site / "audio").mkdir()
    for path in sorted((manifest.parent / "audio").glob("*.wav")):
        x, fs = sf.read(path, dtype="int16", frames=40 * 2000)
        sf.write(site / "audio" / path.name, x, fs, subtype="PCM_16")
    db = site / "uninterrupted.db"
    score_deployment(sweep_model, site / "manifest.toml", db)
    return site / "manifest.toml", db


def _store_state(db):
    """Files of the store; per done file its run_files (detections, scored_utc); per file
    the ids of its stored detections."""
    con = sqlite3.connect(db)
    try:
        total = con.execute("SELECT COUNT(*) FROM files").fetchone()[0]
        done = {
            name: (n, scored)
            for name, n, scored in con.execute(
                "SELECT f.name, r.detections, r.scored_utc FROM run_files r JOIN files f USING (file_id) "
                "WHERE r.status='done'"
            )
        }
        ids: dict[str, list[int]] = {}
        for name, detection_id in con.execute(
            "SELECT f.name, d.detection_id FROM detections d JOIN files f USING (file_id) "
            "WHERE d.superseded=0 ORDER BY d.detection_id"
        ):
            ids.setdefault(name, []).append(detection_id)
    finally:
        con.close()
    return total, done, ids


@pytest.mark.parametrize(
    "faults",
    [
        [("CALLSIEVE_FAULT_AFTER_FILES", 1)],
        [("CALLSIEVE_FAULT_AFTER_FILES", 4)],
        [("CALLSIEVE_FAULT_INSIDE_FILE", 3)],
        [("CALLSIEVE_FAULT_INSIDE_FILE", 6)],
        # a resumed run that crashes again
        [("CALLSIEVE_FAULT_AFTER_FILES", 2), ("CALLSIEVE_FAULT_INSIDE_FILE", 2)],
    ],
    ids=lambda faults: "+".join(f"{hook.split('_')[-2].lower()}{k}" for hook, k in faults),
)
def test_crash_at_a_known_point_then_resume_gives_the_uninterrupted_result(
    short_site, sweep_model, tmp_path, monkeypatch, faults
):
    # Deterministic crashes (the scoring loop's test hooks, see classifier/scoring.py): a
    # real process dies with os._exit, without cleanup or rollback, either right after the
    # k-th file it scores has committed or inside that file's transaction before COMMIT.
    # The store must then hold whole files only (DEVELOPERS.md, "Resuming"), and the
    # rerun must score the rest and nothing else, ending with the uninterrupted result.
    manifest, reference = short_site
    db = tmp_path / "crashed.db"
    cmd = _score_command(sweep_model, manifest, db)
    expected_done = 0
    for hook, k in faults:
        env = {**os.environ, hook: str(k)}
        proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        try:
            _, err = proc.communicate(timeout=180)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
        assert proc.returncode == 137 and f"{hook}={k}: dying on purpose" in err.decode(), err.decode()[-2000:]
        expected_done += k if hook.endswith("AFTER_FILES") else k - 1
        total, done, ids = _store_state(db)
        # Nothing of a file that is not done (its detections went with its transaction) ...
        assert set(ids) <= set(done)
        # ... each done file holds exactly the detections its run_files row counts ...
        assert {name: n for name, (n, _) in done.items()} == {name: len(ids.get(name, [])) for name in done}
        # ... exactly the committed files are done, and files were left to score.
        assert len(done) == expected_done < total == 6
    assert sum(n for n, _ in done.values()) > 0 or expected_done == 0
    monkeypatch.delenv("CALLSIEVE_FAULT_AFTER_FILES", raising=False)
    monkeypatch.delenv("CALLSIEVE_FAULT_INSIDE_FILE", raising=False)
    summary = score_deployment(sweep_model, manifest, db)
    assert (summary["skipped"], summary["files"]) == (expected_done, 6 - expected_done)
    total, done_after, ids_after = _store_state(db)
    # Files done before the crash were not scored again: same rows, same detection ids.
    assert len(done_after) == total
    assert all(done_after[name] == done[name] and ids_after.get(name) == ids.get(name) for name in done)
    assert all(n == len(ids_after.get(name, [])) for name, (n, _) in done_after.items())
    # One run, finished, with the uninterrupted run's detections.
    con = sqlite3.connect(db)
    assert con.execute("SELECT status FROM runs").fetchall() == [("finished",)]
    con.close()
    _same(_detections(db), _detections(reference))


def test_fault_hook_is_refused_when_not_a_count(short_site, sweep_model, tmp_path, monkeypatch, capsys):
    manifest, _ = short_site
    monkeypatch.setenv("CALLSIEVE_FAULT_AFTER_FILES", "soon")
    assert main(["score", str(sweep_model), "--deployment", str(manifest), "--db", str(tmp_path / "x.db")]) == 2
    assert "CALLSIEVE_FAULT_AFTER_FILES=soon" in capsys.readouterr().err
    assert not (tmp_path / "x.db").exists()


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


def test_continuous_recording_split_into_files_gives_the_same_detections(labelled, sweep_model, tmp_path, monkeypatch):
    # One continuous recording written as one file and as five consecutive files: every
    # detection comes back once, at the same time (from the recording's start) as in one
    # file. Upsweeps planted across the joins (or just after one) are one detection each,
    # in the file where its peak window starts (DEVELOPERS.md, "Continuous recordings").
    import soundfile as sf
    from callsieve.classifier import scoring
    from callsieve.features.calibration import RecordingChain, samples_from_pressure
    from callsieve.features.synthesis import CallShape, call_waveform
    from conftest import write_manifest

    fs = 2000
    manifest, labels, _ = labelled
    src = sorted((manifest.parent / "audio").glob("*.wav"))
    x = np.concatenate([sf.read(p)[0] for p in src[:3]])  # 12 min of sweeps, full scale 1
    # Joins off the window grid (hop 0.4 s) and 100 s or more apart (the noise floor's
    # half span is 30 s); an upsweep starts at each join + offset: 0.3 s after it, and
    # half, five sixths and 0.35 s of its 1.2 s before it.
    joins = [100.55, 200.3, 431.7, 561.9]
    shape = CallShape("sweep", 80.0, 160.0, 1.2)
    planted = [j + d for j, d in zip(joins, [0.3, -0.6, -1.0, -0.35], strict=True)]
    used = {p.name: 240.0 * k for k, p in enumerate(src[:3])}  # file: its start in x, s
    truth = [
        (used[r["file"]] + float(r["start_s"]), used[r["file"]] + float(r["end_s"]))
        for r in csv.DictReader(open(labels))
        if r["file"] in used
    ]
    # No labelled call within 2.5 s (a window is 1.7 s): each planted call is a peak of its own.
    assert all(t1 < s - 2.5 or t0 > s + shape.duration_s + 2.5 for s in planted for t0, t1 in truth)
    chain = RecordingChain.flat(2.5, -170.0, 40.0)  # the manifest's calibration
    for s in planted:
        i = int(s * fs)
        t = np.arange(int(shape.duration_s * fs) + 2) / fs - (s - i / fs)
        # 106 dB re 1 µPa: amid the labelled calls' 100 to 115 dB
        x[i : i + t.size] += samples_from_pressure(call_waveform(shape, t, np.sqrt(2) * 10 ** (106 / 20)), fs, chain)
    t0 = datetime(2033, 6, 1, 0, 0, 0)
    one, many = tmp_path / "one", tmp_path / "many"
    for folder in (one, many):
        (folder / "audio").mkdir(parents=True)
        write_manifest(folder, name=folder.name)
    sf.write(one / "audio" / f"rec_{t0:%Y%m%dT%H%M%SZ}.wav", x, fs, subtype="PCM_16")
    cuts = [0, *(int(round(j * fs)) for j in joins), x.size]
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        name = f"rec_{t0 + timedelta(seconds=a / fs):%Y%m%dT%H%M%SZ}.wav"
        sf.write(many / "audio" / name, x[a:b], fs, subtype="PCM_16")
    # File names carry whole seconds: the joins differ from the names by under a second,
    # within the deployment's tolerance, so the five files are one continuous recording.

    # The one-file run, watched: the start (s) of each detection's peak window, whose
    # first sample names the file that must hold the detection in the split recording.
    window_start_s, peak_window_s = [], {}
    describe, pick = scoring.describe_stream, scoring.pick_detections

    def watched_describe(*args, **kwargs):
        for table in describe(*args, **kwargs):
            window_start_s.append(table.start_s)
            yield table

    def watched_pick(*args, **kwargs):
        cands = pick(*args, **kwargs)
        starts = np.concatenate(window_start_s)
        peak_window_s.update({(round(c.start_s, 4), c.label): float(starts[c.window]) for c in cands})
        return cands

    monkeypatch.setattr(scoring, "describe_stream", watched_describe)
    monkeypatch.setattr(scoring, "pick_detections", watched_pick)
    score_deployment(sweep_model, one / "manifest.toml", tmp_path / "one.db")
    monkeypatch.undo()
    score_deployment(sweep_model, many / "manifest.toml", tmp_path / "many.db")

    def absolute(db, folder):
        """Rows (start, end in s from the recording's start, that is UTC less its start;
        label, confidence, index of the file, start_s as stored)."""
        dep = load_deployment(folder / "manifest.toml")
        offsets, acc = {}, 0
        for k, f in enumerate(dep.files):
            offsets[f.name] = (acc, k)
            acc += f.info.frames / fs
        return sorted(
            (round(offsets[r[0]][0] + r[1], 3), round(offsets[r[0]][0] + r[2], 3), r[5], round(r[6], 5))
            + (offsets[r[0]][1], r[1])
            for r in _detections(db)
        )

    a, b = absolute(tmp_path / "one.db", one), absolute(tmp_path / "many.db", many)
    assert len(a) > 10
    assert [r[:4] for r in a] == [r[:4] for r in b]
    hop = load_model(sweep_model).settings.frame_hop_s
    crossing = 0
    for s, j in zip(planted, joins, strict=True):

        def on_call(rows, s=s):
            return [r for r in rows if r[2] == "up" and r[0] < s + shape.duration_s and r[1] > s]

        # One detection in each run, not two (one from each side of the join), not none.
        assert len(on_call(a)) == 1 and len(on_call(b)) == 1, (s, j, on_call(a), on_call(b))
        (single,), (split,) = on_call(a), on_call(b)
        owner = int(np.searchsorted(cuts, round(peak_window_s[(single[5], "up")] * fs), side="right")) - 1
        assert split[4] == owner
        assert abs(split[0] - single[0]) <= hop
        crossing += split[0] < j < split[1]
    # What the test is for: detections that themselves lie across a join (the other calls
    # across joins may be detected from a window on one side only).
    assert crossing >= 2


def test_a_call_gives_one_detection_that_spans_it(sweep_model, tmp_path):
    # A detection spans the call: 1.3 s upsweeps, alone in noise, give one detection each,
    # of 1.0 to 1.6 s (the acceptance rule of the detector work: the extent comes from
    # the frames that hold the trace, within about a frame and a hop at each end).
    import soundfile as sf
    from callsieve.features.calibration import RecordingChain, samples_from_pressure
    from callsieve.features.synthesis import CallShape, call_waveform
    from conftest import write_manifest

    fs = 2000
    rng = np.random.default_rng(5)
    # White noise at 65 dB re 1 µPa²/Hz as at the training site (conftest `labelled`).
    p = rng.normal(0.0, np.sqrt(10 ** (65 / 10) * fs / 2), fs * 120)
    t = np.arange(p.size) / fs
    shape = CallShape("sweep", 80.0, 160.0, 1.3)
    starts = [10.2, 40.7, 71.1, 100.45]
    for s in starts:
        # 110 dB re 1 µPa: well above the in-band noise (about +5 dB SNR over 70-175 Hz).
        p += call_waveform(shape, t - s, np.sqrt(2) * 10 ** (110 / 20))
    site = tmp_path / "site"
    (site / "audio").mkdir(parents=True)
    write_manifest(site, name="extent-site")
    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    sf.write(site / "audio" / "unit_20320105T000000Z.wav", samples_from_pressure(p, fs, chain), fs, subtype="PCM_16")
    db = tmp_path / "extent.db"
    score_deployment(sweep_model, site / "manifest.toml", db)
    with sqlite3.connect(db) as con:
        rows = con.execute("SELECT start_s, end_s, label FROM detections WHERE confidence >= 0.5").fetchall()
    for s in starts:
        over = [(a, b) for a, b, label in rows if label == "up" and a < s + shape.duration_s and b > s]
        assert len(over) == 1, f"call at {s} s: {over}"
        a, b = over[0]
        assert 1.0 <= b - a <= 1.6, f"call at {s} s spans {a:.2f}-{b:.2f} s"
