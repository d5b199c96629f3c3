"""The long-term spectrum collected while scoring (features/soundscape.py, the store's
`soundscape` table): bands, levels, streaming."""

from __future__ import annotations

import sqlite3

import numpy as np
import pytest
from callsieve.features.calibration import RecordingChain
from callsieve.features.soundscape import (
    MinuteSpectra,
    band_means,
    segment_psd,
    soundscape_band_edges,
)
from scipy import signal

FS = 2000
CHAIN = RecordingChain.flat(2.5, -170.0, 40.0)


def _samples_for(pressure_upa: np.ndarray) -> np.ndarray:
    from callsieve.features.calibration import samples_from_pressure

    return samples_from_pressure(pressure_upa, FS, CHAIN)


def test_every_fourth_edge_is_a_third_octave_edge():
    # IEC 61260-1:2014 base-10 one-third-octave band edges (REFERENCES §2 table):
    # 17.7828, 22.3872, 28.1838 ... 891.2509 Hz.
    e = soundscape_band_edges(FS)
    thirds = [17.7828, 22.3872, 28.1838, 35.4813, 44.6684, 56.2341, 70.7946, 89.1251, 112.2018]
    assert e[0:33:4] == pytest.approx(thirds, abs=5e-4)
    assert e[-1] == FS / 2
    assert np.all(np.diff(e) > 0)
    # The lowest band is at least one 1-Hz bin wide, the one below it would not be.
    assert e[1] - e[0] >= 1.0 and e[0] * (1 - 10**-0.025) < 1.0


def test_segment_psd_equals_scipy_welch_of_one_hann_segment():
    # scipy.signal.welch, density scaling, one segment, no detrending (REFERENCES §5).
    rng = np.random.default_rng(1)
    x = rng.normal(0, 0.1, FS).astype(np.float32)
    chain = RecordingChain.flat(1.0, 0.0, 0.0)  # 1 µPa per unit: the PSD is the samples'
    f, psd = segment_psd(x, FS, chain)
    fw, pw = signal.welch(x.astype(float), FS, window="hann", nperseg=FS, noverlap=0, detrend=False)
    assert f == pytest.approx(fw)
    assert psd[0] == pytest.approx(pw, rel=1e-4)


def test_a_tone_of_known_level_stands_at_its_level_in_its_band():
    """A 500 Hz tone of 120 dB re 1 µPa (rms): its band's mean PSD times the band's width
    in bins gives back 120 dB (Parseval, density scaling); white noise far below."""
    t = np.arange(3 * 60 * FS) / FS
    p = np.sqrt(2) * 10 ** (120 / 20) * np.sin(2 * np.pi * 500.0 * t)
    spectra = MinuteSpectra(FS, CHAIN, 0, t.size)
    spectra.add(0, _samples_for(p))
    seconds, psd = spectra.result()
    assert seconds == pytest.approx([60, 60, 60])
    e = spectra.edges
    band = int(np.searchsorted(e, 500.0, side="right") - 1)
    bins = np.count_nonzero((np.arange(FS // 2 + 1) >= e[band]) & (np.arange(FS // 2 + 1) < e[band + 1]))
    level = 10 * np.log10(psd[:, band] * bins * 1.0)
    assert level == pytest.approx([120.0] * 3, abs=0.05)
    far = [k for k in range(e.size - 1) if e[k + 1] < 400 or e[k] > 650]
    assert np.nanmax(10 * np.log10(np.maximum(psd[:, far], 1e-30))) < 120 - 10 * np.log10(bins) - 60


def test_streaming_in_overlapping_blocks_equals_one_shot_and_counts_own_samples_only():
    rng = np.random.default_rng(2)
    n_before, n_own, n_after = 7 * FS + 123, 150 * FS + 777, 9 * FS
    stream = rng.normal(0, 0.05, n_before + n_own + n_after).astype(np.float32)
    one = MinuteSpectra(FS, CHAIN, n_before, n_own)
    one.add(0, stream)
    blocks = MinuteSpectra(FS, CHAIN, n_before, n_own)
    start = 0
    while start < stream.size:  # blocks that overlap, as scoring's do
        stop = min(start + int(rng.integers(3 * FS, 40 * FS)), stream.size)
        blocks.add(start, stream[start:stop])
        start = max(stop - int(rng.integers(0, 2 * FS)), start + 1)
    s1, p1 = one.result()
    s2, p2 = blocks.result()
    assert s1 == pytest.approx(s2) and np.allclose(p1, p2, rtol=1e-6, equal_nan=True)
    # Whole seconds of the file's own samples, in bins of 60 s: 60, 60, 30.
    assert s1 == pytest.approx([60, 60, 30])


def test_a_hole_in_the_blocks_is_never_filled_in():
    spectra = MinuteSpectra(FS, CHAIN, 0, 120 * FS)
    x = np.zeros(120 * FS, np.float32)
    spectra.add(0, x[: 30 * FS])
    spectra.add(40 * FS, x[40 * FS :])  # ten seconds never read
    seconds, _ = spectra.result()
    assert seconds.sum() == pytest.approx(30)


def test_band_means_averages_the_bins_of_each_band():
    f = np.arange(0, 11, dtype=float)
    psd = np.tile(f, (2, 1))
    got = band_means(psd, f, np.array([0.5, 3.5, 7.5, 10.0]))
    assert got[0] == pytest.approx([2.0, 5.5, 9.0])  # bins 1-3, 4-7, 8-10


def test_scoring_stores_the_sites_noise_level_per_minute(reference):
    """conftest's site is white noise of 65 dB re 1 µPa²/Hz with sweeps at 80-160 Hz: away
    from the calls every band's stored mean PSD is 65 dB, and each 240-s file has 4 bins."""
    con = sqlite3.connect(reference[0])
    rows = con.execute("SELECT seconds, band_edges_hz, psd_db FROM soundscape WHERE run_id=1").fetchall()
    n_files = con.execute("SELECT COUNT(*) FROM run_files WHERE status='done'").fetchone()[0]
    con.close()
    assert len(rows) == n_files == 6
    for seconds, edges, psd in rows:
        seconds = np.frombuffer(seconds, "<f4")
        edges = np.frombuffer(edges, "<f4")
        psd = np.frombuffer(psd, "<f2").reshape(seconds.size, edges.size - 1).astype(float)
        assert seconds == pytest.approx([60, 60, 60, 60])
        quiet = (edges[:-1] > 300) & (edges[1:] < 950)
        assert np.median(psd[:, quiet]) == pytest.approx(65.0, abs=0.3)
