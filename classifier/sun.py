"""The sun's position, sunrise and sunset: the NOAA solar calculator's equations.

The equations are those of the NOAA Global Monitoring Laboratory's solar calculator
(its published spreadsheet), which follow Jean Meeus, *Astronomical Algorithms*
(Willmann-Bell, 1991; 2nd ed. 1998), ch. 25 (solar coordinates, low accuracy) and ch. 28
(equation of time). Accuracy is about 0.01° in declination and a few seconds in the
equation of time for years 1800–2100: far finer than an hour-of-day figure needs.
Rise and set are the instants when the sun's centre stands 0.833° below the horizon
(refraction 0.567° plus the semi-diameter 0.266°, the almanac convention).
"""

from __future__ import annotations

import numpy as np

__all__ = ["julian_day", "solar_coordinates", "solar_elevation_deg", "sunrise_sunset_utc_s"]

_UNIX_EPOCH_JD = 2440587.5  # Julian Day of 1970-01-01T00:00:00Z
_J2000 = 2451545.0
_RISE_SET_ZENITH_DEG = 90.833


def julian_day(epoch_s: np.ndarray | float) -> np.ndarray:
    """Julian Day of UNIX times (s since 1970-01-01T00:00:00Z, UTC)."""
    return np.asarray(epoch_s, dtype=float) / 86400.0 + _UNIX_EPOCH_JD


def solar_coordinates(epoch_s: np.ndarray | float) -> dict[str, np.ndarray]:
    """Apparent declination, right ascension and the equation of time.

    Parameters
    ----------
    epoch_s : np.ndarray or float, s since 1970-01-01T00:00:00Z (UTC; the ~1 min
        difference to dynamical time is below this method's accuracy)

    Returns
    -------
    dict of np.ndarray: ``declination_deg``, ``right_ascension_deg`` (0..360),
    ``equation_of_time_min`` (apparent minus mean solar time, minutes).
    """
    t = (julian_day(epoch_s) - _J2000) / 36525.0  # Julian centuries from J2000.0
    l0 = np.mod(280.46646 + t * (36000.76983 + 0.0003032 * t), 360.0)  # geometric mean longitude
    m = 357.52911 + t * (35999.05029 - 0.0001537 * t)  # mean anomaly
    e = 0.016708634 - t * (0.000042037 + 0.0000001267 * t)  # orbit eccentricity
    mr = np.radians(m)
    centre = (
        np.sin(mr) * (1.914602 - t * (0.004817 + 0.000014 * t))
        + np.sin(2 * mr) * (0.019993 - 0.000101 * t)
        + np.sin(3 * mr) * 0.000289
    )
    omega = np.radians(125.04 - 1934.136 * t)
    apparent = np.radians(l0 + centre - 0.00569 - 0.00478 * np.sin(omega))
    mean_obliquity = 23.0 + (26.0 + (21.448 - t * (46.815 + t * (0.00059 - t * 0.001813))) / 60.0) / 60.0
    obliquity = np.radians(mean_obliquity + 0.00256 * np.cos(omega))
    declination = np.degrees(np.arcsin(np.sin(obliquity) * np.sin(apparent)))
    right_ascension = np.mod(
        np.degrees(np.arctan2(np.cos(obliquity) * np.sin(apparent), np.cos(apparent))),
        360.0,
    )
    y = np.tan(obliquity / 2.0) ** 2
    l0r = np.radians(l0)
    eot = 4.0 * np.degrees(
        y * np.sin(2 * l0r)
        - 2 * e * np.sin(mr)
        + 4 * e * y * np.sin(mr) * np.cos(2 * l0r)
        - 0.5 * y * y * np.sin(4 * l0r)
        - 1.25 * e * e * np.sin(2 * mr)
    )
    return {"declination_deg": declination, "right_ascension_deg": right_ascension, "equation_of_time_min": eot}


def solar_elevation_deg(epoch_s: np.ndarray | float, latitude_deg: float, longitude_deg: float) -> np.ndarray:
    """Geometric elevation of the sun's centre above the horizon, degrees (no refraction).

    Parameters
    ----------
    epoch_s : np.ndarray or float, s since 1970-01-01T00:00:00Z (UTC)
    latitude_deg : float, degrees north
    longitude_deg : float, degrees east
    """
    c = solar_coordinates(epoch_s)
    minutes = np.mod(np.asarray(epoch_s, dtype=float), 86400.0) / 60.0
    true_solar_min = minutes + c["equation_of_time_min"] + 4.0 * longitude_deg
    hour_angle = np.radians(true_solar_min / 4.0 - 180.0)
    lat, dec = np.radians(latitude_deg), np.radians(c["declination_deg"])
    cos_zenith = np.sin(lat) * np.sin(dec) + np.cos(lat) * np.cos(dec) * np.cos(hour_angle)
    return 90.0 - np.degrees(np.arccos(np.clip(cos_zenith, -1.0, 1.0)))


def _half_day_s(epoch_s: np.ndarray, latitude_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """Half the time the sun is up (s), and cos of the rise hour angle, for its declination at ``epoch_s``."""
    dec = np.radians(solar_coordinates(epoch_s)["declination_deg"])
    lat = np.radians(latitude_deg)
    cos_ha = np.cos(np.radians(_RISE_SET_ZENITH_DEG)) / (np.cos(lat) * np.cos(dec)) - np.tan(lat) * np.tan(dec)
    return np.degrees(np.arccos(np.clip(cos_ha, -1.0, 1.0))) * 4.0 * 60.0, cos_ha


def _noon_s(midnight: np.ndarray, epoch_s: np.ndarray, longitude_deg: float) -> np.ndarray:
    eot = solar_coordinates(epoch_s)["equation_of_time_min"]
    return midnight + (720.0 - 4.0 * longitude_deg - eot) * 60.0


def sunrise_sunset_utc_s(day_utc_s: np.ndarray | float, latitude_deg: float, longitude_deg: float) -> tuple:
    """Sunrise, solar noon and sunset near each given day, as UNIX times (s, UTC).

    Solar noon is 12:00 minus 4 min per degree of longitude east minus the equation of
    time; rise and set are the hour angle at which the zenith distance is 90.833° (NOAA
    calculator). Each event is computed twice, the second time with the sun's
    coordinates at the first result, so the declination's change over half a day does
    not enter (the single-pass form is off by up to about a minute).

    Parameters
    ----------
    day_utc_s : np.ndarray or float, s, any instant of each day (its 00:00 UTC is used)
    latitude_deg : float, degrees north
    longitude_deg : float, degrees east

    Returns
    -------
    (sunrise, noon, sunset) : np.ndarray, s since the epoch (UTC). Where the sun stays up
    all day, sunrise and sunset are -inf and +inf; where it stays down, both are NaN.
    """
    midnight = np.floor(np.asarray(day_utc_s, dtype=float) / 86400.0) * 86400.0
    noon = _noon_s(midnight, midnight + (720.0 - 4.0 * longitude_deg) * 60.0, longitude_deg)
    noon = _noon_s(midnight, noon, longitude_deg)
    half, cos_ha = _half_day_s(noon, latitude_deg)
    rise, sset = noon - half, noon + half
    for _ in range(2):
        rise = _noon_s(midnight, rise, longitude_deg) - _half_day_s(rise, latitude_deg)[0]
        sset = _noon_s(midnight, sset, longitude_deg) + _half_day_s(sset, latitude_deg)[0]
    up_all_day, down_all_day = cos_ha < -1.0, cos_ha > 1.0
    rise = np.where(up_all_day, -np.inf, np.where(down_all_day, np.nan, rise))
    sset = np.where(up_all_day, np.inf, np.where(down_all_day, np.nan, sset))
    return rise, noon, sset
