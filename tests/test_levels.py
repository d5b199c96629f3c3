"""Level metrics and fractional-octave bands against ISO 18405 and IEC 61260-1 values."""

from __future__ import annotations

import numpy as np
import pytest
from callsieve.features.levels import (
    band_level_db,
    band_levels_db,
    fractional_octave_bands,
    sel_db,
    spl_rms_db,
)

# IEC 61260-1:2014 / ANSI S1.11-2004 base-10 one-third-octave bands, as tabulated in
# REFERENCES §2: (x, nominal, exact centre, lower, upper).
THIRD_OCTAVES = [
    (-20, 10, 10.0000, 8.9125, 11.2202),
    (-15, 31.5, 31.6228, 28.1838, 35.4813),
    (-12, 63, 63.0957, 56.2341, 70.7946),
    (-10, 100, 100.0000, 89.1251, 112.2018),
    (-2, 630, 630.9573, 562.3413, 707.9458),
    (-1, 800, 794.3282, 707.9458, 891.2509),
    (0, 1000, 1000.0000, 891.2509, 1122.0185),
    (1, 1250, 1258.9254, 1122.0185, 1412.5375),
    (2, 1600, 1584.8932, 1412.5375, 1778.2794),
    (5, 3150, 3162.2777, 2818.3829, 3548.1339),
    (8, 6300, 6309.5734, 5623.4133, 7079.4578),
    (13, 20000, 19952.6231, 17782.7941, 22387.2114),
]
OCTAVES = [
    (-6, 16, 15.8489, 11.2202, 22.3872),
    (-5, 31.5, 31.6228, 22.3872, 44.6684),
    (-3, 125, 125.8925, 89.1251, 177.8279),
    (0, 1000, 1000.0000, 707.9458, 1412.5375),
    (4, 16000, 15848.9319, 11220.1845, 22387.2114),
]


def test_third_octave_centres_edges_and_nominal_names():
    bands = fractional_octave_bands(9.0, 21000.0, fraction=3)
    assert bands.index[0] == -20 and bands.index[-1] == 13
    for x, nominal, centre, lower, upper in THIRD_OCTAVES:
        i = int(np.flatnonzero(bands.index == x)[0])
        assert bands.nominal_hz[i] == pytest.approx(nominal)
        assert bands.centre_hz[i] == pytest.approx(centre, abs=1e-4)
        assert bands.lower_hz[i] == pytest.approx(lower, abs=1e-4)
        assert bands.upper_hz[i] == pytest.approx(upper, abs=1e-4)
    # Adjacent bands share edges exactly (IEC 61260-1 band definition).
    np.testing.assert_allclose(bands.upper_hz[:-1], bands.lower_hz[1:], rtol=1e-12)


def test_octave_bands_and_three_thirds_tile_an_octave():
    octaves = fractional_octave_bands(15.0, 16000.0, fraction=1)
    thirds = fractional_octave_bands(10.0, 20000.0, fraction=3)
    for x, nominal, centre, lower, upper in OCTAVES:
        i = int(np.flatnonzero(octaves.index == x)[0])
        assert octaves.nominal_hz[i] == pytest.approx(nominal)
        assert octaves.centre_hz[i] == pytest.approx(centre, abs=1e-4)
        assert octaves.lower_hz[i] == pytest.approx(lower, abs=1e-4)
        assert octaves.upper_hz[i] == pytest.approx(upper, abs=1e-4)
        # Octave x spans third-octaves 3x-1 .. 3x+1 (REFERENCES §2).
        lo = thirds.lower_hz[thirds.index == 3 * x - 1]
        hi = thirds.upper_hz[thirds.index == 3 * x + 1]
        if lo.size and hi.size:
            assert lo[0] == pytest.approx(lower, abs=1e-4) and hi[0] == pytest.approx(upper, abs=1e-4)


def test_sel_of_steady_signal():
    # ISO 18405: L_E = L_p + 10 log10(T / 1 s); 120 dB for 10 s -> 130.00, 0.5 s -> 116.99
    # (REFERENCES §3).
    fs = 1000
    for duration, expected in [(10.0, 130.0), (0.5, 116.99), (60.0, 137.78)]:
        t = np.arange(int(duration * fs)) / fs
        p = 1e6 * np.sqrt(2) * np.sin(2 * np.pi * 50 * t)  # 120 dB re 1 µPa rms
        assert spl_rms_db(p) == pytest.approx(120.0, abs=1e-3)
        assert sel_db(p, fs) == pytest.approx(expected, abs=0.01)


def test_band_level_of_flat_psd():
    # Flat 60 dB re 1 µPa²/Hz: third-octave at 1 kHz (230.77 Hz wide) -> 83.63 dB, octave
    # (704.59 Hz) -> 88.48 dB re 1 µPa (REFERENCES §5, level relations).
    f = np.arange(0, 5001, 1.0)
    psd = np.full((f.size, 3), 60.0)
    third = fractional_octave_bands(1000, 1000, 3)
    octave = fractional_octave_bands(1000, 1000, 1)
    level = band_level_db(psd, f, third.lower_hz[0], third.upper_hz[0])
    np.testing.assert_allclose(level, 83.63, atol=0.01)
    level = band_levels_db(psd, f, octave.lower_hz, octave.upper_hz)
    np.testing.assert_allclose(level, 88.48, atol=0.01)


def test_adjacent_band_levels_add_up_to_their_union():
    # Energy is conserved across a shared edge (incoherent sum: equal halves give +3.0103 dB).
    f = np.arange(0, 2001, 2.0)
    psd = np.full(f.size, 50.0)
    a = band_level_db(psd, f, 100.0, 301.0)
    b = band_level_db(psd, f, 301.0, 502.0)
    both = band_level_db(psd, f, 100.0, 502.0)
    assert 10 * np.log10(10 ** (a / 10) + 10 ** (b / 10)) == pytest.approx(both, abs=1e-9)
    assert both - a == pytest.approx(3.0103, abs=1e-3)


def test_band_spl_of_waveform_selects_the_band():
    # Two tones of 1 Pa rms (120 dB re 1 µPa each, ISO 18405): the band around one gives
    # 120 dB, the whole band gives their incoherent sum 123.01 dB (REFERENCES §3).
    from callsieve.features.levels import band_spl_db

    fs = 2000
    t = np.arange(fs * 4) / fs
    p = 1e6 * np.sqrt(2) * (np.sin(2 * np.pi * 100 * t) + np.sin(2 * np.pi * 400 * t))
    assert band_spl_db(p, fs, 50.0, 200.0) == pytest.approx(120.0, abs=1e-6)
    assert band_spl_db(p, fs, 1.0, 999.0) == pytest.approx(123.0103, abs=1e-3)
    assert band_spl_db(p, fs, 0.0, 1000.0) == pytest.approx(spl_rms_db(p), abs=1e-9)
