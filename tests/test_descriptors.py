"""Descriptors of analytic signals, and their independence of sample rate, gain and block size."""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf
from callsieve.features.calibration import RecordingChain, samples_from_pressure
from callsieve.features.descriptors import DescriptorSettings, descriptor_names
from callsieve.features.pipeline import describe_file
from callsieve.features.synthesis import CallShape, call_waveform
from scipy import signal

SETTINGS = DescriptorSettings(
    low_hz=40.0, high_hz=400.0, resolution_hz=5.0, frame_hop_s=0.025, window_s=2.0, window_hop_s=0.5
)
NAMES = descriptor_names(SETTINGS)


def _noise(fs, seconds, level_db, rng):
    """White noise whose PSD is ``level_db`` dB re 1 µPa²/Hz (REFERENCES §5: PSD = 2σ²/fs)."""
    sigma = np.sqrt(10 ** (level_db / 10) * fs / 2)
    return rng.normal(0.0, sigma, int(fs * seconds))


def _describe(tmp_path, pressure, fs, chain, name="x.wav", block_s=600.0):
    path = tmp_path / name
    sf.write(path, np.clip(samples_from_pressure(pressure, fs, chain), -1.0, 1.0), fs, subtype="FLOAT")
    tables = list(describe_file(path, chain, SETTINGS, block_s=block_s))
    return (
        np.concatenate([t.start_s for t in tables]),
        np.concatenate([t.values for t in tables]),
        np.concatenate([t.clipped for t in tables]),
    )


def _at(start, values, t, name):
    return float(values[np.argmin(np.abs(start - t)), NAMES.index(name)])


CHAIN = RecordingChain.flat(2.5, -170.0, 40.0)


def test_linear_sweep_slope(tmp_path):
    # An analytic linear sweep 100 -> 200 Hz over 1 s has a slope of 100 Hz/s (definition).
    fs = 2000
    rng = np.random.default_rng(0)
    t = np.arange(fs * 120) / fs
    p = _noise(fs, 120, 60.0, rng)
    sweep = CallShape("sweep", 100.0, 200.0, 1.0)
    for t0 in (30.25, 60.25, 90.25):
        p += call_waveform(sweep, t - t0, 1e6, taper=0.1)  # 117 dB re 1 µPa rms
    start, values, _ = _describe(tmp_path, p, fs, CHAIN)
    for t0 in (30.25, 60.25, 90.25):
        slope = _at(start, values, t0 - 0.5, "trace_sweep_rate_hz_per_s")
        assert slope == pytest.approx(100.0, rel=0.05)
        assert _at(start, values, t0 - 0.5, "trace_lowest_hz") == pytest.approx(100.0, abs=2 * SETTINGS.resolution_hz)
        assert _at(start, values, t0 - 0.5, "trace_highest_hz") == pytest.approx(200.0, abs=2 * SETTINGS.resolution_hz)


def test_tone_frequency_slope_and_level(tmp_path):
    # A 1 Pa rms tone is 120 dB re 1 µPa (ISO 18405); in a window wholly inside it the band
    # level is that of the tone (noise 50 dB lower), its trace sits at its frequency within
    # one bin with zero slope.
    fs = 2000
    rng = np.random.default_rng(1)
    t = np.arange(fs * 120) / fs
    p = _noise(fs, 120, 50.0, rng) + np.where((t > 40) & (t < 80), 1e6 * np.sqrt(2) * np.sin(2 * np.pi * 173.0 * t), 0)
    start, values, _ = _describe(tmp_path, p, fs, CHAIN)
    inside = (start > 42) & (start < 76)
    col = {n: values[inside, NAMES.index(n)] for n in NAMES}
    np.testing.assert_allclose(col["trace_median_hz"], 173.0, atol=SETTINGS.resolution_hz)
    np.testing.assert_allclose(col["trace_sweep_rate_hz_per_s"], 0.0, atol=1.0)
    np.testing.assert_allclose(col["band_level_db"], 120.0, atol=0.2)
    # Peak-to-peak of a sine: rms + 9.03 dB (REFERENCES §3).
    np.testing.assert_allclose(col["peak_to_peak_db"], 129.03, atol=0.2)


def test_white_noise_psd_evenness_near_maximum(tmp_path):
    # A flat spectrum has maximal Shannon entropy (normalised: 1); white noise averaged over
    # 40 frames comes within a few per cent of it (common practice).
    fs = 2000
    start, values, _ = _describe(tmp_path, _noise(fs, 120, 70.0, np.random.default_rng(2)), fs, CHAIN)
    entropy = values[:, NAMES.index("psd_evenness")]
    assert np.min(entropy) > 0.97 and np.max(entropy) <= 1.0
    # ... and its contour stands above the floor rarely (false-alarm rate 5 % per frame).
    assert np.mean(values[:, NAMES.index("trace_cover_fraction")]) < 0.1


def _call_scene(fs, rng):
    t = np.arange(fs * 150) / fs
    p = _noise(fs, 150, 55.0, rng)
    # Band-limit the noise so that both sample rates hold the same pressure.
    p = signal.sosfiltfilt(signal.butter(10, 700.0, fs=fs, output="sos"), p)
    for t0, shape in [
        (20.3, CallShape("sweep", 90.0, 170.0, 1.2)),
        (60.1, CallShape("sweep", 160.0, 80.0, 1.0)),
        (100.7, CallShape("drone", 110.0, 120.0, 1.6, wobble_hz=3.0)),
    ]:
        p += call_waveform(shape, t - t0, 3e5)
    return p


def test_same_pressure_same_descriptors_at_two_rates_and_two_gains(tmp_path):
    rng = np.random.default_rng(3)
    p8 = _call_scene(8000, rng)
    p2 = signal.resample_poly(p8, 1, 4)
    s_hi, v_hi, _ = _describe(tmp_path, p8, 8000, CHAIN, "hi.wav")
    s_lo, v_lo, _ = _describe(tmp_path, p2, 2000, CHAIN, "lo.wav")
    np.testing.assert_allclose(s_hi, s_lo)
    strong = v_hi[:, NAMES.index("snr_db")] > 10
    assert strong.sum() >= 6
    for name, tol in [
        ("band_level_db", 0.2),
        ("peak_to_peak_db", 0.3),
        ("trace_median_hz", 1.0),
        ("trace_sweep_rate_hz_per_s", 3.0),
        ("snr_db", 0.3),
        ("subband2_level_db", 0.2),
    ]:
        i = NAMES.index(name)
        np.testing.assert_allclose(v_hi[strong, i], v_lo[strong, i], atol=tol, err_msg=name)
    # A recorder with 20 dB more gain writes other sample values for the same pressure;
    # the descriptors, in physical units, stay the same.
    loud = RecordingChain.flat(2.5, -170.0, 60.0)
    _, v_gain, _ = _describe(tmp_path, p2, 2000, loud, "gain.wav")
    np.testing.assert_allclose(v_gain, v_lo, rtol=1e-3, atol=0.05)


@pytest.mark.parametrize("fs", [2000, 8000])
def test_descriptors_do_not_depend_on_block_size(tmp_path, fs):
    # At 8 kHz the analysis runs decimated (factor 5); block edges must not show either way.
    rng = np.random.default_rng(4)
    p = _call_scene(fs, rng)
    s_a, v_a, c_a = _describe(tmp_path, p, fs, CHAIN, "a.wav", block_s=600.0)
    s_b, v_b, c_b = _describe(tmp_path, p, fs, CHAIN, "a.wav", block_s=23.0)
    np.testing.assert_array_equal(s_a, s_b)
    np.testing.assert_allclose(v_a, v_b, rtol=1e-6, atol=1e-4)
    np.testing.assert_array_equal(c_a, c_b)


def test_clipping_is_flagged_in_its_window(tmp_path):
    fs = 2000
    rng = np.random.default_rng(5)
    p = _noise(fs, 60, 60.0, rng)
    p[int(30.2 * fs)] = 2e7  # 146 dB re 1 µPa: beyond the 137.96 dB clip level of this chain
    # Full scale stands for 7.906e6 µPa (REFERENCES §4, example A); the converter saturates.
    start, values, clipped = _describe(tmp_path, np.clip(p, -7.95e6, 7.95e6), fs, CHAIN)
    hit = (start <= 30.2) & (start + SETTINGS.window_s > 30.2)
    assert clipped[hit].all() and not clipped[~hit].any()
