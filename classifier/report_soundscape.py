"""The soundscape of a run: long-term spectrogram, percentile spectra, third-octave levels.

Scoring stores, per file, the mean PSD (dB re 1 µPa²/Hz) in fractional-octave bands for
consecutive bins of ``bin_s`` seconds from the file's start (the store's ``soundscape``
table). This module re-bins those rows in time, one file at a time, into a deployment-long
grid, and derives the percentile spectra and third-octave band levels from them. Averages
are of linear power, weighted by the seconds of audio in each bin; a bin without audio
stays NaN (a gap is drawn as a gap, never interpolated).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from callsieve.features.levels import fractional_octave_bands

__all__ = [
    "PERCENTILES",
    "LongTermSpectrum",
    "SoundscapeAccumulator",
    "band_name",
    "bin_text",
    "choose_bin_s",
    "decode_soundscape_row",
    "duty_cycle_s",
    "encode_soundscape_row",
    "long_term_spectrogram",
    "read_soundscape",
    "third_octave_levels",
    "union_band_edges",
    "write_soundscape",
]

PERCENTILES = (5.0, 50.0, 95.0)
# Resolution and range of the per-band level histograms behind the percentile spectra
# (dB). The stored PSD is float16, whose spacing near 100 dB is 0.0625 dB: finer bins
# would only resolve the storage's rounding.
_HIST_STEP_DB = 0.05
_HIST_LOW_DB, _HIST_HIGH_DB = -100.0, 300.0


def decode_soundscape_row(seconds: bytes, band_edges_hz: bytes, psd_db: bytes) -> tuple[np.ndarray, ...]:
    """Arrays of one ``soundscape`` row (little-endian blobs, as the store documents).

    Returns
    -------
    seconds : np.ndarray [shape=(n_bins,)], s of audio per bin, float32
    band_edges_hz : np.ndarray [shape=(n_bands + 1,)], Hz, float32
    psd_db : np.ndarray [shape=(n_bins, n_bands)], dB re 1 µPa²/Hz, float32 (NaN: empty)
    """
    sec = np.frombuffer(seconds, dtype="<f4")
    edges = np.frombuffer(band_edges_hz, dtype="<f4")
    psd = np.frombuffer(psd_db, dtype="<f2").astype(np.float32)
    n_bands = edges.size - 1
    if n_bands < 1 or psd.size != sec.size * n_bands:
        raise ValueError(f"soundscape row: {sec.size} bins × {n_bands} bands does not match {psd.size} PSD values")
    return sec, edges, psd.reshape(sec.size, n_bands)


def encode_soundscape_row(seconds: np.ndarray, band_edges_hz: np.ndarray, psd_db: np.ndarray) -> tuple[bytes, ...]:
    """The three blobs of a ``soundscape`` row (the inverse of ``decode_soundscape_row``)."""
    return (
        np.asarray(seconds, dtype="<f4").tobytes(),
        np.asarray(band_edges_hz, dtype="<f4").tobytes(),
        np.ascontiguousarray(psd_db, dtype="<f2").tobytes(),
    )


_NICE_BINS_S = (60, 300, 600, 900, 1200, 1800, 3600, 7200, 10800, 21600, 43200, 86400)


def choose_bin_s(span_s: float, cycle_s: float | None = None) -> float:
    """Time bin of the long-term spectrogram for a deployment of ``span_s`` seconds.

    60 s up to a day, 5 min up to 31 days, 30 min up to half a year, 1 h beyond: a
    figure a few thousand columns wide at most (common practice for long-term spectral
    averages), and arrays that stay small for a year. A duty-cycled recorder
    (``cycle_s``: its period, s) gets a bin no shorter than one period, so that each bin
    averages what was recorded in it and only true gaps (no audio in a whole bin) are
    blank; the bin is then the next of 60 s, 5, 10, 15, 20, 30 min, 1, 2, 3, 6, 12, 24 h.
    """
    day = 86400.0
    if span_s <= day:
        base = 60.0
    elif span_s <= 31 * day:
        base = 300.0
    elif span_s <= 183 * day:
        base = 1800.0
    else:
        base = 3600.0
    if cycle_s is None or cycle_s <= base:
        return base
    return float(next((b for b in _NICE_BINS_S if b >= cycle_s - 1e-6), _NICE_BINS_S[-1]))


def duty_cycle_s(start_s: np.ndarray, duration_s: np.ndarray) -> float | None:
    """The recorder's period (s) where files are regularly shorter than their spacing, else None.

    Parameters
    ----------
    start_s, duration_s : np.ndarray [shape=(n_files,)], s
    """
    start = np.sort(np.asarray(start_s, float))
    if start.size < 3:
        return None
    period = float(np.median(np.diff(start)))
    # Files covering under 90 % of their spacing: the recorder sleeps between them.
    if period > 0 and float(np.median(duration_s)) < 0.9 * period:
        return period
    return None


def bin_text(bin_s: float) -> str:
    """A time bin in words for titles: '60-s', '5-min', '1-h'."""
    if bin_s >= 3600 and bin_s % 3600 == 0:
        return f"{bin_s / 3600:g}-h"
    if bin_s >= 300 and bin_s % 60 == 0:
        return f"{bin_s / 60:g}-min"
    return f"{bin_s:g}-s"


def band_name(nominal_hz: float) -> str:
    """ISO 266 preferred name of a band: '63 Hz', '125 Hz', '1 kHz', '12.5 kHz'."""
    if nominal_hz >= 1000.0:
        return f"{nominal_hz / 1000.0:g} kHz"
    return f"{nominal_hz:g} Hz"


@dataclass
class LongTermSpectrum:
    """A long-term spectrogram and what is derived from it.

    Attributes
    ----------
    start_utc_s : float, s since 1970-01-01T00:00:00Z, start of the first time bin
    bin_s : float, s, width of a time bin
    band_edges_hz : np.ndarray [shape=(n_bands + 1,)], Hz
    psd_db : np.ndarray [shape=(n_time, n_bands)], dB re 1 µPa²/Hz, float32; NaN: no audio
    seconds : np.ndarray [shape=(n_time,)], s of audio in each time bin
    percentiles : np.ndarray [shape=(n_pct,)], percent
    percentile_db : np.ndarray [shape=(n_pct, n_bands)], dB re 1 µPa²/Hz, over the
        stored (60-s) bins, each weighted by its seconds of audio
    """

    start_utc_s: float
    bin_s: float
    band_edges_hz: np.ndarray
    psd_db: np.ndarray
    seconds: np.ndarray
    percentiles: np.ndarray
    percentile_db: np.ndarray

    @property
    def time_utc_s(self) -> np.ndarray:
        """Start of each time bin, s since the epoch (UTC)."""
        return self.start_utc_s + self.bin_s * np.arange(self.psd_db.shape[0])

    @property
    def centre_hz(self) -> np.ndarray:
        """Geometric centre of each band, Hz."""
        e = self.band_edges_hz.astype(float)
        return np.sqrt(e[:-1] * e[1:])


def long_term_spectrogram(
    bin_start_utc_s: np.ndarray,
    seconds: np.ndarray,
    psd_db: np.ndarray,
    start_utc_s: float,
    bin_s: float,
    n_time: int,
    source_bin_s: float = 60.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Re-bin PSD rows in time in one pass (the one-shot form; see ``SoundscapeAccumulator``).

    Each source bin goes whole to the output bin holding its midpoint; output bins are
    the seconds-weighted mean of linear power per band.

    Parameters
    ----------
    bin_start_utc_s : np.ndarray [shape=(n,)], s since the epoch, start of each source bin
    seconds : np.ndarray [shape=(n,)], s of audio in each source bin
    psd_db : np.ndarray [shape=(n, n_bands)], dB re 1 µPa²/Hz (NaN: empty)
    start_utc_s, bin_s : float, s, the output grid's start and step
    n_time : int, output bins
    source_bin_s : float, s, nominal width of a source bin

    Returns
    -------
    psd_db : np.ndarray [shape=(n_time, n_bands)], dB re 1 µPa²/Hz, float32 (NaN: no audio)
    seconds : np.ndarray [shape=(n_time,)], s of audio per output bin
    """
    acc = _Sums(start_utc_s, bin_s, n_time, np.asarray(psd_db).shape[1], source_bin_s)
    acc.add(bin_start_utc_s, seconds, psd_db, np.arange(np.asarray(psd_db).shape[1]))
    return acc.mean_db(), acc.seconds()


class _Sums:
    """Running sums of power × seconds and seconds per output bin and band."""

    def __init__(self, start_utc_s: float, bin_s: float, n_time: int, n_bands: int, source_bin_s: float) -> None:
        self.start, self.step, self.n_time, self.source = float(start_utc_s), float(bin_s), int(n_time), source_bin_s
        self.energy = np.zeros((self.n_time, n_bands))
        self.weight = np.zeros((self.n_time, n_bands))
        self.audio_s = np.zeros(self.n_time)

    def add(self, t0: np.ndarray, seconds: np.ndarray, psd_db: np.ndarray, columns: np.ndarray) -> None:
        t0 = np.asarray(t0, dtype=float)
        sec = np.asarray(seconds, dtype=float)
        psd = np.asarray(psd_db, dtype=float)
        k = np.floor((t0 + self.source / 2.0 - self.start) / self.step).astype(np.int64)
        ok = (k >= 0) & (k < self.n_time) & (sec > 0)
        k, sec, psd = k[ok], sec[ok], psd[ok]
        finite = np.isfinite(psd)
        w = np.where(finite, sec[:, None], 0.0)
        e = np.where(finite, 10.0 ** (np.where(finite, psd, 0.0) / 10.0), 0.0) * w
        if k.size == 0:
            return
        # One flat index per (time bin, band) over the rows this call touches: bincount
        # sums repeated indices in one pass, and the work stays that of the call.
        n_bands = self.energy.shape[1]
        lo, hi = int(k.min()), int(k.max()) + 1
        flat = ((k - lo)[:, None] * n_bands + np.asarray(columns)[None, :]).ravel()
        shape = (hi - lo, n_bands)
        self.energy[lo:hi] += np.bincount(flat, e.ravel(), minlength=shape[0] * n_bands).reshape(shape)
        self.weight[lo:hi] += np.bincount(flat, w.ravel(), minlength=shape[0] * n_bands).reshape(shape)
        self.audio_s[lo:hi] += np.bincount(k - lo, sec, minlength=shape[0])

    def mean_db(self) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            out = 10.0 * np.log10(self.energy / self.weight)
        return np.where(self.weight > 0, out, np.nan).astype(np.float32)

    def seconds(self) -> np.ndarray:
        return self.audio_s.copy()


class SoundscapeAccumulator:
    """The long-term spectrogram and the level histograms, fed one file (or bin) at a time.

    Memory is fixed by the output grid and the histogram (n_bands × 8,000 counts), not
    by the length of the deployment.

    Parameters
    ----------
    start_utc_s : float, s since the epoch, start of the output grid
    bin_s : float, s, output time bin
    n_time : int, output bins
    band_edges_hz : np.ndarray [shape=(n_bands + 1,)], Hz, the bands of the output
        (``union_band_edges`` of every row's); a row contributes to each output band that
        lies inside one of its own bands
    source_bin_s : float, s, nominal width of a stored bin (the store's ``bin_s``)
    """

    def __init__(
        self,
        start_utc_s: float,
        bin_s: float,
        n_time: int,
        band_edges_hz: np.ndarray,
        source_bin_s: float = 60.0,
    ) -> None:
        self.band_edges_hz = np.asarray(band_edges_hz, dtype=np.float32)
        n_bands = self.band_edges_hz.size - 1
        self._sums = _Sums(start_utc_s, bin_s, n_time, n_bands, source_bin_s)
        n_hist = int(round((_HIST_HIGH_DB - _HIST_LOW_DB) / _HIST_STEP_DB))
        self._hist = np.zeros((n_bands, n_hist))
        self._layouts: dict[bytes, np.ndarray] = {}

    def row_band_of_column(self, band_edges_hz: np.ndarray) -> np.ndarray:
        """For each output band, the band of a row's layout that holds it (-1: none does).

        A row band holding several output bands (a file whose top band is cut at a lower
        Nyquist frequency than another's) gives its mean PSD to each of them.
        """
        e = np.asarray(band_edges_hz, dtype=np.float32)
        key = e.tobytes()
        if key not in self._layouts:
            out = self.band_edges_hz.astype(float)
            row = e.astype(float)
            k = np.searchsorted(row, out[:-1] * (1 + _EDGE_TOL), side="right") - 1
            inside = (k >= 0) & (k < row.size - 1)
            k = np.where(inside, k, 0)
            inside &= row[k + 1] >= out[1:] * (1 - _EDGE_TOL)
            self._layouts[key] = np.where(inside, k, -1)
        return self._layouts[key]

    def add(
        self, bin_start_utc_s: np.ndarray, seconds: np.ndarray, psd_db: np.ndarray, band_edges_hz: np.ndarray
    ) -> None:
        """Add stored bins (any number, of one band layout).

        Parameters
        ----------
        bin_start_utc_s : np.ndarray [shape=(n,)], s since the epoch
        seconds : np.ndarray [shape=(n,)], s of audio per bin
        psd_db : np.ndarray [shape=(n, n_row_bands)], dB re 1 µPa²/Hz
        band_edges_hz : np.ndarray [shape=(n_row_bands + 1,)], Hz
        """
        src = self.row_band_of_column(band_edges_hz)
        cols = np.flatnonzero(src >= 0)
        psd = np.asarray(psd_db, dtype=float)[:, src[cols]]
        self._sums.add(bin_start_utc_s, seconds, psd, cols)
        sec = np.asarray(seconds, dtype=float)
        finite = np.isfinite(psd) & (sec[:, None] > 0)
        idx = np.clip(np.floor((np.where(finite, psd, 0.0) - _HIST_LOW_DB) / _HIST_STEP_DB), 0, self._hist.shape[1] - 1)
        band = np.broadcast_to(cols[None, :], psd.shape)
        np.add.at(
            self._hist, (band[finite], idx[finite].astype(np.int64)), np.broadcast_to(sec[:, None], psd.shape)[finite]
        )

    def add_file(
        self, file_start_utc_s: float, bin_s: float, seconds: np.ndarray, psd_db: np.ndarray, band_edges_hz: np.ndarray
    ) -> None:
        """Add one stored row: consecutive bins of ``bin_s`` from the file's start."""
        t0 = file_start_utc_s + bin_s * np.arange(np.asarray(seconds).size)
        self.add(t0, seconds, psd_db, band_edges_hz)

    def result(self) -> LongTermSpectrum:
        """The long-term spectrum so far."""
        pct = np.array(PERCENTILES)
        return LongTermSpectrum(
            start_utc_s=self._sums.start,
            bin_s=self._sums.step,
            band_edges_hz=self.band_edges_hz.copy(),
            psd_db=self._sums.mean_db(),
            seconds=self._sums.seconds(),
            percentiles=pct,
            percentile_db=_histogram_percentiles(self._hist, pct),
        )


# Edges written as float32 by different files agree to this relative tolerance.
_EDGE_TOL = 1e-5


def _histogram_percentiles(hist: np.ndarray, pct: np.ndarray) -> np.ndarray:
    """Weighted percentiles per band from level histograms (NaN for an empty band), dB."""
    total = hist.sum(axis=1)
    cum = np.cumsum(hist, axis=1)
    out = np.full((pct.size, hist.shape[0]), np.nan, dtype=np.float32)
    centres = _HIST_LOW_DB + _HIST_STEP_DB * (np.arange(hist.shape[1]) + 0.5)
    for i, p in enumerate(pct):
        for j in np.flatnonzero(total > 0):
            k = int(np.searchsorted(cum[j], p / 100.0 * total[j], side="left"))
            out[i, j] = centres[min(k, centres.size - 1)]
    return out


def union_band_edges(edge_sets: list[np.ndarray]) -> np.ndarray:
    """Every band edge of several rows' layouts, sorted (Hz, float32).

    Files at different sample rates share the series' edges up to their own Nyquist
    frequency, where their top band is cut; the union keeps every edge, so each output
    band lies inside one band of each layout that reaches it.
    """
    values = np.sort(np.concatenate([np.asarray(e, dtype=np.float64) for e in edge_sets])) if edge_sets else []
    if len(values) == 0:
        return np.zeros(0, dtype=np.float32)
    keep = np.concatenate([[True], values[1:] > values[:-1] * (1 + _EDGE_TOL)])
    return values[keep].astype(np.float32)


def third_octave_levels(psd_db: np.ndarray, band_edges_hz: np.ndarray, min_coverage: float = 0.5) -> dict:
    """One-third-octave band levels (base 10, IEC 61260-1) from finer-band mean PSDs.

    The band's level is its mean PSD over the finer bands inside it (power × width of
    overlap, over the width measured) times its bandwidth: for a flat PSD, PSD + 10
    log10(bandwidth). Finer bands without a frequency bin (NaN, at low frequencies)
    are left out of the mean; a band whose measured part is under ``min_coverage`` of
    its width is NaN, and only bands wholly inside the finer bands' range are given.

    Parameters
    ----------
    psd_db : np.ndarray [shape=(n_time, n_bands)], dB re 1 µPa²/Hz
    band_edges_hz : np.ndarray [shape=(n_bands + 1,)], Hz, contiguous finer bands
    min_coverage : float, 0..1

    Returns
    -------
    dict: ``names`` (ISO 266, '63 Hz'), ``nominal_hz``, ``centre_hz``, ``lower_hz``,
    ``upper_hz`` (np.ndarray [shape=(n_third,)], Hz) and ``level_db`` (np.ndarray
    [shape=(n_time, n_third)], dB re 1 µPa, float32).
    """
    e = np.asarray(band_edges_hz, dtype=float)
    psd = np.asarray(psd_db, dtype=float)
    empty = {
        "names": [],
        "nominal_hz": np.zeros(0),
        "centre_hz": np.zeros(0),
        "lower_hz": np.zeros(0),
        "upper_hz": np.zeros(0),
        "level_db": np.zeros((psd.shape[0], 0), np.float32),
    }
    if e.size < 2:
        return empty
    bands = fractional_octave_bands(e[0], e[-1], 3)
    tol = 1e-4
    inside = (bands.lower_hz >= e[0] * (1 - tol)) & (bands.upper_hz <= e[-1] * (1 + tol))
    lower, upper = bands.lower_hz[inside], bands.upper_hz[inside]
    if lower.size == 0:
        return empty
    # overlap[k, j]: Hz of finer band k inside third-octave band j.
    overlap = np.clip(
        np.minimum(e[1:, None], upper[None, :]) - np.maximum(e[:-1, None], lower[None, :]),
        0.0,
        None,
    )
    finite = np.isfinite(psd)
    power = np.where(finite, 10.0 ** (np.where(finite, psd, 0.0) / 10.0), 0.0)
    measured = finite.astype(float) @ overlap  # Hz measured, per time and band
    width = upper - lower
    with np.errstate(divide="ignore", invalid="ignore"):
        level = 10.0 * np.log10((power @ overlap) / measured * width)
    # (a relative 1e-9 so that exactly half measured counts as half)
    level = np.where(measured >= min_coverage * width * (1 - 1e-9), level, np.nan)
    nominal = bands.nominal_hz[inside]
    return {
        "names": [band_name(f) for f in nominal],
        "nominal_hz": nominal,
        "centre_hz": bands.centre_hz[inside],
        "lower_hz": lower,
        "upper_hz": upper,
        "level_db": level.astype(np.float32),
    }


def write_soundscape(path: str | Path, lts: LongTermSpectrum, extra: dict | None = None) -> Path:
    """Write the long-term spectrum, its third-octave levels and ``extra`` arrays as one .npz.

    Keys (docs/report.md): ``start_utc_s``, ``bin_s``, ``time_utc_s``, ``band_edges_hz``,
    ``psd_db``, ``seconds``, ``percentiles``, ``percentile_db``, ``third_octave_names``,
    ``third_octave_nominal_hz``, ``third_octave_lower_hz``, ``third_octave_upper_hz``,
    ``third_octave_db``, plus ``extra``'s (detections, run and deployment).
    """
    third = third_octave_levels(lts.psd_db, lts.band_edges_hz)
    arrays = {
        "start_utc_s": np.float64(lts.start_utc_s),
        "bin_s": np.float64(lts.bin_s),
        "time_utc_s": lts.time_utc_s,
        "band_edges_hz": lts.band_edges_hz.astype(np.float32),
        "psd_db": lts.psd_db.astype(np.float32),
        "seconds": lts.seconds.astype(np.float32),
        "percentiles": lts.percentiles,
        "percentile_db": lts.percentile_db.astype(np.float32),
        "third_octave_names": np.array(third["names"], dtype=str),
        "third_octave_nominal_hz": third["nominal_hz"],
        "third_octave_lower_hz": third["lower_hz"],
        "third_octave_upper_hz": third["upper_hz"],
        "third_octave_db": third["level_db"],
    }
    arrays.update(extra or {})
    path = Path(path)
    tmp = path.with_name(path.name + ".partial.npz")
    np.savez_compressed(tmp, **arrays)
    tmp.replace(path)
    return path


def read_soundscape(path: str | Path) -> tuple[LongTermSpectrum, dict[str, np.ndarray]]:
    """Read a file of ``write_soundscape`` back: the spectrum, and every array by key.

    No pickled objects are read (``allow_pickle=False``): the file is plain arrays.
    """
    with np.load(path, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    lts = LongTermSpectrum(
        start_utc_s=float(arrays["start_utc_s"]),
        bin_s=float(arrays["bin_s"]),
        band_edges_hz=arrays["band_edges_hz"],
        psd_db=arrays["psd_db"],
        seconds=arrays["seconds"],
        percentiles=arrays["percentiles"],
        percentile_db=arrays["percentile_db"],
    )
    return lts, arrays
