"""Calibrated PSD on a physical grid, against scipy.signal.welch and white-noise theory."""

from __future__ import annotations

import numpy as np
import pytest
from callsieve.features.calibration import RecordingChain
from callsieve.features.spectrogram import SpectrogramGrid, psd_spectrogram
from scipy import signal


def test_white_noise_psd_matches_welch_and_theory():
    # One-sided PSD of white noise of variance σ² is 2σ²/fs (REFERENCES §5); scaling as
    # scipy.signal.welch(scaling='density'). Compare interior bins, averaged over frames.
    fs, sigma = 2000, 1000.0  # σ in µPa
    x = np.random.default_rng(1).normal(0.0, sigma, fs * 600)
    grid = SpectrogramGrid(resolution_hz=2.0, hop_s=0.25, low_hz=10.0, high_hz=988.0)
    spec = psd_spectrogram(x, fs, grid)
    mean_psd = 10 * np.log10(np.mean(10 ** (spec.psd_db.astype(float) / 10), axis=1))
    f_w, p_w = signal.welch(x, fs, nperseg=1000, noverlap=500, detrend=False)
    welch_db = 10 * np.log10(p_w[np.isin(f_w, spec.frequency_hz)])
    theory_db = 10 * np.log10(2 * sigma**2 / fs)
    # Band means: per-bin scatter is a few %, so compare over 10-bin groups.
    ours = mean_psd.reshape(-1, 10).mean(axis=1)
    assert np.max(np.abs(ours - welch_db.reshape(-1, 10).mean(axis=1))) < 0.2
    assert abs(np.mean(mean_psd) - theory_db) < 0.2
    assert np.max(np.abs(ours - theory_db)) < 0.2


def test_same_pressure_at_two_sample_rates_gives_same_psd_on_same_grid():
    # The grid is fixed in Hz and seconds: a tone plus noise band-limited below 900 Hz,
    # generated at 8 kHz and decimated exactly to 2 kHz, must give the same levels.
    rng = np.random.default_rng(2)
    fs_hi, fs_lo = 8000, 2000
    noise = signal.sosfiltfilt(signal.butter(8, 900, fs=fs_hi, output="sos"), rng.normal(0, 1e4, fs_hi * 120))
    t = np.arange(noise.size) / fs_hi
    x_hi = noise + 3e4 * np.sin(2 * np.pi * 300.0 * t)
    x_lo = signal.resample_poly(x_hi, 1, 4)
    grid = SpectrogramGrid(resolution_hz=4.0, hop_s=0.5, low_hz=50.0, high_hz=800.0)
    a = psd_spectrogram(x_hi, fs_hi, grid)
    b = psd_spectrogram(x_lo, fs_lo, grid)
    np.testing.assert_array_equal(a.frequency_hz, b.frequency_hz)
    np.testing.assert_allclose(a.start_s, b.start_s)
    mean_a = 10 * np.log10(np.mean(10 ** (a.psd_db[:, 2:-2] / 10.0), axis=1))
    mean_b = 10 * np.log10(np.mean(10 ** (b.psd_db[:, 2:-2] / 10.0), axis=1))
    np.testing.assert_allclose(mean_a, mean_b, atol=0.2)
    # The tone's bin holds its power: A²/2 spread over Hann's ENBW of 1.5 bins.
    k = int(np.flatnonzero(a.frequency_hz == 300.0)[0])
    tone_db = 10 * np.log10((3e4**2 / 2) / (1.5 * 4.0))
    assert mean_a[k] == pytest.approx(tone_db, abs=0.3)


def test_calibration_is_applied_per_bin():
    # Sample values through a flat chain: PSD in µPa²/Hz = PSD of samples × (µPa per unit)².
    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    fs = 2000
    x = np.random.default_rng(3).normal(0, 0.01, fs * 30)
    grid = SpectrogramGrid(2.0, 0.5, 20.0, 900.0)
    counts = psd_spectrogram(x, fs, grid)
    upa = psd_spectrogram(x, fs, grid, chain=chain)
    np.testing.assert_allclose(upa.psd_db - counts.psd_db, 20 * np.log10(chain.upa_per_unit(1.0)), atol=1e-3)


def test_non_integer_window_is_interpolated_onto_the_grid():
    # fs / resolution = 2000 / 3 is not an integer; levels of white noise must still be
    # 2σ²/fs (REFERENCES §5) on bins at multiples of 3 Hz.
    fs, sigma = 2000, 10.0
    x = np.random.default_rng(4).normal(0, sigma, fs * 300)
    grid = SpectrogramGrid(3.0, 0.5, 30.0, 900.0)
    spec = psd_spectrogram(x, fs, grid)
    np.testing.assert_allclose(spec.frequency_hz % 3.0, 0.0)
    mean = 10 * np.log10(np.mean(10 ** (spec.psd_db / 10.0)))
    assert mean == pytest.approx(10 * np.log10(2 * sigma**2 / fs), abs=0.2)


def test_frames_are_numbered_from_the_recording_start():
    # A block that starts mid-recording gives the frames a whole-file spectrogram gives there.
    fs = 2000
    x = np.random.default_rng(5).normal(0, 1.0, fs * 20).astype(np.float32)
    grid = SpectrogramGrid(2.0, 0.3, 10.0, 900.0)
    whole = psd_spectrogram(x, fs, grid)
    part = psd_spectrogram(x[7001:], fs, grid, first_sample=7001)
    common = np.isin(whole.frame_index, part.frame_index)
    np.testing.assert_array_equal(whole.psd_db[:, common], part.psd_db)
    assert part.frame_index[0] == int(np.ceil(7001 / 600))


def test_band_above_nyquist_is_refused():
    from callsieve.features import ParameterError

    with pytest.raises(ParameterError, match="Nyquist"):
        psd_spectrogram(np.zeros(4000), 2000, SpectrogramGrid(2.0, 0.5, 10.0, 1500.0))


def test_streamed_frames_equal_whole_file_frames(tmp_path):
    # Frames taken from each block's core (with one window of context) reproduce the
    # whole-recording spectrogram, frame for frame, whatever the block size.
    import soundfile as sf
    from callsieve.features.streaming import read_blocks

    fs = 2000
    x = np.random.default_rng(6).uniform(-0.5, 0.5, fs * 37)
    path = tmp_path / "s.wav"
    sf.write(path, x, fs, subtype="FLOAT")
    grid = SpectrogramGrid(2.0, 0.35, 10.0, 900.0)
    x32 = sf.read(path, dtype="float32")[0]
    whole = psd_spectrogram(x32, fs, grid)
    n_win = grid.window_samples(fs)
    for block_frames in (3001, 20000):
        parts = []
        for b in read_blocks(path, block_frames, context_frames=n_win):
            idx = grid.frames_starting_in(b.core_start, b.core_stop, fs)
            idx = idx[grid.frame_start_samples(idx, fs) + n_win <= b.first_sample + b.samples.size]
            parts.append(psd_spectrogram(b.samples, fs, grid, first_sample=b.first_sample, frame_index=idx))
        np.testing.assert_array_equal(np.concatenate([p.frame_index for p in parts]), whole.frame_index)
        np.testing.assert_allclose(np.concatenate([p.psd_db for p in parts], axis=1), whole.psd_db, atol=1e-4)
