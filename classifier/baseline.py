"""The baseline of every evaluation: the floor-excess detector over the same files.

It sees the audio through the model's own grid, band and noise-floor settings, so the
difference between the two is what the model's descriptors and training add.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from callsieve.features.calibration import RecordingChain
from callsieve.features.descriptors import DescriptorSettings
from callsieve.features.excess import band_power_db, excess_events, running_floor_db
from callsieve.features.noise import percentile_to_mean_db
from callsieve.features.spectrogram import psd_spectrogram
from callsieve.features.streaming import AudioReader

from .detections import Candidate
from .scoring import measure_levels

__all__ = ["ExcessDetector", "excess_detections", "call_levels"]


@dataclass(frozen=True)
class ExcessDetector:
    """Settings of the floor-excess detector (in-band power over its running floor).

    Parameters
    ----------
    start_excess_db : float, dB, excess an event must climb past to exist at all
    hold_excess_db : float, dB, excess an event keeps while it lasts; below it, it is over
    shortest_event_s : float, s, an event must last this long to count
    join_gap_s : float, s, two events with a shorter pause between them are one
    """

    start_excess_db: float = 3.0
    hold_excess_db: float = 1.0
    shortest_event_s: float = 0.25
    join_gap_s: float = 0.25


def excess_detections(
    path: str | Path,
    channel: int,
    chain: RecordingChain,
    settings: DescriptorSettings,
    detector: ExcessDetector = ExcessDetector(),
    block_s: float = 600.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Floor-excess events of one file in the band of ``settings``.

    The file is read in blocks of ``block_s`` (frames tile the file, so the result does
    not depend on it); the in-band power series of the whole file is small (one value
    per frame) and the running floor and events are taken on it at once.

    Returns
    -------
    start_s, end_s, peak_db : np.ndarray, s from the file's start and dB of excess
    """
    grid = settings.grid
    with AudioReader(path, channel) as reader:
        fs = reader.sample_rate_hz
        n_win = grid.window_samples(fs)
        frames = grid.frames_within(0, reader.frames, fs)
        if frames.size == 0:
            empty = np.empty(0)
            return empty, empty, empty
        per_block = max(int(block_s / settings.frame_hop_s), 1)
        level = np.empty(frames.size)
        for a in range(0, frames.size, per_block):
            idx = frames[a : a + per_block]
            starts = grid.frame_start_samples(idx, fs)
            x = reader.read(int(starts[0]), int(starts[-1]) + n_win)
            spec = psd_spectrogram(x, fs, grid, chain, first_sample=int(starts[0]), frame_index=idx)
            level[a : a + idx.size] = band_power_db(spec.psd_db, spec.frequency_hz, settings.low_hz, settings.high_hz)
    floor = running_floor_db(
        level,
        settings.noise_span_frames,
        settings.frames_per_noise_step,
        settings.noise_stride,
        settings.noise_percentile,
    )
    return excess_events(
        level - floor,
        grid.frame_start_samples(frames, fs) / fs,
        n_win / fs,
        detector.start_excess_db,
        detector.hold_excess_db,
        detector.shortest_event_s,
        detector.join_gap_s,
    )


def call_levels(
    path: str | Path,
    channel: int,
    chain: RecordingChain,
    settings: DescriptorSettings,
    start_s: np.ndarray,
    end_s: np.ndarray,
    low_hz: np.ndarray,
    high_hz: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Received level and SNR of calls in one file, measured as for detections.

    The received level is the in-band rms SPL of the calibrated waveform over the
    call (dB re 1 µPa); the noise is the running-percentile floor of the PSD over the
    ``settings.noise_span_s`` around the call, summed over the call's band, so these
    SNRs and the detections' are on one scale.

    Parameters
    ----------
    start_s, end_s : np.ndarray, s from the file's start
    low_hz, high_hz : np.ndarray, Hz, each call's band (NaN: the settings' band)

    Returns
    -------
    received_level_db, snr_db : np.ndarray [shape=(n_calls,)]
    """
    grid = settings.grid
    n = len(start_s)
    lo = np.where(np.isfinite(low_hz), np.maximum(low_hz, settings.low_hz), settings.low_hz)
    hi = np.where(np.isfinite(high_hz), np.minimum(high_hz, settings.high_hz), settings.high_hz)
    hi = np.maximum(hi, lo + settings.resolution_hz)
    with AudioReader(path, channel) as reader:
        fs = reader.sample_rate_hz
        half = settings.noise_span_s / 2.0
        noise_psd = np.empty((n, grid.frequency_hz.size))
        for i in range(n):
            a = max(int((start_s[i] - half) * fs), 0)
            b = min(int((end_s[i] + half) * fs), reader.frames)
            spec = psd_spectrogram(reader.read(a, b), fs, grid, chain, first_sample=a)
            if spec.psd_db.shape[1] == 0:
                noise_psd[i] = np.nan
                continue
            floor_db = np.percentile(spec.psd_db, settings.noise_percentile, axis=1)
            noise_psd[i] = 10.0 ** ((floor_db + percentile_to_mean_db(settings.noise_percentile)) / 10.0)
        cands = [
            Candidate(float(start_s[i]), float(end_s[i]), float(lo[i]), float(hi[i]), "", 1.0, i) for i in range(n)
        ]
        levels = measure_levels(reader, chain, cands, noise_psd, grid.frequency_hz)
    rl = np.array([x[0] for x in levels])
    snr = np.array([x[1] for x in levels])
    return rl, snr
