"""Judging detections against truth (docs/evaluation.md), and the figures of merit built on it.

Pure functions on arrays: matching, average precision, precision-recall curves,
threshold tables, bootstrap intervals over recording hours, hour presence and recall
per bin of signal-to-noise ratio or received level. Reading the store, the audio and
writing reports is done in :mod:`callsieve.classifier.evaluate`.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass

import numpy as np

__all__ = [
    "match_detections",
    "PrecisionRecall",
    "precision_recall",
    "average_precision",
    "threshold_table",
    "bootstrap_over_hours",
    "hour_presence",
    "recall_by_bin",
    "wilson_interval",
]


def match_detections(
    det_key: np.ndarray,
    det_start_s: np.ndarray,
    det_end_s: np.ndarray,
    det_confidence: np.ndarray,
    truth_key: np.ndarray,
    truth_start_s: np.ndarray,
    truth_end_s: np.ndarray,
    tolerance_s: float = 0.5,
) -> np.ndarray:
    """Match detections to truth calls one-to-one by the matching rule of docs/evaluation.md.

    Parameters
    ----------
    det_key, truth_key : sequence of hashable [length n]
        Where a detection or call may match: the same (deployment, file, label).
    det_start_s, det_end_s, truth_start_s, truth_end_s : np.ndarray, s from the file's start
    det_confidence : np.ndarray [shape=(n_det,)], 0..1
    tolerance_s : float, s, widening of each call's interval on both sides

    Returns
    -------
    match : np.ndarray [shape=(n_det,)], int
        Index of the truth call each detection matched, or -1.

    Notes
    -----
    Detections are taken in descending confidence (ties: earlier start first); each
    takes, among the still unmatched calls whose widened interval overlaps it, the one
    with the largest overlap with that widened interval (ties: the earliest call).
    """
    det_start_s, det_end_s = np.asarray(det_start_s, float), np.asarray(det_end_s, float)
    truth_start_s, truth_end_s = np.asarray(truth_start_s, float), np.asarray(truth_end_s, float)
    det_confidence = np.asarray(det_confidence, float)
    match = np.full(det_start_s.size, -1, dtype=np.int64)
    calls: dict = defaultdict(list)
    for i, k in enumerate(truth_key):
        calls[k].append(i)
    dets: dict = defaultdict(list)
    for i, k in enumerate(det_key):
        if k in calls:
            dets[k].append(i)
    for k, d_idx in dets.items():
        t_idx = np.asarray(calls[k])
        t_idx = t_idx[np.lexsort((t_idx, truth_start_s[t_idx]))]  # earliest call first
        lo = truth_start_s[t_idx] - tolerance_s
        hi = truth_end_s[t_idx] + tolerance_s
        free = np.ones(t_idx.size, dtype=bool)
        d_idx = np.asarray(d_idx)
        # Only detections that overlap some widened call can match: found at once with the
        # calls sorted by start and the running maximum of their ends.
        by_lo = np.argsort(lo, kind="stable")
        reach = np.maximum.accumulate(hi[by_lo])
        before = np.searchsorted(lo[by_lo], det_end_s[d_idx], side="left")  # calls starting before the end
        can = (before > 0) & (reach[np.maximum(before - 1, 0)] > det_start_s[d_idx])
        d_idx = d_idx[can]
        order = d_idx[np.lexsort((d_idx, det_start_s[d_idx], -det_confidence[d_idx]))]
        for i in order:
            overlap = np.minimum(det_end_s[i], hi) - np.maximum(det_start_s[i], lo)
            overlap = np.where(free, overlap, 0.0)
            j = int(np.argmax(overlap))
            if overlap[j] > 0.0:
                match[i] = t_idx[j]
                free[j] = False
    return match


@dataclass(frozen=True)
class PrecisionRecall:
    """Precision and recall at every distinct confidence of a ranked list of detections.

    Attributes
    ----------
    threshold : np.ndarray [shape=(m,)], descending distinct confidences
    detections, true_positives : np.ndarray [shape=(m,)], int, counts at ``>= threshold``
    precision, recall : np.ndarray [shape=(m,)]
    n_truth : int, truth calls (recall's denominator)
    """

    threshold: np.ndarray
    detections: np.ndarray
    true_positives: np.ndarray
    precision: np.ndarray
    recall: np.ndarray
    n_truth: int

    @property
    def f1(self) -> np.ndarray:
        """Harmonic mean of precision and recall at each threshold (0 where both are 0)."""
        s = self.precision + self.recall
        return np.where(s > 0, 2 * self.precision * self.recall / np.where(s > 0, s, 1.0), 0.0)


def precision_recall(confidence: np.ndarray, is_true: np.ndarray, n_truth: int) -> PrecisionRecall:
    """Precision-recall curve of detections ranked by confidence.

    Parameters
    ----------
    confidence : np.ndarray [shape=(n,)], 0..1
    is_true : np.ndarray [shape=(n,)], bool, the detection matched a truth call
    n_truth : int, truth calls, matched or not; unmatched calls are misses at every threshold
    """
    confidence = np.asarray(confidence, float)
    is_true = np.asarray(is_true, bool)
    order = np.argsort(-confidence, kind="stable")
    c, t = confidence[order], is_true[order]
    tp = np.cumsum(t)
    # The last detection at each distinct confidence closes that threshold's step.
    last = np.flatnonzero(np.r_[c[1:] != c[:-1], True]) if c.size else np.empty(0, dtype=int)
    n = last + 1
    tp = tp[last]
    recall = tp / n_truth if n_truth > 0 else np.full(tp.shape, np.nan)
    return PrecisionRecall(c[last], n, tp, tp / n, recall, int(n_truth))


def average_precision(curve: PrecisionRecall) -> float:
    """Step-wise area under the precision-recall curve: Σ (R_n − R_{n−1}) P_n.

    The definition of ``sklearn.metrics.average_precision_score``, with recall over all
    truth calls, so a list that never finds some calls cannot reach recall 1.
    NaN when there is no truth call.
    """
    if curve.n_truth == 0:
        return float("nan")
    gained = np.diff(np.r_[0.0, curve.recall])
    return float(np.sum(gained * curve.precision))


def threshold_table(
    confidence: np.ndarray, is_true: np.ndarray, n_truth: int, thresholds: np.ndarray
) -> dict[str, np.ndarray]:
    """Detections, true positives, precision, recall and F1 at each given threshold.

    A detection counts at threshold t when its confidence is >= t. Precision is NaN
    where nothing is detected.
    """
    confidence = np.asarray(confidence, float)
    thresholds = np.asarray(thresholds, float)
    order = np.argsort(confidence, kind="stable")
    c, t = confidence[order], np.asarray(is_true, bool)[order]
    tp_above = np.r_[np.cumsum(t[::-1])[::-1], 0]  # true positives at index >= i
    first = np.searchsorted(c, thresholds, side="left")
    n = c.size - first
    tp = tp_above[first]
    with np.errstate(invalid="ignore", divide="ignore"):
        precision = np.where(n > 0, tp / np.maximum(n, 1), np.nan)
        recall = tp / n_truth if n_truth > 0 else np.full(tp.shape, np.nan)
        s = precision + recall
        f1 = np.where(s > 0, 2 * precision * recall / np.where(s > 0, s, 1.0), 0.0)
    return {
        "threshold": thresholds,
        "detections": n,
        "true_positives": tp,
        "precision": precision,
        "recall": recall,
        "f1": f1,
    }


#: Hours holding detections or calls that an interval by resampling hours needs.
MIN_BOOTSTRAP_HOURS = 2


def bootstrap_over_hours(
    tp_per_hour: np.ndarray,
    detections_per_hour: np.ndarray,
    found_per_hour: np.ndarray,
    calls_per_hour: np.ndarray,
    n_resamples: int = 2000,
    confidence_level: float = 0.95,
    seed: int = 0,
) -> dict[str, tuple[float, float]]:
    """Percentile bootstrap intervals of precision and recall, resampling recording hours.

    Calls within an hour are not independent (bouts, shared noise), so the hour is the
    unit of resampling: each replicate draws as many hours as there are, with
    replacement, and sums their counts.

    Parameters
    ----------
    tp_per_hour : np.ndarray [shape=(n_hours,)], true positive detections starting in each hour
    detections_per_hour : np.ndarray [shape=(n_hours,)], detections starting in each hour
    found_per_hour : np.ndarray [shape=(n_hours,)], truth calls in each hour that were matched
    calls_per_hour : np.ndarray [shape=(n_hours,)], truth calls starting in each hour
    n_resamples : int
    confidence_level : float, 0..1
    seed : int, of the resampling (fixed, so reports can be reproduced)

    Returns
    -------
    dict with ``precision`` and ``recall``: (low, high), NaN where undefined
    """
    counts = np.column_stack([tp_per_hour, detections_per_hour, found_per_hour, calls_per_hour]).astype(float)
    n_hours = counts.shape[0]
    # Resampling fewer than two hours that hold anything gives the same sums every time:
    # a zero-width interval that would look certain. No interval is honest there.
    if np.count_nonzero(counts[:, 1] + counts[:, 3]) < MIN_BOOTSTRAP_HOURS:
        return {"precision": (float("nan"),) * 2, "recall": (float("nan"),) * 2}
    rng = np.random.default_rng(seed)
    sums = np.empty((n_resamples, 4))
    # Replicates in chunks: the weight matrix of a year of hours stays small.
    chunk = max(1, 2_000_000 // n_hours)
    for a in range(0, n_resamples, chunk):
        b = min(a + chunk, n_resamples)
        weights = rng.multinomial(n_hours, np.full(n_hours, 1.0 / n_hours), size=b - a)
        sums[a:b] = weights @ counts
    alpha = (1.0 - confidence_level) / 2.0
    out = {}
    with np.errstate(invalid="ignore", divide="ignore"):
        for name, num, den in (("precision", 0, 1), ("recall", 2, 3)):
            ratio = sums[:, num] / sums[:, den]
            ratio = ratio[np.isfinite(ratio)]
            out[name] = (
                (float(np.quantile(ratio, alpha)), float(np.quantile(ratio, 1.0 - alpha)))
                if ratio.size
                else (float("nan"), float("nan"))
            )
    return out


def hour_presence(effort_hours: np.ndarray, call_hours: np.ndarray, detection_hours: np.ndarray) -> dict[str, float]:
    """Hour-presence precision and recall (docs/evaluation.md).

    Parameters
    ----------
    effort_hours : np.ndarray, int, hours (any integer numbering, e.g. hours since the
        epoch) that hold recording effort
    call_hours : np.ndarray, int, the hour each truth call starts in
    detection_hours : np.ndarray, int, the hour each detection at the chosen threshold starts in

    Returns
    -------
    dict: ``effort_hours``, ``present_hours`` (truly present), ``detected_hours``,
    ``true_positive_hours``, ``true_negative_hours``, ``precision``, ``recall`` (NaN where
    undefined); only hours with effort count.
    """
    effort = np.unique(np.asarray(effort_hours, dtype=np.int64))
    present = np.intersect1d(np.asarray(call_hours, dtype=np.int64), effort)
    detected = np.intersect1d(np.asarray(detection_hours, dtype=np.int64), effort)
    both = np.intersect1d(present, detected).size
    neither = effort.size - np.union1d(present, detected).size
    return {
        "effort_hours": int(effort.size),
        "present_hours": int(present.size),
        "detected_hours": int(detected.size),
        "true_positive_hours": int(both),
        "true_negative_hours": int(neither),
        "precision": both / detected.size if detected.size else float("nan"),
        "recall": both / present.size if present.size else float("nan"),
    }


def wilson_interval(k: np.ndarray, n: np.ndarray, confidence_level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval of the proportions k/n (NaN where n = 0).

    Wilson (1927); formula as in REFERENCES §6.1.
    """
    from scipy.stats import norm

    k, n = np.asarray(k, float), np.asarray(n, float)
    z = float(norm.ppf(1.0 - (1.0 - confidence_level) / 2.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        p = k / n
        centre = (p + z * z / (2 * n)) / (1 + z * z / n)
        half = z / (1 + z * z / n) * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
        return np.clip(centre - half, 0.0, 1.0), np.clip(centre + half, 0.0, 1.0)


def recall_by_bin(value: np.ndarray, found: np.ndarray, edges: np.ndarray) -> dict[str, np.ndarray]:
    """Recall per bin of a property of the truth calls (SNR in dB, received level in dB).

    Parameters
    ----------
    value : np.ndarray [shape=(n_calls,)], the property (NaN: not measured, left out)
    found : np.ndarray [shape=(n_calls,)], bool, the call was matched at the chosen threshold
    edges : np.ndarray [shape=(n_bins + 1,)], ascending; values outside go to the end bins

    Returns
    -------
    dict of arrays per bin: ``low``, ``high``, ``calls``, ``found``, ``recall``,
    ``recall_low``, ``recall_high`` (Wilson 95 %)
    """
    value = np.asarray(value, float)
    found = np.asarray(found, bool)
    edges = np.asarray(edges, float)
    ok = np.isfinite(value)
    idx = np.clip(np.searchsorted(edges, value[ok], side="right") - 1, 0, edges.size - 2)
    calls = np.bincount(idx, minlength=edges.size - 1)
    hits = np.bincount(idx, weights=found[ok].astype(float), minlength=edges.size - 1).astype(int)
    low, high = wilson_interval(hits, calls)
    with np.errstate(invalid="ignore", divide="ignore"):
        recall = np.where(calls > 0, hits / np.maximum(calls, 1), np.nan)
    return {
        "low": edges[:-1],
        "high": edges[1:],
        "calls": calls,
        "found": hits,
        "recall": recall,
        "recall_low": low,
        "recall_high": high,
    }
