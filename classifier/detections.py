"""From window probabilities to detections: peak-picking over consecutive windows."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import find_peaks

from .labels import BACKGROUND

__all__ = ["Candidate", "pick_detections", "short_call_factor", "DUPLICATE_OVERLAP"]

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


def short_call_factor(duration_s: np.ndarray, short_call_s: float) -> np.ndarray:
    """Factor on the confidence of detections shorter than a whole call of their class.

    Parameters
    ----------
    duration_s : np.ndarray, s, the detections' durations
    short_call_s : float, s, the duration below which a detection counts as a fragment
        (a share of the class's median labelled call); 0 or less: no factor

    Returns
    -------
    np.ndarray, ``min(1, duration_s / short_call_s)``: 1 for a detection at least
    ``short_call_s`` long, falling in proportion to the duration below it
    """
    d = np.asarray(duration_s, dtype=float)
    if short_call_s <= 0:
        return np.ones_like(d)
    return np.clip(d / short_call_s, 0.0, 1.0)


def pick_detections(
    proba: np.ndarray,
    classes: list[str],
    segment_s: np.ndarray,
    band_hz: np.ndarray,
    floor: float,
    active: np.ndarray | None = None,
    short_call_s: dict[str, float] | None = None,
) -> list[Candidate]:
    """Detections of every class from consecutive windows' probabilities.

    Parameters
    ----------
    proba : np.ndarray [shape=(n_windows, n_classes)], calibrated probabilities
    classes : list of str, column labels (``background`` is never detected)
    segment_s : np.ndarray [shape=(n_windows, 2)], s, where each window's main trace lies
    band_hz : np.ndarray [shape=(n_windows, 2)], Hz, the trace's lowest and highest frequency
    floor : float, probability below which nothing is kept
    active : np.ndarray [shape=(n_windows,)] of bool, optional; windows whose trace stands
        above the noise floor (their segment and band say where a call is). Without it,
        every window counts as active.
    short_call_s : dict of str to float, optional; s, per class, the duration below
        which a detection's confidence is scaled down by :func:`short_call_factor`
        (classes left out: no factor; see Notes)

    Returns
    -------
    list of Candidate, by start time

    Notes
    -----
    Per class, each local maximum of the probability over consecutive windows that
    reaches ``floor`` and stands at least ``floor / 2`` above the dips on both sides
    (its prominence) is one detection, so two calls a few seconds apart, with a dip
    between them, stay two. A peak is kept only where its class is the most probable
    call class in that window. Its time and band are the union of the traces of the
    windows that saw the same call: going out from the peak window while the class's
    probability stays at or above half the peak's (and the floor) and each window's
    trace overlaps in time what is gathered so far, so a call longer than one window's
    view is spanned whole. Of two detections of one class whose intervals overlap by
    more than ``DUPLICATE_OVERLAP`` of the shorter (the same call seen from two peaks),
    only the more confident is kept.

    A window scores what it sees; a fragment (a transient, a snatch of another animal's
    sweep, the loud part of a call masked elsewhere) can look like a call to it. The
    detection's extent is the first place the whole event is seen, so a detection
    shorter than ``short_call_s`` of its class keeps only that share of its
    probability above ``floor`` (a common-practice minimum-duration criterion, made
    gradual so that detections of one length keep their order):
    ``floor + (p - floor) * factor``. Every peak that reached the floor is still kept, at
    or above it, and duplicates are resolved on the scaled confidence, so a whole call
    wins over a louder fragment of it.
    """
    out: list[Candidate] = []
    calls = [j for j, c in enumerate(classes) if c != BACKGROUND]
    if proba.shape[0] == 0 or not calls:
        return out
    call_proba = proba[:, calls]
    best_call = np.asarray(calls)[np.argmax(call_proba, axis=1)]
    active = np.ones(proba.shape[0], dtype=bool) if active is None else np.asarray(active, dtype=bool)
    for j in calls:
        p = proba[:, j]
        # Pad with zeros so that a run touching either end of the file still has a peak.
        padded = np.concatenate([[0.0], p, [0.0]])
        peaks, _ = find_peaks(padded, height=floor, prominence=floor / 2.0)
        peaks = peaks - 1
        peaks = peaks[best_call[peaks] == j]
        extent = np.array([_call_extent(i, p, segment_s, band_hz, active, floor) for i in peaks]).reshape(-1, 4)
        # Scaled above the floor, so that every peak that reached it is still stored; an
        # unscaled peak stores p itself (floor + (p - floor) * 1 can differ by an ulp).
        factor = short_call_factor(extent[:, 1] - extent[:, 0], (short_call_s or {}).get(classes[j], 0.0))
        confidence = np.where(factor < 1.0, floor + (p[peaks] - floor) * factor, p[peaks])
        for k in _suppress_duplicates(confidence, extent[:, :2]):
            out.append(
                Candidate(
                    float(extent[k, 0]),
                    float(extent[k, 1]),
                    float(extent[k, 2]),
                    float(extent[k, 3]),
                    classes[j],
                    float(confidence[k]),
                    int(peaks[k]),
                )
            )
    out.sort(key=lambda c: (c.start_s, c.label))
    return out


def _call_extent(
    i: int, p: np.ndarray, segment_s: np.ndarray, band_hz: np.ndarray, active: np.ndarray, floor: float
) -> tuple[float, float, float, float]:
    """Start, end (s) and band (Hz) of the call whose probability peaks at window ``i``.

    A loop over the few windows around one detection (not over frames): the windows
    on either side join while they hold the call (probability at least half the peak's),
    see a trace, and that trace overlaps in time what the earlier ones saw.
    """
    a, b = segment_s[i]
    lo, hi = band_hz[i]
    if not active[i]:
        return float(a), float(b), float(lo), float(hi)
    keep = max(floor, 0.5 * p[i])
    for step in (-1, 1):
        k = i + step
        while 0 <= k < p.size and p[k] >= keep and active[k]:
            ka, kb = segment_s[k]
            if kb < a or ka > b:
                break
            a, b = min(a, ka), max(b, kb)
            lo, hi = min(lo, band_hz[k, 0]), max(hi, band_hz[k, 1])
            k += step
    return float(a), float(b), float(lo), float(hi)


def _suppress_duplicates(confidence: np.ndarray, interval_s: np.ndarray) -> list[int]:
    """Indices left after dropping each one that overlaps a more confident kept one.

    Overlap is the shared time over the shorter interval; ties in confidence keep the
    earlier one, so the result does not depend on how the windows were split.
    """
    order = np.lexsort((np.arange(confidence.size), -confidence))
    kept: list[int] = []
    for i in order:
        a, b = interval_s[i]
        if kept:
            ka, kb = interval_s[kept, 0], interval_s[kept, 1]
            shared = np.minimum(b, kb) - np.maximum(a, ka)
            shorter = np.maximum(np.minimum(b - a, kb - ka), 1e-9)
            if np.any(shared > DUPLICATE_OVERLAP * shorter):
                continue
        kept.append(int(i))
    return sorted(kept)
