"""The long-term calibrated spectrum: mean PSD per minute in fractional-octave bands.

Collected from the samples scoring reads anyway, so a deployment's soundscape costs no
second read of the archive. One-second Hann segments without overlap give 1 Hz bins,
averaged into base-10 one-twelfth-octave bands (four to a one-third-octave band of
IEC 61260-1, so third-octave band levels follow by summing), then into bins of 60 s.
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sp_fft
from scipy import signal

from ._validation import check_positive
from .calibration import RecordingChain

__all__ = [
    "SEGMENT_S",
    "BIN_S",
    "BANDS_PER_OCTAVE",
    "soundscape_band_edges",
    "segment_psd",
    "band_means",
    "MinuteSpectra",
]

SEGMENT_S = 1.0  # s, one PSD estimate: 1 Hz resolution
BIN_S = 60.0  # s, one time bin of the long-term spectrum (common practice: one-minute means)
BANDS_PER_OCTAVE = 12
_G = 10.0**0.3  # base-10 octave ratio (IEC 61260-1:2014)


def soundscape_band_edges(sample_rate_hz: float, resolution_hz: float = 1.0 / SEGMENT_S) -> np.ndarray:
    """Edges of the base-10 one-twelfth-octave bands that hold at least one frequency bin.

    Bands are centred on 1000 · G^(x/24) for odd x (exact fractions of the third-octave
    series of IEC 61260-1, four to each); the lowest kept band is the first at least one
    ``resolution_hz`` wide, the highest the last whose centre lies below Nyquist, cut at it.

    Parameters
    ----------
    sample_rate_hz : float, Hz
    resolution_hz : float, Hz, spacing of the PSD's frequency bins

    Returns
    -------
    edges : np.ndarray [shape=(n_bands + 1,)], Hz, increasing, adjacent bands share edges
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz)
    nyquist = fs / 2.0
    # Edges of the one-twelfth-octave series are 1000 · G^(m/12) = 1000 · 10^(0.025 m) for
    # integer m; every fourth (m = 4x − 2) is an edge of third-octave band x.
    step = 0.3 / BANDS_PER_OCTAVE
    m_low = int(np.ceil(np.log10(resolution_hz / (10**step - 1.0) / 1000.0) / step - 1e-9))
    m_high = int(np.floor(np.log10(nyquist / 1000.0) / step + 1e-9))
    edges = 1000.0 * 10.0 ** (step * np.arange(m_low, m_high + 1))
    edges = edges[edges < nyquist]
    return np.append(edges, nyquist)


def segment_psd(samples: np.ndarray, sample_rate_hz: int, chain: RecordingChain) -> tuple[np.ndarray, np.ndarray]:
    """Calibrated PSD of each whole one-second segment, µPa²/Hz.

    Parameters
    ----------
    samples : np.ndarray [shape=(n,)], sample values (full scale ±1.0)
    sample_rate_hz : int, Hz
    chain : RecordingChain, the recorder's calibration

    Returns
    -------
    frequency_hz : np.ndarray [shape=(n_freq,)], Hz
    psd : np.ndarray [shape=(n_segments, n_freq)], float64, µPa²/Hz; scaled as
        ``scipy.signal.welch(scaling='density', detrend=False)`` of one Hann segment
    """
    n = int(round(sample_rate_hz * SEGMENT_S))
    count = samples.size // n
    window = signal.get_window("hann", n, fftbins=True)
    frequency_hz = np.fft.rfftfreq(n, 1.0 / sample_rate_hz)
    if count == 0:
        return frequency_hz, np.empty((0, frequency_hz.size))
    x = samples[: count * n].reshape(count, n) * window.astype(np.float32)
    spectrum = sp_fft.rfft(x, axis=1)  # single precision stays single (see psd_spectrogram)
    power = spectrum.real.astype(np.float64) ** 2 + spectrum.imag.astype(np.float64) ** 2
    scale = np.full(frequency_hz.shape, 2.0 / (sample_rate_hz * np.sum(window**2)))
    scale[0] /= 2.0
    if n % 2 == 0:
        scale[-1] /= 2.0
    return frequency_hz, power * (scale * chain.upa_per_unit(np.maximum(frequency_hz, 1e-3)) ** 2)


def band_means(psd: np.ndarray, frequency_hz: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Mean PSD of the frequency bins in each band [edge_k, edge_k+1) (last band: to its top).

    Returns
    -------
    np.ndarray [shape=(n_rows, n_bands)], the unit of ``psd``; NaN for a band without bins
    """
    idx = np.searchsorted(edges, frequency_hz, side="right") - 1
    idx[frequency_hz == edges[-1]] = edges.size - 2
    inside = (idx >= 0) & (idx < edges.size - 1)
    n_bands = edges.size - 1
    counts = np.bincount(idx[inside], minlength=n_bands).astype(float)
    # Bins are sorted, so each band's bins are one run: a cumulative sum gives every band.
    cols = psd[:, inside]
    starts = np.searchsorted(idx[inside], np.arange(n_bands))
    cum = np.concatenate([np.zeros((psd.shape[0], 1)), np.cumsum(cols, axis=1)], axis=1)
    ends = starts + counts.astype(int)
    sums = cum[:, ends] - cum[:, starts]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / counts, np.nan)


class MinuteSpectra:
    """Collects the long-term spectrum of one file from blocks of its samples, in order.

    Blocks may overlap and may reach beyond the file (neighbours read for context): only
    the file's own samples ``[first, first + frames)`` count, each once, in whole
    one-second segments counted from ``first``.

    Parameters
    ----------
    sample_rate_hz : int, Hz
    chain : RecordingChain
    first, frames : int, the file's first sample in the stream and its number of samples
    """

    def __init__(self, sample_rate_hz: int, chain: RecordingChain, first: int, frames: int) -> None:
        self.sample_rate_hz = int(sample_rate_hz)
        self.chain = chain
        self.first = int(first)
        self.stop = int(first) + int(frames)
        self.edges = soundscape_band_edges(sample_rate_hz)
        self._segment = int(round(sample_rate_hz * SEGMENT_S))
        self._next = self.first  # first own sample not yet used
        self._pending = np.empty(0, dtype=np.float32)
        self._done = 0  # whole segments taken so far
        # Sums per time bin, allocated for the whole file: memory does not grow with
        # what is read (a 12-hour file at 2 kHz: 720 bins).
        self._per_bin = int(round(BIN_S / SEGMENT_S))
        n_bins = max(-(-int(frames) // (self._segment * self._per_bin)), 1)
        self._sums = np.zeros((n_bins, self.edges.size - 1))
        self._counts = np.zeros(n_bins)

    def add(self, start: int, samples: np.ndarray) -> None:
        """Take the samples ``samples`` that begin at stream sample ``start``."""
        end = min(start + samples.size, self.stop)
        begin = max(self._next, start)
        if end <= begin or begin != self._next:
            return  # nothing new, or a hole (a block that skipped samples): never guessed
        new = samples[begin - start : end - start]
        self._next = end
        data = np.concatenate([self._pending, new]) if self._pending.size else new
        whole = (data.size // self._segment) * self._segment
        if whole:
            f, psd = segment_psd(data[:whole], self.sample_rate_hz, self.chain)
            bands = band_means(psd, f, self.edges)
            bin_of = (self._done + np.arange(bands.shape[0])) // self._per_bin
            np.add.at(self._sums, bin_of, bands)
            np.add.at(self._counts, bin_of, 1.0)
            self._done += bands.shape[0]
        self._pending = np.array(data[whole:], dtype=np.float32)

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """Seconds of audio in each time bin of ``BIN_S`` and the mean PSD per bin and band.

        Returns
        -------
        seconds : np.ndarray [shape=(n_bins,)], s
        psd : np.ndarray [shape=(n_bins, n_bands)], µPa²/Hz (NaN where a band holds no bin)
        """
        n_bins = -(-self._done // self._per_bin)
        counts = self._counts[:n_bins]
        return counts * SEGMENT_S, self._sums[:n_bins] / counts[:, None]
