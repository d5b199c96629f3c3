"""Spreading, seawater absorption and the level arithmetic around them.

Absorption formulas are written as published, with frequency in kHz and the result in
dB/km; the public functions take Hz and metres. Sources: Francois & Garrison (1982),
JASA 72(3) 896-907 and 72(6) 1879-1890; Ainslie & McColm (1998), JASA 103(3) 1671-1672.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._validation import ParameterError

__all__ = [
    "Seawater",
    "spherical_spreading_loss_db",
    "cylindrical_spreading_loss_db",
    "francois_garrison_absorption_db_per_km",
    "ainslie_mccolm_absorption_db_per_km",
    "absorption_db_per_km",
    "spreading_loss_db",
    "transmission_loss_db",
    "received_level_db",
    "source_level_db",
    "voltage_rms",
    "sample_value",
]


@dataclass(frozen=True)
class Seawater:
    """Water properties for absorption.

    Parameters
    ----------
    temperature_c : float, °C
    salinity_psu : float, PSU
    ph : float
    depth_m : float, m
    """

    temperature_c: float = 4.0
    salinity_psu: float = 35.0
    ph: float = 8.0
    depth_m: float = 0.0


def _as_range(range_m: np.ndarray | float, reference_m: float) -> np.ndarray:
    r = np.asarray(range_m, dtype=float)
    if np.any(r <= 0) or reference_m <= 0:
        raise ParameterError("ranges must be > 0 m")
    return r


def spherical_spreading_loss_db(range_m: np.ndarray | float, reference_m: float = 1.0) -> np.ndarray:
    """Spherical spreading loss ``20 log10(r / r0)``, dB; ``range_m`` and ``reference_m`` in m."""
    return 20.0 * np.log10(_as_range(range_m, reference_m) / reference_m)


def cylindrical_spreading_loss_db(range_m: np.ndarray | float, reference_m: float = 1.0) -> np.ndarray:
    """Cylindrical spreading loss ``10 log10(r / r0)``, dB; ``range_m`` and ``reference_m`` in m."""
    return 10.0 * np.log10(_as_range(range_m, reference_m) / reference_m)


def francois_garrison_absorption_db_per_km(
    frequency_hz: np.ndarray | float, water: Seawater = Seawater()
) -> np.ndarray:
    """Seawater absorption after Francois & Garrison (1982b), dB/km.

    Parameters
    ----------
    frequency_hz : np.ndarray or float, Hz (stated validity 200 Hz - 1 MHz)
    water : Seawater
    """
    f = np.asarray(frequency_hz, dtype=float) / 1000.0
    t, s, ph, z = water.temperature_c, water.salinity_psu, water.ph, water.depth_m
    c = 1412.0 + 3.21 * t + 1.19 * s + 0.0167 * z
    theta = 273.0 + t
    a1 = 8.86 / c * 10.0 ** (0.78 * ph - 5.0)
    f1 = 2.8 * np.sqrt(s / 35.0) * 10.0 ** (4.0 - 1245.0 / theta)
    a2 = 21.44 * s / c * (1.0 + 0.025 * t)
    p2 = 1.0 - 1.37e-4 * z + 6.2e-9 * z * z
    f2 = 8.17 * 10.0 ** (8.0 - 1990.0 / theta) / (1.0 + 0.0018 * (s - 35.0))
    if t <= 20.0:
        a3 = 4.937e-4 - 2.59e-5 * t + 9.11e-7 * t**2 - 1.50e-8 * t**3
    else:
        a3 = 3.964e-4 - 1.146e-5 * t + 1.45e-7 * t**2 - 6.5e-10 * t**3
    p3 = 1.0 - 3.83e-5 * z + 4.9e-10 * z * z
    f_sq = f * f
    return a1 * f1 * f_sq / (f1 * f1 + f_sq) + a2 * p2 * f2 * f_sq / (f2 * f2 + f_sq) + a3 * p3 * f_sq


def ainslie_mccolm_absorption_db_per_km(frequency_hz: np.ndarray | float, water: Seawater = Seawater()) -> np.ndarray:
    """Seawater absorption after Ainslie & McColm (1998), dB/km (within ~10 % of F&G).

    Parameters
    ----------
    frequency_hz : np.ndarray or float, Hz
    water : Seawater
    """
    f = np.asarray(frequency_hz, dtype=float) / 1000.0
    t, s, ph = water.temperature_c, water.salinity_psu, water.ph
    z_km = water.depth_m / 1000.0
    f1 = 0.78 * np.sqrt(s / 35.0) * np.exp(t / 26.0)
    f2 = 42.0 * np.exp(t / 17.0)
    f_sq = f * f
    return (
        0.106 * f1 * f_sq / (f1 * f1 + f_sq) * np.exp((ph - 8.0) / 0.56)
        + 0.52 * (1.0 + t / 43.0) * (s / 35.0) * f2 * f_sq / (f2 * f2 + f_sq) * np.exp(-z_km / 6.0)
        + 0.00049 * f_sq * np.exp(-(t / 27.0 + z_km / 17.0))
    )


_ABSORPTION = {
    "francois-garrison": francois_garrison_absorption_db_per_km,
    "ainslie-mccolm": ainslie_mccolm_absorption_db_per_km,
}


def absorption_db_per_km(
    frequency_hz: np.ndarray | float,
    water: Seawater = Seawater(),
    model: str = "francois-garrison",
) -> np.ndarray:
    """Absorption coefficient in dB/km by ``model`` ('francois-garrison' or 'ainslie-mccolm')."""
    try:
        return _ABSORPTION[model](frequency_hz, water)
    except KeyError:
        raise ParameterError(f"absorption model must be one of {sorted(_ABSORPTION)}, got {model!r}") from None


def spreading_loss_db(
    range_m: np.ndarray | float, spreading: str = "spherical", transition_range_m: float | None = None
) -> np.ndarray:
    """Geometric spreading loss, dB re 1 m.

    Parameters
    ----------
    range_m : np.ndarray or float, m
    spreading : {'spherical', 'cylindrical', 'spherical-cylindrical'}
        The last is spherical out to ``transition_range_m`` (m, e.g. the water depth),
        cylindrical beyond it (common practice for shallow water).
    transition_range_m : float, m
    """
    r = _as_range(range_m, 1.0)
    if spreading == "spherical":
        return spherical_spreading_loss_db(r)
    if spreading == "cylindrical":
        return cylindrical_spreading_loss_db(r)
    if spreading == "spherical-cylindrical":
        if transition_range_m is None or transition_range_m <= 0:
            raise ParameterError("spherical-cylindrical spreading needs transition_range_m > 0")
        r_t = float(transition_range_m)
        return np.where(
            r <= r_t,
            spherical_spreading_loss_db(r),
            spherical_spreading_loss_db(r_t) + cylindrical_spreading_loss_db(np.maximum(r, r_t), r_t),
        )
    raise ParameterError(f"spreading must be 'spherical', 'cylindrical' or 'spherical-cylindrical', got {spreading!r}")


def transmission_loss_db(
    range_m: np.ndarray | float,
    frequency_hz: np.ndarray | float,
    water: Seawater = Seawater(),
    spreading: str = "spherical",
    transition_range_m: float | None = None,
    absorption_model: str = "francois-garrison",
) -> np.ndarray:
    """One-way transmission loss, dB: spreading (:func:`spreading_loss_db`) plus ``alpha * r / 1000``.

    Parameters
    ----------
    range_m : np.ndarray or float, m
    frequency_hz : np.ndarray or float, Hz (broadcast against ``range_m``)
    water : Seawater
    spreading, transition_range_m : as :func:`spreading_loss_db`
    absorption_model : {'francois-garrison', 'ainslie-mccolm'}
    """
    r = _as_range(range_m, 1.0)
    alpha = absorption_db_per_km(frequency_hz, water, absorption_model)
    return spreading_loss_db(r, spreading, transition_range_m) + alpha * r / 1000.0


def received_level_db(source_level_db: np.ndarray | float, loss_db: np.ndarray | float) -> np.ndarray:
    """Received level RL = SL - TL; SL in dB re 1 µPa·m, TL in dB -> dB re 1 µPa."""
    return np.asarray(source_level_db, dtype=float) - np.asarray(loss_db, dtype=float)


def source_level_db(received_db: np.ndarray | float, loss_db: np.ndarray | float) -> np.ndarray:
    """Source level SL = RL + TL; RL in dB re 1 µPa, TL in dB -> dB re 1 µPa·m."""
    return np.asarray(received_db, dtype=float) + np.asarray(loss_db, dtype=float)


def voltage_rms(level_db: np.ndarray | float, system_sensitivity_db: np.ndarray | float) -> np.ndarray:
    """Voltage ``10**((L + S) / 20)`` V, L in dB re 1 µPa and sensitivity S in dB re 1 V/µPa.

    An rms level gives V rms; a zero-to-peak level gives V 0-to-peak (REFERENCES §4).
    """
    return 10.0 ** ((np.asarray(level_db, dtype=float) + np.asarray(system_sensitivity_db)) / 20.0)


def sample_value(volts: np.ndarray | float, full_scale_volts: float) -> np.ndarray:
    """Digital sample value ``V / V_fs`` (full scale ±1.0) for a voltage in V."""
    return np.asarray(volts, dtype=float) / float(full_scale_volts)
