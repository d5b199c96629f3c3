"""The cascade: cheap screen descriptors, its out-of-fold operating point, and scoring with it."""

from __future__ import annotations

import json

import numpy as np
import pytest
import soundfile as sf
from callsieve.classifier.cascade import CASCADE_RECALL, MIN_REJECTED, fit_cascade
from callsieve.classifier.deployment import load_deployment
from callsieve.classifier.model import load_model, save_model
from callsieve.classifier.scoring import score_file
from callsieve.features.calibration import RecordingChain, samples_from_pressure
from callsieve.features.descriptors import DescriptorSettings, describe_windows, descriptor_names
from callsieve.features.pipeline import _describe_passed, describe_stream
from callsieve.features.screening import frames_of_windows, screen_names, screen_values
from callsieve.features.streaming import AudioReader
from callsieve.features.synthesis import CallShape, call_waveform
from conftest import write_manifest
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.model_selection import PredefinedSplit, cross_val_predict

SETTINGS = DescriptorSettings(
    low_hz=50.0, high_hz=250.0, resolution_hz=5.0, frame_hop_s=0.05, window_s=2.0, window_hop_s=0.5
)


def _spectrogram(rng, n_frames=400):
    """Exponential noise PSD (dB) on a sloping floor, with a sweep of known excess in it."""
    f = SETTINGS.grid.frequency_hz
    floor = (70.0 - 10.0 * np.log10(f / f[0]))[:, None] * np.ones((1, n_frames))
    psd = floor + 10.0 * np.log10(rng.exponential(1.0, (f.size, n_frames)))
    track = np.clip(((np.arange(n_frames) - 100) * 0.6).astype(int) + 5, 0, f.size - 1)
    on = (np.arange(n_frames) >= 100) & (np.arange(n_frames) < 160)
    psd[track[on], np.flatnonzero(on)] += 15.0
    return psd.astype(np.float32), floor.astype(np.float32), f


def test_screen_values_are_the_descriptors_of_the_same_names():
    # Reference: describe_windows, the full descriptors the screen's names come from.
    rng = np.random.default_rng(3)
    psd, floor, f = _spectrogram(rng)
    first = np.arange(0, 400 - SETTINGS.frames_per_window, SETTINGS.frames_per_window_hop)
    full, _, _ = describe_windows(psd, floor, f, first, SETTINGS, np.zeros(first.size))
    names = descriptor_names(SETTINGS)
    cols = [names.index(n) for n in screen_names(SETTINGS)]
    np.testing.assert_allclose(screen_values(psd, floor, f, first, SETTINGS), full[:, cols], atol=1e-3)


def test_describing_only_passed_windows_gives_their_full_descriptors():
    # Dropping frames no kept window covers must not change a kept window's descriptors.
    rng = np.random.default_rng(4)
    psd, floor, f = _spectrogram(rng)
    first = np.arange(0, 400 - SETTINGS.frames_per_window, SETTINGS.frames_per_window_hop)
    p2p = rng.normal(100, 3, first.size)
    full, seg, noise = describe_windows(psd, floor, f, first, SETTINGS, p2p)
    passed = np.zeros(first.size, dtype=bool)
    passed[[2, 3, 9, 20]] = True
    values, seg2, noise2 = _describe_passed(psd, floor, f, first, SETTINGS, p2p, passed)
    np.testing.assert_allclose(values[passed], full[passed], rtol=1e-4, atol=1e-3)
    np.testing.assert_array_equal(seg2[passed], seg[passed])
    np.testing.assert_allclose(noise2[passed], noise[passed], rtol=1e-6)
    assert np.isnan(values[~passed]).all()
    cols = frames_of_windows(first[passed], SETTINGS.frames_per_window, psd.shape[1])
    expected = np.unique(np.concatenate([np.arange(a, a + SETTINGS.frames_per_window) for a in first[passed]]))
    np.testing.assert_array_equal(cols, expected)


def _examples(rng, n_bg=3000, n_call=400):
    """Descriptor rows: background of pure noise, calls of two classes with excess of 3-15 dB."""
    names = descriptor_names(SETTINGS)
    X = np.zeros((n_bg + 2 * n_call, len(names)), dtype=np.float32)
    y = np.array(["background"] * n_bg + ["a"] * n_call + ["b"] * n_call)
    excess = np.concatenate([rng.normal(0.0, 0.7, n_bg), rng.uniform(3, 15, 2 * n_call)])
    X[:] = rng.normal(0.0, 1.0, X.shape)
    X[:, names.index("snr_db")] = excess + rng.normal(0, 0.5, y.size)
    X[:, names.index("subband2_peak_excess_db")] = 3.0 + excess * (y == "a") + rng.exponential(1.0, y.size)
    X[:, names.index("subband3_peak_excess_db")] = 3.0 + excess * (y == "b") + rng.exponential(1.0, y.size)
    weight = np.where(y == "background", 10.0, 1.0)
    fold = rng.integers(0, 4, y.size)
    return X, y, weight, fold, names


def test_cascade_keeps_the_training_calls_out_of_fold():
    rng = np.random.default_rng(5)
    X, y, weight, fold, names = _examples(rng)
    cascade = fit_cascade(X, y, weight, fold, names, SETTINGS, "background")
    assert cascade is not None and cascade.names == screen_names(SETTINGS)
    # Out-of-fold scores recomputed with scikit-learn's cross_val_predict on the same folds.
    Z = X[:, [names.index(n) for n in cascade.names]]
    oof = cross_val_predict(
        HistGradientBoostingClassifier(
            max_iter=20, max_depth=3, learning_rate=0.2, class_weight="balanced", early_stopping=False, random_state=0
        ),
        Z,
        y != "background",
        cv=PredefinedSplit(fold),
        method="predict_proba",
    )[:, 1]
    kept = oof >= cascade.threshold
    for c in ("a", "b"):
        assert kept[y == c].mean() >= CASCADE_RECALL
        assert cascade.recall[c] == pytest.approx(kept[y == c].mean())
    bg = y == "background"
    assert cascade.rejected_share == pytest.approx(weight[bg & ~kept].sum() / weight[bg].sum())
    # Calls stand at least 3 dB out: most background is rejected.
    assert cascade.rejected_share > 0.5


def test_model_file_keeps_the_cascade_and_an_older_file_loads_without(sweep_model, tmp_path):
    model = load_model(sweep_model)
    assert model.cascade is not None
    assert model.metadata()["cascade"]["recall"] == model.cascade.recall
    model.cascade = None
    older = tmp_path / "older.skops"
    save_model(model, older)
    again = load_model(older)
    assert again.cascade is None and "cascade" not in again.metadata()


@pytest.fixture(scope="module")
def loud_calls(tmp_path_factory):
    """Ten minutes of white noise (65 dB re 1 µPa²/Hz·Hz band) with six loud up-sweeps."""
    folder = tmp_path_factory.mktemp("loud")
    (folder / "audio").mkdir()
    fs = 2000
    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    rng = np.random.default_rng(8)
    n = fs * 600
    t = np.arange(n) / fs
    p = rng.normal(0.0, np.sqrt(10 ** (65 / 10) * fs / 2), n)
    starts = [40.0, 130.0, 222.0, 310.0, 405.0, 520.0]
    for s in starts:
        p += call_waveform(CallShape("sweep", 80.0, 160.0, 1.1), t - s, np.sqrt(2) * 10 ** (118 / 20))
    sf.write(folder / "audio" / "loud_20320105T000000Z.wav", samples_from_pressure(p, fs, chain), fs, "PCM_16")
    return write_manifest(folder, name="loud-site"), starts


def test_cascade_rejects_most_noise_and_keeps_every_loud_call(sweep_model, loud_calls):
    manifest, starts = loud_calls
    dep = load_deployment(manifest)
    model = load_model(sweep_model)
    f = dep.files[0]
    with AudioReader(f.path, 0) as reader:
        tables = list(describe_stream(reader, dep.chain, model.settings, screen=model.cascade.keep))
    passed = np.concatenate([t.passed for t in tables])
    assert passed.mean() < 0.5
    with_cascade = score_file(model, f.path, f.name, dep.chain, 0, 0.1)
    without = score_file(model, f.path, f.name, dep.chain, 0, 0.1, cascade=False)
    for rows in (with_cascade.rows, without.rows):
        for s in starts:  # every call found as an up-sweep (matching rule: overlap within 0.5 s)
            assert any(r[4] == "up" and r[0] < s + 1.1 + 0.5 and r[1] > s - 0.5 for r in rows), s

    # The calls' detections are the same with and without the first stage.
    def at_calls(rows):
        return sorted(r for r in rows if any(r[0] < s + 1.6 and r[1] > s - 0.5 for s in starts))

    a, b = at_calls(with_cascade.rows), at_calls(without.rows)
    assert len(a) == len(b) >= len(starts)
    for x, y in zip(a, b, strict=True):
        assert x[4] == y[4]
        np.testing.assert_allclose([v for v in x[:4] + x[5:8]], [v for v in y[:4] + y[5:8]], rtol=1e-5, atol=1e-4)


def test_a_screen_that_rejects_too_little_is_not_used(sweep_model, loud_calls):
    # A screen below MIN_REJECTED is recorded but scoring describes every window: even
    # one that would reject everything (threshold above any probability) changes nothing.
    manifest, _ = loud_calls
    dep = load_deployment(manifest)
    model = load_model(sweep_model)
    f = dep.files[0]
    without = score_file(model, f.path, f.name, dep.chain, 0, 0.1, cascade=False)
    model.cascade.threshold = 1.1
    assert score_file(model, f.path, f.name, dep.chain, 0, 0.1).rows == []
    model.cascade.rejected_share = MIN_REJECTED / 2
    assert not model.cascade.pays
    assert score_file(model, f.path, f.name, dep.chain, 0, 0.1).rows == without.rows


def test_evaluate_reports_the_cascade(labelled, reference, sweep_model, tmp_path, capsys):
    from callsieve.classifier.cli import main

    _, labels, _ = labelled
    db, _ = reference
    out = tmp_path / "ev"
    assert main(["evaluate", str(db), "--truth", str(labels), "--out", str(out)]) == 0
    recorded = json.loads((out / "metrics.json").read_text())["cascade"]
    assert recorded == load_model(sweep_model).summary["cascade"]
    assert recorded["min_recall"] >= CASCADE_RECALL
    assert "cascade: its first stage kept" in capsys.readouterr().out


def test_peak_to_peak_can_be_left_out_and_nothing_else_changes(sweep_model, loud_calls):
    # Scoring leaves out the one waveform descriptor when the model does not read it; the
    # reference is the full description of the same file.
    manifest, _ = loud_calls
    dep = load_deployment(manifest)
    model = load_model(sweep_model)
    names = descriptor_names(model.settings)
    i = names.index("peak_to_peak_db")
    assert i not in model.estimator.columns
    with AudioReader(dep.files[0].path, 0) as reader:
        full = np.concatenate([t.values for t in describe_stream(reader, dep.chain, model.settings)])
    with AudioReader(dep.files[0].path, 0) as reader:
        tables = describe_stream(reader, dep.chain, model.settings, peak_to_peak=False)
        part = np.concatenate([t.values for t in tables])
    assert np.isnan(part[:, i]).all() and np.isfinite(full[:, i]).all()
    others = np.arange(len(names)) != i
    np.testing.assert_array_equal(part[:, others], full[:, others])
