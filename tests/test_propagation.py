"""Spreading and seawater absorption against published formulas and their tables."""

from __future__ import annotations

import numpy as np
import pytest
from callsieve.features.propagation import (
    Seawater,
    ainslie_mccolm_absorption_db_per_km,
    cylindrical_spreading_loss_db,
    francois_garrison_absorption_db_per_km,
    received_level_db,
    source_level_db,
    spherical_spreading_loss_db,
    transmission_loss_db,
)

FREQS_HZ = np.array([100.0, 1000.0, 10000.0, 50000.0, 100000.0])
# REFERENCES §1.3 (computed from Francois & Garrison 1982b and Ainslie & McColm 1998),
# S = 35 PSU, pH 8: (T °C, depth m) -> FG values, AM values in dB/km.
TABLE = {
    (4.0, 0.0): (
        [0.001266, 0.06311, 1.151, 15.14, 27.54],
        [0.001262, 0.06388, 1.171, 15.34, 27.87],
    ),
    (10.0, 0.0): (
        [0.001007, 0.06013, 0.9626, 15.39, 33.63],
        [0.001006, 0.06132, 0.9866, 15.71, 34.34],
    ),
    (10.0, 1000.0): (
        [0.000985, 0.05837, 0.8454, 13.32, 29.24],
        [0.000993, 0.06000, 0.8568, 13.40, 29.41],
    ),
}


@pytest.mark.parametrize("conditions", list(TABLE))
def test_absorption_against_both_published_formulas(conditions):
    t, z = conditions
    water = Seawater(temperature_c=t, salinity_psu=35.0, ph=8.0, depth_m=z)
    fg_ref, am_ref = TABLE[conditions]
    np.testing.assert_allclose(francois_garrison_absorption_db_per_km(FREQS_HZ, water), fg_ref, rtol=1e-3)
    np.testing.assert_allclose(ainslie_mccolm_absorption_db_per_km(FREQS_HZ, water), am_ref, rtol=1e-3)


def test_francois_garrison_tabulated_check_values():
    # REFERENCES §1.4: quoted F&G check values, pH 8, z = 0; agree within 0.5 %.
    for t, s, f_khz, ref in [
        (0, 30, 1, 0.0610),
        (0, 35, 1, 0.0640),
        (10, 35, 1, 0.0600),
        (0, 30, 10, 1.12),
        (0, 35, 10, 1.29),
        (10, 35, 10, 0.963),
        (0, 30, 100, 21.0),
        (0, 35, 100, 23.4),
        (10, 35, 100, 33.6),
    ]:
        water = Seawater(temperature_c=t, salinity_psu=s)
        assert francois_garrison_absorption_db_per_km(1000.0 * f_khz, water) == pytest.approx(ref, rel=5e-3)


def test_absorption_rules_of_thumb():
    # Common practice: ~1e-3 dB/km at 100 Hz, ~1 dB/km at 10 kHz, ~30 dB/km at 100 kHz.
    water = Seawater(temperature_c=10.0)
    a = francois_garrison_absorption_db_per_km(np.array([100.0, 1e4, 1e5]), water)
    assert 0.5e-3 < a[0] < 2e-3
    assert 0.5 < a[1] < 2.0
    assert 20.0 < a[2] < 40.0


def test_fg_pure_water_branch_is_continuous_at_20_degrees():
    # REFERENCES §1 test ideas: both A3 branches give ~2.20e-4 at 20 °C.
    lo = francois_garrison_absorption_db_per_km(500e3, Seawater(temperature_c=20.0))
    hi = francois_garrison_absorption_db_per_km(500e3, Seawater(temperature_c=20.0001))
    assert hi == pytest.approx(lo, rel=2e-3)


def test_spreading_losses():
    # Spherical 20 log10 r: 1 m -> 10 m is 20 dB, 1 km is 60 dB; cylindrical 10 dB per decade
    # (REFERENCES §3).
    assert spherical_spreading_loss_db(10.0) == pytest.approx(20.0)
    assert spherical_spreading_loss_db(1000.0) == pytest.approx(60.0)
    assert spherical_spreading_loss_db(2.0) == pytest.approx(6.0206, abs=1e-4)
    assert cylindrical_spreading_loss_db(100.0, 10.0) == pytest.approx(10.0)
    assert cylindrical_spreading_loss_db(2.0) == pytest.approx(3.0103, abs=1e-4)


def test_transmission_loss_adds_absorption_over_range_and_sonar_arithmetic():
    water = Seawater(temperature_c=10.0)
    alpha = francois_garrison_absorption_db_per_km(10000.0, water)
    tl = transmission_loss_db(5000.0, 10000.0, water)
    assert tl == pytest.approx(20 * np.log10(5000.0) + 5.0 * alpha)
    mixed = transmission_loss_db(
        np.array([50.0, 1000.0]),
        100.0,
        water,
        spreading="spherical-cylindrical",
        transition_range_m=100.0,
    )
    assert mixed[0] == pytest.approx(20 * np.log10(50.0), abs=1e-3)
    alpha_100 = francois_garrison_absorption_db_per_km(100.0, water)
    assert mixed[1] == pytest.approx(40.0 + 10.0 + alpha_100, abs=1e-9)
    rl = received_level_db(180.0, tl)
    assert source_level_db(rl, tl) == pytest.approx(180.0)
