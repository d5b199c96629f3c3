"""Claims of the README and docs/ that had no test: one test per claim, each able to fail.

Most tests reuse the session fixtures of conftest.py (the labelled sweep site, the model
trained on it and the uninterrupted scoring run ``reference``); tests that change a
store or a deployment work on copies in their own temporary folder.
"""

from __future__ import annotations

import csv
import json
import os
import shutil
import sqlite3
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from callsieve.classifier.cli import main
from callsieve.classifier.deployment import load_deployment
from callsieve.classifier.errors import InputError
from callsieve.classifier.evaluate import _curve_points, format_evaluation
from callsieve.classifier.evaluation import precision_recall
from callsieve.classifier.export import CAUTION, DETECTION_COLUMNS
from callsieve.classifier.model import load_model, save_model
from callsieve.classifier.scoring import _continuity, score_deployment, score_file
from callsieve.classifier.store import now_utc
from conftest import FLAT_CALIBRATION, write_files, write_manifest


@pytest.fixture(autouse=True)
def _no_mlflow(monkeypatch, tmp_path):
    """evaluate logs to ./mlflow.db or MLFLOW_TRACKING_URI where found: keep both out of the way."""
    monkeypatch.delenv("MLFLOW_TRACKING_URI", raising=False)
    monkeypatch.chdir(tmp_path)


def _copy_store(db: Path, to: Path) -> Path:
    """A consistent copy of a WAL-mode store (SQLite's online backup)."""
    src, dst = sqlite3.connect(db), sqlite3.connect(to)
    with dst:
        src.backup(dst)
    src.close()
    dst.close()
    return to


def _write_table(path: Path, rows: list[dict]) -> Path:
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    return path


def _audio_names(manifest: Path) -> list[str]:
    return sorted(p.name for p in (manifest.parent / "audio").glob("*.wav"))


def _one_line_error(err: str) -> str:
    """The whole of stderr must be one line of the documented form (docs/formats.md §7)."""
    assert err.count("\n") == 1 and err.endswith("\n"), err
    assert err.startswith("callsieve: error: "), err
    return err.strip()


# --- README "Detections and the store": verified detections are kept, marked superseded ---


def test_verified_detections_are_kept_and_marked_superseded_when_a_file_is_rescored(
    labelled, reference, sweep_model, tmp_path
):
    """Claim (README, docs/formats.md §6): detections that were verified are never deleted;
    when their file is scored again they are kept, marked superseded, and new detections
    of the file are stored beside them."""
    manifest, _, _ = labelled
    ref_db, ref_summary = reference
    # A copy of the site (copy2 keeps sizes and modification times, so only the touched
    # file counts as changed) and of the store.
    site = tmp_path / "site"
    shutil.copytree(manifest.parent, site)
    db = _copy_store(ref_db, tmp_path / "store.db")
    victim = sorted((site / "audio").glob("*.wav"))[1]

    con = sqlite3.connect(db)
    file_id = con.execute("SELECT file_id FROM files WHERE name=?", (victim.name,)).fetchone()[0]
    before = con.execute(
        "SELECT detection_id, start_s, end_s, label, confidence FROM detections "
        "WHERE run_id=? AND file_id=? AND superseded=0 ORDER BY detection_id",
        (ref_summary["run_id"], file_id),
    ).fetchall()
    assert len(before) >= 2  # the file holds calls: something to verify and something not
    verified = max(before, key=lambda r: r[4])
    with con:
        con.execute(
            "INSERT INTO verdicts (detection_id, reviewer, verdict, note, recorded_utc) VALUES (?, ?, ?, ?, ?)",
            (verified[0], "analyst-a", "yes", "clear upsweep", now_utc()),
        )
    con.close()

    st = victim.stat()
    os.utime(victim, ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))  # touched: mtime 5 s later
    said: list[str] = []
    summary = score_deployment(sweep_model, site / "manifest.toml", db, progress=said.append)
    assert summary["run_id"] == ref_summary["run_id"]  # same model, deployment, threshold: same run
    assert summary["files"] == 1 and summary["skipped"] == 5
    assert any(victim.name in line and "changed since it was scored" in line for line in said)

    con = sqlite3.connect(db)
    kept = con.execute(
        "SELECT d.start_s, d.end_s, d.label, d.confidence, d.superseded, v.reviewer, v.verdict "
        "FROM detections d JOIN verdicts v ON v.detection_id=d.detection_id WHERE d.detection_id=?",
        (verified[0],),
    ).fetchone()
    assert kept is not None, "a verified detection was deleted"
    assert kept[:4] == verified[1:] and kept[4] == 1 and kept[5:] == ("analyst-a", "yes")
    current = con.execute(
        "SELECT detection_id, start_s, end_s, label, confidence FROM detections "
        "WHERE run_id=? AND file_id=? AND superseded=0",
        (summary["run_id"], file_id),
    ).fetchall()
    # New detections for the file, with new ids; the unverified old ones are gone. The
    # audio is the same, so the new set equals the old one (the verified call included).
    assert current and not {r[0] for r in current} & {r[0] for r in before}
    assert sorted(r[1:] for r in current) == sorted(r[1:] for r in before)
    old_unverified = [r[0] for r in before if r[0] != verified[0]]
    left = con.execute(
        f"SELECT COUNT(*) FROM detections WHERE detection_id IN ({','.join('?' * len(old_unverified))})",
        old_unverified,
    ).fetchone()[0]
    assert left == 0
    stored = con.execute(
        "SELECT detections FROM run_files WHERE run_id=? AND file_id=?", (summary["run_id"], file_id)
    ).fetchone()[0]
    assert stored == len(current)
    con.close()
    # The superseded detection is kept for its verdict, not exported as a current one.
    out = tmp_path / "d.csv"
    assert main(["export", str(db), "--out", str(out), "--quiet"]) == 0
    exported = [r for r in csv.DictReader(open(out)) if r["file"] == victim.name]
    assert len(exported) == len(current) and str(verified[0]) not in {r["detection_id"] for r in exported}


# --- docs/evaluation.md §2 "Thresholds": the operating threshold ---


def test_operating_threshold_is_the_lowest_reaching_the_target_precision():
    """Claim (docs/evaluation.md §2): the operating threshold of a class is the lowest
    confidence whose precision reaches --target-precision."""
    conf = np.array([0.95, 0.90, 0.80, 0.70, 0.60, 0.50, 0.40, 0.30])
    hit = np.array([1, 1, 0, 1, 1, 0, 1, 0], dtype=bool)
    curve = precision_recall(conf, hit, n_truth=6)
    # Worked by hand from the rule: precision at >= each confidence is
    # 1/1, 2/2, 2/3, 3/4, 4/5, 4/6, 5/7, 5/8; recall over 6 calls 1/6 ... 5/6.
    np.testing.assert_allclose(curve.precision, [1, 1, 2 / 3, 3 / 4, 4 / 5, 4 / 6, 5 / 7, 5 / 8])
    # Precision 0.75 is reached at 0.70 and again, after a dip, at 0.60 (0.8): the lowest
    # is 0.60, not the end of the first run above the target (0.70) nor 0.90.
    p = _curve_points(curve, 0.75)
    assert p["threshold_for_target_precision"] == 0.60
    assert p["precision_at_target"] == pytest.approx(4 / 5) and p["recall_at_target_precision"] == pytest.approx(4 / 6)
    # Precision 0.9 holds only down to 0.90 (2/2); at 0.80 it falls to 2/3 and never returns.
    p = _curve_points(curve, 0.9)
    assert p["threshold_for_target_precision"] == 0.90 and p["recall_at_target_precision"] == pytest.approx(2 / 6)


def test_operating_threshold_falls_back_to_the_f1_optimum_when_no_threshold_reaches_the_target(
    labelled, reference, tmp_path
):
    """Claim (docs/evaluation.md §2): where no confidence reaches the target precision, the
    operating threshold is the F1-optimal one."""
    # By hand: the most confident detection is false, so precision at >= each confidence is
    # 0/1, 1/2, 2/3, 2/4, 3/5, 3/6, 4/7, 4/8 and never reaches 0.7. With 5 calls (one never
    # detected), F1 = 2 TP / (detections + calls) is 0, 2/7, 4/8, 4/9, 6/10, 6/11, 8/12,
    # 8/13: the optimum is 2/3 at confidence 0.40 (F1 as in sklearn.metrics.f1_score).
    conf = np.array([0.95, 0.90, 0.80, 0.70, 0.60, 0.50, 0.40, 0.30])
    hit = np.array([0, 1, 1, 0, 1, 0, 1, 0], dtype=bool)
    p = _curve_points(precision_recall(conf, hit, n_truth=5), 0.7)
    assert p["threshold_for_target_precision"] is None and p["recall_at_target_precision"] is None
    assert p["f1_optimal_threshold"] == 0.40 and p["f1_at_optimal"] == pytest.approx(2 / 3)
    assert p["precision_at_f1_optimal"] == pytest.approx(4 / 7) and p["recall_at_f1_optimal"] == pytest.approx(4 / 5)

    # End to end: truth with the two labels swapped, so the model's confident detections
    # are all false and no threshold reaches precision 0.9; the operating point (and the
    # counts reported at it) must then be the F1 optimum's.
    _, labels, _ = labelled
    db, _ = reference
    rows = list(csv.DictReader(open(labels)))
    for r in rows:
        r["label"] = {"up": "down", "down": "up"}[r["label"]]
    truth = _write_table(tmp_path / "swapped.csv", rows)
    out = tmp_path / "e"
    assert main(["evaluate", str(db), "--truth", str(truth), "--out", str(out), "--quiet"]) == 0
    metrics = json.loads((out / "metrics.json").read_text())
    matches = list(csv.DictReader(open(out / "matches.csv")))
    for label, m in metrics["classes"].items():
        assert m["threshold_for_target_precision"] is None  # the premise of this case
        assert m["f1_optimal_threshold"] is not None
        assert m["operating_threshold"] == m["f1_optimal_threshold"]
        at = [r for r in matches if r["label"] == label and float(r["confidence"]) >= m["operating_threshold"]]
        assert m["operating"]["detections"] == len(at)
        assert m["operating"]["true_positives"] == sum(r["truth_row"] != "" for r in at)


# --- docs/evaluation.md §1: --complete-truth ---


def test_complete_truth_makes_detections_in_unnamed_files_false_positives(labelled, reference, tmp_path):
    """Claim (README, docs/evaluation.md §1): only the files the truth table names are
    judged; with --complete-truth, files it does not name hold no call and their
    detections count as false positives."""
    manifest, labels, _ = labelled
    db, summary = reference
    names = _audio_names(manifest)
    named, unnamed = names[:4], names[4:]
    truth = _write_table(tmp_path / "four.csv", [r for r in csv.DictReader(open(labels)) if r["file"] in named])
    con = sqlite3.connect(db)
    per_file = dict(
        con.execute(
            "SELECT f.name, COUNT(d.detection_id) FROM files f LEFT JOIN detections d ON d.file_id=f.file_id "
            "AND d.run_id=? AND d.superseded=0 GROUP BY f.name",
            (summary["run_id"],),
        ).fetchall()
    )
    con.close()
    assert all(per_file[f] > 0 for f in unnamed)  # there is something to count

    results = {}
    for flag in ([], ["--complete-truth"]):
        out = tmp_path / ("complete" if flag else "named")
        assert main(["evaluate", str(db), "--truth", str(truth), "--out", str(out), "--quiet", *flag]) == 0
        metrics = json.loads((out / "metrics.json").read_text())
        results[bool(flag)] = (metrics, list(csv.DictReader(open(out / "matches.csv"))))
    (m0, rows0), (m1, rows1) = results[False], results[True]
    assert not m0["complete_truth"] and m1["complete_truth"]
    assert m0["files_judged"] == 4 and m1["files_judged"] == 6
    # 240 s files (conftest): 4 or 6 of them recorded.
    assert m0["recorded_hours"] == pytest.approx(4 * 240 / 3600, abs=1e-4)
    assert m1["recorded_hours"] == pytest.approx(6 * 240 / 3600, abs=1e-4)
    # Without the flag, the unnamed files are not judged: none of their detections counts.
    assert {r["file"] for r in rows0} <= set(named)
    assert sum(c["detections"] for c in m0["classes"].values()) == sum(per_file[f] for f in named)
    # With it, every detection of the unnamed files is judged, and judged false.
    extra = [r for r in rows1 if r["file"] in unnamed]
    assert len(extra) == sum(per_file[f] for f in unnamed)
    assert all(r["truth_row"] == "" for r in extra)
    assert sum(c["detections"] for c in m1["classes"].values()) == sum(per_file.values())
    # And the summary says so, counting them (the files with no truth call, and their detections).
    assert m1["files_without_truth_calls"] == sorted(unnamed) and m0["files_without_truth_calls"] == []
    assert m1["detections_in_files_without_truth_calls"] == len(extra)
    said = format_evaluation(m1)
    assert (
        f"{len(unnamed)} of the 6 files judged hold no truth call" in said and f"their {len(extra)} detections" in said
    )
    assert "hold no truth call" not in format_evaluation(m0)
    # The calls and the matches are the same; only false positives were added.
    assert {c: m["truth_calls"] for c, m in m0["classes"].items()} == {
        c: m["truth_calls"] for c, m in m1["classes"].items()
    }
    assert {(r["detection_id"], r["truth_row"]) for r in rows0 if r["truth_row"]} == {
        (r["detection_id"], r["truth_row"]) for r in rows1 if r["truth_row"]
    }
    for c in m0["classes"]:
        assert m1["classes"][c]["average_precision"] < m0["classes"][c]["average_precision"]


# --- docs/evaluation.md §1 and metrics.json: files_not_scored ---


def test_a_truth_file_the_run_did_not_score_is_reported_and_left_out_whole(labelled, sweep_model, tmp_path, capsys):
    """Claim (README, docs/evaluation.md §1): a truth file that was not scored in the run is
    reported (``files_not_scored`` in metrics.json) and left out whole: its calls,
    detections and effort."""
    manifest, labels, _ = labelled
    names = _audio_names(manifest)
    site = tmp_path / "site"
    (site / "audio").mkdir(parents=True)
    shutil.copy2(manifest, site / "manifest.toml")
    for name in names[:2]:
        shutil.copy2(manifest.parent / "audio" / name, site / "audio" / name)
    db = tmp_path / "store.db"
    score_deployment(sweep_model, site / "manifest.toml", db)
    # A file added to the deployment after the run, three clock hours later: it holds calls
    # (a copy of a labelled file) and would add an hour of effort if it were counted.
    late = "unit_20320105T030000Z.wav"
    shutil.copy2(manifest.parent / "audio" / names[2], site / "audio" / late)
    rows = []
    for r in csv.DictReader(open(labels)):
        if r["file"] in names[:2]:
            rows.append(r)
        elif r["file"] == names[2]:
            rows.append(r | {"file": late})
    assert sum(r["file"] == late for r in rows) == 25  # conftest: 25 calls per file
    truth = _write_table(tmp_path / "truth.csv", rows)
    out = tmp_path / "e"
    assert main(["evaluate", str(db), "--truth", str(truth), "--out", str(out)]) == 0
    assert late in capsys.readouterr().err  # reported as it runs
    m = json.loads((out / "metrics.json").read_text())
    assert m["files_not_scored"] == [late] and m["files_unreadable"] == []
    assert m["files_judged"] == 2
    assert sum(c["truth_calls"] for c in m["classes"].values()) == 50  # its 25 calls are no misses
    assert m["recorded_hours"] == pytest.approx(2 * 240 / 3600, abs=1e-4)
    assert m["effort_hours"] == 1  # 00:00 and 00:10, one clock hour; not 03:00
    assert all(r["file"] != late for r in csv.DictReader(open(out / "matches.csv")))


# --- README "Model file": another descriptor version is refused ---


def test_a_model_of_another_descriptor_version_is_refused_with_one_line(
    labelled, sweep_model, tmp_path, monkeypatch, capsys
):
    """Claim (README "Model file", DEVELOPERS.md "Adding a descriptor"): a model file made
    for another descriptor version is refused with a message to retrain: exit 2, one line."""
    import callsieve.classifier.model as model_module

    manifest, _, _ = labelled
    model = load_model(sweep_model)
    # A consistent model file (its content hash matches) written by a callsieve whose
    # descriptors were of another version.
    current = model_module.DESCRIPTOR_VERSION
    with monkeypatch.context() as m:
        m.setattr(model_module, "DESCRIPTOR_VERSION", current + "-older")
        old = tmp_path / "old.skops"
        save_model(model, old)
    assert model_module.DESCRIPTOR_VERSION == current
    with pytest.raises(InputError, match="descriptor version .*retrain"):
        load_model(old)
    db = tmp_path / "s.db"
    capsys.readouterr()
    assert main(["score", str(old), "--deployment", str(manifest), "--db", str(db), "--quiet"]) == 2
    line = _one_line_error(capsys.readouterr().err)
    assert "old.skops" in line and f"{current}-older" in line and current in line and "retrain" in line
    assert not db.exists()  # refused before anything was written


# --- README "export" and docs/formats.md §4: the caution in Parquet metadata ---


def test_parquet_export_carries_the_caution_in_its_metadata(reference, tmp_path):
    """Claim (README "export", docs/formats.md §4): a Parquet export holds the README's
    caution in its metadata."""
    import pyarrow.parquet as pq

    db, summary = reference
    out = tmp_path / "detections.parquet"
    assert main(["export", str(db), "--out", str(out), "--quiet"]) == 0
    schema = pq.read_schema(out)
    assert schema.names == DETECTION_COLUMNS
    caution = (schema.metadata or {}).get(b"caution", b"").decode()
    assert caution == CAUTION
    # The README's "Cautions": detections are candidates for trained analysts to verify.
    assert "candidates for trained analysts to verify" in caution
    assert pq.read_metadata(out).num_rows == summary["detections"] > 0


# --- docs/formats.md §7: one-line errors, --debug adds the traceback ---


def test_debug_adds_a_traceback_and_without_it_an_error_is_one_line(tmp_path, capsys, monkeypatch):
    """Claim (README, docs/formats.md §7): errors are one line on stderr,
    ``callsieve: error: ...``, exit 2 for bad input; ``--debug`` adds the traceback."""
    missing = str(tmp_path / "nope.toml")
    assert main(["calibrate", missing]) == 2
    line = _one_line_error(capsys.readouterr().err)
    assert "nope.toml" in line and "Traceback" not in line
    for argv in (["calibrate", missing, "--debug"], ["--debug", "calibrate", missing]):
        assert main(argv) == 2
        err = capsys.readouterr().err
        assert err.startswith("Traceback (most recent call last):") and "InputError" in err
        assert err.strip().splitlines()[-1] == line  # the same one line closes it
    # Work that fails unexpectedly (exit 1): one line that points at --debug, or the traceback.
    import callsieve.classifier.calibrate as calibrate_module

    def broken(*args, **kwargs):
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(calibrate_module, "calibration_summary", broken)
    assert main(["calibrate", missing]) == 1
    line = _one_line_error(capsys.readouterr().err)
    assert "RuntimeError: disk on fire" in line and "--debug" in line
    assert main(["calibrate", missing, "--debug"]) == 1
    err = capsys.readouterr().err
    assert "Traceback (most recent call last):" in err and "in broken" in err


# --- README "continuous recordings": an unreadable neighbour counts as a gap ---


def _split_recording(labelled, folder: Path, ext: str) -> tuple[Path, list[Path], int]:
    """One labelled 4-minute recording cut into three continuous 80 s files; (manifest, paths, samples per file)."""
    manifest, _, _ = labelled
    x, fs = sf.read(manifest.parent / "audio" / _audio_names(manifest)[0], dtype="int16")
    t0 = datetime(2032, 3, 1, 0, 0, 0)
    n = x.size // 3
    (folder / "audio").mkdir(parents=True)
    paths = []
    for k in range(3):
        p = folder / "audio" / f"unit_{t0 + timedelta(seconds=80 * k):%Y%m%dT%H%M%SZ}.{ext}"
        sf.write(p, x[k * n : (k + 1) * n], fs, subtype="PCM_16")
        paths.append(p)
    return write_manifest(folder, name="split-site", glob=f"*.{ext}"), paths, n


def _corrupt(path: Path, how: str) -> None:
    if how == "truncated":  # the second half of the file is lost, as in a copy cut short
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    else:
        path.write_bytes(b"not a sound file" * 64)


def _stored_rows(db: Path, name: str) -> list[tuple]:
    con = sqlite3.connect(db)
    rows = con.execute(
        "SELECT d.start_s, d.end_s, d.low_hz, d.high_hz, d.label, d.confidence, d.received_level_db, d.snr_db, "
        "d.clipped FROM detections d JOIN files f ON f.file_id=d.file_id WHERE f.name=? ORDER BY d.detection_id",
        (name,),
    ).fetchall()
    con.close()
    return [tuple(r) for r in rows]


def _run_status(db: Path) -> dict[str, str]:
    con = sqlite3.connect(db)
    status = dict(con.execute("SELECT f.name, rf.status FROM run_files rf JOIN files f USING (file_id)").fetchall())
    con.close()
    return status


@pytest.mark.parametrize(
    "ext,how",
    [
        ("wav", "truncated"),
        ("wav", "unreadable"),
        ("flac", "truncated"),  # a FLAC that loses sync: found at the listing since deployment._check_flac_end
    ],
)
def test_a_neighbour_that_cannot_be_read_counts_as_a_gap(labelled, sweep_model, tmp_path, ext, how):
    """Claim (README "Detections and the store"): a neighbour that cannot be read counts as
    a gap. Three continuous files, the middle one corrupt: the first and third are not
    treated as continuous (each is scored as a recording of its own), and only the middle
    one fails."""
    man, paths, n = _split_recording(labelled, tmp_path / "split", ext)
    first, middle, third = (p.name for p in paths)
    # Control: all readable, the three are one recording (offsets add up, neighbours set).
    ctx = _continuity(load_deployment(man))
    assert (ctx[first][0], ctx[first][1]) == (0, None) and Path(ctx[first][2][0]).name == middle
    assert ctx[third][0] == 2 * n and Path(ctx[third][1][0]).name == middle

    _corrupt(paths[1], how)
    dep = load_deployment(man)
    ctx = _continuity(dep)
    assert ctx[first][:3] == (0, None, None) and ctx[third][:3] == (0, None, None)
    db = tmp_path / "split.db"
    summary = score_deployment(sweep_model, man, db)
    assert [f["file"] for f in summary["failed"]] == [middle]
    assert _run_status(db) == {first: "done", middle: "failed", third: "done"}
    model = load_model(sweep_model)
    for k in (0, 2):
        alone = score_file(model, paths[k], paths[k].name, dep.chain, dep.channel, 0.1)
        assert sorted(_stored_rows(db, paths[k].name)) == sorted(
            alone.rows
        )  # one set; calls of two classes may share a start
    assert _stored_rows(db, first) or _stored_rows(db, third)  # the comparison is not of two empty lists


def test_a_neighbour_that_becomes_unreadable_after_the_listing_counts_as_a_gap(
    labelled, sweep_model, tmp_path, monkeypatch
):
    """Claim (README "Detections and the store"; scoring.score_file: "a neighbour that cannot
    be opened is a gap, not a fault of this file"): a middle file cut short between the
    listing of the deployment and the scoring of its neighbours (a copy still in progress)
    fails alone; its neighbours are scored as at a gap."""
    import callsieve.classifier.scoring as scoring

    man, paths, _ = _split_recording(labelled, tmp_path / "split", "wav")
    first, middle, third = (p.name for p in paths)
    listed = scoring.load_deployment

    def list_then_cut(manifest):
        dep = listed(manifest)
        _corrupt(paths[1], "truncated")
        return dep

    monkeypatch.setattr(scoring, "load_deployment", list_then_cut)
    db = tmp_path / "split.db"
    summary = score_deployment(sweep_model, man, db)
    assert [f["file"] for f in summary["failed"]] == [middle]
    assert _run_status(db) == {first: "done", middle: "failed", third: "done"}
    model = load_model(sweep_model)
    dep = listed(man)
    for k in (0, 2):
        alone = score_file(model, paths[k], paths[k].name, dep.chain, dep.channel, 0.1)
        assert sorted(_stored_rows(db, paths[k].name)) == sorted(
            alone.rows
        )  # one set; calls of two classes may share a start


# --- docs/formats.md §1: the nearest known name for an unknown field ---


@pytest.mark.parametrize(
    "calibration,extra,unknown,hint",
    [
        (
            FLAT_CALIBRATION.replace("hydrophone_sensitivity_db", "hydrophone_sensitivty_db"),
            "",
            "hydrophone_sensitivty_db",
            "did you mean hydrophone_sensitivity_db?",
        ),
        (FLAT_CALIBRATION, "[site]\ntemprature_c = 12.0\n", "temprature_c", "did you mean temperature_c?"),
        (FLAT_CALIBRATION.replace("[calibration]", "[calibraton]"), "", "[calibraton]", "did you mean [calibration]?"),
    ],
    ids=["field", "site-field", "table"],
)
def test_an_unknown_manifest_field_gets_the_nearest_known_name(tmp_path, capsys, calibration, extra, unknown, hint):
    """Claim (docs/formats.md §1): an unknown field is refused with one line naming the file
    and the field, and the nearest known name as a hint."""
    write_files(tmp_path, [datetime(2031, 5, 4, 6, 0, 0)], 5.0)
    manifest = write_manifest(tmp_path, calibration=calibration, extra=extra)
    assert main(["calibrate", str(manifest)]) == 2
    line = _one_line_error(capsys.readouterr().err)
    assert "manifest.toml" in line and unknown in line and hint in line
