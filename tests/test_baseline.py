"""The energy-detector baseline and the level measurement of truth calls, on known signals."""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf
from callsieve.classifier.baseline import call_levels, excess_detections
from callsieve.features.calibration import RecordingChain, samples_from_pressure
from callsieve.features.descriptors import DescriptorSettings
from callsieve.features.excess import excess_events, running_floor_db

SETTINGS = DescriptorSettings(
    low_hz=50.0, high_hz=400.0, resolution_hz=5.0, frame_hop_s=0.05, window_s=2.0, window_hop_s=0.5
)
CHAIN = RecordingChain.flat(2.0, -170.0, 20.0)
FS = 2000


def _white(seconds, psd_db, rng):
    """White noise of PSD ``psd_db`` dB re 1 µPa²/Hz (REFERENCES §5: PSD = 2σ²/fs)."""
    return rng.normal(0.0, np.sqrt(10 ** (psd_db / 10) * FS / 2), int(FS * seconds))


def _tone(seconds, start_s, length_s, freq_hz, rms_db):
    t = np.arange(int(FS * seconds)) / FS
    on = (t >= start_s) & (t < start_s + length_s)
    return np.where(on, np.sqrt(2) * 10 ** (rms_db / 20) * np.sin(2 * np.pi * freq_hz * t), 0.0)


def test_events_follow_hysteresis_merge_and_duration():
    # Worked by hand from the event rule of docs/evaluation.md §2 "Baseline" (climbs past
    # the start excess, holds above the hold excess, short pauses joined, short events
    # dropped), with the thresholds given here: 3 dB and 1 dB as documented, a 0.15 s join.
    t = np.arange(20) * 0.1
    x = np.zeros(20)
    x[2:5] = [2.0, 4.0, 2.0]  # above onset: one event 0.2-0.5+frame
    x[6:8] = 2.0  # above offset only, never onset: no event
    x[10] = 5.0  # one frame: too short alone
    x[12:15] = [3.5, 6.0, 3.5]
    start, end, peak = excess_events(
        x, t, 0.1, start_excess_db=3.0, hold_excess_db=1.0, shortest_event_s=0.25, join_gap_s=0.15
    )
    # Events: [0.2, 0.5) peak 4; [1.0, 1.1) peak 5 merges with [1.2, 1.5) (gap 0.1 s < 0.15 s).
    assert np.allclose(start, [0.2, 1.0]) and np.allclose(end, [0.5, 1.5]) and np.allclose(peak, [4.0, 6.0])


def test_running_floor_of_a_steady_level_is_that_level_and_ignores_short_events():
    # docs/evaluation.md §2: the floor is the running 20th percentile over the noise span
    # (a minute). Worked by hand: the percentile of a constant is that constant, and a
    # burst filling 4 % of the span cannot move the 20th percentile (common practice for
    # order statistics).
    level = np.full(4000, 100.0)
    level[1000:1040] = 130.0  # 2 s burst at 0.05 s frames: far less than 80 % of a minute
    floor = running_floor_db(level, SETTINGS.noise_span_frames, SETTINGS.frames_per_noise_step, 1, 20.0)
    assert np.allclose(floor, 100.0, atol=1e-4)


def test_energy_detector_finds_tone_bursts_at_their_times(tmp_path):
    # Three 1 s bursts at 200 Hz, 10 dB above the in-band noise power; nothing else.
    rng = np.random.default_rng(3)
    seconds = 240.0
    noise_psd_db = 60.0
    band_noise_db = noise_psd_db + 10 * np.log10(400.0 - 50.0)
    p = _white(seconds, noise_psd_db, rng)
    onsets = [40.0, 120.5, 200.25]
    for t0 in onsets:
        p = p + _tone(seconds, t0, 1.0, 200.0, band_noise_db + 10.0)
    path = tmp_path / "bursts.wav"
    sf.write(path, samples_from_pressure(p, FS, CHAIN), FS, subtype="FLOAT")
    start, end, peak = excess_detections(path, 0, CHAIN, SETTINGS)
    strong = peak > 6.0
    assert strong.sum() == 3
    assert np.allclose(start[strong], onsets, atol=0.25)
    assert np.allclose(end[strong] - start[strong], 1.0 + 1 / SETTINGS.resolution_hz, atol=0.3)
    # 10 dB SNR: mean excess 10 log10(1 + 10) = 10.4 dB over the mean noise, a few tenths
    # more over its 20th percentile; the peak frame adds the spread of a 70-bin band sum.
    assert np.all((peak[strong] > 10.0) & (peak[strong] < 12.5))
    # Same events with another block size (the frames tile the file).
    again = excess_detections(path, 0, CHAIN, SETTINGS, block_s=37.0)
    assert all(np.array_equal(a, b) for a, b in zip((start, end, peak), again, strict=True))


def test_call_levels_of_a_tone_of_known_pressure(tmp_path):
    # A 2 s, 120 dB re 1 µPa rms tone at 150 Hz over 60 dB re 1 µPa²/Hz white noise: in
    # 100-200 Hz the noise holds 60 + 20 = 80 dB, so SNR 40 dB (ISO 18405 rms SPL).
    rng = np.random.default_rng(4)
    seconds = 120.0
    p = _white(seconds, 60.0, rng) + _tone(seconds, 50.0, 2.0, 150.0, 120.0)
    path = tmp_path / "tone.wav"
    sf.write(path, samples_from_pressure(p, FS, CHAIN), FS, subtype="FLOAT")
    rl, snr = call_levels(
        path,
        0,
        CHAIN,
        SETTINGS,
        np.array([50.0, 90.0]),
        np.array([52.0, 92.0]),
        np.array([100.0, 100.0]),
        np.array([200.0, np.nan]),
    )
    assert rl[0] == pytest.approx(120.0, abs=0.1)
    assert snr[0] == pytest.approx(40.0, abs=0.5)
    # Noise only, in the settings' band up to 400 Hz: 60 + 10 log10(300) = 84.8 dB, SNR low.
    assert rl[1] == pytest.approx(60.0 + 10 * np.log10(300.0), abs=0.3)
    assert snr[1] < 0.0
