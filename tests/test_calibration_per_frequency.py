"""Calibration through a frequency-dependent chain, checked against samples written by hand.

The recording is made with plain numpy from the response tables below, never with
``samples_from_pressure``, so an error in how the package reads its tables cannot cancel
between the writer and the reader. The chain has a frequency-dependent hydrophone AND a
frequency-dependent preamplifier; every tone sits exactly on a row of both tables (no
interpolation needed to know the response), and the system response differs by 4 to 21 dB
between tones, so a response read at the wrong frequency moves a tone's level by decibels.

Every tone is a multiple of every bin spacing used here, so each analysis frame holds a
whole number of its periods and its Hann-windowed power falls on three bins exactly.
"""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf
from callsieve.features.calibration import (
    RecordingChain,
    ResponseCurve,
    band_pressure_fir,
    pressure_from_samples,
    samples_from_pressure,
)
from callsieve.features.descriptors import DescriptorSettings, descriptor_names
from callsieve.features.levels import band_level_db, band_levels_db
from callsieve.features.pipeline import describe_file
from callsieve.features.spectrogram import SpectrogramGrid, psd_spectrogram
from scipy import signal

FS = 2000  # Hz; below 3 x 640 Hz, so describe_file does not decimate
FULL_SCALE_V = 2.0  # 0-to-peak volts at sample value 1.0

# Response tables (rows in Hz). Both tables have a row at every tone frequency.
HYDROPHONE_HZ = np.array([10.0, 60.0, 120.0, 240.0, 480.0, 1500.0])
HYDROPHONE_DB = np.array([-185.0, -178.0, -174.0, -171.0, -169.0, -167.0])  # dB re 1 V/µPa
PREAMP_HZ = np.array([10.0, 20.0, 60.0, 120.0, 240.0, 480.0, 2000.0])
PREAMP_DB = np.array([0.0, 6.0, 18.0, 24.0, 28.0, 30.0, 31.0])  # dB

# One tone per sub-band of the descriptor settings below (edges 40, 80, 160, 320, 640 Hz).
TONE_HZ = np.array([60.0, 120.0, 240.0, 480.0])
TONE_RMS_DB = np.array([110.0, 100.0, 104.0, 96.0])  # dB re 1 µPa (rms)
TONE_AMPLITUDE_UPA = np.sqrt(2.0) * 10.0 ** (TONE_RMS_DB / 20.0)  # sine: p_rms = A/√2 (REFERENCES §3)


def _table_value(freq_hz: np.ndarray, level_db: np.ndarray, f: float) -> float:
    """The table's own row at ``f`` (no interpolation: every tone is a row)."""
    (row,) = np.flatnonzero(freq_hz == f)
    return float(level_db[row])


# System sensitivity at each tone, read from the rows above by hand: S = M_h + G (REFERENCES §4).
SYSTEM_DB = np.array(
    [_table_value(HYDROPHONE_HZ, HYDROPHONE_DB, f) + _table_value(PREAMP_HZ, PREAMP_DB, f) for f in TONE_HZ]
)  # -160, -150, -143, -139 dB re 1 V/µPa


def _chain() -> RecordingChain:
    return RecordingChain(
        FULL_SCALE_V, ResponseCurve(HYDROPHONE_HZ, HYDROPHONE_DB), ResponseCurve(PREAMP_HZ, PREAMP_DB)
    )


def _tone_samples(k: int, n: int) -> np.ndarray:
    """Sample values of tone k, written with plain numpy from the table rows.

    REFERENCES §4: volts = p · 10^(M_h/20) · 10^(G/20) (p in µPa, M_h in dB re 1 V/µPa, G in
    dB); sample value x = volts / V_fs.
    """
    t = np.arange(n) / FS
    volts = TONE_AMPLITUDE_UPA[k] * 10.0 ** (SYSTEM_DB[k] / 20.0) * np.sin(2 * np.pi * TONE_HZ[k] * t)
    return volts / FULL_SCALE_V


def _recording(seconds: float) -> np.ndarray:
    """All four tones, plus converter noise 100 dB below them (it changes no level here)."""
    n = int(FS * seconds)
    x = sum(_tone_samples(k, n) for k in range(TONE_HZ.size))
    return x + np.random.default_rng(11).normal(0.0, 1e-7, n)


def _rms_db(p: np.ndarray) -> float:
    """SPL, dB re 1 µPa, of a pressure in µPa: 10 log10(mean p²) (ISO 18405; REFERENCES §3)."""
    return float(10.0 * np.log10(np.mean(np.asarray(p, dtype=np.float64) ** 2)))


def test_the_chain_differs_by_decibels_between_tones():
    # The premise of the file: a response read at the wrong frequency must move a level by
    # decibels. Table rows differ by >= 4 dB between neighbouring tones, 21 dB end to end,
    # and both the hydrophone and the preamplifier vary.
    assert np.min(np.abs(np.diff(SYSTEM_DB))) >= 4.0 and np.ptp(SYSTEM_DB) >= 20.0
    assert np.ptp(HYDROPHONE_DB[1:5]) >= 6.0 and np.ptp(PREAMP_DB[2:6]) >= 6.0
    # The package reads the same rows (log-frequency interpolation is exact at a row).
    np.testing.assert_allclose(_chain().system_sensitivity_db(TONE_HZ), SYSTEM_DB, atol=1e-9)
    # Clipping would spoil every check below: the loudest sum of tones stays below full scale.
    assert np.max(np.abs(_recording(1.0))) < 0.5


def test_psd_bins_hold_each_tone_at_its_pressure():
    # (i) PSD scaling as scipy.signal.welch(scaling='density') (REFERENCES §5): integrated over
    # frequency it gives the mean square, ∫ P df = A²/2 for a sine of amplitude A. A tone on a
    # bin centre leaks through the periodic Hann window into exactly its bin and the two
    # neighbours (0.25, 0.5, 0.25 of the bin-centre amplitude; from memory, the Hann DFT), so
    # the sum over ±2 bins × bin width is the tone's whole power. Level = 10 log10(A²/2)
    # = 20 log10(A/√2) dB re 1 µPa (REFERENCES §3). 2-Hz bins keep each tone's side bins within
    # 0.5 dB of its own response, which moves the sum by < 0.01 dB.
    grid = SpectrogramGrid(resolution_hz=2.0, hop_s=0.5, low_hz=20.0, high_hz=900.0)
    spec = psd_spectrogram(_recording(20.0).astype(np.float32), FS, grid, chain=_chain())
    mean_psd = np.mean(10.0 ** (spec.psd_db.astype(np.float64) / 10.0), axis=1)  # µPa²/Hz
    df = grid.resolution_hz
    for k, f in enumerate(TONE_HZ):
        near = np.abs(spec.frequency_hz - f) <= 2 * df + 1e-9
        level = 10.0 * np.log10(np.sum(mean_psd[near]) * df)
        assert level == pytest.approx(TONE_RMS_DB[k], abs=0.3), f"{f:g} Hz"


def test_band_levels_from_the_psd_hold_each_tone_and_their_sum():
    # (ii) Band level from a PSD: L_band = 10 log10(∫_band P df) (REFERENCES §5, level
    # relations); a band ±20 Hz around each tone holds that tone alone, so its band level is
    # the tone's SPL (REFERENCES §3); a band holding all four is their power sum
    # (incoherent sum, REFERENCES §3).
    grid = SpectrogramGrid(resolution_hz=2.0, hop_s=0.5, low_hz=20.0, high_hz=900.0)
    spec = psd_spectrogram(_recording(20.0).astype(np.float32), FS, grid, chain=_chain())
    mean_db = 10.0 * np.log10(np.mean(10.0 ** (spec.psd_db.astype(np.float64) / 10.0), axis=1))
    levels = band_levels_db(mean_db, spec.frequency_hz, TONE_HZ - 20.0, TONE_HZ + 20.0)
    np.testing.assert_allclose(levels, TONE_RMS_DB, atol=0.3)
    total = 10.0 * np.log10(np.sum(10.0 ** (TONE_RMS_DB / 10.0)))
    assert band_level_db(mean_db, spec.frequency_hz, 40.0, 640.0) == pytest.approx(total, abs=0.3)


def test_descriptor_subband_levels_hold_one_tone_each(tmp_path):
    # (iii) Through the file path (describe_file): sub-band k's level is the rms SPL in that
    # sub-band (descriptor_table), here the one tone inside it, 20 log10(A/√2) dB re 1 µPa
    # (REFERENCES §3), its power summed over bins as in REFERENCES §5; the band level is the
    # power sum of the four. Hann window: each tone is bin-centred, so its three bins lie
    # inside its sub-band (>= 12 Hz from an edge) and hold all its power.
    settings = DescriptorSettings(
        low_hz=40.0, high_hz=640.0, resolution_hz=2.0, frame_hop_s=0.25, window_s=2.0, window_hop_s=1.0
    )
    np.testing.assert_allclose(
        np.geomspace(40.0, 640.0, 5), [40.0, 80.0, 160.0, 320.0, 640.0]
    )  # equal log widths (descriptor_table); each tone lies inside one of them
    path = tmp_path / "tones.wav"
    sf.write(path, _recording(30.0), FS, subtype="FLOAT")
    tables = list(describe_file(path, _chain(), settings))
    values = np.concatenate([t.values for t in tables])
    names = descriptor_names(settings)
    inner = values[2:-2]  # windows away from the file's ends
    assert inner.shape[0] >= 10
    for k in range(TONE_HZ.size):
        np.testing.assert_allclose(
            inner[:, names.index(f"subband{k + 1}_level_db")], TONE_RMS_DB[k], atol=0.3, err_msg=f"{TONE_HZ[k]:g} Hz"
        )
    total = 10.0 * np.log10(np.sum(10.0 ** (TONE_RMS_DB / 10.0)))
    np.testing.assert_allclose(inner[:, names.index("band_level_db")], total, atol=0.3)


@pytest.mark.parametrize("k", range(TONE_HZ.size))
def test_waveform_correction_gives_each_tone_its_pressure(k):
    # (iv) The waveform path: pressure_from_samples applied to the hand-written samples of one
    # tone (the filter is linear, so tones can be checked one at a time) gives back its
    # pressure: rms 20 log10(A/√2) dB re 1 µPa (REFERENCES §3), with p = x · V_fs / 10^(S/20)
    # (REFERENCES §4) at that tone's own S. Ends of length taps/2 lack filter context
    # (pressure_from_samples docstring) and are left out.
    chain = _chain()
    n = FS * 12
    pressure = pressure_from_samples(_tone_samples(k, n), FS, chain)
    edge = chain.fir_length(FS)
    assert _rms_db(pressure[edge:-edge]) == pytest.approx(TONE_RMS_DB[k], abs=0.15)


@pytest.mark.parametrize("k", range(TONE_HZ.size))
def test_forward_model_writes_the_samples_the_tables_predict(k):
    # samples_from_pressure (the writer other tests use) against the same hand-written
    # samples: x_rms = p_rms · 10^(S/20) / V_fs (REFERENCES §4), at each tone's own S.
    n = FS * 12
    t = np.arange(n) / FS
    written = samples_from_pressure(TONE_AMPLITUDE_UPA[k] * np.sin(2 * np.pi * TONE_HZ[k] * t), FS, _chain())
    edge = _chain().fir_length(FS)
    by_hand = _tone_samples(k, n)
    assert _rms_db(written[edge:-edge]) == pytest.approx(_rms_db(by_hand[edge:-edge]), abs=0.15)


@pytest.mark.parametrize("k", range(TONE_HZ.size))
def test_band_pressure_filter_gives_each_tone_its_pressure(k):
    # The band filter that describe_file uses for peak-to-peak levels: inside the band its
    # gain is the chain's µPa per unit (band_pressure_fir docstring), so a tone inside the band
    # comes back at 20 log10(A/√2) dB re 1 µPa (REFERENCES §3, §4). Tolerance 0.2 dB: the
    # filter's gain is specified on 64 points 9.5 Hz apart and interpolated linearly between
    # them (0.1 dB off at 60 Hz, where the response bends most).
    fir = band_pressure_fir(_chain(), FS, 40.0, 640.0)
    n = FS * 12
    pressure = signal.oaconvolve(_tone_samples(k, n), fir, mode="same")
    edge = fir.size
    assert _rms_db(pressure[edge:-edge]) == pytest.approx(TONE_RMS_DB[k], abs=0.2)
