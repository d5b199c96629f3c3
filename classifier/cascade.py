"""The cascade's first stage: a small model on cheap descriptors that rejects background.

Scoring computes the screen's descriptors (:mod:`callsieve.features.screening`: in-band
SNR and each sub-band's mean and strongest-frame excess over the noise floor) for every
window; only the windows the screen keeps get the full descriptors, the main model and
the detection levels. The screen is trained with the main model, on the same examples
and the same grouped folds, and its operating point is fixed there: the highest score
threshold that keeps at least ``recall`` of every call class's training windows, out of
fold. A model file without a screen scores every window, as before.

Where the training labels hold calls that stand no higher above the noise floor than
background does (faint calls an analyst heard or saw in context), no screen can keep
them and still reject much: the threshold then sits near zero. Computing the screen's
descriptors costs a little for every window, so a screen that rejects less than
:data:`MIN_REJECTED` of the background is recorded but not used at scoring.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from callsieve.features.descriptors import DescriptorSettings
from callsieve.features.screening import screen_names
from sklearn.base import clone
from sklearn.ensemble import HistGradientBoostingClassifier

__all__ = ["Cascade", "fit_cascade", "CASCADE_RECALL", "MIN_REJECTED"]

#: Share of every call class's training windows the screen must keep, out of fold.
CASCADE_RECALL = 0.995
#: Share of background a screen must reject, out of fold, to be used at scoring. The
#: screen's descriptors for every window cost about a quarter of the full descriptors
#: (0.05 s against 0.19 s per hour of 2 kHz audio on the demo's settings; the model adds
#: 0.19 s), so below about 15 % rejected it costs more than it saves; 20 % leaves a margin.
MIN_REJECTED = 0.2


@dataclass
class Cascade:
    """A fitted screen and its operating point.

    Attributes
    ----------
    estimator : HistGradientBoostingClassifier, call (1) against background (0)
    names : list of str, the descriptors it reads, in column order
    threshold : float, windows scoring below it are background
    recall : dict, per call class: share of its training windows kept, out of fold
    rejected_share : float, share of background windows rejected, out of fold, weighted
        by the inverse of each example's chance of being kept (so of all background
        windows of the annotated files)
    """

    estimator: HistGradientBoostingClassifier
    names: list[str]
    threshold: float
    recall: dict[str, float]
    rejected_share: float

    @property
    def pays(self) -> bool:
        """Whether scoring uses it: it rejects at least MIN_REJECTED of background."""
        return self.rejected_share >= MIN_REJECTED

    def keep(self, values: np.ndarray) -> np.ndarray:
        """Which windows pass [shape=(n,)], bool, from screen rows [shape=(n, len(names))]."""
        values = np.asarray(values, dtype=np.float32)
        if values.shape[0] == 0:
            return np.zeros(0, dtype=bool)
        return self.estimator.predict_proba(values)[:, 1] >= self.threshold

    def summary(self) -> dict[str, Any]:
        """Plain values for the model file, the experiment record and reports."""
        return {
            "descriptors": self.names,
            "threshold": self.threshold,
            "target_recall": CASCADE_RECALL,
            "recall": self.recall,
            "min_recall": min(self.recall.values()) if self.recall else float("nan"),
            "background_rejected": self.rejected_share,
            "used_at_scoring": self.pays,
        }


def _screen() -> HistGradientBoostingClassifier:
    # A few shallow trees: its cost per window must stay far below the main model's.
    return HistGradientBoostingClassifier(
        max_iter=20, max_depth=3, learning_rate=0.2, class_weight="balanced", early_stopping=False, random_state=0
    )


def fit_cascade(
    X: np.ndarray,
    y: np.ndarray,
    weight: np.ndarray,
    fold: np.ndarray,
    names: list[str],
    settings: DescriptorSettings,
    background: str,
    recall: float = CASCADE_RECALL,
) -> Cascade | None:
    """Fit the screen on the training examples and fix its threshold out of fold.

    Parameters
    ----------
    X : np.ndarray [shape=(n, n_descriptors)], descriptor rows as ``names``
    y : np.ndarray [shape=(n,)], class labels; ``background`` is the negative class
    weight : np.ndarray [shape=(n,)], inverse inclusion probabilities of the examples
    fold : np.ndarray [shape=(n,)], the fold each example was held out in (the main
        model's grouped folds)
    names : list of str, the descriptor names of X's columns
    settings : DescriptorSettings
    background : str
    recall : float, share of each call class's windows to keep, out of fold

    Returns
    -------
    Cascade, or None where there is nothing to screen (no background or no call, or
    fewer than two folds)
    """
    y = np.asarray(y).astype(str)
    call = y != background
    folds = np.unique(fold)
    if call.all() or not call.any() or folds.size < 2:
        return None
    cols = screen_names(settings)
    Z = np.asarray(X, dtype=np.float32)[:, [names.index(c) for c in cols]]
    oof = np.zeros(y.size)
    for k in folds:
        test = fold == k
        if np.unique(call[~test]).size < 2:
            return None
        oof[test] = clone(_screen()).fit(Z[~test], call[~test]).predict_proba(Z[test])[:, 1]
    classes = sorted(set(y[call]))
    # The highest threshold under which at most (1 - recall) of each class's windows
    # fall: each class's (1 - recall) quantile, taken on the lower side, then the least.
    threshold = float(min(np.quantile(oof[y == c], 1.0 - recall, method="lower") for c in classes))
    kept = oof >= threshold
    per_class = {str(c): float(kept[y == c].mean()) for c in classes}
    bg = ~call
    w = np.asarray(weight, dtype=float)
    rejected = float(w[bg & ~kept].sum() / w[bg].sum())
    final = clone(_screen()).fit(Z, call)
    return Cascade(final, cols, threshold, per_class, rejected)
