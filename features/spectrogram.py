"""Calibrated power spectral density on a grid fixed in physical units.

A :class:`SpectrogramGrid` is set in Hz and seconds, not in samples, so the same
settings give the same frequency bins and frame times at 2 kHz and at 200 kHz.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy import signal

from ._validation import ParameterError, check_positive
from .calibration import RecordingChain
from .levels import _TINY

__all__ = ["SpectrogramGrid", "Spectrogram", "psd_spectrogram"]


@dataclass(frozen=True)
class SpectrogramGrid:
    """Frequency and time axes of a spectrogram, in physical units.

    Parameters
    ----------
    resolution_hz : float, Hz
        Bin spacing; the analysis window lasts ``1 / resolution_hz`` seconds.
    hop_s : float, s
        Time between frame starts.
    low_hz, high_hz : float, Hz
        The analysis band; only bins inside it are kept.
    window : str
        Window name understood by ``scipy.signal.get_window`` (periodic form).
    """

    resolution_hz: float
    hop_s: float
    low_hz: float
    high_hz: float
    window: str = "hann"

    def __post_init__(self) -> None:
        check_positive("resolution_hz", self.resolution_hz)
        check_positive("hop_s", self.hop_s)
        if not (0.0 <= self.low_hz < self.high_hz):
            raise ParameterError(f"the band needs 0 <= low_hz < high_hz, got {self.low_hz:g} .. {self.high_hz:g} Hz")

    @property
    def window_s(self) -> float:
        """Length of the analysis window, s."""
        return 1.0 / self.resolution_hz

    @property
    def frequency_hz(self) -> np.ndarray:
        """Bin centres inside the band, Hz: multiples of ``resolution_hz``."""
        k0 = int(np.ceil(self.low_hz / self.resolution_hz - 1e-9))
        k1 = int(np.floor(self.high_hz / self.resolution_hz + 1e-9))
        return np.arange(k0, k1 + 1) * self.resolution_hz

    def window_samples(self, sample_rate_hz: float) -> int:
        """Window (and FFT) length in samples at ``sample_rate_hz`` (Hz)."""
        return max(2, int(round(sample_rate_hz / self.resolution_hz)))

    def frame_start_samples(self, frame_index: np.ndarray, sample_rate_hz: float) -> np.ndarray:
        """First sample of each frame (frame 0 starts at sample 0 of the recording)."""
        return np.round(np.asarray(frame_index) * self.hop_s * sample_rate_hz).astype(np.int64)

    def frames_within(self, first_sample: int, n_samples: int, sample_rate_hz: float) -> np.ndarray:
        """Indices of the frames whose whole window lies in samples [first, first + n)."""
        n_win = self.window_samples(sample_rate_hz)
        hop = self.hop_s * sample_rate_hz
        lo = int(np.ceil(first_sample / hop - 1e-9))
        hi = int(np.floor((first_sample + n_samples - n_win) / hop + 1e-9))
        idx = np.arange(max(lo, 0), hi + 1)
        starts = self.frame_start_samples(idx, sample_rate_hz)
        keep = (starts >= first_sample) & (starts + n_win <= first_sample + n_samples)
        return idx[keep]

    def frames_starting_in(self, start: int, stop: int, sample_rate_hz: float) -> np.ndarray:
        """Indices of the frames whose first sample lies in [start, stop).

        Streaming callers take the frames that start in a block's core, so consecutive
        blocks give every frame exactly once.
        """
        hop = self.hop_s * sample_rate_hz
        lo = max(int(np.floor(start / hop)) - 1, 0)
        hi = int(np.ceil(stop / hop)) + 1
        idx = np.arange(lo, hi + 1)
        starts = self.frame_start_samples(idx, sample_rate_hz)
        return idx[(starts >= start) & (starts < stop)]

    def check_sample_rate(self, sample_rate_hz: float) -> None:
        """Raise :class:`ParameterError` if the band does not fit below Nyquist."""
        if self.high_hz > sample_rate_hz / 2.0 + 1e-9:
            raise ParameterError(
                f"the analysis band reaches {self.high_hz:g} Hz but recordings at "
                f"{sample_rate_hz:g} Hz stop at {sample_rate_hz / 2:g} Hz (Nyquist)"
            )


@dataclass(frozen=True, eq=False)
class Spectrogram:
    """PSD frames on a :class:`SpectrogramGrid`.

    Attributes
    ----------
    psd_db : np.ndarray [shape=(n_freq, n_frames)], float32, dB re 1 µPa²/Hz
    frequency_hz : np.ndarray [shape=(n_freq,)], Hz
    frame_index : np.ndarray [shape=(n_frames,)], frame numbers from the recording's start
    start_s : np.ndarray [shape=(n_frames,)], s, start of each frame's window
    grid : SpectrogramGrid
    """

    psd_db: np.ndarray
    frequency_hz: np.ndarray
    frame_index: np.ndarray
    start_s: np.ndarray
    grid: SpectrogramGrid


def psd_spectrogram(
    x: np.ndarray,
    sample_rate_hz: float,
    grid: SpectrogramGrid,
    chain: RecordingChain | None = None,
    first_sample: int = 0,
    frame_index: np.ndarray | None = None,
) -> Spectrogram:
    """One-sided PSD of every whole frame of ``x`` on ``grid``, dB re 1 µPa²/Hz.

    Parameters
    ----------
    x : np.ndarray [shape=(n,)]
        Pressure in µPa when ``chain`` is None, else sample values (full scale ±1.0)
        that ``chain`` turns into pressure bin by bin.
    sample_rate_hz : float, Hz
    grid : SpectrogramGrid
    chain : RecordingChain, optional
    first_sample : int
        Index of ``x[0]`` in the recording, so frame numbers and times are global.
    frame_index : np.ndarray [shape=(n_frames,)], optional
        Frames to compute (global numbers); default every frame whose window lies in
        ``x``. Each must lie in ``x``.

    Notes
    -----
    Scaling as ``scipy.signal.welch(scaling='density', detrend=False)`` for a single
    segment: ``2 |X|² / (fs Σw²)``, not doubled at DC and Nyquist (REFERENCES §5).
    Where ``fs / resolution_hz`` is not an integer the bins are interpolated linearly
    onto the grid's frequencies.
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz)
    grid.check_sample_rate(fs)
    x = np.ascontiguousarray(x, dtype=np.float32)
    n_win = grid.window_samples(fs)
    if frame_index is None:
        frames = grid.frames_within(first_sample, x.size, fs)
    else:
        frames = np.asarray(frame_index, dtype=np.int64)
        rel = grid.frame_start_samples(frames, fs) - first_sample
        if frames.size and (rel.min() < 0 or rel.max() + n_win > x.size):
            raise ParameterError("frame_index asks for frames that do not lie within x")
    f_grid = grid.frequency_hz
    if frames.size == 0:
        empty = np.empty((f_grid.size, 0), dtype=np.float32)
        return Spectrogram(empty, f_grid, frames, np.empty(0), grid)
    starts = grid.frame_start_samples(frames, fs) - first_sample
    window = signal.get_window(grid.window, n_win, fftbins=True).astype(np.float32)
    frames_view = sliding_window_view(x, n_win)
    step = int(starts[1] - starts[0]) if starts.size > 1 else 1
    if step > 0 and np.all(np.diff(starts) == step):
        # Frames on a whole-sample hop: a strided view, not a gathered copy (3x faster).
        frames_in = frames_view[starts[0] :: step][: starts.size]
    else:
        frames_in = frames_view[starts]
    # The windowed frames are rounded to float32 (as numpy's float32 FFT would see them)
    # and written straight into the double-precision buffer the FFT reads: one pass, no
    # float32 copy.
    segments = np.empty(frames_in.shape, dtype=np.float64)
    np.multiply(frames_in, window, out=segments, dtype=np.float32)
    # numpy transforms float32 in double precision and rounds the result to complex64;
    # doing that explicitly gives the same values at half the cost, and rounding only
    # the band's bins saves the rest. (scipy's single-precision FFT is faster still, but
    # moves PSD values by up to tenths of a dB in bins near a null, enough to change a
    # trained model and its AP by a few 0.01.)
    spectrum = np.fft.rfft(segments, axis=1)
    f_fft = np.fft.rfftfreq(n_win, 1.0 / fs)
    exact = abs(fs / grid.resolution_hz - n_win) < 1e-6
    if exact:
        bins = np.round(f_grid / grid.resolution_hz).astype(int)
        spectrum = spectrum[:, bins].astype(np.complex64)
        f_bins = f_grid
    else:
        keep = slice(
            max(int(np.searchsorted(f_fft, f_grid[0]) - 1), 0),
            int(np.searchsorted(f_fft, f_grid[-1]) + 2),
        )
        spectrum = spectrum[:, keep].astype(np.complex64)
        f_bins = f_fft[keep]
    # float32 throughout: levels to 1e-6 dB, at half the memory traffic of float64.
    power = spectrum.real**2 + spectrum.imag**2
    scale = np.full(f_bins.shape, 2.0 / (fs * float(np.sum(window.astype(np.float64) ** 2))))
    scale[f_bins == 0.0] /= 2.0
    if n_win % 2 == 0:
        scale[np.isclose(f_bins, fs / 2.0)] /= 2.0
    if chain is not None:
        scale = scale * chain.upa_per_unit(f_bins) ** 2
    power *= scale.astype(np.float32)
    if not exact:
        # Linear interpolation onto the grid, the same weights for every frame.
        lo = np.clip(np.searchsorted(f_bins, f_grid, side="right") - 1, 0, f_bins.size - 2)
        w = (f_grid - f_bins[lo]) / (f_bins[lo + 1] - f_bins[lo])
        power = power[:, lo] * (1.0 - w) + power[:, lo + 1] * w
    psd = (10.0 * np.log10(np.maximum(power.T, np.float32(_TINY)))).astype(np.float32, copy=False)
    start_s = grid.frame_start_samples(frames, fs) / fs
    return Spectrogram(psd, f_grid, frames, start_s, grid)
