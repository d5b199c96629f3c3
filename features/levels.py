"""Level metrics in the terms of ISO 18405, from pressure waveforms and from PSDs.

Reference values: p0 = 1 µPa, E0 = 1 µPa²·s (ISO 18405:2017 §3.2). Inputs are in µPa,
so a level is simply ``10 log10`` of the mean-square (or squared peak) value.
"""

from __future__ import annotations

import numpy as np

from ._validation import ParameterError, check_positive

__all__ = [
    "power_db",
    "spl_rms_db",
    "spl_zero_to_peak_db",
    "spl_peak_to_peak_db",
    "sel_db",
    "band_level_db",
    "band_spl_db",
    "band_levels_db",
    "fractional_octave_bands",
    "FractionalOctaveBands",
]

_TINY = 1e-30  # keeps log10 finite for silent input; -300 dB is "no sound"


def power_db(mean_square: np.ndarray | float) -> np.ndarray:
    """``10 log10`` of a mean-square quantity (µPa² or µPa²·s or µPa²/Hz) -> dB re its unit."""
    return 10.0 * np.log10(np.maximum(np.asarray(mean_square, dtype=float), _TINY))


def spl_rms_db(pressure_upa: np.ndarray, axis: int = -1) -> np.ndarray:
    """Sound pressure level (rms), dB re 1 µPa, of ``pressure_upa`` (µPa) along ``axis``."""
    p = np.asarray(pressure_upa, dtype=np.float64)
    return power_db(np.mean(p * p, axis=axis))


def spl_zero_to_peak_db(pressure_upa: np.ndarray, axis: int = -1) -> np.ndarray:
    """Zero-to-peak sound pressure level, dB re 1 µPa: ``20 log10(max|p| / 1 µPa)``."""
    p = np.asarray(pressure_upa, dtype=np.float64)
    return power_db(np.max(np.abs(p), axis=axis) ** 2)


def spl_peak_to_peak_db(pressure_upa: np.ndarray, axis: int = -1) -> np.ndarray:
    """Peak-to-peak sound pressure level, dB re 1 µPa: ``20 log10((max p - min p) / 1 µPa)``."""
    p = np.asarray(pressure_upa, dtype=np.float64)
    return power_db((np.max(p, axis=axis) - np.min(p, axis=axis)) ** 2)


def sel_db(pressure_upa: np.ndarray, sample_rate_hz: float, axis: int = -1) -> np.ndarray:
    """Sound exposure level, dB re 1 µPa²·s: ``10 log10(sum(p²) / fs)``.

    Parameters
    ----------
    pressure_upa : np.ndarray, µPa
    sample_rate_hz : float, Hz
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz)
    p = np.asarray(pressure_upa, dtype=np.float64)
    return power_db(np.sum(p * p, axis=axis) / fs)


def band_level_db(
    psd_db: np.ndarray,
    frequency_hz: np.ndarray,
    low_hz: float,
    high_hz: float,
    axis: int = 0,
) -> np.ndarray:
    """Band sound pressure level, dB re 1 µPa, from a PSD in dB re 1 µPa²/Hz.

    Parameters
    ----------
    psd_db : np.ndarray [shape=(n_freq, ...)], dB re 1 µPa²/Hz
        PSD on an evenly spaced frequency axis (``axis`` selects it).
    frequency_hz : np.ndarray [shape=(n_freq,)], Hz
        Bin centres, evenly spaced.
    low_hz, high_hz : float, Hz
        Band edges. Each bin counts with the fraction of its width inside the band, so
        band levels of adjacent bands add up to the level of their union.

    Returns
    -------
    level : np.ndarray, dB re 1 µPa
    """
    weights = _band_weights(np.asarray(frequency_hz, dtype=float), low_hz, high_hz)
    psd = 10.0 ** (np.asarray(psd_db, dtype=np.float64) / 10.0)
    psd = np.moveaxis(psd, axis, -1)
    return power_db(psd @ weights)


def band_spl_db(pressure_upa: np.ndarray, sample_rate_hz: float, low_hz: float, high_hz: float) -> np.ndarray:
    """In-band rms sound pressure level (band-pass filtered) of a waveform, dB re 1 µPa.

    The mean square of the part of ``pressure_upa`` between ``low_hz`` and ``high_hz``,
    from its periodogram (Parseval: a rectangular filter, no window), so that it adds
    up exactly across adjacent bands.

    Parameters
    ----------
    pressure_upa : np.ndarray [shape=(..., n)], µPa
    sample_rate_hz : float, Hz
    low_hz, high_hz : float, Hz
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz)
    if not high_hz > low_hz:
        raise ParameterError(f"band needs high_hz > low_hz, got {low_hz:g} .. {high_hz:g} Hz")
    p = np.asarray(pressure_upa, dtype=np.float64)
    n = p.shape[-1]
    if n < 2:
        raise ParameterError("a band level needs at least two samples")
    spectrum = np.fft.rfft(p, axis=-1)
    f = np.fft.rfftfreq(n, 1.0 / fs)
    weight = np.where(f == 0.0, 1.0, 2.0)
    if n % 2 == 0:
        weight[-1] = 1.0
    weight = weight * ((f >= low_hz) & (f <= high_hz))
    mean_square = np.sum(weight * (spectrum.real**2 + spectrum.imag**2), axis=-1) / n**2
    return power_db(mean_square)


def band_levels_db(
    psd_db: np.ndarray,
    frequency_hz: np.ndarray,
    lower_hz: np.ndarray,
    upper_hz: np.ndarray,
    axis: int = 0,
) -> np.ndarray:
    """Levels of several bands at once, dB re 1 µPa; bands along a new last axis."""
    f = np.asarray(frequency_hz, dtype=float)
    weights = np.stack([_band_weights(f, lo, hi) for lo, hi in zip(lower_hz, upper_hz, strict=True)], axis=1)
    psd = np.moveaxis(10.0 ** (np.asarray(psd_db, dtype=np.float64) / 10.0), axis, -1)
    return power_db(psd @ weights)


def _band_weights(frequency_hz: np.ndarray, low_hz: float, high_hz: float) -> np.ndarray:
    """Width in Hz of each bin that falls inside [low_hz, high_hz]."""
    if frequency_hz.size < 2:
        raise ParameterError("a band level needs at least two frequency bins")
    df = float(frequency_hz[1] - frequency_hz[0])
    if not high_hz > low_hz:
        raise ParameterError(f"band needs high_hz > low_hz, got {low_hz:g} .. {high_hz:g} Hz")
    lo_edge = frequency_hz - df / 2.0
    hi_edge = frequency_hz + df / 2.0
    return np.clip(np.minimum(hi_edge, high_hz) - np.maximum(lo_edge, low_hz), 0.0, None)


# ISO 266 / IEC 61260-1 preferred (R10) names of the base-10 one-third-octave series.
_R10 = (10.0, 12.5, 16.0, 20.0, 25.0, 31.5, 40.0, 50.0, 63.0, 80.0)


class FractionalOctaveBands:
    """Base-10 octave or one-third-octave bands (IEC 61260-1:2014, ANSI S1.11-2004).

    Attributes
    ----------
    index : np.ndarray [shape=(n,)], band number x (0 is the 1 kHz band)
    centre_hz, lower_hz, upper_hz : np.ndarray [shape=(n,)], Hz
        Exact mid-band frequency ``1000 G^(x/b)`` and edges ``f_m G^(∓1/(2b))``, G = 10^0.3.
    nominal_hz : np.ndarray [shape=(n,)], Hz
        Preferred (ISO 266 R10) names: 31.5, 63, 125, ...
    """

    def __init__(self, index: np.ndarray, fraction: int) -> None:
        self.fraction = fraction
        self.index = np.asarray(index, dtype=int)
        g = 10.0**0.3
        self.centre_hz = 1000.0 * g ** (self.index / fraction)
        self.lower_hz = self.centre_hz * g ** (-1.0 / (2 * fraction))
        self.upper_hz = self.centre_hz * g ** (1.0 / (2 * fraction))
        third = self.index * (3 // fraction)  # index on the one-third-octave series
        decade = np.floor_divide(third, 10)
        self.nominal_hz = np.array(_R10)[np.mod(third, 10)] * 10.0 ** (decade + 2)

    def __len__(self) -> int:
        return int(self.index.size)


def fractional_octave_bands(min_hz: float, max_hz: float, fraction: int = 3) -> FractionalOctaveBands:
    """Bands of the base-10 series whose mid-band frequency lies in [min_hz, max_hz].

    Parameters
    ----------
    min_hz, max_hz : float, Hz
    fraction : {1, 3}
        1 for octave bands, 3 for one-third-octave bands.
    """
    if fraction not in (1, 3):
        raise ParameterError(f"fraction must be 1 (octave) or 3 (one-third octave), got {fraction}")
    min_hz = check_positive("min_hz", min_hz)
    max_hz = check_positive("max_hz", max_hz)
    # x = b * log10(f/1000) / 0.3; a small margin keeps exact centres such as 1000 Hz.
    lo = int(np.ceil(fraction * np.log10(min_hz / 1000.0) / 0.3 - 1e-9))
    hi = int(np.floor(fraction * np.log10(max_hz / 1000.0) / 0.3 + 1e-9))
    return FractionalOctaveBands(np.arange(lo, hi + 1), fraction)
