"""Helpers shared by the tests: small deployments written to a temporary folder."""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

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
