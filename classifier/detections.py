"""From window probabilities to detections: peak-picking over consecutive windows."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import find_peaks

from .labels import BACKGROUND

__all__ = ["Candidate", "pick_detections", "DUPLICATE_OVERLAP"]

# Two peaks of one class whose intervals share more than this fraction of the shorter one
# are one call seen from two windows: the less confident is dropped (non-maximum
# suppression; 0.5 as in common practice for overlap criteria).
DUPLICATE_OVERLAP = 0.5


@dataclass(frozen=True)
class Candidate:
    """One detection before its levels are measured: times in s from the file's start."""

    start_s: float
    end_s: float
    low_hz: float
    high_hz: float
    label: str
    confidence: float
    window: int  # index (in the file's window arrays) of the peak window


def pick_detections(
    proba: np.ndarray,
    classes: list[str],
    segment_s: np.ndarray,
    band_hz: np.ndarray,
    floor: float,
) -> list[Candidate]:
    """Detections of every class from consecutive windows' probabilities.

    Parameters
    ----------
    proba : np.ndarray [shape=(n_windows, n_classes)], calibrated probabilities
    classes : list of str, column labels (``background`` is never detected)
    segment_s : np.ndarray [shape=(n_windows, 2)], s, where each window's main trace lies
    band_hz : np.ndarray [shape=(n_windows, 2)], Hz, the trace's lowest and highest frequency
    floor : float, probability below which nothing is kept

    Returns
    -------
    list of Candidate, by start time

    Notes
    -----
    Per class, each local maximum of the probability over consecutive windows that
    reaches ``floor`` and stands at least ``floor / 2`` above the dips on both sides
    (its prominence) is one detection, so two calls a few seconds apart, with a dip
    between them, stay two. A peak is kept only where its class is the most probable
    call class in that window; its time and band are those of that window's trace.
    Of two peaks of one class whose intervals overlap by more than
    ``DUPLICATE_OVERLAP`` of the shorter (the same trace seen from two windows), only
    the more confident is kept.
    """
    out: list[Candidate] = []
    calls = [j for j, c in enumerate(classes) if c != BACKGROUND]
    if proba.shape[0] == 0 or not calls:
        return out
    call_proba = proba[:, calls]
    best_call = np.asarray(calls)[np.argmax(call_proba, axis=1)]
    for j in calls:
        p = proba[:, j]
        # Pad with zeros so that a run touching either end of the file still has a peak.
        padded = np.concatenate([[0.0], p, [0.0]])
        peaks, _ = find_peaks(padded, height=floor, prominence=floor / 2.0)
        peaks = peaks - 1
        peaks = peaks[best_call[peaks] == j]
        for i in _suppress_duplicates(peaks, p, segment_s):
            low, high = band_hz[i]
            out.append(
                Candidate(
                    float(segment_s[i, 0]),
                    float(segment_s[i, 1]),
                    float(low),
                    float(high),
                    classes[j],
                    float(p[i]),
                    int(i),
                )
            )
    out.sort(key=lambda c: (c.start_s, c.label))
    return out


def _suppress_duplicates(peaks: np.ndarray, p: np.ndarray, segment_s: np.ndarray) -> list[int]:
    """Peaks left after dropping each one that overlaps a more confident kept peak.

    Overlap is the shared time over the shorter interval; ties in confidence keep the
    earlier window, so the result does not depend on how the windows were split.
    """
    order = peaks[np.lexsort((peaks, -p[peaks]))]
    kept: list[int] = []
    for i in order:
        a, b = segment_s[i]
        if kept:
            ka, kb = segment_s[kept, 0], segment_s[kept, 1]
            shared = np.minimum(b, kb) - np.maximum(a, ka)
            shorter = np.maximum(np.minimum(b - a, kb - ka), 1e-9)
            if np.any(shared > DUPLICATE_OVERLAP * shorter):
                continue
        kept.append(int(i))
    return sorted(kept)
