"""The call classifier (a scikit-learn estimator) and the model file that carries it.

The model file is a skops archive: loading it can only build objects of the types in
:data:`TRUSTED_TYPES`, so it cannot run code a file brings with it.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
from callsieve.features.descriptors import DESCRIPTOR_VERSION, DescriptorSettings
from sklearn.base import BaseEstimator, ClassifierMixin, clone
from sklearn.ensemble import HistGradientBoostingClassifier, RandomForestClassifier
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedGroupKFold, StratifiedKFold
from sklearn.utils.validation import check_is_fitted

from .errors import InputError

__all__ = ["CallClassifier", "CallModel", "save_model", "load_model", "TRUSTED_TYPES", "MODEL_FORMAT"]

MODEL_FORMAT = "callsieve-model/1"
#: Weight of the raw score beside the isotonic calibration: ranks without ties.
_TIE_BREAK = 1e-3


class CallClassifier(ClassifierMixin, BaseEstimator):
    """Gradient-boosted or random-forest classifier with calibrated probabilities.

    Fitting runs a grouped cross-validation once: its out-of-fold scores fit one
    calibrator per class (isotonic or sigmoid), and also give honest out-of-fold
    probabilities (each fold calibrated by the other folds' calibrators) for metrics.
    The final estimator is then fitted on all rows. ``folds + 1`` fits in all. With
    ``average_folds`` the fold estimators are kept, and a window's raw score is the
    mean of theirs and the final estimator's before calibration: models fitted on
    overlapping shares of the rows disagree where one of them learned a quirk of its
    rows, and their mean ranks more steadily than any one of them, at no extra fit. The
    calibrators (and ``oof_proba_``) come from single fold estimators' scores; the mean
    of five is a little less spread, which the calibration does not see.

    Parameters
    ----------
    kind : {'gradient-boosting', 'random-forest'}
    params : dict, parameters of the scikit-learn estimator of that kind
    calibration : {'isotonic', 'sigmoid'}
    class_weight : {'balanced', 'none'}
    folds : int, grouped folds for calibration and out-of-fold scores
    random_state : int
    columns : list of int, optional; the columns of X the estimator learns from (all
        when None), so a model can be handed whole descriptor rows and still leave some
        out (absolute levels)
    average_folds : bool, score with the mean raw score of the fold estimators and the
        final one (kept in ``fold_estimators_``), else with the final one alone

    Attributes
    ----------
    classes_ : np.ndarray, class labels
    estimator_ : the fitted scikit-learn estimator (all rows)
    calibrators_ : list, one fitted calibrator per class (one in total for two classes)
    fold_ : np.ndarray [shape=(n,)], the fold each training row was held out in
    fold_estimators_ : list, the estimators fitted on each fold's other rows (empty
        without ``average_folds``, and in models saved before it)
    oof_proba_ : np.ndarray [shape=(n, n_classes)], out-of-fold calibrated probabilities
    n_features_in_ : int
    """

    def __init__(
        self,
        kind: str = "gradient-boosting",
        params: dict | None = None,
        calibration: str = "isotonic",
        class_weight: str = "balanced",
        folds: int = 4,
        random_state: int = 0,
        columns: list[int] | None = None,
        average_folds: bool = False,
    ) -> None:
        self.kind = kind
        self.params = params
        self.calibration = calibration
        self.class_weight = class_weight
        self.folds = folds
        self.random_state = random_state
        self.columns = columns
        self.average_folds = average_folds

    def _base(self) -> BaseEstimator:
        params = dict(self.params or {})
        balanced = self.class_weight == "balanced"
        if self.kind == "gradient-boosting":
            return HistGradientBoostingClassifier(
                **params,
                class_weight="balanced" if balanced else None,
                early_stopping=False,
                random_state=self.random_state,
            )
        if self.kind == "random-forest":
            # All cores for fitting; prediction is set back to one (see fit).
            return RandomForestClassifier(
                **params,
                class_weight="balanced_subsample" if balanced else None,
                n_jobs=-1,
                random_state=self.random_state,
            )

        raise ValueError(f"unknown model kind {self.kind!r}")

    def _inputs(self, X: np.ndarray) -> np.ndarray:
        X = np.asarray(X, dtype=np.float32)
        return X if self.columns is None else np.ascontiguousarray(X[:, list(self.columns)])

    def _splits(self, X: np.ndarray, y: np.ndarray, groups: np.ndarray | None) -> list:
        if groups is not None and len(np.unique(groups)) >= 2:
            n = int(min(self.folds, len(np.unique(groups))))
            splitter = StratifiedGroupKFold(n_splits=n, shuffle=True, random_state=self.random_state)
            return list(splitter.split(X, y, groups))
        n = int(min(self.folds, np.min(np.unique(y, return_counts=True)[1])))
        return list(StratifiedKFold(n_splits=max(n, 2), shuffle=True, random_state=self.random_state).split(X, y))

    def _fit_calibrators(self, raw: np.ndarray, y: np.ndarray, weight: np.ndarray) -> list:
        columns = [1] if len(self.classes_) == 2 else range(len(self.classes_))
        out = []
        for j in columns:
            target = (y == self.classes_[j]).astype(float)
            if self.calibration == "isotonic":
                cal = IsotonicRegression(y_min=0.0, y_max=1.0, out_of_bounds="clip")
                cal.fit(raw[:, j], target, sample_weight=weight)
            else:  # Platt scaling on the log-odds of the score
                cal = LogisticRegression(C=1e6)
                cal.fit(_logit(raw[:, j])[:, None], target.astype(int), sample_weight=weight)
            out.append(cal)
        return out

    def _calibrate(self, raw: np.ndarray, calibrators: list) -> np.ndarray:
        def one(cal, column):
            if isinstance(cal, IsotonicRegression):
                # An isotonic fit is a staircase: dozens of windows would share its top
                # step and lose their order. A small share of a non-saturating function
                # of the raw score (arctangent of its log-odds: a raw score of 1 - 1e-9
                # still ranks above 1 - 1e-8) makes the map strictly increasing; it moves
                # no probability by more than _TIE_BREAK.
                return (1.0 - _TIE_BREAK) * cal.predict(column) + _TIE_BREAK * _rank_share(column)
            return cal.predict_proba(_logit(column)[:, None])[:, 1]

        if len(self.classes_) == 2:
            p = np.clip(one(calibrators[0], raw[:, 1]), 0.0, 1.0)
            return np.column_stack([1.0 - p, p])
        proba = np.column_stack([one(c, raw[:, j]) for j, c in enumerate(calibrators)])
        total = proba.sum(axis=1, keepdims=True)
        # Rows every calibrator put at zero fall back to the uncalibrated scores.
        return np.where(total > 0, proba / np.where(total > 0, total, 1.0), raw)

    def fit(
        self,
        X: np.ndarray,
        y: np.ndarray,
        sample_weight: np.ndarray | None = None,
        groups: np.ndarray | None = None,
    ) -> CallClassifier:
        """Fit the estimator and its probability calibration.

        Parameters
        ----------
        X : np.ndarray [shape=(n, n_descriptors)], descriptors in physical units
        y : np.ndarray [shape=(n,)], class labels
        sample_weight : np.ndarray [shape=(n,)], optional; weights of the calibration fit.
            Inverse sampling probabilities make the calibrated probabilities those of
            the population of windows. The estimator itself ranks, balancing classes by
            ``class_weight`` (weighted boosting costs several times as much and ranks
            no better).
        groups : np.ndarray [shape=(n,)], optional; no group is split across folds
        """
        X = self._inputs(X)
        y = np.asarray(y)
        weight = np.ones(y.size) if sample_weight is None else np.asarray(sample_weight, dtype=float)
        self.classes_ = np.unique(y)
        if self.classes_.size < 2:
            raise ValueError("need at least two classes")
        splits = self._splits(X, y, groups)
        raw = np.zeros((y.size, self.classes_.size))
        self.fold_ = np.zeros(y.size, dtype=int)
        self.fold_estimators_ = []
        for k, (train, test) in enumerate(splits):
            model = clone(self._base()).fit(X[train], y[train])
            raw[test] = _aligned_proba(model, X[test], self.classes_)
            self.fold_[test] = k
            if self.average_folds:
                self.fold_estimators_.append(model)
        self.calibrators_ = self._fit_calibrators(raw, y, weight)
        # Out-of-fold probabilities: each fold calibrated without its own rows.
        self.oof_proba_ = np.zeros_like(raw)
        for k, (_, test) in enumerate(splits):
            others = self.fold_ != k
            cal = self._fit_calibrators(raw[others], y[others], weight[others])
            self.oof_proba_[test] = self._calibrate(raw[test], cal)
        self.estimator_ = clone(self._base()).fit(X, y)
        for model in (self.estimator_, *self.fold_estimators_):
            if "n_jobs" in model.get_params():
                # Scoring runs in parallel over files; a forest's own threads would oversubscribe.
                model.set_params(n_jobs=1)
        self.n_features_in_ = X.shape[1]
        return self

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """Calibrated class probabilities [shape=(n, n_classes)], columns as ``classes_``.

        The mean raw score of the fold estimators and the final one where they were kept
        (``average_folds``), else the final estimator's; then the calibrators. Each class
        is averaged over the estimators whose fold held it.
        """
        X = self._inputs(X)
        return self._calibrate(self._mean_raw(X, self._final_raw(X)), self.calibrators_)

    def predict_proba_screened(self, X: np.ndarray, columns: list[int], at_least: float) -> np.ndarray:
        """:meth:`predict_proba` where the final estimator gives one of ``columns`` at
        least ``at_least`` (a probability), :meth:`predict_proba_final` elsewhere.

        The fold estimators cost as much as the final one each; scoring asks them only
        about windows near a call. An approximation: their mean can lift a window the
        final estimator put lower (see ``scoring._predict``).
        """
        X = self._inputs(X)
        raw = self._final_raw(X)
        proba = self._calibrate(raw, self.calibrators_)
        near = proba[:, columns].max(axis=1) >= at_least
        if self._averaged() and np.any(near):
            proba[near] = self._calibrate(self._mean_raw(X[near], raw[near]), self.calibrators_)
        return proba

    def _averaged(self) -> bool:
        return bool(getattr(self, "average_folds", False) and getattr(self, "fold_estimators_", None))

    def _mean_raw(self, X: np.ndarray, final_raw: np.ndarray) -> np.ndarray:
        """Mean raw score of the final estimator (given) and, with ``average_folds``, the
        fold estimators; a class is averaged over the estimators that saw it."""
        if not self._averaged():
            return final_raw
        total, count = final_raw.copy(), np.ones(self.classes_.size)
        for model in self.fold_estimators_:
            total += _aligned_proba(model, X, self.classes_)
            count[np.searchsorted(self.classes_, model.classes_)] += 1
        return total / count

    def predict_proba_final(self, X: np.ndarray) -> np.ndarray:
        """Calibrated probabilities from the final estimator alone, a cheaper first look.

        Equal to :meth:`predict_proba` without fold estimators.
        """
        return self._calibrate(self._final_raw(self._inputs(X)), self.calibrators_)

    def _final_raw(self, X: np.ndarray) -> np.ndarray:
        check_is_fitted(self, "estimator_")
        return _aligned_proba(self.estimator_, X, self.classes_)

    def predict(self, X: np.ndarray) -> np.ndarray:
        """The most probable class of each row."""
        return self.classes_[np.argmax(self.predict_proba(X), axis=1)]


def _rank_share(p: np.ndarray) -> np.ndarray:
    """A strictly increasing map of probabilities onto (0, 1) that does not saturate near 0 or 1."""
    p = np.clip(np.asarray(p, dtype=np.float64), 1e-300, 1.0)
    log_odds = np.log(p) - np.log1p(-np.minimum(p, 1.0 - 2**-53))
    return 0.5 + np.arctan(log_odds / 8.0) / np.pi


def _logit(p: np.ndarray) -> np.ndarray:
    p = np.clip(p, 1e-6, 1 - 1e-6)
    return np.log(p / (1 - p))


def _aligned_proba(model: BaseEstimator, X: np.ndarray, classes: np.ndarray) -> np.ndarray:
    """predict_proba with columns for every class, zero for classes a fold never saw."""
    out = np.zeros((X.shape[0], classes.size))
    proba = model.predict_proba(X)
    for j, c in enumerate(model.classes_):
        out[:, int(np.searchsorted(classes, c))] = proba[:, j]
    return out


# Every type a model file may hold. Anything else in a file refuses the load.
TRUSTED_TYPES = sorted(
    {
        "callsieve.classifier.model.CallClassifier",
        "sklearn.calibration.CalibratedClassifierCV",
        "sklearn.calibration._CalibratedClassifier",
        "sklearn.calibration._SigmoidCalibration",
        "sklearn.isotonic.IsotonicRegression",
        "sklearn.ensemble._hist_gradient_boosting.gradient_boosting.HistGradientBoostingClassifier",
        "sklearn.ensemble._hist_gradient_boosting.binning._BinMapper",
        "sklearn.ensemble._hist_gradient_boosting.predictor.TreePredictor",
        "sklearn._loss.loss.HalfBinomialLoss",
        "sklearn._loss.loss.HalfMultinomialLoss",
        "sklearn._loss.link.LogitLink",
        "sklearn._loss.link.MultinomialLogit",
        "sklearn._loss.link.Interval",
        "sklearn._loss._loss.CyHalfBinomialLoss",
        "sklearn._loss._loss.CyHalfMultinomialLoss",
        "sklearn.ensemble._forest.RandomForestClassifier",
        "sklearn.tree._classes.DecisionTreeClassifier",
        "sklearn.tree._tree.Tree",
        "sklearn.model_selection._split.GroupKFold",
        "sklearn.model_selection._split.StratifiedKFold",
        "sklearn.utils._bunch.Bunch",
        "builtins.slice",
        "numpy.ndarray",
        "numpy.dtype",
        "numpy.float64",
        "numpy.float32",
        "numpy.int64",
        "numpy.int32",
        "numpy.random.mtrand.RandomState",
        "numpy.random._mt19937.MT19937",
        "collections.OrderedDict",
    }
)


class CallModel:
    """A fitted classifier with what scoring needs to use it correctly.

    Attributes
    ----------
    estimator : CallClassifier
    settings : DescriptorSettings
    descriptor_names : list of str, column order of the descriptors
    classes : list of str
    target : str or None, the class the model was trained to find (None: all classes)
    summary : dict, training-set summary and cross-validated metrics
    cascade : Cascade or None, the first stage that rejects background windows before
        the full descriptors and the estimator (None: every window is described)
    short_call_s : dict of str to float, s, per class, the duration below which a
        detection's confidence is scaled down by its duration (see ``pick_detections``;
        empty in models made before it: no scaling)
    content_sha256 : str, hash of the estimator and everything above
    """

    def __init__(
        self,
        estimator: CallClassifier,
        settings: DescriptorSettings,
        descriptor_names: list[str],
        target: str | None,
        summary: dict[str, Any],
        cascade: Any = None,
        short_call_s: dict[str, float] | None = None,
    ) -> None:
        self.estimator = estimator
        self.cascade = cascade
        self.short_call_s = {str(k): float(v) for k, v in (short_call_s or {}).items()}
        self.settings = settings
        self.descriptor_names = list(descriptor_names)
        self.classes = [str(c) for c in estimator.classes_]
        self.target = target
        self.summary = summary
        self.content_sha256 = ""

    def metadata(self) -> dict[str, Any]:
        """Everything but the estimator, as plain JSON values."""
        return (
            {
                "format": MODEL_FORMAT,
                "descriptor_version": DESCRIPTOR_VERSION,
                "settings": self.settings.to_dict(),
                "descriptor_names": self.descriptor_names,
                "classes": self.classes,
                "target": self.target,
                "summary": self.summary,
            }
            | ({"cascade": self.cascade.summary()} if self.cascade is not None else {})
            | (
                # Left out when empty, so that a model without it keeps its content hash.
                {"short_call_s": self.short_call_s} if self.short_call_s else {}
            )
        )

    def check_fits(self, sample_rate_hz: float, where: str) -> None:
        """Refuse data this model cannot describe (band above Nyquist)."""
        if self.settings.high_hz > sample_rate_hz / 2.0:
            raise InputError(
                f"{where}: the model's band reaches {self.settings.high_hz:g} Hz but the recordings at "
                f"{sample_rate_hz:g} Hz stop at {sample_rate_hz / 2:g} Hz (Nyquist); "
                "use a model trained for this band"
            )


def _digest(estimator_bytes: bytes, metadata: dict, cascade_bytes: bytes = b"") -> str:
    h = hashlib.sha256(estimator_bytes)
    h.update(cascade_bytes)  # empty for a model without a cascade: older hashes hold
    h.update(json.dumps(metadata, sort_keys=True, default=str).encode())
    return h.hexdigest()


def save_model(model: CallModel, path: str | Path) -> str:
    """Write the model file; return its content hash (sha256 hex)."""
    import skops.io as sio  # here, not at import: it costs a second, and workers do not need it

    est_bytes = sio.dumps(model.estimator)
    cascade_bytes = sio.dumps(model.cascade.estimator) if model.cascade is not None else b""
    meta = model.metadata()
    model.content_sha256 = _digest(est_bytes, meta, cascade_bytes)
    payload = {
        "estimator": est_bytes,
        "metadata": json.dumps(meta, default=str),
        "content_sha256": model.content_sha256,
    }
    if cascade_bytes:
        payload["cascade"] = cascade_bytes
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(path.suffix + ".partial")
    sio.dump(payload, tmp)
    tmp.replace(path)
    return model.content_sha256


def load_model(path: str | Path) -> CallModel:
    """Read a model file, refusing any type outside :data:`TRUSTED_TYPES`.

    Raises
    ------
    InputError
        For a file that is not a callsieve model, holds untrusted types, was altered,
        or was made for another descriptor version.
    """
    import skops.io as sio

    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such model file; make one with 'callsieve train'")
    try:
        raw = path.read_bytes()
        outer_untrusted = sio.get_untrusted_types(data=raw)
        if outer_untrusted:
            raise InputError(f"{path}: not a callsieve model file (it holds {', '.join(outer_untrusted[:3])})")
        payload = sio.loads(raw, trusted=[])
        est_bytes = payload["estimator"]
        cascade_bytes = payload.get("cascade", b"")
        for part in (est_bytes, cascade_bytes) if cascade_bytes else (est_bytes,):
            untrusted = [t for t in sio.get_untrusted_types(data=part) if t not in TRUSTED_TYPES]
            if untrusted:
                raise InputError(
                    f"{path}: refused: the model holds types callsieve does not trust ({', '.join(untrusted[:5])})"
                )
        estimator = sio.loads(est_bytes, trusted=TRUSTED_TYPES)
        if isinstance(estimator, CallClassifier) and not hasattr(estimator, "average_folds"):
            estimator.average_folds = False  # saved before the parameter existed: the final estimator alone
        cascade_estimator = sio.loads(cascade_bytes, trusted=TRUSTED_TYPES) if cascade_bytes else None
        meta = json.loads(payload["metadata"])
    except InputError:
        raise
    except Exception as exc:  # skops raises many kinds for a damaged archive
        raise InputError(f"{path}: not a readable callsieve model file ({type(exc).__name__}: {exc})") from None
    if meta.get("format") != MODEL_FORMAT:
        raise InputError(f"{path}: model format {meta.get('format')!r}, this callsieve reads {MODEL_FORMAT}")
    if _digest(est_bytes, meta, cascade_bytes) != payload.get("content_sha256"):
        raise InputError(f"{path}: content hash does not match; the file was altered or damaged")
    if meta["descriptor_version"] != DESCRIPTOR_VERSION:
        raise InputError(
            f"{path}: made with descriptor version {meta['descriptor_version']}, this callsieve "
            f"computes version {DESCRIPTOR_VERSION}; retrain the model"
        )
    settings_dict = {k: v for k, v in meta["settings"].items() if k != "version"}
    model = CallModel(
        estimator,
        DescriptorSettings(**settings_dict),
        meta["descriptor_names"],
        meta["target"],
        meta["summary"],
        _cascade(cascade_estimator, meta.get("cascade")),
        meta.get("short_call_s"),
    )
    model.content_sha256 = payload["content_sha256"]
    return model


def _cascade(estimator: Any, described: dict | None) -> Any:
    """The model file's cascade from its estimator and its recorded operating point."""
    if estimator is None or described is None:
        return None
    from .cascade import Cascade

    return Cascade(
        estimator,
        list(described["descriptors"]),
        float(described["threshold"]),
        {str(k): float(v) for k, v in described["recall"].items()},
        float(described["background_rejected"]),
    )
