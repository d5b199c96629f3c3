"""Matching and figures of merit against scikit-learn and published worked values."""

import numpy as np
import pytest
from callsieve.classifier.evaluation import (
    average_precision,
    bootstrap_over_hours,
    hour_presence,
    match_detections,
    precision_recall,
    recall_by_bin,
    threshold_table,
    wilson_interval,
)
from scipy.stats import binomtest
from sklearn.metrics import average_precision_score, precision_recall_curve


def _ap_of(det, truth, tol=0.5):
    """Average precision of detections (key, start, end, conf) against truth (key, start, end)."""
    dk, ds, de, dc = (list(x) if i == 0 else np.array(x, float) for i, x in enumerate(zip(*det, strict=True)))
    tk, ts, te = (list(x) if i == 0 else np.array(x, float) for i, x in enumerate(zip(*truth, strict=True)))
    m = match_detections(dk, ds, de, dc, tk, ts, te, tol)
    curve = precision_recall(dc, m >= 0, len(truth))
    return m, curve, average_precision(curve)


# REFERENCES §7, second row: y_true [1,0,1,1,0,0,1,0] with descending scores -> AP 0.747024.
Y = [1, 0, 1, 1, 0, 0, 1, 0]
CONF = [0.95, 0.90, 0.80, 0.70, 0.60, 0.50, 0.40, 0.30]
KEY = ("dep", "a.wav", "upsweep")


def _ranked_case():
    """Detections of CONF, each at its own time; the true ones (Y) have a call under them."""
    det = [(KEY, 10.0 * i, 10.0 * i + 1.0, c) for i, c in enumerate(CONF)]
    truth = [(KEY, 10.0 * i + 0.2, 10.0 * i + 1.2) for i, t in enumerate(Y) if t]
    return det, truth


def test_average_precision_equals_sklearn_on_a_ranked_list():
    y, conf = Y, CONF
    det, truth = _ranked_case()
    m, curve, ap = _ap_of(det, truth)
    assert list((m >= 0).astype(int)) == y
    assert ap == pytest.approx(average_precision_score(y, conf), abs=1e-12)
    assert ap == pytest.approx(0.747024, abs=1e-6)
    # scikit-learn's curve at the same thresholds (its last point is recall 0, precision 1).
    p, r, t = precision_recall_curve(y, conf)
    assert np.allclose(curve.precision[::-1], p[:-1]) and np.allclose(curve.recall[::-1], r[:-1])
    assert np.allclose(curve.threshold[::-1], t)


def test_missed_calls_count_at_every_threshold():
    # Four more calls that no detection reaches: recall can only reach 4/8, and the
    # area is sklearn's AP over the detections scaled by the fraction found (docs/evaluation.md §2).
    y, conf, key = Y, CONF, KEY
    det, truth = _ranked_case()
    truth += [(key, 500.0 + 10 * i, 501.0 + 10 * i) for i in range(4)]
    _, curve, ap = _ap_of(det, truth)
    assert curve.recall.max() == pytest.approx(0.5)
    assert ap == pytest.approx(average_precision_score(y, conf) * 4 / 8, abs=1e-12)
    # Ties form one step, as in sklearn (REFERENCES §7, third row: 0.833333).
    det = [(key, 0.0, 1.0, 0.9), (key, 10.0, 11.0, 0.5), (key, 20.0, 21.0, 0.5), (key, 30.0, 31.0, 0.1)]
    truth = [(key, 0.0, 1.0), (key, 20.0, 21.0)]
    _, _, ap = _ap_of(det, truth)
    assert ap == pytest.approx(average_precision_score([1, 0, 1, 0], [0.9, 0.5, 0.5, 0.1]), abs=1e-12)


def test_matching_needs_same_label_and_file_and_respects_tolerance():
    # Worked by hand from the rule of docs/evaluation.md §1: same label, same file, overlap
    # with the call widened by the tolerance on each side; most confident first.
    a, b = ("dep", "a.wav", "upsweep"), ("dep", "a.wav", "click")
    c = ("dep", "b.wav", "upsweep")
    truth = [(a, 10.0, 12.0)]
    # Wrong label, wrong file, 0.4 s before the call (inside 0.5 s), 0.6 s after (outside).
    det = [(b, 10.0, 12.0, 0.9), (c, 10.0, 12.0, 0.9), (a, 9.0, 9.6, 0.8), (a, 12.6, 13.0, 0.95)]
    m, _, _ = _ap_of(det, truth)
    assert list(m) == [-1, -1, 0, -1]
    m, _, _ = _ap_of(det, truth, tol=0.0)
    assert list(m) == [-1, -1, -1, -1]
    m, _, _ = _ap_of(det, truth, tol=0.7)
    assert list(m) == [-1, -1, -1, 0]  # the more confident detection takes it


def test_matching_is_one_to_one_with_overlapping_calls():
    k = ("dep", "a.wav", "upsweep")
    # Worked by hand from docs/evaluation.md §1 (one-to-one, largest overlap with the call
    # widened by 0.5 s): two overlapping calls, 10-14 s and 12-16 s (widened 9.5-14.5 and
    # 11.5-16.5); three detections.
    truth = [(k, 10.0, 14.0), (k, 12.0, 16.0)]
    det = [
        (k, 12.5, 16.0, 0.9),  # overlaps 2.0 s of the first, 3.5 s of the second: takes the second
        (k, 11.0, 15.0, 0.8),  # the second is taken: takes the first (3.5 s)
        (k, 10.0, 14.0, 0.7),  # both taken: a false positive
    ]
    m, curve, ap = _ap_of(det, truth)
    assert list(m) == [1, 0, -1]
    assert curve.true_positives[-1] == 2 and curve.detections[-1] == 3
    assert ap == pytest.approx(average_precision_score([1, 1, 0], [0.9, 0.8, 0.7]))
    # Order by confidence, not by position: with the confidences reversed, 10-14 s comes
    # first and takes the first call, 11-15 s the second, and 12.5-16 s is left over.
    det = [(k, 12.5, 16.0, 0.7), (k, 11.0, 15.0, 0.8), (k, 10.0, 14.0, 0.9)]
    m, _, _ = _ap_of(det, truth)
    assert list(m) == [-1, 1, 0]


def test_threshold_table_counts_at_or_above():
    # Worked by hand from docs/evaluation.md §2 (a detection counts at t when its confidence
    # is >= t): at 0.4, 4 detections of which 3 true, precision 3/4, recall 3/5 of 5 calls;
    # F1 the harmonic mean 2PR/(P+R), as sklearn.metrics.f1_score; nothing at 0.95, so
    # precision is undefined (NaN, where sklearn warns and returns 0).
    conf = np.array([0.9, 0.8, 0.8, 0.4, 0.2])
    ok = np.array([True, True, False, True, False])
    t = threshold_table(conf, ok, n_truth=5, thresholds=np.array([0.0, 0.4, 0.8, 0.95]))
    assert list(t["detections"]) == [5, 4, 3, 0]
    assert list(t["true_positives"]) == [3, 3, 2, 0]
    assert t["precision"][1] == pytest.approx(0.75) and t["recall"][1] == pytest.approx(0.6)
    assert np.isnan(t["precision"][3])
    assert t["f1"][1] == pytest.approx(2 * 0.75 * 0.6 / 1.35)


def test_bootstrap_over_independent_hours_has_binomial_spread():
    # One call per hour, found in 45 of 50 hours, all detections true: the bootstrap of a
    # mean of independent 0/1 values has the plug-in binomial variance p(1-p)/n
    # (Efron & Tibshirani 1993, from memory), SE 0.0424 here; its percentile interval
    # is close to the Wilson interval 0.786-0.957 (REFERENCES §6.1, 45/50).
    found = np.r_[np.ones(45), np.zeros(5)]
    ones = np.ones(50)
    ci = bootstrap_over_hours(found, found, found, ones, n_resamples=20000, seed=1)
    lo, hi = ci["recall"]
    se = (hi - lo) / (2 * 1.959964)
    assert se == pytest.approx(np.sqrt(0.9 * 0.1 / 50), rel=0.12)
    assert lo == pytest.approx(0.786398, abs=0.04) and hi == pytest.approx(0.956524, abs=0.05)
    assert ci["precision"] == (1.0, 1.0)


def test_bootstrap_is_wider_when_calls_cluster_in_hours():
    # Same 90 % recall over 500 calls, but in 10 hours of 50 calls each (all found or
    # none): the hour is the unit, so the interval must be far wider than binomial.
    calls = np.full(10, 50.0)
    found = np.r_[np.full(9, 50.0), 0.0]
    ci = bootstrap_over_hours(found, found, found, calls, n_resamples=5000, seed=2)
    lo, hi = ci["recall"]
    binomial_width = 2 * 1.96 * np.sqrt(0.9 * 0.1 / 500)
    assert hi - lo > 4 * binomial_width


def test_hour_presence_on_a_duty_cycled_day():
    # Worked by hand from docs/evaluation.md §2 "Hour presence" (a clock hour with effort is
    # present when a call starts in it, detected when a detection does; only hours with
    # effort count). A day recorded 10 minutes every second hour: 12 hours hold effort (0, 2, ..., 22).
    effort = np.arange(0, 24, 2)
    # Calls start in hours 2, 6, 6, 10; detections at the threshold in 2, 10, 14.
    calls = np.array([2, 6, 6, 10])
    dets = np.array([2, 10, 10, 14])
    r = hour_presence(effort, calls, dets)
    assert r["effort_hours"] == 12 and r["present_hours"] == 3 and r["detected_hours"] == 3
    assert r["true_positive_hours"] == 2 and r["true_negative_hours"] == 12 - 4
    assert r["precision"] == pytest.approx(2 / 3) and r["recall"] == pytest.approx(2 / 3)
    # An hour without effort never counts, even if something claims to be in it.
    r2 = hour_presence(effort, np.r_[calls, 5], np.r_[dets, 7])
    assert r2 == r


def test_wilson_interval_matches_published_values():
    # REFERENCES §6.1 (Wilson 1927; Newcombe 1998 Table II): 81/263 -> 0.255289-0.366210, 0/10 -> 0-0.277533.
    lo, hi = wilson_interval(np.array([81, 0, 45]), np.array([263, 10, 50]))
    assert lo[0] == pytest.approx(0.255289, abs=1e-6) and hi[0] == pytest.approx(0.366210, abs=1e-6)
    assert lo[1] == pytest.approx(0.0, abs=1e-12) and hi[1] == pytest.approx(0.277533, abs=1e-6)
    ci = binomtest(45, 50).proportion_ci(confidence_level=0.95, method="wilson")
    assert lo[2] == pytest.approx(ci.low, abs=1e-12) and hi[2] == pytest.approx(ci.high, abs=1e-12)


def test_recall_by_bin_counts_each_call_once():
    # Worked by hand from docs/evaluation.md §2 (calls, calls found and recall per bin) and
    # recall_by_bin's docstring (values outside the edges go to the end bins, NaN is left out).
    snr = np.array([-12.0, -3.0, -1.0, 2.0, 4.0, 9.0, 25.0, np.nan])
    found = np.array([False, False, True, True, True, True, True, False])
    r = recall_by_bin(snr, found, np.array([-10.0, 0.0, 5.0, 10.0]))
    # -12 goes to the first bin, 25 to the last; NaN is left out.
    assert list(r["calls"]) == [3, 2, 2]
    assert list(r["found"]) == [1, 2, 2]
    assert r["recall"][0] == pytest.approx(1 / 3)
    assert r["calls"].sum() == 7


def _brute_force_match(dk, ds, de, dc, tk, ts, te, tol):
    """docs/evaluation.md §1 read literally: one detection at a time, over every call."""
    order = sorted(range(len(dk)), key=lambda i: (-dc[i], ds[i], i))
    taken, match = set(), [-1] * len(dk)
    for i in order:
        best, best_overlap = -1, 0.0
        for j in sorted(range(len(tk)), key=lambda j: (ts[j], j)):
            if tk[j] != dk[i] or j in taken:
                continue
            overlap = min(de[i], te[j] + tol) - max(ds[i], ts[j] - tol)
            if overlap > best_overlap:
                best, best_overlap = j, overlap
        if best >= 0:
            match[i] = best
            taken.add(best)
    return match


def test_matching_equals_the_rule_read_literally_on_random_cases():
    # Crowded random cases (overlapping calls, nested detections, two files, two labels).
    rng = np.random.default_rng(11)
    for _ in range(30):
        n_t, n_d = rng.integers(1, 25), rng.integers(1, 40)
        tk = list(rng.integers(0, 4, n_t))
        ts = rng.uniform(0, 60, n_t)
        te = ts + rng.uniform(0.2, 4.0, n_t)
        dk = list(rng.integers(0, 4, n_d))
        ds = rng.uniform(0, 60, n_d)
        de = ds + rng.uniform(0.2, 6.0, n_d)
        dc = np.round(rng.uniform(0, 1, n_d), 1)  # ties in confidence on purpose
        got = match_detections(dk, ds, de, dc, tk, ts, te, 0.5)
        assert list(got) == _brute_force_match(dk, ds, de, dc, tk, ts, te, 0.5)


def test_one_hour_gives_no_interval_rather_than_a_zero_width_one():
    # Resampling one hour (or one hour that holds anything, among empty ones) repeats the
    # same sums: the percentile interval would be zero-width and look certain. Common
    # practice: no bootstrap interval from a single cluster.
    one = bootstrap_over_hours(np.array([9]), np.array([10]), np.array([9]), np.array([12]), n_resamples=200)
    assert all(np.isnan(v) for v in one["precision"] + one["recall"])
    padded = bootstrap_over_hours(
        np.array([9, 0, 0]), np.array([10, 0, 0]), np.array([9, 0, 0]), np.array([12, 0, 0]), n_resamples=200
    )
    assert all(np.isnan(v) for v in padded["precision"])
    two = bootstrap_over_hours(
        np.array([9, 3]), np.array([10, 6]), np.array([9, 3]), np.array([12, 4]), n_resamples=200
    )
    lo, hi = two["precision"]
    assert lo < hi  # two hours with different precision (0.9 and 0.5) spread the replicates
