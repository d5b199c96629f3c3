"""Fold averaging: a one-target model scores with the mean raw score of the grouped
cross-validation's fold estimators and its final estimator, then calibrates.

The reference values are scikit-learn's own ``predict_proba`` of each fitted estimator
(HistGradientBoostingClassifier) and of the fitted calibrator (IsotonicRegression); the
data are synthetic classes with known overlap."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from callsieve.classifier.config import TrainingConfig
from callsieve.classifier.labels import BACKGROUND
from callsieve.classifier.model import CallClassifier, load_model, save_model
from callsieve.classifier.scoring import _predict
from callsieve.classifier.training import _estimator


def _two_classes(seed: int = 3, n: int = 1200):
    """Two overlapping Gaussian classes in 5 dimensions, 12 groups of rows."""
    rng = np.random.default_rng(seed)
    y = np.where(rng.random(n) < 0.2, "call", BACKGROUND)
    X = rng.normal(size=(n, 5)).astype(np.float32)
    X[y == "call", :2] += 1.2
    groups = np.repeat(np.arange(12), n // 12)
    return X, y, groups


def _fitted(average_folds: bool) -> tuple[CallClassifier, np.ndarray]:
    X, y, groups = _two_classes()
    params = {"max_iter": 30, "max_leaf_nodes": 15, "max_features": 0.5}
    clf = CallClassifier(params=params, class_weight="none", folds=4, average_folds=average_folds)
    return clf.fit(X, y, groups=groups), X


def test_probabilities_are_the_calibrated_mean_of_the_fold_and_final_scores():
    clf, X = _fitted(True)
    assert len(clf.fold_estimators_) == 4  # one per grouped fold
    models = [*clf.fold_estimators_, clf.estimator_]
    assert all(list(m.classes_) == list(clf.classes_) for m in models)
    # scikit-learn's own scores of each fitted estimator, averaged; then the calibrator.
    raw = np.mean([m.predict_proba(X) for m in models], axis=0)
    np.testing.assert_allclose(clf.predict_proba(X), clf._calibrate(raw, clf.calibrators_), rtol=0, atol=1e-12)
    # The folds matter: the mean differs from the final estimator alone.
    assert np.max(np.abs(clf.predict_proba(X) - clf.predict_proba_final(X))) > 1e-3


def test_without_it_the_final_estimator_scores_alone():
    clf, X = _fitted(False)
    assert clf.fold_estimators_ == []
    np.testing.assert_array_equal(clf.predict_proba(X), clf.predict_proba_final(X))


def test_it_is_on_for_one_target_gradient_boosting_only():
    names = ["a", "snr_db", "b_excess_db"]
    on = TrainingConfig()
    assert on.average_folds is True  # the default
    assert _estimator(on, names, target="up").average_folds is True
    assert _estimator(on, names, target=None).average_folds is False  # a model of every label
    forest = TrainingConfig(kind="random-forest", params={"n_estimators": 10})
    assert _estimator(forest, names, target="up").average_folds is False
    off = TrainingConfig(average_folds=False)
    assert _estimator(off, names, target="up").average_folds is False


def test_scoring_asks_the_folds_only_near_the_storage_floor():
    clf, X = _fitted(True)
    model = SimpleNamespace(classes=[str(c) for c in clf.classes_], estimator=clf)
    j = model.classes.index("call")
    floor = 0.1  # score's default
    got = _predict(model, X, None, 0, 1, None, floor)
    final = clf.predict_proba_final(X)
    near = final[:, j] >= 0.5 * floor
    assert 0 < near.sum() < near.size  # both kinds of window are present
    np.testing.assert_allclose(got[near], clf.predict_proba(X[near]), rtol=0, atol=1e-12)
    np.testing.assert_array_equal(got[~near], final[~near])
    # With a floor of 0 every window is asked of every estimator.
    np.testing.assert_allclose(_predict(model, X, None, 0, 1, None, 0.0), clf.predict_proba(X), rtol=0, atol=1e-12)


def test_a_class_missing_from_a_fold_is_averaged_over_the_estimators_that_saw_it():
    # A third class lives in one group only, so the fold holding that group out never
    # sees it: its mean must come from the other estimators, not be diluted by a zero.
    X, y, groups = _two_classes(seed=5)
    rare = groups == 0
    y = np.where(rare & (y == "call"), "rare", y)
    X[y == "rare", 2:] += 2.0
    clf = CallClassifier(params={"max_iter": 20}, class_weight="none", folds=4, average_folds=True)
    clf.fit(X, y, groups=groups)
    k = list(clf.classes_).index("rare")
    saw = [m for m in (*clf.fold_estimators_, clf.estimator_) if "rare" in m.classes_]
    assert 1 <= len(saw) < len(clf.fold_estimators_) + 1  # one fold never saw it
    # scikit-learn's own scores of the estimators that saw the class, averaged.
    expected = np.mean([m.predict_proba(X)[:, list(m.classes_).index("rare")] for m in saw], axis=0)
    mean_raw = clf._mean_raw(X, clf.estimator_.predict_proba(X))
    np.testing.assert_allclose(mean_raw[:, k], expected, rtol=1e-12)


def test_forest_fold_estimators_score_on_one_thread():
    X, y, groups = _two_classes()
    clf = CallClassifier(kind="random-forest", params={"n_estimators": 5}, folds=3, average_folds=True)
    clf.fit(X, y, groups=groups)
    # Scoring runs files in parallel; each estimator's own threads would oversubscribe.
    assert len(clf.fold_estimators_) == 3
    assert all(m.n_jobs == 1 for m in (*clf.fold_estimators_, clf.estimator_))


def test_the_fold_estimators_travel_with_the_model_file_and_old_files_score_as_before(labelled, tmp_path):
    from callsieve.classifier.training import train

    manifest, labels, config_path = labelled
    path = tmp_path / "up.skops"
    train([manifest], [labels], path, config_path=config_path, target="up", track=False)
    model = load_model(path)
    est = model.estimator
    assert est.average_folds is True and len(est.fold_estimators_) >= 2
    X = np.random.default_rng(0).normal(size=(50, len(model.descriptor_names))).astype(np.float32)
    X = np.abs(X) * 10.0
    again = load_model(path)
    np.testing.assert_array_equal(again.estimator.predict_proba(X), est.predict_proba(X))
    # A file saved before fold averaging holds neither the parameter nor the fold
    # estimators: it loads, reports the parameter off, and scores with its final estimator
    # (as computed here before the file was written).
    final_only = est.predict_proba_final(X)
    del est.average_folds
    del est.fold_estimators_
    save_model(model, tmp_path / "old.skops")
    old = load_model(tmp_path / "old.skops").estimator
    assert old.get_params()["average_folds"] is False
    np.testing.assert_array_equal(old.predict_proba(X), final_only)
    np.testing.assert_array_equal(old.predict_proba(X), old.predict_proba_final(X))


@pytest.mark.parametrize("value", ["yes", 1])
def test_a_bad_setting_is_refused_with_one_line(tmp_path, value):
    from callsieve.classifier.config import load_training_config
    from callsieve.classifier.errors import InputError

    path = tmp_path / "c.toml"
    path.write_text(f"[model]\naverage_folds = {value!r}\n".replace("'", '"'))
    with pytest.raises(InputError, match="average_folds"):
        load_training_config(path)
