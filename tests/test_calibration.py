"""Recording chain: sample values <-> pressure, clip level, worked examples."""

from __future__ import annotations

import numpy as np
import pytest
from callsieve.features.calibration import (
    RecordingChain,
    ResponseCurve,
    pressure_from_samples,
    samples_from_pressure,
)
from callsieve.features.levels import spl_peak_to_peak_db, spl_rms_db, spl_zero_to_peak_db
from callsieve.features.propagation import sample_value, voltage_rms


def test_tone_of_known_pressure_comes_back_at_its_levels():
    # A 1 Pa rms tone = 120 dB re 1 µPa rms; sine: pk = rms + 3.0103 dB, pk-pk = rms + 9.0309 dB
    # (ISO 18405 definitions; identities in REFERENCES §3).
    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    fs = 8000
    t = np.arange(fs * 2) / fs
    amplitude_upa = 1e6 * np.sqrt(2.0)
    samples = samples_from_pressure(amplitude_upa * np.sin(2 * np.pi * 250.0 * t), fs, chain)
    # Quantise as a 16-bit recorder would (soundfile convention: code / 2**15, REFERENCES §4).
    samples = np.round(samples * 32768) / 32768
    p = pressure_from_samples(samples.astype(np.float32), fs, chain)
    assert spl_rms_db(p) == pytest.approx(120.0, abs=0.1)
    assert spl_zero_to_peak_db(p) == pytest.approx(123.0103, abs=0.1)
    assert spl_peak_to_peak_db(p) == pytest.approx(129.0309, abs=0.1)


def test_worked_example_a_sample_value_of_one_pascal():
    # REFERENCES §4, worked example A: S_sys = -130 dB re 1 V/µPa; 120 dB -> 0.31623 V rms,
    # x_rms = 0.12649; full scale stands for 7.9057e6 µPa.
    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    v = voltage_rms(120.0, chain.system_sensitivity_db(1000.0))
    assert v == pytest.approx(0.31623, rel=1e-4)
    assert sample_value(v, 2.5) == pytest.approx(0.12649, rel=1e-4)
    assert chain.upa_per_unit(1000.0) == pytest.approx(7.9057e6, rel=1e-4)


def test_clip_level_of_flat_system():
    # Clip level = 20 log10(V_fs) - (M_h + G), REFERENCES §4; example A gives 137.96 dB,
    # example B (-165 dB, +12 dB, 1.0 V) gives 153.00 dB re 1 µPa (0-pk).
    f = np.array([10.0, 100.0, 1000.0, 50000.0])
    a = RecordingChain.flat(2.5, -170.0, 40.0).clip_level_db(f)
    np.testing.assert_allclose(a, 20 * np.log10(2.5) - (-170.0 + 40.0))
    np.testing.assert_allclose(a, 137.96, atol=0.005)
    b = RecordingChain.flat(1.0, -165.0, 12.0).clip_level_db(f)
    np.testing.assert_allclose(b, 153.0, atol=1e-9)


def test_worked_chain_of_the_trade():
    # Common practice: -200 dB re 1 V/µPa is 0.1 nV per µPa.
    assert voltage_rms(0.0, -200.0) == pytest.approx(1e-10, rel=1e-12)
    # A -160 dB re 1 V/µPa system receiving 160 dB re 1 µPa puts out 1 V.
    assert voltage_rms(160.0, -160.0) == pytest.approx(1.0, rel=1e-12)
    # 20 dB more (10 V) clips a converter whose full scale is 10 V.
    chain = RecordingChain.flat(10.0, -160.0, 0.0)
    assert sample_value(voltage_rms(180.0, -160.0), 10.0) == pytest.approx(1.0)
    assert chain.clip_level_db(1000.0) == pytest.approx(180.0)
    # REFERENCES §4 example C: -200 dB, no gain, 160 dB -> 0.0100 V.
    assert voltage_rms(160.0, -200.0) == pytest.approx(0.01, rel=1e-9)


def test_sweep_through_gain_table_comes_back_flat_in_micropascal():
    # A constant-amplitude sweep through a gain that rises 20 dB over the band must come
    # back with constant amplitude once the chain is inverted (the point of calibration).
    fs = 4000
    gain = ResponseCurve(np.array([20.0, 100.0, 400.0, 1500.0]), np.array([20.0, 26.0, 34.0, 40.0]))
    hydrophone = ResponseCurve(np.array([10.0, 2000.0]), np.array([-172.0, -168.0]))
    chain = RecordingChain(2.0, hydrophone, gain)
    t = np.arange(int(fs * 8.0)) / fs
    f0, f1 = 50.0, 1500.0
    phase = 2 * np.pi * (f0 * t + (f1 - f0) / (2 * t[-1]) * t * t)
    pressure = 1e5 * np.sin(phase)  # 100 dB re 1 µPa peak
    samples = samples_from_pressure(pressure, fs, chain)
    # The samples are far from flat: the chain rises about 12 dB over the sweep.
    seg = fs // 4
    raw = spl_rms_db(samples[: (len(t) // seg) * seg].reshape(-1, seg))
    assert np.ptp(raw[2:-2]) > 10.0
    back = pressure_from_samples(samples, fs, chain)
    levels = spl_rms_db(back[: (len(t) // seg) * seg].reshape(-1, seg))
    np.testing.assert_allclose(levels[2:-2], 100.0 - 3.0103, atol=0.2)


def test_response_table_interpolates_in_log_frequency_and_holds_ends():
    # SPEC §1: tables interpolated in log-frequency, held flat beyond their ends.
    curve = ResponseCurve(np.array([100.0, 10000.0]), np.array([-170.0, -160.0]))
    assert curve.at(1000.0) == pytest.approx(-165.0)  # the log-midpoint
    assert curve.at(10.0) == pytest.approx(-170.0)
    assert curve.at(0.0) == pytest.approx(-170.0)
    assert curve.at(1e6) == pytest.approx(-160.0)
