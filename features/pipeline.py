"""From a sound file to one row of descriptors per analysis window, block by block.

The one path that training and scoring share, so that a window is described the same
way when it is learned and when it is scored. Results do not depend on the block
size: every block reads the context its frames, noise floor and filters need.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import signal

from .calibration import RecordingChain, band_pressure_fir
from .descriptors import DescriptorSettings, describe_windows
from .levels import power_db
from .noise import noise_floor_db, noise_floor_steps
from .screening import frames_of_windows, screen_values
from .spectrogram import psd_spectrogram
from .streaming import AudioReader, SegmentReader

__all__ = ["WindowTable", "describe_file", "describe_stream", "decimation_factor", "CLIP_THRESHOLD"]

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
    segment_s : np.ndarray [shape=(n, 2)], s from the file's start: start and end of
        each window's main trace (the window itself where it has none)
    noise_psd : np.ndarray [shape=(n, n_freq)], float32, µPa²/Hz, mean noise floor per window
    frequency_hz : np.ndarray [shape=(n_freq,)], Hz, the bins of ``noise_psd``
    passed : np.ndarray [shape=(n,)], bool, or None; with a screen, the windows it kept
        (the others have NaN descriptors, a zero noise floor and the whole window as
        their segment); None without a screen (every window described)
    """

    window_index: np.ndarray
    start_s: np.ndarray
    end_s: np.ndarray
    values: np.ndarray
    clipped: np.ndarray
    segment_s: np.ndarray
    noise_psd: np.ndarray
    frequency_hz: np.ndarray
    passed: np.ndarray | None = None


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


def describe_stream(
    reader: AudioReader | SegmentReader,
    chain: RecordingChain,
    settings: DescriptorSettings,
    block_s: float = 600.0,
    window_range: tuple[int, int] | None = None,
    on_samples: Callable[[int, np.ndarray], None] | None = None,
    screen: Callable[[np.ndarray], np.ndarray] | None = None,
    peak_to_peak: bool = True,
) -> Iterator[WindowTable]:
    """Describe the windows [k0, k1) of an open stream (a file, or consecutive files).

    Window k starts at the frame ``k * frames_per_window_hop`` counted from the stream's
    sample 0, so every worker that reads a stretch of a continuous recording puts its
    windows on the same grid. Times in the tables are seconds from sample 0.
    ``on_samples(start, samples)`` is given every stretch of samples read, as read (in
    order, overlapping), so other measures need no second read of the audio.

    ``screen(values)`` (a cascade's first stage) is given the
    :func:`~callsieve.features.screening.screen_values` of every window, shape
    (n_windows, n_screen), and returns which windows to describe in full (bool); the
    others get NaN descriptors (``WindowTable.passed``). ``peak_to_peak=False`` leaves
    the peak-to-peak level (the one waveform descriptor, a band filter over every block)
    NaN, for a caller whose model does not read it.
    """
    fs = reader.sample_rate_hz
    settings.grid.check_sample_rate(fs)
    yield from _describe(reader, fs, chain, settings, block_s, window_range, on_samples, screen, peak_to_peak)


def decimation_factor(sample_rate_hz: int, high_hz: float) -> int:
    """Integer factor that brings the rate down to at least three times the band's top.

    Only divisors of the rate are used, so the analysis rate is a whole number of Hz;
    the anti-alias filter of :func:`scipy.signal.resample_poly` is flat within 0.1 dB
    up to 0.6 of the new Nyquist frequency, which the band stays below.
    """
    q_max = int(sample_rate_hz // (3.0 * high_hz))
    for q in range(max(q_max, 1), 0, -1):
        if sample_rate_hz % q == 0:
            return q
    return 1


# Original-rate samples of context for the decimation filter, per unit of the factor
# (resample_poly's filter reaches 10 q samples each way).
_DECIMATION_PAD = 16


def _describe(
    reader: AudioReader | SegmentReader,
    fs: int,
    chain: RecordingChain,
    settings: DescriptorSettings,
    block_s: float,
    window_range: tuple[int, int] | None = None,
    on_samples: Callable[[int, np.ndarray], None] | None = None,
    screen: Callable[[np.ndarray], np.ndarray] | None = None,
    peak_to_peak: bool = True,
) -> Iterator[WindowTable]:
    grid = settings.grid
    q = decimation_factor(fs, settings.high_hz)
    fs_a = fs // q  # the analysis rate
    n_fft = grid.window_samples(fs_a)
    n_w, m = settings.frames_per_window, settings.frames_per_window_hop
    step, span = settings.frames_per_noise_step, settings.noise_span_frames
    half = span // 2
    # Analysis-rate samples with a whole set of originals behind them, and the frames
    # and windows that lie inside them (numbered from the stream's sample 0).
    a0, a1 = -(-reader.start // q), reader.stop // q
    if a1 - a0 < n_fft:
        return
    frames = grid.frames_within(a0, a1 - a0, fs_a)
    f_first, f_total = int(frames[0]), int(frames[-1]) + 1
    k_min, k_max = -(-f_first // m), (f_total - n_w) // m
    if window_range is not None:
        k_min, k_max = max(k_min, window_range[0]), min(k_max, window_range[1] - 1)
    if k_max < k_min:
        return
    j_max = (f_total - 1) // step + 1
    window_len_a = int(round(settings.window_s * fs_a))
    fir = band_pressure_fir(chain, fs_a, settings.low_hz, settings.high_hz)
    fir_half = fir.size // 2
    pad = _DECIMATION_PAD * q
    per_block = max(int(round(block_s / settings.window_hop_s)), 1)
    for k0 in range(k_min, k_max + 1, per_block):
        k1 = min(k0 + per_block, k_max + 1)
        fa, fb = k0 * m, (k1 - 1) * m + n_w  # frames the windows use: [fa, fb)
        j0, j1 = fa // step, min((fb - 1) // step + 1, j_max)
        steps = np.arange(j0, j1 + 1)
        steps = steps[steps <= j_max]
        fr0 = max(min(fa, j0 * step - half), f_first)
        fr1 = min(max(fb, steps[-1] * step - half + span), f_total)
        frame_idx = np.arange(fr0, fr1)
        starts = grid.frame_start_samples(frame_idx, fs_a)
        k = np.arange(k0, k1)
        w_start = grid.frame_start_samples(k * m, fs_a)
        # Analysis-rate span this block needs: its frames, and each window's waveform
        # with the band filter's context.
        s0 = int(min(starts[0], w_start[0] - fir_half))
        s1 = int(max(starts[-1] + n_fft, w_start[-1] + window_len_a + fir_half))
        s0, s1 = max(s0, a0), min(s1, a1)
        # Raw spans start on a multiple of q, so decimated samples sit on the stream's grid.
        raw0 = max(q * s0 - pad, q * a0)
        raw1 = min(q * s1 + pad, reader.stop)
        raw = reader.read(raw0, raw1)
        if on_samples is not None:
            on_samples(raw0, raw)
        if q > 1:
            analysed = signal.resample_poly(raw, 1, q).astype(np.float32)
            analysed = analysed[s0 - raw0 // q : s1 - raw0 // q]
        else:
            analysed = raw[s0 - raw0 : s1 - raw0]
        spec = psd_spectrogram(analysed, fs_a, grid, chain, first_sample=s0, frame_index=frame_idx)
        floor_steps = noise_floor_steps(
            spec.psd_db,
            fr0,
            f_total,
            steps,
            step,
            span,
            settings.noise_stride,
            settings.noise_percentile,
            first_available=f_first,
        )
        used = slice(fa - fr0, fb - fr0)
        noise = noise_floor_db(floor_steps, steps, step, frame_idx[used])
        first = k * m - fa
        psd_used = spec.psd_db[:, used]
        passed = None
        if screen is not None:
            passed = np.asarray(screen(screen_values(psd_used, noise, spec.frequency_hz, first, settings)), bool)
        # Waveform measures: band-passed pressure at the analysis rate; clipping in the
        # samples as recorded, where one sample at full scale is enough.
        if peak_to_peak and (passed is None or passed.any()):
            pressure = signal.oaconvolve(analysed, fir.astype(np.float32), mode="same")
            p2p = _window_peak_to_peak(pressure, w_start - s0, window_len_a)
        else:
            p2p = np.full(k.size, np.nan)
        clipped = _window_clipped(raw, q * w_start - raw0, int(round(settings.window_s * fs)))
        if passed is None:
            values, segment, noise_psd = describe_windows(psd_used, noise, spec.frequency_hz, first, settings, p2p)
        else:
            values, segment, noise_psd = _describe_passed(
                psd_used, noise, spec.frequency_hz, first, settings, p2p, passed
            )
        start_s = w_start / fs_a
        yield WindowTable(
            k,
            start_s,
            start_s + window_len_a / fs_a,
            values,
            clipped,
            start_s[:, None] + segment,
            noise_psd,
            spec.frequency_hz,
            passed,
        )


def _describe_passed(
    psd_db: np.ndarray,
    noise_db: np.ndarray,
    frequency_hz: np.ndarray,
    first: np.ndarray,
    settings: DescriptorSettings,
    p2p: np.ndarray,
    passed: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``describe_windows`` of the passed windows only, on the frames they cover.

    Every descriptor of a window is a function of its own frames, so the frames no kept
    window covers are dropped before the per-frame work; the windows' frames stay
    contiguous. Rows of rejected windows are NaN (segment: the whole window; noise: 0).
    """
    n_w = settings.frames_per_window
    n_win, n_freq = first.size, frequency_hz.size
    cols = frames_of_windows(first[passed], n_w, psd_db.shape[1])
    kept_first = np.searchsorted(cols, first[passed])
    vals, seg, npsd = describe_windows(
        psd_db[:, cols], noise_db[:, cols], frequency_hz, kept_first, settings, p2p[passed]
    )
    values = np.full((n_win, vals.shape[1]), np.nan, dtype=np.float32)
    values[passed] = vals
    segment = np.tile(np.array([0.0, settings.window_s]), (n_win, 1))
    segment[passed] = seg
    noise_psd = np.zeros((n_win, n_freq), dtype=np.float32)
    noise_psd[passed] = npsd
    return values, segment, noise_psd


def _chunk_extremes(x: np.ndarray, bounds: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Max and min of x over consecutive chunks [bounds[i], bounds[i+1])."""
    x = x[: bounds[-1]]
    return np.maximum.reduceat(x, bounds[:-1]), np.minimum.reduceat(x, bounds[:-1])


def _window_peak_to_peak(pressure: np.ndarray, offsets: np.ndarray, length: int) -> np.ndarray:
    """Peak-to-peak level (dB re 1 µPa) of windows [offset, offset + length) of ``pressure``.

    Windows overlap and start on a regular grid; extremes are taken once per stretch
    between consecutive window edges, then combined per window.
    """
    edges = np.unique(np.concatenate([offsets, offsets + length]))
    hi_c, lo_c = _chunk_extremes(pressure, edges)
    first = np.searchsorted(edges, offsets)
    last = np.searchsorted(edges, offsets + length)
    # Windows span a fixed number of chunks only when hop divides the length; use a
    # sliding reduce over chunk indices with each window's own span.
    span = last - first
    width = int(span.max())
    idx = first[:, None] + np.arange(width)[None, :]
    valid = idx < last[:, None]
    idx = np.minimum(idx, hi_c.size - 1)
    hi = np.where(valid, hi_c[idx], -np.inf).max(axis=1)
    lo = np.where(valid, lo_c[idx], np.inf).min(axis=1)
    return power_db((hi - lo) ** 2)


def _window_clipped(raw: np.ndarray, offsets: np.ndarray, length: int) -> np.ndarray:
    """Whether a sample of each window [offset, offset + length) reached full scale."""
    offsets = np.clip(offsets, 0, raw.size - 1)
    ends = np.clip(offsets + length, 1, raw.size)
    edges = np.unique(np.concatenate([offsets, ends]))
    peak = np.maximum.reduceat(np.abs(raw[: edges[-1]]), edges[:-1])
    first = np.searchsorted(edges, offsets)
    last = np.searchsorted(edges, ends)
    width = int(max((last - first).max(), 1))
    idx = first[:, None] + np.arange(width)[None, :]
    valid = idx < last[:, None]
    idx = np.minimum(idx, peak.size - 1)
    return np.where(valid, peak[idx], 0.0).max(axis=1) >= CLIP_THRESHOLD
