"""What the model sees: relative descriptors only, and every labelled non-target call."""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf
from callsieve.classifier.config import load_training_config
from callsieve.classifier.deployment import load_deployment
from callsieve.classifier.labels import BACKGROUND, read_label_table
from callsieve.classifier.training import LabelledSet, collect_examples
from callsieve.features.calibration import RecordingChain, samples_from_pressure
from callsieve.features.descriptors import (
    DescriptorSettings,
    descriptor_names,
    is_absolute_level,
    model_descriptor_names,
)
from callsieve.features.pipeline import describe_file
from callsieve.features.synthesis import CallShape, call_waveform

FS = 2000
CHAIN = RecordingChain.flat(2.5, -170.0, 0.0)
SETTINGS = DescriptorSettings(
    low_hz=50.0, high_hz=400.0, resolution_hz=5.0, frame_hop_s=0.05, window_s=2.0, window_hop_s=0.5
)


def _describe(tmp_path, noise_db: float, call_db: float, name: str, seed: int = 3) -> np.ndarray:
    """Upsweeps at ``call_db`` dB re 1 µPa in white noise of PSD ``noise_db`` dB re 1 µPa²/Hz."""
    rng = np.random.default_rng(seed)
    t = np.arange(FS * 120) / FS
    p = rng.normal(0.0, np.sqrt(10 ** (noise_db / 10) * FS / 2), t.size)
    for s in (20.25, 50.25, 80.25):
        p += call_waveform(CallShape("sweep", 80.0, 200.0, 1.3), t - s, np.sqrt(2) * 10 ** (call_db / 20))
    path = tmp_path / name
    sf.write(path, samples_from_pressure(p, FS, CHAIN), FS, subtype="FLOAT")
    return np.concatenate([tab.values for tab in describe_file(path, CHAIN, SETTINGS)])


def test_the_model_sees_no_absolute_level():
    names = descriptor_names(SETTINGS)
    seen = model_descriptor_names(SETTINGS)
    absolute = [n for n in names if n not in seen]
    # ISO 18405 levels in dB re 1 µPa: the band, the noise floor, peak-to-peak and every
    # sub-band level; everything relative to the floor (excess, SNR) stays in.
    assert set(absolute) == {"band_level_db", "noise_level_db", "peak_to_peak_db"} | {
        f"subband{k}_level_db" for k in range(1, SETTINGS.n_subbands + 1)
    }
    assert all(is_absolute_level(n) for n in absolute)
    assert "snr_db" in seen and "subband1_excess_db" in seen and "patch_t1_b1_excess_db" in seen


def test_a_louder_site_changes_only_the_absolute_levels(tmp_path):
    # The same scene 10 dB louder in every sample (calls and noise alike, as a recorder
    # with 10 dB more gain or a site where everything arrives 10 dB stronger): absolute
    # levels rise by 10 dB (definition of the decibel), every descriptor the model sees is
    # unchanged (to float32 rounding; frequencies, times and ratios are scale-free).
    quiet = _describe(tmp_path, 60.0, 105.0, "quiet.wav")
    loud = _describe(tmp_path, 70.0, 115.0, "loud.wav")
    names = descriptor_names(SETTINGS)
    for k, n in enumerate(names):
        if is_absolute_level(n):
            np.testing.assert_allclose(loud[:, k] - quiet[:, k], 10.0, atol=0.01, err_msg=n)
        else:
            np.testing.assert_allclose(loud[:, k], quiet[:, k], atol=0.02, rtol=1e-4, err_msg=n)


@pytest.mark.parametrize("noise_shift_db", [-10.0, 10.0])
def test_call_shape_does_not_depend_on_the_noise_level_at_high_snr(tmp_path, noise_shift_db):
    # The same calls in ambient noise 10 dB louder and 10 dB quieter: at high SNR (the
    # louder noise still leaves the call about 25 dB over each bin's floor) the trace's
    # frequencies, slope and duration stay within a bin, a few Hz/s and two hops.
    base = _describe(tmp_path, 55.0, 125.0, "base.wav")
    moved = _describe(tmp_path, 55.0 + noise_shift_db, 125.0, "moved.wav")
    names = descriptor_names(SETTINGS)
    start = np.arange(base.shape[0]) * SETTINGS.window_hop_s
    inside = np.isin(start, [19.5, 49.5, 79.5])  # windows holding a whole call
    tol = {
        "trace_first_hz": 2 * SETTINGS.resolution_hz,
        "trace_last_hz": 2 * SETTINGS.resolution_hz,
        "trace_median_hz": SETTINGS.resolution_hz,
        "trace_sweep_rate_hz_per_s": 8.0,
        "trace_duration_s": 2 * SETTINGS.frame_hop_s + 0.1,
        "excess_centroid_hz": 2 * SETTINGS.resolution_hz,
    }
    for n, atol in tol.items():
        k = names.index(n)
        np.testing.assert_allclose(moved[inside, k], base[inside, k], atol=atol, err_msg=n)


def test_a_target_model_keeps_every_window_of_other_labels(labelled):
    # In a model of one target, calls of other labels are background examples an analyst
    # named: all their windows are kept, however small the random background draw.
    manifest, labels, config_path = labelled
    dep = load_deployment(manifest)
    lset = LabelledSet(dep, read_label_table(labels, [dep]), str(labels))
    config = load_training_config(config_path)
    settings = DescriptorSettings(
        low_hz=60.0, high_hz=200.0, resolution_hz=5.0, frame_hop_s=0.05, window_s=1.7, window_hop_s=0.4
    )
    every = collect_examples([lset], settings, config)
    n_down = int(np.sum(every.y == "down"))
    assert n_down > 50
    from dataclasses import replace

    sparse = collect_examples([lset], settings, replace(config, target_background_ratio=0.01), target="up")
    n_up = int(np.sum(sparse.y == "up"))
    assert n_up == int(np.sum(every.y == "up"))
    # The draw alone would give max(0.01 · n_up, 1) background windows.
    assert int(np.sum(sparse.y == BACKGROUND)) >= n_down
    # Kept with certainty: their weight (inverse chance of being kept) is 1.
    assert np.sum(sparse.weight[sparse.y == BACKGROUND] == 1.0) >= n_down


def test_a_target_model_never_scores_a_louder_call_lower():
    # TrainingConfig.monotone_excess: scikit-learn's HistGradientBoostingClassifier with
    # monotonic_cst = +1 on snr_db and every *_excess_db column (scikit-learn user guide,
    # "Monotonic Constraints"), then isotonic calibration, which is non-decreasing.
    # Training rows where the calls sit at moderate excess and transients at very high
    # excess: unconstrained trees learn that very loud means "not a call"; constrained,
    # the same rows made 15 dB louder never score lower. The unconstrained fit is checked
    # to break the rule, so the test can fail.
    from callsieve.classifier.config import TrainingConfig
    from callsieve.classifier.training import _estimator

    names = model_descriptor_names(SETTINGS)
    excess = np.array([n == "snr_db" or n.endswith("excess_db") for n in names])
    rng = np.random.default_rng(0)
    n_call, n_noise, n_snap = 300, 1200, 300
    X = rng.normal(0.0, 1.0, (n_call + n_noise + n_snap, len(names))).astype(np.float32)
    X[:n_call, excess] += 8.0  # calls: moderate excess
    X[n_call + n_noise :, excess] += 25.0  # transients: very high excess
    y = np.array(["tarsel-upsweep"] * n_call + [BACKGROUND] * (n_noise + n_snap))
    groups = np.arange(y.size) % 8
    louder = X[:n_call].copy()
    louder[:, excess] += 15.0

    def drop(config: TrainingConfig) -> float:
        model = _estimator(config, names, "tarsel-upsweep").fit(X, y, groups=groups)
        j = list(model.classes_).index("tarsel-upsweep")
        return float(np.max(model.predict_proba(X[:n_call])[:, j] - model.predict_proba(louder)[:, j]))

    params = {"max_iter": 30}
    assert drop(TrainingConfig(params=params)) <= 1e-9
    assert drop(TrainingConfig(params=params, monotone_excess=False)) > 0.3


def test_a_target_model_splits_on_half_the_descriptors_and_a_model_of_every_label_on_all():
    # TrainingConfig.target_params: one-target gradient-boosted models take scikit-learn's
    # max_features = 0.5 (HistGradientBoostingClassifier, "proportion of randomly chosen
    # features in each and every node split"); a model of every label keeps 1.0, and a
    # configuration's [model.target_params] wins over the default.
    from callsieve.classifier.config import TrainingConfig
    from callsieve.classifier.training import _estimator

    names = model_descriptor_names(SETTINGS)
    rng = np.random.default_rng(1)
    X = rng.normal(0.0, 1.0, (400, len(names))).astype(np.float32)
    X[:100, names.index("trace_sweep_rate_hz_per_s")] += 3.0
    y = np.array(["tarsel-upsweep"] * 100 + [BACKGROUND] * 300)
    groups = np.arange(y.size) % 4
    one = _estimator(TrainingConfig(params={"max_iter": 10}), names, "tarsel-upsweep").fit(X, y, groups=groups)
    every = _estimator(TrainingConfig(params={"max_iter": 10}), names, None).fit(X, y, groups=groups)
    assert one.estimator_.max_features == 0.5
    assert every.estimator_.max_features == 1.0
    mine = TrainingConfig(params={"max_iter": 10}, target_params={"max_features": 1.0})
    assert _estimator(mine, names, "tarsel-upsweep").fit(X, y, groups=groups).estimator_.max_features == 1.0


@pytest.mark.parametrize(
    "text, says",
    [
        ("[model.target_params]\nmax_features = 7.0\n", "max_features"),
        ("[model.params]\nlearning_rate = -1.0\n", "learning_rate"),
        ("[model]\ntarget_params = 3\n", "target_params must be a table"),
        ("[model.target_params]\nmax_feature = 0.5\n", "max_feature are not parameters"),
    ],
)
def test_a_configuration_scikit_learn_would_refuse_is_refused_before_any_audio_is_read(tmp_path, text, says):
    from callsieve.classifier.config import load_training_config
    from callsieve.classifier.errors import InputError

    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(InputError) as caught:
        load_training_config(path)
    message = str(caught.value)
    assert says in message and str(path) in message and "\n" not in message
