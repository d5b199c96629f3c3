"""From sample values to sound pressure: the recording chain and its response.

The chain is hydrophone (sensitivity ``M_h`` in dB re 1 V/µPa) -> preamplifier
(gain ``G`` in dB) -> converter (``full_scale_volts``, the 0-to-peak voltage that maps
to sample value 1.0). The system sensitivity is ``S = M_h + G`` dB re 1 V/µPa and a
sample value ``x`` is the pressure ``p = x * V_fs / 10**(S/20)`` µPa (REFERENCES §4).
Where ``S`` depends on frequency, the conversion is a filter: applied to spectra as
a per-bin factor and to waveforms as a linear-phase FIR.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import signal

from ._validation import ParameterError, check_increasing, check_positive

__all__ = [
    "ResponseCurve",
    "RecordingChain",
    "PlausibleRange",
    "PLAUSIBLE",
    "pressure_from_samples",
    "samples_from_pressure",
    "band_pressure_fir",
]


@dataclass(frozen=True)
class PlausibleRange:
    """The values one quantity of a recording chain takes: usual ones and possible ones.

    Parameters
    ----------
    what : str, the quantity in words ("hydrophone sensitivity")
    unit : str, its unit ("dB re 1 V/µPa")
    usual : (float, float), the range most recorders fall in; outside it a value is
        unusual but possible (warn)
    possible : (float, float), beyond it no recorder has such a value: a typing error
        (refuse)
    """

    what: str
    unit: str
    usual: tuple[float, float]
    possible: tuple[float, float]

    def judge(self, value: float) -> str:
        """``'usual'``, ``'unusual'`` or ``'impossible'`` for a finite ``value`` in ``unit``."""
        if not self.possible[0] <= value <= self.possible[1]:
            return "impossible"
        if not self.usual[0] <= value <= self.usual[1]:
            return "unusual"
        return "usual"

    def usual_text(self) -> str:
        """The usual range in words, for messages."""
        return f"usual range {self.usual[0]:g} .. {self.usual[1]:g} {self.unit}, common practice"


# Plausible values of a recording chain. Common practice, from memory (manufacturers'
# data sheets and recorders seen in use), not from a standard: the usual edges are
# approximate, and the possible ones deliberately wide, so that only a typing error
# (a lost minus sign, millivolts for volts, kHz for Hz) is refused.
PLAUSIBLE = {
    # Hydrophones: about -220 (rugged, for loud sources) to -150 dB re 1 V/µPa; with a
    # built-in preamplifier up to about -120 (the upper edge is the least sure, by about
    # 10 dB). Above -90 dB (31.6 V/Pa) no transducer exists; 0 dB would be 1 V per µPa.
    "hydrophone_sensitivity_db": PlausibleRange(
        "hydrophone sensitivity", "dB re 1 V/µPa", (-220.0, -120.0), (-260.0, -90.0)
    ),
    # Preamplifiers: 0 (none) to about 70 dB of gain in recorders' settings; a negative
    # gain is an attenuator (unusual). Beyond +-100 dB no recording amplifier goes.
    "preamp_gain_db": PlausibleRange("preamplifier gain", "dB", (0.0, 70.0), (-100.0, 100.0)),
    # Converters: 0-to-peak full scale of about 0.1 to 20 V (1, 1.41, 2.5, 5 V are
    # common). Below 1 mV or above 100 V it is millivolts typed as volts, or the reverse.
    "full_scale_volts": PlausibleRange("converter full scale (0-to-peak)", "V", (0.1, 20.0), (1e-3, 100.0)),
    # Calibration tables: about 1 Hz to 1 MHz; above 10 MHz they are not sound in water.
    "frequency_hz": PlausibleRange("calibration table frequency", "Hz", (1.0, 1e6), (1e-3, 1e7)),
    # Sound recordings: about 1 kHz to 1 MHz (a few low-frequency recorders and the
    # hydrophone channels of ocean-bottom seismometers run at 100-500 Hz).
    "sample_rate_hz": PlausibleRange("sample rate", "Hz", (1000.0, 1e6), (10.0, 1e7)),
    # The whole chain: the 0-to-peak pressure at digital full scale. Under 60 dB re 1 µPa
    # the quietest sea would drive the converter to full scale all the time; above 300
    # dB (1 GPa) water cannot carry the sound. Recorders for animal calls clip at about
    # 130 to 200 dB re 1 µPa; the usual range here is wider.
    "clip_level_db": PlausibleRange("clip level (0-to-peak)", "dB re 1 µPa", (100.0, 250.0), (60.0, 300.0)),
}


@dataclass(frozen=True, eq=False)
class ResponseCurve:
    """A level in dB as a function of frequency, interpolated in log-frequency.

    Parameters
    ----------
    frequency_hz : np.ndarray [shape=(n,)], Hz
        Strictly increasing, > 0. One point means a flat curve.
    level_db : np.ndarray [shape=(n,)], dB
        Level at each frequency (dB re 1 V/µPa for a hydrophone, dB for a gain).

    Notes
    -----
    Between table points the level is linear in log10(frequency); beyond the ends it is
    held at the end values (docs/formats.md), which also covers 0 Hz.
    """

    frequency_hz: np.ndarray
    level_db: np.ndarray
    _log_f: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        f = check_increasing("frequency_hz", self.frequency_hz)
        if f[0] <= 0:
            raise ParameterError(f"frequency_hz must be > 0, got {f[0]:g}")
        level = np.asarray(self.level_db, dtype=float)
        if level.shape != f.shape or not np.all(np.isfinite(level)):
            raise ParameterError("level_db must be finite and have one value per frequency")
        object.__setattr__(self, "frequency_hz", f)
        object.__setattr__(self, "level_db", level)
        object.__setattr__(self, "_log_f", np.log10(f))

    @classmethod
    def flat(cls, level_db: float) -> ResponseCurve:
        """A curve with the same level at every frequency, ``level_db`` in dB."""
        return cls(np.array([1.0]), np.array([float(level_db)]))

    @property
    def is_flat(self) -> bool:
        """True when the level is the same at every frequency."""
        return bool(np.ptp(self.level_db) == 0.0)

    def at(self, frequency_hz: np.ndarray | float) -> np.ndarray:
        """Level in dB at ``frequency_hz`` (Hz, any shape; values <= 0 take the lowest point)."""
        f = np.asarray(frequency_hz, dtype=float)
        log_f = np.log10(np.maximum(f, self.frequency_hz[0]))
        return np.interp(log_f, self._log_f, self.level_db)


@dataclass(frozen=True, eq=False)
class RecordingChain:
    """Hydrophone, preamplifier and converter of one recorder.

    Parameters
    ----------
    full_scale_volts : float, V
        0-to-peak voltage at the converter input that maps to sample value 1.0.
    hydrophone_sensitivity : ResponseCurve, dB re 1 V/µPa
        Open-circuit receiving sensitivity of the hydrophone.
    preamp_gain : ResponseCurve, dB
        Gain between the hydrophone and the converter (all stages together).
    """

    full_scale_volts: float
    hydrophone_sensitivity: ResponseCurve
    preamp_gain: ResponseCurve

    def __post_init__(self) -> None:
        object.__setattr__(self, "full_scale_volts", check_positive("full_scale_volts", self.full_scale_volts))

    @classmethod
    def flat(cls, full_scale_volts: float, sensitivity_db: float, gain_db: float = 0.0) -> RecordingChain:
        """A chain whose sensitivity (dB re 1 V/µPa) and gain (dB) do not vary with frequency."""
        return cls(full_scale_volts, ResponseCurve.flat(sensitivity_db), ResponseCurve.flat(gain_db))

    @property
    def is_flat(self) -> bool:
        """True when the system sensitivity is the same at every frequency."""
        return self.hydrophone_sensitivity.is_flat and self.preamp_gain.is_flat

    def system_sensitivity_db(self, frequency_hz: np.ndarray | float) -> np.ndarray:
        """End-to-end sensitivity ``M_h + G`` in dB re 1 V/µPa at ``frequency_hz`` (Hz)."""
        return self.hydrophone_sensitivity.at(frequency_hz) + self.preamp_gain.at(frequency_hz)

    def clip_level_db(self, frequency_hz: np.ndarray | float) -> np.ndarray:
        """Zero-to-peak pressure level that reaches digital full scale, dB re 1 µPa.

        ``20 log10(V_fs / 1 V) - S(f)`` (REFERENCES §4).
        """
        return 20.0 * np.log10(self.full_scale_volts) - self.system_sensitivity_db(frequency_hz)

    def upa_per_unit(self, frequency_hz: np.ndarray | float) -> np.ndarray:
        """Pressure in µPa that one unit of sample value stands for, at ``frequency_hz`` (Hz)."""
        return self.full_scale_volts * 10.0 ** (-self.system_sensitivity_db(frequency_hz) / 20.0)

    def fir_length(self, sample_rate_hz: float) -> int:
        """Odd number of taps of the waveform correction filter at ``sample_rate_hz`` (Hz).

        The frequency step fs/taps resolves the lowest table point to a third of its
        frequency, capped at 16385 taps; 1 for a flat chain.
        """
        if self.is_flat:
            return 1
        fs = check_positive("sample_rate_hz", sample_rate_hz)
        lowest = min(self.hydrophone_sensitivity.frequency_hz[0], self.preamp_gain.frequency_hz[0])
        taps = int(np.ceil(3.0 * fs / max(lowest, fs / 16384.0)))
        taps = int(np.clip(taps, 129, 16385))
        return taps | 1


def _correction_fir(chain: RecordingChain, sample_rate_hz: float, inverse: bool) -> np.ndarray:
    taps = chain.fir_length(sample_rate_hz)
    # Frequency sampling on a grid twice as fine as the filter resolves.
    grid_hz = np.linspace(0.0, sample_rate_hz / 2.0, taps)
    gain = chain.upa_per_unit(grid_hz)
    if inverse:
        gain = 1.0 / gain
    return signal.firwin2(taps, grid_hz, gain, fs=sample_rate_hz, window="hann")


def pressure_from_samples(samples: np.ndarray, sample_rate_hz: float, chain: RecordingChain) -> np.ndarray:
    """Sound pressure in µPa from sample values (full scale ±1.0).

    Parameters
    ----------
    samples : np.ndarray [shape=(n,)], sample values (full scale ±1.0)
    sample_rate_hz : float, Hz
    chain : RecordingChain

    Returns
    -------
    pressure : np.ndarray [shape=(n,)], µPa, float32 where the input is float32

    Notes
    -----
    A frequency-dependent chain is inverted by a zero-delay linear-phase FIR of
    ``chain.fir_length(fs)`` taps; the first and last ``taps // 2`` output samples lack
    context, so streaming callers read that many samples of context on each side.
    """
    x = np.asarray(samples)
    dtype = x.dtype if x.dtype in (np.float32, np.float64) else np.float64
    if chain.is_flat:
        return (x * chain.upa_per_unit(1.0)).astype(dtype, copy=False)
    fir = _correction_fir(chain, sample_rate_hz, inverse=False)
    return signal.oaconvolve(x.astype(np.float64), fir, mode="same").astype(dtype, copy=False)


def samples_from_pressure(pressure_upa: np.ndarray, sample_rate_hz: float, chain: RecordingChain) -> np.ndarray:
    """Sample values (full scale ±1.0, unclipped) that the chain produces from pressure in µPa.

    The forward direction of :func:`pressure_from_samples`, used to write synthetic
    recordings through a recorder's own response.
    """
    p = np.asarray(pressure_upa, dtype=np.float64)
    if chain.is_flat:
        return p / chain.upa_per_unit(1.0)
    fir = _correction_fir(chain, sample_rate_hz, inverse=True)
    return signal.oaconvolve(p, fir, mode="same")


def band_pressure_fir(chain: RecordingChain, sample_rate_hz: float, low_hz: float, high_hz: float) -> np.ndarray:
    """Linear-phase FIR from sample values to band-passed pressure in µPa.

    The gain is the chain's µPa per unit inside [low_hz, high_hz] and falls to zero
    over transitions of a quarter of ``low_hz`` (at least 5 Hz, at most 500 Hz) on
    each side, so the same band gives the same filter in Hz at any sample rate.

    Returns
    -------
    taps : np.ndarray [shape=(n_taps,)], odd length, zero delay at its centre
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz)
    nyquist = fs / 2.0
    transition = float(np.clip(0.25 * low_hz, 5.0, 500.0))
    taps = int(np.clip(np.ceil(4.0 * fs / transition), 65, 16385)) | 1
    grid = [0.0]
    gain = [0.0]
    lo_stop = max(low_hz - transition, 0.0)
    if lo_stop > 0:
        grid += [lo_stop]
        gain += [0.0]
    hi_stop = min(high_hz + transition, nyquist)
    inner = np.linspace(max(low_hz, 1e-6), min(high_hz, nyquist), 64)
    grid += list(inner)
    gain += list(chain.upa_per_unit(inner))
    if hi_stop < nyquist:
        grid += [hi_stop, nyquist]
        gain += [0.0, 0.0]
    else:
        grid[-1] = nyquist
    grid_arr = np.array(grid)
    keep = np.concatenate([[True], np.diff(grid_arr) > 0])
    return signal.firwin2(taps, grid_arr[keep], np.array(gain)[keep], fs=fs, window="hann")
