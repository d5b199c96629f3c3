"""Confidences that rank without ties, and cross-validation groups that really group."""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
from callsieve.classifier.model import CallClassifier
from callsieve.classifier.training import _group_keys, resolve_groups
from sklearn.datasets import make_classification
from sklearn.metrics import roc_auc_score


class _Dep:
    def __init__(self, name):
        self.name = name


class _Rec:
    def __init__(self, name, start):
        self.name = name
        self.start_utc = start


def _keys(files: list[tuple[str, datetime, float]], step_s: float = 1.0) -> np.ndarray:
    parts = []
    for name, start, duration_s in files:
        parts.append(_group_keys(_Dep("site"), _Rec(name, start), np.arange(0.0, duration_s, step_s)))
    return np.concatenate(parts)


def test_isotonic_confidences_rank_without_ties():
    # An isotonic calibrator fitted on a few hundred positives is a staircase ending in a
    # plateau; stored confidences must still rank. The acceptance rule of the detector
    # work: at most 1 % of rows share the top value.
    X, y = make_classification(n_samples=3000, n_features=8, n_informative=5, weights=[0.9], random_state=1)
    groups = np.arange(y.size) // 100
    model = CallClassifier(params={"max_iter": 30}, calibration="isotonic", folds=3).fit(
        X[:2000], y[:2000], None, groups[:2000]
    )
    p = model.predict_proba(X[2000:])[:, 1]
    top_share = np.mean(p == p.max())
    assert top_share <= 0.01, f"{top_share:.1%} of rows share the top confidence"
    # Calibration loses no rank: as many distinct confidences as distinct raw scores, and
    # the ranking is as good as the raw scores' (scikit-learn's roc_auc_score as the
    # reference); no probability leaves 0..1.
    raw = model.estimator_.predict_proba(X[2000:].astype(np.float32))[:, 1]
    assert np.unique(p).size == np.unique(raw).size
    assert roc_auc_score(y[2000:], p) == np.float64(roc_auc_score(y[2000:], raw))
    assert p.min() >= 0.0 and p.max() <= 1.0


def test_auto_grouping_falls_back_from_hours_to_files():
    # Six hours in twelve 30-minute files: 6 hour groups are fewer than two per fold
    # (4 folds), 12 file groups are enough.
    t0 = datetime(2031, 3, 2, tzinfo=UTC)
    files = [(f"f{k:02d}.wav", t0.replace(hour=k // 2, minute=30 * (k % 2)), 1800.0) for k in range(12)]
    groups, described = resolve_groups(_keys(files, 10.0), "auto", folds=4)
    assert described == "file (12 groups)"
    assert np.unique(groups).size == 12


def test_auto_grouping_uses_blocks_of_minutes_when_labels_cover_40_minutes():
    # One file of 40 minutes (the case that turned "by hour" folds into ungrouped ones):
    # 10-minute blocks give 4 groups, and each block's windows stay together.
    t0 = datetime(2031, 3, 2, 5, 0, tzinfo=UTC)
    keys = _keys([("one.wav", t0, 2400.0)])
    groups, described = resolve_groups(keys, "auto", folds=4)
    assert described == "10-minute block (4 groups)"
    minutes = (keys["t"] - keys["t"][0]) / 60.0
    for g in np.unique(groups):
        m = minutes[groups == g]
        assert m.max() - m.min() < 10.0


def test_grouping_that_cannot_group_says_so():
    t0 = datetime(2031, 3, 2, 5, 0, tzinfo=UTC)
    groups, described = resolve_groups(_keys([("one.wav", t0, 1200.0)]), "hour", folds=4)
    assert np.unique(groups).size == 1
    assert described.startswith("none:") and "ungrouped" in described


def test_tie_break_does_not_saturate_near_certainty():
    # A boosted model's raw probabilities crowd against 1 (log-odds 20 → 1 - 2e-9): the
    # tie-break must still order them, and survive storage as a float64 (IEEE 754 double).
    from callsieve.classifier.model import _TIE_BREAK, _rank_share

    log_odds = np.array([-30.0, -5.0, 0.0, 5.0, 15.0, 25.0, 33.0, 35.0])
    p = 1.0 / (1.0 + np.exp(-log_odds))
    share = _rank_share(p)
    assert np.all(np.diff(share) > 0)
    stored = (1.0 - _TIE_BREAK) * 1.0 + _TIE_BREAK * share  # an isotonic plateau at 1.0
    assert np.unique(stored).size == stored.size
    assert share.min() > 0.0 and share.max() < 1.0


def test_training_warns_under_the_documented_minimum():
    # Two labelled calls gave a model of AP 0.004 that was accepted silently; under the
    # documented minimum (MIN_CALLS_PER_CLASS, common practice) and with ungrouped folds,
    # training now says so.
    from types import SimpleNamespace

    from callsieve.classifier.training import MIN_CALLS_PER_CLASS, training_warnings

    def notes(label, n):
        return [SimpleNamespace(label=label) for _ in range(n)]

    sets = [SimpleNamespace(annotations=notes("up", 2) + notes("down", MIN_CALLS_PER_CLASS))]
    grouped = {"grouping": "file (12 groups)", "n_folds": 4}
    warned = training_warnings(sets, grouped, None)
    assert len(warned) == 1 and "only 2 labelled call(s) of 'up'" in warned[0]
    assert training_warnings(sets, grouped, "down") == []
    ungrouped = {"grouping": "none: only 1 group, folds are ungrouped", "n_folds": 4}
    assert any("not grouped" in w for w in training_warnings(sets, ungrouped, "down"))
