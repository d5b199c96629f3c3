"""Helpers shared by the tests: small deployments written to a temporary folder."""

from __future__ import annotations

import csv
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from callsieve.features.calibration import RecordingChain, samples_from_pressure
from callsieve.features.synthesis import CallShape, call_waveform

FLAT_CALIBRATION = """
[calibration]
full_scale_volts = 2.5
preamp_gain_db = 40.0
hydrophone_sensitivity_db = -170.0
"""


def write_manifest(
    folder: Path,
    name: str = "test-site",
    calibration: str = FLAT_CALIBRATION,
    extra: str = "",
    glob: str = "*.wav",
    timestamp_format: str = "%Y%m%dT%H%M%SZ",
) -> Path:
    """Write manifest.toml in ``folder`` (audio in folder/audio) and return its path."""
    text = f"""
[deployment]
name = "{name}"
audio_dir = "audio"
glob = "{glob}"
timestamp_format = "{timestamp_format}"
{extra}
{calibration}
"""
    path = folder / "manifest.toml"
    path.write_text(text)
    return path


def write_files(
    folder: Path,
    starts: list[datetime],
    duration_s: float,
    fs: int = 2000,
    subtype: str = "PCM_16",
    seed: int = 0,
    ext: str = "wav",
) -> list[Path]:
    """Noise files named testrec_<UTC start>.<ext> in folder/audio."""
    audio = folder / "audio"
    audio.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    paths = []
    for t in starts:
        p = audio / f"testrec_{t:%Y%m%dT%H%M%SZ}.{ext}"
        sf.write(p, rng.normal(0, 0.05, int(duration_s * fs)), fs, subtype=subtype)
        paths.append(p)
    return paths


@pytest.fixture
def duty_cycled(tmp_path: Path) -> tuple[Path, list[datetime]]:
    """Four 60-s files every 5 minutes (a duty cycle) and a flat manifest."""
    t0 = datetime(2031, 5, 4, 6, 0, 0)
    starts = [t0 + timedelta(minutes=5 * i) for i in range(4)]
    write_files(tmp_path, starts, 60.0)
    return write_manifest(tmp_path), starts


FAST = """
[model]
kind = "gradient-boosting"
[model.params]
max_iter = 60
[validation]
group_by = "file"
folds = 3
"""


@pytest.fixture(scope="session")
def labelled(tmp_path_factory):
    """Six 4-minute files of noise with up- and down-sweeps at known times, and their labels."""
    folder = tmp_path_factory.mktemp("labelled")
    fs = 2000
    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    rng = np.random.default_rng(21)
    rows = []
    t0 = datetime(2032, 1, 5, 0, 0, 0)
    (folder / "audio").mkdir()
    for k in range(6):
        n = fs * 240
        t = np.arange(n) / fs
        p = rng.normal(0.0, np.sqrt(10 ** (65 / 10) * fs / 2), n)
        name = f"unit_{t0 + timedelta(minutes=10 * k):%Y%m%dT%H%M%SZ}.wav"
        for start in np.arange(5.0, 230.0, 9.0) + rng.uniform(0, 2, 25):
            up = rng.random() < 0.5
            f0, f1 = (80.0, 160.0) if up else (160.0, 80.0)
            shape = CallShape("sweep", f0 + rng.uniform(-5, 5), f1 + rng.uniform(-5, 5), rng.uniform(0.9, 1.3))
            level = rng.uniform(100.0, 115.0)  # dB re 1 µPa: SNR from about -5 to +10 dB in band
            p += call_waveform(shape, t - start, np.sqrt(2) * 10 ** (level / 20))
            rows.append(
                {
                    "file": name,
                    "start_s": round(start, 3),
                    "end_s": round(start + shape.duration_s, 3),
                    "label": "up" if up else "down",
                    "low_hz": 70,
                    "high_hz": 175,
                }
            )
        sf.write(folder / "audio" / name, samples_from_pressure(p, fs, chain), fs, subtype="PCM_16")
    manifest = write_manifest(folder, name="sweep-site")
    labels = folder / "labels.csv"
    with open(labels, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    config = folder / "fast.toml"
    config.write_text(FAST)
    return manifest, labels, config


@pytest.fixture(scope="session")
def sweep_model(labelled, tmp_path_factory):
    """A model trained (without tracking) on the labelled sweep site."""
    from callsieve.classifier.training import train

    manifest, labels, config = labelled
    path = tmp_path_factory.mktemp("sweep-model") / "model.skops"
    train([manifest], [labels], path, config_path=config, track=False)
    return path


@pytest.fixture(scope="session")
def reference(labelled, sweep_model, tmp_path_factory):
    """An uninterrupted single-process scoring run over the labelled site."""
    from callsieve.classifier.scoring import score_deployment

    manifest, _, _ = labelled
    db = tmp_path_factory.mktemp("ref") / "ref.db"
    summary = score_deployment(sweep_model, manifest, db)
    return db, summary


def isolated_call_level_db(p, fs, call, busy, duration_s):
    """Band level (dB re 1 µPa) of one call in calibrated pressure ``p``, noise taken out.

    The band rms over the call less the median power of 1-s pieces of noise within 8 s,
    clear of every call in ``busy`` ((start, end) in s); None where the call overlaps
    another or fewer than 3 noise pieces remain (ISO 18405 SPL; incoherent power sum).
    """
    from callsieve.features.levels import band_spl_db

    s0, s1 = float(call["start_s"]), float(call["end_s"])
    # Two animals can call at once; only an isolated call can be measured alone.
    if sum(a < s1 and b > s0 for a, b in busy) > 1:
        return None
    lo, hi = float(call["low_hz"]), float(call["high_hz"])
    total = band_spl_db(p[int(round(s0 * fs)) : int(round(s1 * fs))], fs, lo, hi)
    pieces = [
        10 ** (band_spl_db(p[int(a * fs) : int((a + 1) * fs)], fs, lo, hi) / 10)
        for a in np.arange(s0 - 8.0, s1 + 8.0, 1.0)
        if a >= 0 and a + 1 <= duration_s and not any(a < e and a + 1 > b for b, e in busy)
    ]
    if len(pieces) < 3:
        return None
    return float(10 * np.log10(10 ** (total / 10) - np.median(pieces)))


def write_sweeps_file(path, shapes, level_db, fs=2000, noise_db=65.0, seed=5):
    """Sweeps at ``level_db`` dB re 1 µPa, one every 10 s from 5 s, in white noise of PSD
    ``noise_db`` dB re 1 µPa²/Hz; returns the start times (s)."""
    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    rng = np.random.default_rng(seed)
    starts = 5.0 + 10.0 * np.arange(len(shapes))
    t = np.arange(int(fs * (starts[-1] + 6.0))) / fs
    p = rng.normal(0.0, np.sqrt(10 ** (noise_db / 10) * fs / 2), t.size)
    for shape, s in zip(shapes, starts, strict=True):
        p += call_waveform(shape, t - s, np.sqrt(2) * 10 ** (level_db / 20))
    sf.write(path, samples_from_pressure(p, fs, chain), fs, subtype="PCM_16")
    return chain, starts
