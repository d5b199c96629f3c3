"""Synthetic pressure signals with known truth: ambient noise, ships, transients, calls.

Pure functions of arrays and random generators; everything in µPa. Used by the
invented demonstration scenario and by tests.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sp_fft

from ._validation import ParameterError, check_positive

__all__ = [
    "ambient_noise_psd_db",
    "shipping_psd_db",
    "wind_psd_db",
    "coloured_noise",
    "CallShape",
    "call_frequency_hz",
    "call_waveform",
    "surface_reflection",
    "harmonic_call_waveform",
    "tonal_burst",
    "strum_waveform",
    "flow_surge",
    "snap_waveform",
    "level_track_db",
]


def _khz(frequency_hz: np.ndarray) -> np.ndarray:
    # The empirical fit is undefined at 0 Hz; 1 Hz is far below any band used here.
    return np.maximum(np.asarray(frequency_hz, dtype=float), 1.0) / 1000.0


def shipping_psd_db(frequency_hz: np.ndarray, shipping: float) -> np.ndarray:
    """Distant-shipping noise, dB re 1 µPa²/Hz: ``40 + 20(s - 0.5) + 26 log f - 60 log(f + 0.03)``.

    Empirical fit of Wenz's (1962) curves (REFERENCES §8), f in kHz, ``shipping`` s in 0..1.
    """
    f = _khz(frequency_hz)
    return 40.0 + 20.0 * (shipping - 0.5) + 26.0 * np.log10(f) - 60.0 * np.log10(f + 0.03)


def wind_psd_db(frequency_hz: np.ndarray, wind_speed_mps: float) -> np.ndarray:
    """Wind-driven noise, dB re 1 µPa²/Hz: ``50 + 7.5 w^0.5 + 20 log f - 40 log(f + 0.4)``."""
    f = _khz(frequency_hz)
    return 50.0 + 7.5 * np.sqrt(wind_speed_mps) + 20.0 * np.log10(f) - 40.0 * np.log10(f + 0.4)


def ambient_noise_psd_db(frequency_hz: np.ndarray, shipping: float = 0.5, wind_speed_mps: float = 5.0) -> np.ndarray:
    """Deep-water ambient noise PSD, dB re 1 µPa²/Hz: shipping, wind, turbulence, thermal.

    The four terms of the empirical Wenz-curve fit (REFERENCES §8) added in power.

    Parameters
    ----------
    frequency_hz : np.ndarray, Hz
    shipping : float, 0 (none) .. 1 (heavy)
    wind_speed_mps : float, m/s
    """
    f = _khz(frequency_hz)
    turbulence = 17.0 - 30.0 * np.log10(f)
    thermal = -15.0 + 20.0 * np.log10(f)
    terms = np.stack(
        [
            shipping_psd_db(frequency_hz, shipping),
            wind_psd_db(frequency_hz, wind_speed_mps),
            turbulence,
            thermal,
        ]
    )
    return 10.0 * np.log10(np.sum(10.0 ** (terms / 10.0), axis=0))


def coloured_noise(n_samples: int, sample_rate_hz: float, psd_db: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Gaussian noise whose one-sided PSD is ``psd_db`` (dB re 1 µPa²/Hz) on the rfft grid.

    Parameters
    ----------
    n_samples : int
    sample_rate_hz : float, Hz
    psd_db : np.ndarray [shape=(n_samples // 2 + 1,)], dB re 1 µPa²/Hz
        Target PSD at ``np.fft.rfftfreq(n_samples, 1 / fs)``.
    rng : np.random.Generator

    Returns
    -------
    pressure : np.ndarray [shape=(n_samples,)], float32, µPa

    Notes
    -----
    Unit-variance white noise has one-sided PSD 2/fs (REFERENCES §5); scaling its
    spectrum by ``sqrt(P(f) fs / 2)`` gives PSD P(f).
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz)
    psd_db = np.asarray(psd_db, dtype=float)
    if psd_db.shape != (n_samples // 2 + 1,):
        raise ParameterError("psd_db needs one value per rfft bin of n_samples")
    # float32 halves the cost; noise at >= 1 µPa needs no more precision.
    white = sp_fft.rfft(rng.standard_normal(n_samples, dtype=np.float32))
    white *= np.sqrt(10.0 ** (psd_db / 10.0) * fs / 2.0).astype(np.float32)
    return sp_fft.irfft(white, n=n_samples)


@dataclass(frozen=True)
class CallShape:
    """The frequency contour of one call.

    Parameters
    ----------
    kind : {'sweep', 'drone'}
        'sweep': ``f0 + (f1 - f0) u^curvature`` with u = t / duration;
        'drone': ``(f0 + f1) / 2 + wobble_hz sin(2π wobble_rate_hz t)``, near-flat.
    f0_hz, f1_hz : float, Hz, start and end frequency of a sweep (band of a drone)
    duration_s : float, s
    curvature : float, exponent of a sweep (1 is linear)
    wobble_hz, wobble_rate_hz : float, Hz, a drone's frequency modulation
    harmonic_db : float, dB, level of the second harmonic relative to the fundamental
    """

    kind: str
    f0_hz: float
    f1_hz: float
    duration_s: float
    curvature: float = 1.0
    wobble_hz: float = 0.0
    wobble_rate_hz: float = 1.0
    harmonic_db: float = -100.0


def call_frequency_hz(shape: CallShape, t_s: np.ndarray) -> np.ndarray:
    """Instantaneous frequency (Hz) of the fundamental at times ``t_s`` (s from the call's start)."""
    t = np.asarray(t_s, dtype=float)
    if shape.kind == "sweep":
        u = np.clip(t / shape.duration_s, 0.0, 1.0)
        return shape.f0_hz + (shape.f1_hz - shape.f0_hz) * u**shape.curvature
    if shape.kind == "drone":
        centre = 0.5 * (shape.f0_hz + shape.f1_hz)
        return centre + shape.wobble_hz * np.sin(2 * np.pi * shape.wobble_rate_hz * t)
    raise ParameterError(f"call kind must be 'sweep' or 'drone', got {shape.kind!r}")


def _phase(shape: CallShape, t: np.ndarray) -> np.ndarray:
    """2π times the integral of the instantaneous frequency from 0 to t (closed form)."""
    if shape.kind == "sweep":
        d, p = shape.duration_s, shape.curvature
        u = np.clip(t / d, 0.0, 1.0)
        inside = shape.f0_hz * t + (shape.f1_hz - shape.f0_hz) * d * u ** (p + 1) / (p + 1)
        return 2 * np.pi * inside
    centre = 0.5 * (shape.f0_hz + shape.f1_hz)
    r = shape.wobble_rate_hz
    return 2 * np.pi * (centre * t - shape.wobble_hz / (2 * np.pi * r) * (np.cos(2 * np.pi * r * t) - 1.0))


def call_waveform(shape: CallShape, t_s: np.ndarray, amplitude_upa: float = 1.0, taper: float = 0.3) -> np.ndarray:
    """Pressure of one call at times ``t_s`` (s from its start), µPa; zero outside it.

    A Tukey envelope (``taper`` = fraction of the duration in the cosine ramps) keeps
    the call inside the band; ``amplitude_upa`` is the peak amplitude of the fundamental.
    """
    t = np.asarray(t_s, dtype=float)
    d = shape.duration_s
    u = t / d
    env = np.zeros_like(t)
    inside = (u >= 0.0) & (u <= 1.0)
    ramp = taper / 2.0
    env[inside] = 1.0
    rise = inside & (u < ramp)
    fall = inside & (u > 1.0 - ramp)
    env[rise] = 0.5 * (1.0 - np.cos(np.pi * u[rise] / ramp))
    env[fall] = 0.5 * (1.0 - np.cos(np.pi * (1.0 - u[fall]) / ramp))
    phase = _phase(shape, t)
    wave = np.sin(phase) + 10.0 ** (shape.harmonic_db / 20.0) * np.sin(2.0 * phase)
    return amplitude_upa * env * wave


def surface_reflection(
    horizontal_range_m: float,
    source_depth_m: float,
    receiver_depth_m: float,
    sound_speed_mps: float = 1500.0,
) -> tuple[float, float, float]:
    """Direct and surface-reflected path lengths (m) and the reflected path's delay (s).

    Image-source geometry over a flat pressure-release surface: the reflected copy
    arrives ``(r2 - r1) / c`` later, with inverted sign.
    """
    dz_direct = receiver_depth_m - source_depth_m
    dz_image = receiver_depth_m + source_depth_m
    r1 = float(np.hypot(horizontal_range_m, dz_direct))
    r2 = float(np.hypot(horizontal_range_m, dz_image))
    return r1, r2, (r2 - r1) / sound_speed_mps


def harmonic_call_waveform(
    shape: CallShape,
    t_s: np.ndarray,
    amplitude_upa: float = 1.0,
    harmonics_db: tuple[float, ...] = (),
    envelope_db: tuple[float, ...] = (),
    taper: float = 0.3,
) -> np.ndarray:
    """Pressure of one call with several harmonics and a fading envelope, µPa; zero outside it.

    Parameters
    ----------
    shape : CallShape
        Its ``harmonic_db`` is ignored: ``harmonics_db`` gives every harmonic.
    t_s : np.ndarray, s from the call's start
    amplitude_upa : float, µPa, peak amplitude of the fundamental where the envelope is 0 dB
    harmonics_db : tuple of float, dB re the fundamental, of harmonics 2, 3, ... in order
    envelope_db : tuple of float, dB
        Gains at equally spaced points from the call's start to its end, interpolated
        linearly (in dB) between them and multiplied with the Tukey taper of
        :func:`call_waveform`: a call that fades in, out or in the middle. Empty: 0 dB.
    taper : float, fraction of the duration in the Tukey envelope's cosine ramps

    Returns
    -------
    pressure : np.ndarray [shape=t_s.shape], µPa
    """
    t = np.asarray(t_s, dtype=float)
    env = _tukey(t / shape.duration_s, taper)
    phase = _phase(shape, t)
    wave = np.sin(phase)
    for k, level_db in enumerate(harmonics_db, start=2):
        wave = wave + 10.0 ** (level_db / 20.0) * np.sin(k * phase)
    wave = env * wave
    if envelope_db:
        knots = np.linspace(0.0, 1.0, len(envelope_db))
        gain_db = np.interp(t / shape.duration_s, knots, np.asarray(envelope_db, dtype=float))
        wave *= 10.0 ** (gain_db / 20.0)
    return amplitude_upa * wave


def _tukey(u: np.ndarray, taper: float) -> np.ndarray:
    """The envelope of :func:`call_waveform` at relative times ``u`` (0 outside [0, 1])."""
    env = np.zeros_like(u, dtype=float)
    inside = (u >= 0.0) & (u <= 1.0)
    ramp = taper / 2.0
    env[inside] = 1.0
    if ramp > 0:
        rise = inside & (u < ramp)
        fall = inside & (u > 1.0 - ramp)
        env[rise] = 0.5 * (1.0 - np.cos(np.pi * u[rise] / ramp))
        env[fall] = 0.5 * (1.0 - np.cos(np.pi * (1.0 - u[fall]) / ramp))
    return env


def tonal_burst(
    t_s: np.ndarray,
    f0_hz: float,
    f1_hz: float,
    duration_s: float,
    amplitude_upa: float = 1.0,
    harmonic_db: float = -100.0,
) -> np.ndarray:
    """A short low tonal burst (a fish-like grunt), µPa; zero outside [0, duration_s].

    A linear glide from ``f0_hz`` to ``f1_hz`` under a Hann envelope, with a second
    harmonic ``harmonic_db`` below the fundamental; ``amplitude_upa`` is the peak
    amplitude of the fundamental.
    """
    t = np.asarray(t_s, dtype=float)
    d = check_positive("duration_s", duration_s)
    u = np.clip(t / d, 0.0, 1.0)
    inside = (t >= 0.0) & (t <= d)
    env = np.where(inside, np.sin(np.pi * u) ** 2, 0.0)
    phase = 2 * np.pi * (f0_hz * t + 0.5 * (f1_hz - f0_hz) * d * u**2)
    return amplitude_upa * env * (np.sin(phase) + 10.0 ** (harmonic_db / 20.0) * np.sin(2 * phase))


def strum_waveform(
    t_s: np.ndarray,
    f0_hz: float,
    duration_s: float,
    amplitude_upa: float = 1.0,
    n_harmonics: int = 4,
    buzz_rate_hz: float = 12.0,
) -> np.ndarray:
    """A buzzing strum: ``n_harmonics`` harmonics of ``f0_hz`` (amplitude 1/k), µPa.

    Amplitude-modulated at ``buzz_rate_hz`` (fully, raised cosine) under a Tukey envelope
    (half the duration in ramps); ``amplitude_upa`` is the fundamental's peak amplitude.
    Zero outside [0, duration_s].
    """
    t = np.asarray(t_s, dtype=float)
    d = check_positive("duration_s", duration_s)
    env = _tukey(t / d, 0.5) * 0.5 * (1.0 - np.cos(2 * np.pi * buzz_rate_hz * t))
    wave = sum(np.sin(2 * np.pi * k * f0_hz * t + 0.7 * k) / k for k in range(1, n_harmonics + 1))
    return amplitude_upa * env * wave


def flow_surge(
    n_samples: int,
    sample_rate_hz: float,
    level_db: float,
    corner_hz: float,
    rng: np.random.Generator,
) -> np.ndarray:
    """A low-frequency broadband surge (flow noise on the hydrophone), µPa.

    Gaussian noise whose PSD is flat below ``corner_hz`` and falls 30 dB per decade
    above it, under a Hann envelope over all ``n_samples``; ``level_db`` (dB re 1 µPa)
    is the broadband rms level at the envelope's peak.
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz)
    f = np.fft.rfftfreq(n_samples, 1.0 / fs)
    shape_db = -10.0 * np.log10(1.0 + (np.maximum(f, 0.5) / corner_hz) ** 3)
    x = coloured_noise(n_samples, fs, shape_db, rng)
    rms = float(np.sqrt(np.mean(x.astype(np.float64) ** 2))) or 1.0
    env = np.sin(np.pi * (np.arange(n_samples) + 0.5) / n_samples) ** 2
    return (10.0 ** (level_db / 20.0) / rms) * x * env


def snap_waveform(
    sample_rate_hz: float,
    peak_upa: float,
    ring_hz: float,
    decay_s: float,
    rng: np.random.Generator,
) -> np.ndarray:
    """One click (a snap): a decaying oscillation at ``ring_hz`` with a random phase, µPa.

    Lasts six decay times; its first extremum is about ``peak_upa``.
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz)
    n = max(int(6 * decay_s * fs), 2)
    t = np.arange(n) / fs
    return peak_upa * np.exp(-t / decay_s) * np.cos(2 * np.pi * ring_hz * t + rng.uniform(0, 2 * np.pi))


def level_track_db(
    t_s: np.ndarray,
    swing_db: float,
    period_s: float,
    phase_rad: float = 0.0,
    walk_knots_s: np.ndarray | None = None,
    walk_db: np.ndarray | None = None,
) -> np.ndarray:
    """A slowly moving level offset, dB: a sinusoid of ``swing_db`` peak to trough plus a walk.

    ``swing_db / 2 * sin(2π t / period_s + phase_rad)``, plus the random walk given by its
    values ``walk_db`` at times ``walk_knots_s`` (interpolated linearly), if any.
    """
    t = np.asarray(t_s, dtype=float)
    out = 0.5 * swing_db * np.sin(2 * np.pi * t / check_positive("period_s", period_s) + phase_rad)
    if walk_knots_s is not None and walk_db is not None:
        out = out + np.interp(t, walk_knots_s, walk_db)
    return out
