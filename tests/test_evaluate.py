"""`callsieve evaluate` end to end on the labelled sweep site scored by the sweep model."""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest
from callsieve.classifier.cli import main
from callsieve.classifier.evaluate import METRIC_KEYS
from sklearn.metrics import average_precision_score


@pytest.fixture(scope="module")
def evaluated(labelled, reference, tmp_path_factory):
    _, labels, _ = labelled
    db, _ = reference
    out = tmp_path_factory.mktemp("evaluation")
    code = main(["evaluate", str(db), "--truth", str(labels), "--out", str(out), "--quiet"])
    assert code == 0
    return out, json.loads((out / "metrics.json").read_text())


def test_outputs_hold_the_documented_keys_tables_and_figures(evaluated, capsys):
    out, metrics = evaluated
    assert set(metrics["classes"]) == {"up", "down"}
    for m in metrics["classes"].values():
        assert set(METRIC_KEYS) <= set(m)
        assert {"average_precision", "threshold_for_target_precision_db", "recall_at_target_precision"} <= set(
            m["baseline"]
        )
        lo, hi = m["operating"]["recall_ci95"]
        # The sweep site's six files lie in one clock hour: resampling one hour gives no
        # interval (docs/evaluation.md §2), null rather than a zero-width one.
        assert metrics["effort_hours"] == 1
        assert lo is None and hi is None
    rows = list(csv.DictReader(open(out / "thresholds.csv")))
    assert {r["detector"] for r in rows} == {"model", "baseline"}
    up = [r for r in rows if r["detector"] == "model" and r["label"] == "up"]
    # Precision-recall trade: recall never rises with the threshold.
    recall = [float(r["recall"]) for r in up]
    assert all(a >= b for a, b in zip(recall, recall[1:], strict=False))
    for name in ("precision_recall.png", "precision_recall_vs_threshold.png", "recall_vs_level.png", "confusion.png"):
        assert (out / name).stat().st_size > 1000
    levels = list(csv.DictReader(open(out / "recall_by_level.csv")))
    # Every truth call counted once per measure and class (the labels hold 150 calls).
    n = sum(int(r["calls"]) for r in levels if r["measure"] == "snr_db")
    assert n == sum(m["truth_calls"] for m in metrics["classes"].values()) == 150


def test_average_precision_agrees_with_sklearn_on_the_matched_list(labelled, evaluated):
    # docs/evaluation.md §2: AP over all truth calls = sklearn's AP over the ranked detections, scaled by
    # the fraction of calls any detection found (misses at every threshold).
    out, metrics = evaluated
    matches = list(csv.DictReader(open(out / "matches.csv")))
    for label, m in metrics["classes"].items():
        rows = [r for r in matches if r["label"] == label]
        y = np.array([r["truth_row"] != "" for r in rows])
        conf = np.array([float(r["confidence"]) for r in rows])
        expected = average_precision_score(y, conf) * y.sum() / m["truth_calls"]
        assert m["average_precision"] == pytest.approx(expected, abs=1e-9)


def test_the_truth_call_table_agrees_with_the_matches_and_the_level_table(evaluated):
    # docs/evaluation.md §2: truth_calls.csv holds every judged call once, the detection
    # that matched it (the same pairs as matches.csv) and the SNR recall_by_level.csv bins.
    out, metrics = evaluated
    calls = list(csv.DictReader(open(out / "truth_calls.csv")))
    assert len(calls) == sum(m["truth_calls"] for m in metrics["classes"].values())
    assert len({r["truth_row"] for r in calls}) == len(calls)
    pairs = {(r["truth_row"], r["detection_id"]) for r in calls if r["detection_id"]}
    matched = {(r["truth_row"], r["detection_id"]) for r in csv.DictReader(open(out / "matches.csv")) if r["truth_row"]}
    assert pairs == matched and pairs
    levels = [r for r in csv.DictReader(open(out / "recall_by_level.csv")) if r["measure"] == "snr_db"]
    for label in metrics["classes"]:
        snr = np.array([float(r["snr_db"]) for r in calls if r["label"] == label])
        bins = [r for r in levels if r["label"] == label]
        edges = np.array([float(r["low"]) for r in bins] + [float(bins[-1]["high"])])
        # Values beyond the edges fall in the end bins (recall_by_level.csv's rule).
        counts, _ = np.histogram(np.clip(snr, edges[0], edges[-1] - 1e-9), edges)
        assert counts.tolist() == [int(r["calls"]) for r in bins]


def test_model_beats_the_energy_baseline_on_up_and_down_sweeps(evaluated):
    # An energy detector cannot tell an up-sweep from a down-sweep in the same band: at
    # best about half its events are of either class. The model was trained on these.
    # Measured on this fixture (2026-12-02): model AP 0.961 (down) and 0.962 (up), excess
    # baseline 0.496 and 0.539; the bounds below are those values with margin.
    _, metrics = evaluated
    for m in metrics["classes"].values():
        assert m["average_precision"] > 0.8
        # It does find the sweeps (10 dB above the floor at the loudest), just not their
        # kind: about half of its events are of the other class.
        assert 0.2 < m["baseline"]["average_precision"] < 0.7
        assert m["average_precision"] > m["baseline"]["average_precision"] + 0.25


def test_tolerance_widens_matching(labelled, reference, tmp_path):
    # Truth written 1.5 s late (a clock offset): the ~1 s calls no longer overlap their
    # detections, unless the tolerance bridges the offset.
    _, labels, _ = labelled
    db, _ = reference
    rows = list(csv.DictReader(open(labels)))
    for r in rows:
        r["start_s"], r["end_s"] = f"{float(r['start_s']) + 1.5:.3f}", f"{float(r['end_s']) + 1.5:.3f}"
    late = tmp_path / "late.csv"
    with open(late, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    found, matched = [], []
    for tol in ("0", "3"):
        out = tmp_path / tol
        args = ["evaluate", str(db), "--truth", str(late), "--out", str(out), "--tolerance-s", tol, "--quiet"]
        assert main(args) == 0
        m = json.loads((out / "metrics.json").read_text())
        found.append(sum(c["operating"]["true_positives"] for c in m["classes"].values()))
        matched.append(sum(r["truth_row"] != "" for r in csv.DictReader(open(out / "matches.csv"))))
        assert m["tolerance_s"] == float(tol)
    assert found[1] >= found[0]
    # Over every stored detection: most calls are found only with the wider tolerance.
    assert matched[0] < 0.5 * matched[1]
    assert found[1] > found[0]


def test_bad_calls_are_refused_with_exit_2(labelled, reference, tmp_path, capsys):
    _, labels, _ = labelled
    db, _ = reference
    out = str(tmp_path / "e")
    assert main(["evaluate", str(db), "--truth", str(labels), "--out", out, "--run", "99", "--quiet"]) == 2
    assert "no such scoring run" in capsys.readouterr().err
    assert main(["evaluate", str(db), "--truth", str(labels), "--out", out, "--target-precision", "1.5"]) == 2
    assert "--target-precision" in capsys.readouterr().err
    assert main(["evaluate", str(db), "--truth", str(labels), "--out", str(labels), "--quiet"]) == 2
    assert "is a file" in capsys.readouterr().err
    bad = tmp_path / "truth.csv"
    bad.write_text("file,start_s,end_s,label\nnot-there.wav,1,2,up\n")
    assert main(["evaluate", str(db), "--truth", str(bad), "--out", out, "--quiet"]) == 2
    assert "not-there.wav" in capsys.readouterr().err


def test_a_file_unreadable_since_scoring_is_left_out_not_fatal(labelled, sweep_model, tmp_path, capsys):
    import shutil

    from callsieve.classifier.scoring import score_deployment

    manifest, labels, _ = labelled
    site = tmp_path / "site"
    shutil.copytree(manifest.parent, site)
    db = tmp_path / "s.db"
    score_deployment(sweep_model, site / "manifest.toml", db)
    victim = sorted((site / "audio").glob("*.wav"))[2]
    victim.write_bytes(b"not audio any more")
    out = tmp_path / "e"
    assert main(["evaluate", str(db), "--truth", str(labels), "--out", str(out)]) == 0
    assert victim.name in capsys.readouterr().err
    m = json.loads((out / "metrics.json").read_text())
    assert m["files_unreadable"] == [victim.name] and m["files_judged"] == 5
    # Its 25 calls are not counted as misses.
    assert sum(c["truth_calls"] for c in m["classes"].values()) == 125


def test_a_class_without_truth_calls_is_reported_not_fatal(labelled, reference, tmp_path):
    # Only the up-sweeps as truth: every down-sweep detection is then a false positive of
    # a class with no call, whose recall and average precision are undefined (null).
    _, labels, _ = labelled
    db, _ = reference
    rows = list(csv.DictReader(open(labels)))
    truth = tmp_path / "up-only.csv"
    with open(truth, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(r for r in rows if r["label"] == "up")
    out = tmp_path / "e"
    assert main(["evaluate", str(db), "--truth", str(truth), "--out", str(out), "--quiet"]) == 0
    m = json.loads((out / "metrics.json").read_text())
    down = m["classes"]["down"]
    assert down["truth_calls"] == 0 and down["average_precision"] is None
    assert down["operating"]["recall"] is None and down["detections"] > 0
    assert m["classes"]["up"]["average_precision"] > 0.8


def test_the_store_works_from_any_folder_and_a_moved_deployment_is_named(
    labelled, sweep_model, tmp_path, monkeypatch, capsys
):
    # Scored from the manifest's folder with a relative path; evaluated from elsewhere.
    # Then the deployment moves: evaluate says how to point at it, and --deployment does.
    import shutil

    manifest, labels, _ = labelled
    site = tmp_path / "site"
    shutil.copytree(manifest.parent, site)
    db = tmp_path / "store.db"
    monkeypatch.chdir(site)
    assert main(["score", str(sweep_model), "--deployment", "manifest.toml", "--db", str(db), "--quiet"]) == 0
    monkeypatch.chdir(tmp_path)
    truth = site / labels.name
    assert main(["evaluate", str(db), "--truth", str(truth), "--out", "ev1", "--quiet"]) == 0
    moved = tmp_path / "moved"
    site.rename(moved)
    capsys.readouterr()
    assert main(["evaluate", str(db), "--truth", str(moved / labels.name), "--out", "ev2", "--quiet"]) == 2
    assert "--deployment" in capsys.readouterr().err
    args = ["evaluate", str(db), "--truth", str(moved / labels.name), "--out", "ev3", "--quiet"]
    assert main([*args, "--deployment", str(moved / "manifest.toml")]) == 0
    first = json.loads((tmp_path / "ev1" / "metrics.json").read_text())
    third = json.loads((tmp_path / "ev3" / "metrics.json").read_text())
    assert first["classes"]["up"]["average_precision"] == third["classes"]["up"]["average_precision"]
