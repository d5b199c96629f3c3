"""Floor-excess events: how far in-band power rises over its own running floor.

The simplest detector a model must beat. Per frame, the PSD summed over the analysis
band; its floor, a running low percentile of that series; the excess, their ratio in
dB. A stretch of frames is one event when its excess climbs past a start level and it
ends where the excess sinks under a lower hold level, so one call is not cut into
pieces by the flicker of its own level.
"""

from __future__ import annotations

import numpy as np

from ._validation import ParameterError
from .noise import noise_floor_db, noise_floor_steps, percentile_to_mean_db

__all__ = ["band_power_db", "running_floor_db", "excess_events"]


def band_power_db(psd_db: np.ndarray, frequency_hz: np.ndarray, low_hz: float, high_hz: float) -> np.ndarray:
    """In-band power of each frame, dB re 1 µPa².

    Parameters
    ----------
    psd_db : np.ndarray [shape=(n_freq, n_frames)], dB re 1 µPa²/Hz
    frequency_hz : np.ndarray [shape=(n_freq,)], Hz, evenly spaced bin centres
    low_hz, high_hz : float, Hz, the band (bins whose centre lies inside)
    """
    f = np.asarray(frequency_hz, dtype=float)
    inside = (f >= low_hz) & (f <= high_hz)
    if not inside.any():
        raise ParameterError(f"no spectrogram bin lies in {low_hz:g}..{high_hz:g} Hz")
    df = float(f[1] - f[0]) if f.size > 1 else 1.0
    power = np.sum(10.0 ** (np.asarray(psd_db, dtype=np.float64)[inside] / 10.0), axis=0) * df
    return 10.0 * np.log10(np.maximum(power, 1e-30))


def running_floor_db(
    level_db: np.ndarray, span_frames: int, step_frames: int, stride: int, percentile: float
) -> np.ndarray:
    """Running percentile of a level series, interpolated between steps, dB.

    Parameters
    ----------
    level_db : np.ndarray [shape=(n_frames,)], dB, consecutive frames of one recording
    span_frames, step_frames, stride : int, frames
        Span of the percentile, spacing of its estimates, subsampling inside the span.
    percentile : float, 0..100

    Returns
    -------
    floor : np.ndarray [shape=(n_frames,)], dB, the percentile itself (no conversion to
    a mean: a band sum is not exponentially distributed)
    """
    level = np.asarray(level_db, dtype=np.float32)[None, :]
    n = level.shape[1]
    if n == 0:
        return np.empty(0)
    steps = np.arange(0, (n - 1) // step_frames + 2)
    floor = noise_floor_steps(level, 0, n, steps, step_frames, span_frames, stride, percentile)
    floor = floor - np.float32(percentile_to_mean_db(percentile))
    # The last step may lie past the end; its span is cut at the end like the first's.
    return noise_floor_db(floor, steps, step_frames, np.arange(n))[0].astype(np.float64)


def excess_events(
    excess_db: np.ndarray,
    frame_start_s: np.ndarray,
    frame_s: float,
    start_excess_db: float = 3.0,
    hold_excess_db: float = 1.0,
    shortest_event_s: float = 0.25,
    join_gap_s: float = 0.25,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Stretches of frames whose in-band excess over the floor climbs past ``start_excess_db``.

    A stretch is a run of frames whose excess stays at or above ``hold_excess_db`` and
    that reaches ``start_excess_db`` somewhere (two levels, so a call's own flicker does
    not split it); stretches separated by less than ``join_gap_s`` become one, and
    stretches shorter than ``shortest_event_s`` are dropped.

    Parameters
    ----------
    excess_db : np.ndarray [shape=(n_frames,)], dB, band power minus its running floor
    frame_start_s : np.ndarray [shape=(n_frames,)], s, start of each (consecutive) frame
    frame_s : float, s, frame length
    start_excess_db, hold_excess_db : float, dB, ``hold_excess_db <= start_excess_db``
    shortest_event_s, join_gap_s : float, s

    Returns
    -------
    start_s, end_s, peak_db : np.ndarray [shape=(n_events,)]
        Times of each event, and its highest excess (the detector's score).
    """
    if hold_excess_db > start_excess_db:
        raise ParameterError(
            f"hold_excess_db ({hold_excess_db:g}) must not exceed start_excess_db ({start_excess_db:g})"
        )
    x = np.asarray(excess_db, dtype=float)
    t = np.asarray(frame_start_s, dtype=float)
    empty = np.empty(0)
    if x.size == 0:
        return empty, empty, empty
    above = np.r_[False, x >= hold_excess_db, False].astype(np.int8)
    edges = np.diff(above)
    first, stop = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)  # runs [first, stop)
    if first.size == 0:
        return empty, empty, empty
    peak = _run_max(x, first, stop)
    keep = peak >= start_excess_db
    first, stop, peak = first[keep], stop[keep], peak[keep]
    if first.size == 0:
        return empty, empty, empty
    start_s = t[first]
    end_s = t[stop - 1] + frame_s
    new = np.r_[True, start_s[1:] - end_s[:-1] >= join_gap_s]
    g_start = start_s[new]
    g_end = np.maximum.reduceat(end_s, np.flatnonzero(new))
    g_peak = np.maximum.reduceat(peak, np.flatnonzero(new))
    long_enough = g_end - g_start >= shortest_event_s
    return g_start[long_enough], g_end[long_enough], g_peak[long_enough]


def _run_max(x: np.ndarray, first: np.ndarray, stop: np.ndarray) -> np.ndarray:
    """Maximum of x over each run [first[i], stop[i]) (runs disjoint, ascending)."""
    # Frames between runs set to -inf, so a reduce from each run's start to the next
    # one's sees only its own run.
    inside = np.zeros(x.size + 1, dtype=np.int64)
    inside[first] += 1
    inside[stop] -= 1
    masked = np.where(np.cumsum(inside)[:-1] > 0, x, -np.inf)
    return np.maximum.reduceat(masked, first)
