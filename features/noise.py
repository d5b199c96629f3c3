"""Noise floor per frequency: a running percentile over tens of seconds to minutes.

A low percentile (20th by default) of the PSD over a minute stays on the background
while calls come and go, as long as they fill less than most of that minute.
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from ._validation import ParameterError

__all__ = ["noise_floor_steps", "noise_floor_db", "percentile_to_mean_db"]


def percentile_to_mean_db(percentile: float) -> float:
    """dB to add to a percentile of single-frame PSD values to get the mean noise PSD.

    Noise power in one bin of one frame is exponentially distributed (chi-squared, two
    degrees of freedom), whose p-quantile is ``-ln(1 - p)`` times its mean.
    """
    return float(-10.0 * np.log10(-np.log(1.0 - percentile / 100.0)))


def noise_floor_steps(
    psd_db: np.ndarray,
    first_frame: int,
    n_frames_total: int,
    steps: np.ndarray,
    step_frames: int,
    span_frames: int,
    stride: int,
    percentile: float,
    first_available: int = 0,
) -> np.ndarray:
    """Percentile of the PSD around each step, dB re 1 µPa²/Hz.

    Parameters
    ----------
    psd_db : np.ndarray [shape=(n_freq, n_frames)], dB re 1 µPa²/Hz
        Consecutive frames ``first_frame .. first_frame + n_frames - 1`` of a recording.
    first_frame : int
    n_frames_total : int, frames in the whole recording (edges truncate the span)
    steps : np.ndarray [shape=(n_steps,)], step numbers; step j is centred on frame
        ``j * step_frames``
    step_frames, span_frames, stride : int, frames
        Step spacing, span of the percentile, and the subsampling of frames inside the
        span (only frames whose global number is a multiple of ``stride`` are used, so
        the result does not depend on where a block starts).
    percentile : float, 0..100
    first_available : int, first frame of the recording (spans are cut there and at
        ``n_frames_total``)

    Returns
    -------
    floor : np.ndarray [shape=(n_freq, n_steps)], float32, dB re 1 µPa²/Hz
        The mean noise PSD: the percentile plus :func:`percentile_to_mean_db`.
    """
    n_freq, n_frames = psd_db.shape
    steps = np.asarray(steps, dtype=np.int64)
    half = span_frames // 2
    lo = np.maximum(steps * step_frames - half, first_available)
    hi = np.minimum(steps * step_frames - half + span_frames, n_frames_total)
    lo = lo + (-lo) % stride  # first multiple of stride inside the span
    if np.any(lo - first_frame < 0) or np.any(hi - first_frame > n_frames):
        raise ParameterError("the noise span of a step reaches outside the frames given")
    floor = np.empty((n_freq, steps.size), dtype=np.float32)
    count = (hi - lo + stride - 1) // stride
    full = count == (span_frames + stride - 1) // stride
    # Steps whose whole span lies inside the recording: one strided sliding view.
    if np.any(full):
        sub_first = first_frame + (-first_frame) % stride
        sub = psd_db[:, sub_first - first_frame :: stride]
        width = int(count[full][0])
        if sub.shape[1] >= width:
            view = sliding_window_view(sub, width, axis=1)
            pos = (lo[full] - sub_first) // stride
            floor[:, full] = np.percentile(view[:, pos, :], percentile, axis=2)
    # Steps near the recording's ends use the frames that exist (a handful per file).
    for j in np.flatnonzero(~full):
        frames = psd_db[:, lo[j] - first_frame : hi[j] - first_frame : stride]
        floor[:, j] = np.percentile(frames, percentile, axis=1) if frames.shape[1] else np.nan
    return floor + np.float32(percentile_to_mean_db(percentile))


def noise_floor_db(
    floor_steps_db: np.ndarray, steps: np.ndarray, step_frames: int, frame_index: np.ndarray
) -> np.ndarray:
    """Noise floor at each frame: linear interpolation in time between steps.

    Parameters
    ----------
    floor_steps_db : np.ndarray [shape=(n_freq, n_steps)], dB re 1 µPa²/Hz
    steps : np.ndarray [shape=(n_steps,)], consecutive step numbers
    step_frames : int
    frame_index : np.ndarray [shape=(n_frames,)], global frame numbers inside the steps' range

    Returns
    -------
    floor : np.ndarray [shape=(n_freq, n_frames)], float32, dB re 1 µPa²/Hz
    """
    pos = np.asarray(frame_index, dtype=np.float64) / step_frames - steps[0]
    j = np.clip(np.floor(pos).astype(np.int64), 0, max(steps.size - 2, 0))
    w = np.clip(pos - j, 0.0, 1.0).astype(np.float32)
    if steps.size == 1:
        return np.repeat(floor_steps_db[:, :1], len(frame_index), axis=1)
    return floor_steps_db[:, j] * (1.0 - w) + floor_steps_db[:, j + 1] * w
