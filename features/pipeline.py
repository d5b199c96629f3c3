"""From a sound file to one row of descriptors per analysis window, block by block.

The one path that training and scoring share, so that a window is described the same
way when it is learned and when it is scored. Results do not depend on the block
size: every block reads the context its frames, noise floor and filters need.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import signal
from scipy.ndimage import maximum_filter1d, minimum_filter1d

from .calibration import RecordingChain, band_pressure_fir
from .descriptors import DescriptorSettings, describe_windows
from .levels import power_db
from .noise import noise_floor_db, noise_floor_steps
from .spectrogram import psd_spectrogram
from .streaming import AudioReader

__all__ = ["WindowTable", "describe_file", "window_count", "CLIP_THRESHOLD"]

# A sample at or beyond this magnitude reached the converter's full scale.
CLIP_THRESHOLD = 0.9999


@dataclass(frozen=True, eq=False)
class WindowTable:
    """Descriptors of consecutive analysis windows of one file.

    Attributes
    ----------
    window_index : np.ndarray [shape=(n,)], window numbers from the file's start
    start_s, end_s : np.ndarray [shape=(n,)], s from the file's start
    values : np.ndarray [shape=(n, n_descriptors)], float32, physical units
    clipped : np.ndarray [shape=(n,)], bool, a sample reached full scale in the window
    """

    window_index: np.ndarray
    start_s: np.ndarray
    end_s: np.ndarray
    values: np.ndarray
    clipped: np.ndarray


def _frame_total(n_samples: int, fs: float, settings: DescriptorSettings) -> int:
    grid = settings.grid
    n_fft = grid.window_samples(fs)
    if n_samples < n_fft:
        return 0
    return int(grid.frames_within(0, n_samples, fs)[-1]) + 1


def window_count(n_samples: int, sample_rate_hz: float, settings: DescriptorSettings) -> int:
    """Number of whole analysis windows in a recording of ``n_samples`` samples."""
    frames = _frame_total(n_samples, sample_rate_hz, settings)
    n_w, m = settings.frames_per_window, settings.frames_per_window_hop
    return 0 if frames < n_w else (frames - n_w) // m + 1


def describe_file(
    path: str | Path,
    chain: RecordingChain,
    settings: DescriptorSettings,
    channel: int = 0,
    block_s: float = 600.0,
) -> Iterator[WindowTable]:
    """Describe every analysis window of a file, one block of windows at a time.

    Parameters
    ----------
    path : str or Path, a sound file libsndfile reads
    chain : RecordingChain, the recorder's calibration
    settings : DescriptorSettings
    channel : int
    block_s : float, s, recorded time per block (memory grows with it, results do not)

    Yields
    ------
    WindowTable
        Consecutive windows; together they cover every whole window of the file once.

    Raises
    ------
    AudioReadError
        For an unreadable or truncated file, or a missing channel.
    """
    with AudioReader(path, channel) as reader:
        fs = reader.sample_rate_hz
        settings.grid.check_sample_rate(fs)
        yield from _describe(reader, fs, chain, settings, block_s)


def _describe(
    reader: AudioReader, fs: int, chain: RecordingChain, settings: DescriptorSettings, block_s: float
) -> Iterator[WindowTable]:
    grid = settings.grid
    n_fft = grid.window_samples(fs)
    n_w, m = settings.frames_per_window, settings.frames_per_window_hop
    step, span = settings.frames_per_noise_step, settings.noise_span_frames
    half = span // 2
    f_total = _frame_total(reader.frames, fs, settings)
    k_total = window_count(reader.frames, fs, settings)
    if k_total == 0:
        return
    j_max = (f_total - 1) // step + 1
    window_len = int(round(settings.window_s * fs))
    fir = band_pressure_fir(chain, fs, settings.low_hz, settings.high_hz)
    fir_half = fir.size // 2
    per_block = max(int(round(block_s / settings.window_hop_s)), 1)
    for k0 in range(0, k_total, per_block):
        k1 = min(k0 + per_block, k_total)
        fa, fb = k0 * m, (k1 - 1) * m + n_w  # frames the windows use: [fa, fb)
        j0, j1 = fa // step, min((fb - 1) // step + 1, j_max)
        steps = np.arange(j0, j1 + 1)
        steps = steps[steps <= j_max]
        fr0 = max(min(fa, j0 * step - half), 0)
        fr1 = min(max(fb, steps[-1] * step - half + span), f_total)
        frame_idx = np.arange(fr0, fr1)
        starts = grid.frame_start_samples(frame_idx, fs)
        s0, s1 = int(starts[0]), int(starts[-1]) + n_fft
        samples = reader.read(s0, s1)
        spec = psd_spectrogram(samples, fs, grid, chain, first_sample=s0, frame_index=frame_idx)
        floor_steps = noise_floor_steps(
            spec.psd_db, fr0, f_total, steps, step, span, settings.noise_stride, settings.noise_percentile
        )
        used = slice(fa - fr0, fb - fr0)
        noise = noise_floor_db(floor_steps, steps, step, frame_idx[used])
        k = np.arange(k0, k1)
        first = k * m - fa
        # Waveform measures over each window's samples: band-limited pressure, clipping.
        w_start = grid.frame_start_samples(k * m, fs)
        a, b = int(w_start[0]), int(w_start[-1]) + window_len
        ra, rb = max(a - fir_half, 0), min(b + fir_half, reader.frames)
        raw = samples[ra - s0 : rb - s0] if ra >= s0 and rb <= s1 else reader.read(ra, rb)
        pressure = signal.oaconvolve(raw.astype(np.float64), fir, mode="same")
        p2p, clipped = _window_extremes(pressure, raw, w_start - ra, window_len)
        values = describe_windows(spec.psd_db[:, used], noise, spec.frequency_hz, first, settings, p2p)
        start_s = w_start / fs
        yield WindowTable(k, start_s, start_s + window_len / fs, values, clipped)


def _window_extremes(
    pressure: np.ndarray, raw: np.ndarray, offsets: np.ndarray, length: int
) -> tuple[np.ndarray, np.ndarray]:
    """Peak-to-peak level (dB re 1 µPa) and clip flag of windows [offset, offset + length)."""
    centre = offsets + length // 2
    # With origin 0 a filter of size L at index i covers [i - L//2, i - L//2 + L).
    origin = 0
    hi = maximum_filter1d(pressure, length, mode="nearest", origin=origin)[centre]
    lo = minimum_filter1d(pressure, length, mode="nearest", origin=origin)[centre]
    peak = maximum_filter1d(np.abs(raw), length, mode="nearest", origin=origin)[centre]
    return power_db((hi - lo) ** 2), peak >= CLIP_THRESHOLD
