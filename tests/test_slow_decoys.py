"""Slow decoys: strong target examples copied as background, sweeping at a share of their rate."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from callsieve.classifier.config import TrainingConfig, load_training_config
from callsieve.classifier.deployment import load_deployment
from callsieve.classifier.labels import BACKGROUND, read_label_table
from callsieve.classifier.training import (
    DECOY_COUNT,
    SWEEP_RATES,
    LabelledSet,
    collect_examples,
    slow_decoys,
    train_model,
)
from callsieve.features.descriptors import DescriptorSettings, descriptor_names, sweep_path_rate_step_hz_per_s
from callsieve.features.pipeline import describe_file
from callsieve.features.synthesis import CallShape
from conftest import write_sweeps_file

SETTINGS = DescriptorSettings(
    low_hz=60.0, high_hz=200.0, resolution_hz=5.0, frame_hop_s=0.05, window_s=1.7, window_hop_s=0.4
)


def test_decoys_copy_only_strong_swept_target_rows_and_change_only_their_rates():
    names = descriptor_names(SETTINGS)
    step = sweep_path_rate_step_hz_per_s(SETTINGS)
    rng = np.random.default_rng(0)
    X = rng.normal(0.0, 30.0, (40, len(names))).astype(np.float32)
    path = names.index("sweep_path_excess_db")
    rate = [names.index(n) for n in SWEEP_RATES]
    X[:, path] = np.linspace(0.0, 39.0, 40)  # dB over the floor
    # Path rates: whole steps, from -3 to +4 (0 and one step: a tone, a slow drift); the
    # trace's rate and the long path's (on steps half as large) a little off the path's,
    # as measured.
    X[:, rate[1]] = step * (np.arange(40) % 8 - 3)
    X[:, rate[0]] = X[:, rate[1]] + rng.uniform(-0.3, 0.3, 40) * step
    X[:, rate[2]] = X[:, rate[1]] + rng.uniform(-0.3, 0.3, 40) * step / 2
    y = np.array(["up", BACKGROUND] * 20, dtype=object)
    config = TrainingConfig(slow_decoy_factor=0.5, slow_decoy_min_excess_db=15.0)
    rows, decoys = slow_decoys(X, y, names, "up", config, step)
    # Halving must move one of the rates by a whole path step at least.
    swept = np.max(np.abs(X[:, rate]), axis=1) >= 2 * step - 1e-6
    expected = np.flatnonzero((y == "up") & (X[:, path] >= 15.0) & swept)
    assert expected.size > 5
    np.testing.assert_array_equal(rows, expected)
    other = [k for k in range(len(names)) if k not in rate]
    np.testing.assert_array_equal(decoys[:, rate], X[rows][:, rate] * 0.5)
    np.testing.assert_array_equal(decoys[:, other], X[rows][:, other])
    # A flat tone never gives a decoy, however loud: halved, it would be its own call.
    tone = X.copy()
    tone[:, rate] = rng.uniform(-0.5, 0.5, (40, len(rate))) * step
    assert slow_decoys(tone, y, names, "up", config, step)[0].size == 0
    # Off: none.
    rows, decoys = slow_decoys(X, y, names, "up", replace(config, slow_decoy_factor=0.0), step)
    assert rows.size == 0 and decoys.shape == (0, len(names))


def test_decoy_settings_are_checked():
    with pytest.raises(Exception, match="slow_decoy_factor"):
        TrainingConfig(slow_decoy_factor=1.5)
    with pytest.raises(Exception, match="slow_decoy_min_excess_db"):
        TrainingConfig(slow_decoy_min_excess_db=-3.0)


def test_decoys_are_background_that_ranks_but_does_not_calibrate(labelled):
    # A decoy is not a window of the recordings: weight 0 (the calibration and the
    # cross-validated metrics stay those of the windows recorded), the group of the call
    # it was made from (so no fold learns from a copy of a call it is tested on), counted
    # apart from the labels.
    manifest, labels, config_path = labelled
    dep = load_deployment(manifest)
    lset = LabelledSet(dep, read_label_table(labels, [dep]), str(labels))
    config = load_training_config(config_path)
    with_decoys = collect_examples([lset], SETTINGS, replace(config, slow_decoy_factor=0.5), target="up")
    without = collect_examples([lset], SETTINGS, replace(config, slow_decoy_factor=0.0), target="up")
    names = with_decoys.names
    path = names.index("sweep_path_excess_db")
    moved = np.max(np.abs(without.X[:, [names.index(n) for n in SWEEP_RATES]]), axis=1) * 0.5
    strong = (
        (without.y == "up")
        & (without.X[:, path] >= config.slow_decoy_min_excess_db)
        & (moved >= sweep_path_rate_step_hz_per_s(SETTINGS) - 1e-6)
    )
    n_decoys = int(strong.sum())
    assert n_decoys > 10  # the fixture's calls reach 15 dB above the floor often enough
    assert with_decoys.X.shape[0] == without.X.shape[0] + n_decoys
    assert with_decoys.counts[str(labels)][DECOY_COUNT] == n_decoys
    assert DECOY_COUNT not in without.counts[str(labels)]
    decoy = with_decoys.weight == 0.0
    assert int(decoy.sum()) == n_decoys and np.all(with_decoys.y[decoy] == BACKGROUND)
    rate = names.index("sweep_path_rate_hz_per_s")
    np.testing.assert_allclose(np.sort(with_decoys.X[decoy, rate]), np.sort(without.X[strong, rate] * 0.5), rtol=1e-6)
    # Row for row, the group of the call each decoy was made from (the draw of background
    # windows does not depend on the decoys, so both sets hold the same other rows).
    np.testing.assert_array_equal(with_decoys.groups[decoy], without.groups[strong])
    np.testing.assert_array_equal(with_decoys.is_decoy(), decoy)
    # A model of every label has none.
    every = collect_examples([lset], SETTINGS, replace(config, slow_decoy_factor=0.5))
    assert not every.is_decoy().any() and np.all(every.weight > 0)


def test_decoys_leave_calibration_possible_when_every_real_example_is_verified():
    # Retraining on verified tables only: every real example is partial, so all of them
    # calibrate (calibration_weight); decoys, weight 0, must not turn that into "some are
    # not verified", which would zero every weight and leave nothing to calibrate on.
    from callsieve.classifier.training import ExampleSet, calibration_weight

    y = np.array(["up", "up", BACKGROUND, BACKGROUND], dtype=object)
    for decoy_partial in (True, False):
        examples = ExampleSet(
            np.zeros((4, 1), np.float32),
            y,
            np.array([1.0, 1.0, 1.0, 0.0]),
            np.arange(4),
            np.full(4, "t"),
            ["x"],
            partial=np.array([True, True, True, decoy_partial]),
            decoy=np.array([False, False, False, True]),
        )
        np.testing.assert_array_equal(calibration_weight(examples), [1.0, 1.0, 1.0, 0.0])


def test_a_model_with_decoys_scores_a_slower_sweep_of_the_same_band_lower(labelled, tmp_path):
    # The fixture's target sweeps up 80 -> 160 Hz in 0.9-1.3 s (60-90 Hz/s); its only
    # other label sweeps down. A slower upsweep over the same start (80 -> 115 Hz in
    # 1.3 s, 27 Hz/s), loud, is another call. Without decoys nothing at the training site
    # tells the trees that the rate matters, only its sign; with them it is learned. The
    # target's own calls at the same level must still score high. Synthetic truth: the
    # calls are written by call_waveform at known rates.
    manifest, labels, config_path = labelled
    dep = load_deployment(manifest)
    lset = LabelledSet(dep, read_label_table(labels, [dep]), str(labels))
    descriptors = {k: v for k, v in SETTINGS.to_dict().items() if k != "version"}
    config = replace(load_training_config(config_path), descriptors=descriptors)
    slow = [CallShape("sweep", 80.0, 115.0, 1.3)] * 6
    fast = [CallShape("sweep", 80.0, 160.0, 1.1)] * 6
    chain, starts = write_sweeps_file(tmp_path / "test.wav", slow + fast, 113.0)
    tables = list(describe_file(tmp_path / "test.wav", chain, SETTINGS))
    values = np.concatenate([t.values for t in tables])
    start = np.concatenate([t.start_s for t in tables])

    def best_score(model, s0, dur):
        inside = (start <= s0) & (start + SETTINGS.window_s >= s0 + dur)
        p = model.estimator.predict_proba(values[inside])[:, model.classes.index("up")]
        return float(p.max())

    scores = {}
    for factor in (0.0, 0.5):
        result = train_model([lset], replace(config, slow_decoy_factor=factor), target="up")
        model, decoy = result.model, result.examples.is_decoy()
        # The decoys are counted apart: the examples, the cross-validated confusion and
        # metrics hold the windows of the recordings only.
        assert model.summary["slow_decoys"] == int(decoy.sum()) and (decoy.sum() > 0) == (factor > 0)
        assert sum(model.summary["examples"].values()) == int((~decoy).sum())
        assert np.sum(result.validation["overall"]["confusion"]) == int((~decoy).sum())
        scores[factor] = (
            np.median([best_score(model, s, c.duration_s) for s, c in zip(starts[:6], slow, strict=True)]),
            np.median([best_score(model, s, c.duration_s) for s, c in zip(starts[6:], fast, strict=True)]),
        )
    (slow_without, fast_without), (slow_with, fast_with) = scores[0.0], scores[0.5]
    assert slow_without > 0.5, scores  # the confusion exists without decoys
    assert slow_with < 0.5 * slow_without, scores
    assert fast_with > 0.8 and fast_without > 0.8, scores
