"""The generalisation benchmark's breakdown of where the AP goes (``ap_losses``).

Checked against scikit-learn's ``average_precision_score``: over a ranked list with
distinct confidences it is the mean precision at the true detections, so the project's AP
(recall over every call, found or not) is it times the share of calls the list finds.
"""

from __future__ import annotations

import csv
import importlib.util
import json
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics import average_precision_score

BENCHMARK = Path(__file__).resolve().parents[1] / "benchmarks" / "generalisation.py"


@pytest.fixture(scope="module")
def generalisation():
    spec = importlib.util.spec_from_file_location("generalisation_benchmark", BENCHMARK)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _write(tmp_path: Path, detections: list[tuple], calls: list[tuple], n_truth: int) -> tuple[Path, Path]:
    """detections: (file, start_s, end_s, confidence, truth_row); calls: (file, start_s, end_s, snr_db, label)."""
    out = tmp_path / "evaluation"
    out.mkdir()
    (out / "metrics.json").write_text(json.dumps({"deployment": "site", "classes": {"tgt": {"truth_calls": n_truth}}}))
    with open(out / "matches.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["detection_id", "file", "start_s", "end_s", "label", "confidence", "truth_row"])
        for i, (f, s, e, c, t) in enumerate(detections, 1):
            w.writerow([i, f, s, e, "tgt", c, t])
    table = tmp_path / "calls.csv"
    with open(table, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["deployment", "file", "start_s", "end_s", "snr_db", "label"])
        for f, s, e, snr, lab in calls:
            w.writerow(["site", f, s, e, snr, lab])
        w.writerow(["elsewhere", "a.wav", 0.0, 100.0, 30.0, "yip"])  # another deployment: ignored
    return out, table


def test_the_ap_without_a_confuser_is_scikit_learns_over_the_rest(tmp_path, generalisation):
    # Ranked: true, yip, true, rise, no call, yip, true; 5 target calls, 3 of them found.
    detections = [
        ("a.wav", 1.0, 2.0, 0.95, "1"),
        ("a.wav", 10.0, 10.5, 0.90, ""),
        ("a.wav", 20.0, 21.0, 0.80, "2"),
        ("b.wav", 5.0, 7.0, 0.70, ""),
        ("b.wav", 40.0, 40.3, 0.60, ""),
        ("b.wav", 50.0, 50.4, 0.50, ""),
        ("b.wav", 60.0, 61.2, 0.40, "3"),
    ]
    calls = [
        ("a.wav", 10.1, 10.45, 20.0, "yip"),
        ("b.wav", 4.0, 8.0, 5.0, "rise"),
        ("b.wav", 5.5, 6.0, 9.0, "yip"),  # a louder yip inside the rise: the detection is the yip's
        ("b.wav", 50.1, 50.5, 12.0, "yip"),
    ]
    out, table = _write(tmp_path, detections, calls, n_truth=5)
    got = generalisation.ap_losses(out, str(table), "tgt", ("rise", "yip"))

    hit = np.array([d[4] != "" for d in detections])
    conf = np.array([d[3] for d in detections])
    kind = np.array(["", "yip", "", "yip", "(no call)", "yip", ""])
    assert got["calls_found"] == 3
    for other in ("rise", "yip"):
        keep = kind != other
        expected = average_precision_score(hit[keep], conf[keep]) * hit[keep].sum() / 5
        assert got[f"without_{other}"] == pytest.approx(expected)
    # Nothing was a rise once the louder yip took the overlapping detection.
    assert got["without_rise"] == pytest.approx(average_precision_score(hit, conf) * 3 / 5)
    assert got["without_yip"] > got["without_rise"]


def test_every_false_detection_removed_leaves_the_share_of_calls_found(tmp_path, generalisation):
    detections = [("a.wav", 1.0, 2.0, 0.9, ""), ("a.wav", 3.0, 4.0, 0.8, "1"), ("a.wav", 6.0, 7.0, 0.7, "2")]
    out, table = _write(tmp_path, detections, [("a.wav", 1.2, 1.8, 3.0, "yip")], n_truth=4)
    got = generalisation.ap_losses(out, str(table), "tgt", ("yip",))
    assert got["without_yip"] == pytest.approx(2 / 4)  # precision 1 at both hits, half the calls found
