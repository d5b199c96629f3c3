"""Training: examples from labelled sets, grouped cross-validation, the final model.

The same descriptor path as scoring (:func:`callsieve.features.pipeline.describe_file`)
describes every window of every annotated file; windows that hold a labelled call become
examples of it, the rest of each file is background, of which a share is kept: the
loudest in-band windows (the hard ones) and a random draw, each weighted by the inverse
of its chance of being kept, so that calibrated probabilities refer to all windows.
"""

from __future__ import annotations

import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
from callsieve.features.descriptors import (
    DescriptorSettings,
    descriptor_names,
    is_absolute_level,
    sweep_path_rate_step_hz_per_s,
)
from callsieve.features.pipeline import describe_file
from callsieve.features.streaming import AudioReadError
from sklearn.metrics import average_precision_score, confusion_matrix

from .cascade import fit_cascade
from .config import TrainingConfig
from .deployment import Deployment
from .errors import InputError
from .labels import BACKGROUND, Annotation
from .model import CallClassifier, CallModel
from .outputs import check_output
from .threads import THREADS_ENV, fit_threads, limited_threads, thread_setting

__all__ = [
    "LabelledSet",
    "ExampleSet",
    "choose_settings",
    "collect_examples",
    "cross_validate",
    "train_model",
]

# Resolutions the automatic choice picks from, Hz (frame lengths of round numbers of ms).
_NICE_RESOLUTIONS = np.array(
    [
        0.25,
        0.5,
        1,
        2,
        2.5,
        4,
        5,
        8,
        10,
        12.5,
        16,
        20,
        25,
        32,
        40,
        50,
        64,
        80,
        100,
        125,
        160,
        200,
        250,
        320,
        400,
        500,
        1000,
        2000,
    ]
)
# Labelled time within this distance of a window makes it unusable as background, s.
_BACKGROUND_MARGIN_S = 0.25


@dataclass(frozen=True)
class LabelledSet:
    """A deployment and its annotations; ``name`` is the label table it came from."""

    deployment: Deployment
    annotations: list[Annotation]
    name: str


@dataclass
class ExampleSet:
    """Training examples: descriptors, classes, weights, groups, and where each came from."""

    X: np.ndarray
    y: np.ndarray
    weight: np.ndarray
    groups: np.ndarray
    source: np.ndarray  # label table of each example
    names: list[str]
    counts: dict[str, dict[str, int]] = field(default_factory=dict)  # per set, per class
    windows_described: int = 0
    hours_described: float = 0.0
    grouping: str = ""  # what the cross-validation groups really are
    # Examples from files with only partial (verified) rows: stretches a model chose.
    partial: np.ndarray | None = None
    # Slow decoys (background made from target examples, see slow_decoys): not windows of
    # the recordings, so left out of the calibration, the metrics and the counts.
    decoy: np.ndarray | None = None

    def is_decoy(self) -> np.ndarray:
        """Which examples are slow decoys (all False where none were made)."""
        return np.zeros(self.y.size, dtype=bool) if self.decoy is None else self.decoy


def _nice_resolution(target_hz: float) -> float:
    return float(_NICE_RESOLUTIONS[np.argmin(np.abs(np.log(_NICE_RESOLUTIONS / target_hz)))])


def choose_settings(
    annotations: list[Annotation], sample_rate_hz: float, overrides: dict[str, Any] | None = None
) -> DescriptorSettings:
    """Band, resolution, window and hop from the labelled calls.

    Band: the 5th to 95th percentile of the labels' edges, widened by 20 % below and 15 %
    above (the whole band below Nyquist where labels give none). Frames last about a
    sixth of the median call; windows hold the 90th-percentile call with room to spare
    and start every quarter window. ``overrides`` (from a config) win over every choice.
    """
    overrides = dict(overrides or {})
    nyquist = sample_rate_hz / 2.0
    lows = np.array([a.low_hz for a in annotations if a.low_hz is not None])
    highs = np.array([a.high_hz for a in annotations if a.high_hz is not None])
    low = float(np.percentile(lows, 5)) * 0.8 if lows.size else 10.0
    high = float(np.percentile(highs, 95)) * 1.15 if highs.size else 0.45 * sample_rate_hz
    low = overrides.get("low_hz", max(low, 1.0))
    high = overrides.get("high_hz", min(high, 0.95 * nyquist))
    durations = np.array([a.duration_s for a in annotations])
    frame_s = float(np.clip(np.median(durations) / 6.0, 0.005, 1.0))
    resolution = _nice_resolution(1.0 / frame_s)
    resolution = overrides.get("resolution_hz", min(resolution, _nice_resolution((high - low) / 24.0)))
    frame_hop = overrides.get("frame_hop_s", 1.0 / resolution / 4.0)
    window = float(np.clip(1.2 * np.percentile(durations, 90) + 1.0 / resolution, 4.0 / resolution, 60.0))
    window = overrides.get("window_s", round(window / frame_hop) * frame_hop)
    window_hop = overrides.get("window_hop_s", max(round(window / 4.0 / frame_hop), 1) * frame_hop)
    noise_span = overrides.get("noise_span_s", max(60.0, 10.0 * window))
    noise_step = overrides.get("noise_step_s", max(round(5.0 / frame_hop), 1) * frame_hop)
    chosen = {
        "low_hz": low,
        "high_hz": high,
        "resolution_hz": resolution,
        "frame_hop_s": frame_hop,
        "window_s": window,
        "window_hop_s": window_hop,
        "noise_span_s": noise_span,
        "noise_step_s": noise_step,
    }
    return DescriptorSettings(**({k: float(v) for k, v in chosen.items()} | overrides))


#: Windows of a call whose label is not the target's, in a model of one target.
LABELLED_OTHER = "\x00other"


def _assign(
    start: np.ndarray, end: np.ndarray, notes: list[Annotation], min_overlap: float, classes: set[str] | None
) -> tuple[np.ndarray, np.ndarray]:
    """Class of each window (None-like '' where ambiguous) and whether it is clear of labels."""
    n = start.size
    label = np.full(n, "", dtype=object)
    if not notes:
        return np.full(n, BACKGROUND, dtype=object), np.ones(n, dtype=bool)
    ls = np.array([a.start_s for a in notes])
    le = np.array([a.end_s for a in notes])
    overlap = np.minimum(end[:, None], le[None, :]) - np.maximum(start[:, None], ls[None, :])
    need = min_overlap * np.minimum(le - ls, end[0] - start[0])[None, :]
    share = np.where(overlap >= need, overlap, -np.inf)
    best = np.argmax(share, axis=1)
    has = np.isfinite(share[np.arange(n), best])
    names = np.array([a.label for a in notes], dtype=object)
    label[has] = names[best[has]]
    near = (
        np.minimum(end[:, None], le[None, :] + _BACKGROUND_MARGIN_S)
        - np.maximum(start[:, None], ls[None, :] - _BACKGROUND_MARGIN_S)
    ) > 0
    clear = ~near.any(axis=1)
    label[clear] = BACKGROUND
    if classes is not None:  # a binary model: other labels are background examples too
        other = (label != "") & (label != BACKGROUND) & ~np.isin(label, list(classes))
        label[other] = LABELLED_OTHER
    return label, clear


def collect_examples(
    sets: list[LabelledSet],
    settings: DescriptorSettings,
    config: TrainingConfig,
    target: str | None = None,
    progress: Callable[[str], None] | None = None,
) -> ExampleSet:
    """Describe the annotated files of every set and turn windows into examples.

    Parameters
    ----------
    sets : list of LabelledSet
    settings : DescriptorSettings
    config : TrainingConfig, background ratio, hard fraction and minimum overlap
    target : str, optional; a binary model of this label against everything else
    progress : callable, optional, receives one line per file

    Returns
    -------
    ExampleSet
    """
    names = descriptor_names(settings)
    rng = np.random.default_rng(config.seed)
    snr_col = names.index("snr_db")
    parts_X, parts_y, parts_w, parts_g, parts_s, parts_p, parts_d = [], [], [], [], [], [], []
    counts: dict[str, dict[str, int]] = {}
    n_described, seconds = 0, 0.0
    keep_classes = {target} if target else None
    ratio = config.target_background_ratio if target else config.background_ratio
    # The distinct annotated files, for the progress lines.
    annotated = {(s.deployment.name, a.file): s.deployment for s in sets for a in s.annotations}
    durations = {f.name: f.duration_s for s in sets for f in s.deployment.files}
    total_files, total_s = len(annotated), sum(durations[name] for _, name in annotated)
    done_files, t_start = 0, time.perf_counter()
    for lset in sets:
        dep = lset.deployment
        by_file: dict[str, list[Annotation]] = {}
        for a in lset.annotations:
            by_file.setdefault(a.file, []).append(a)
        files = {f.name: f for f in dep.files}
        pos_X, pos_y, pos_g, pos_p = [], [], [], []
        bg_X, bg_g = [], []
        for name in sorted(by_file):
            rec = files[name]
            try:
                tables = list(describe_file(rec.path, dep.chain, settings, dep.channel))
            except AudioReadError as exc:
                raise InputError(f"{lset.name}: {exc}; remove its rows or fix the file") from None
            if not tables:
                continue
            values = np.concatenate([t.values for t in tables])
            start = np.concatenate([t.start_s for t in tables])
            end = np.concatenate([t.end_s for t in tables])
            n_described += values.shape[0]
            seconds += rec.duration_s
            notes = by_file[name]
            label, clear = _assign(start, end, notes, config.min_overlap, keep_classes)
            group = _group_keys(dep, rec, start)
            verified_no = np.zeros(label.size, dtype=bool)
            partial = all(a.partial for a in notes)
            if partial:
                # Only the verified stretches of this file are known: windows clear of them
                # are not background, and a stretch verified as no call is a hard negative.
                verified_no = (label == BACKGROUND) & ~clear
                label[clear] = ""
            pos = (label != "") & (label != BACKGROUND) & (label != LABELLED_OTHER)
            # Calls of other labels, in a model of one target, and stretches verified as no
            # call: background examples that are always kept (hard negatives an analyst
            # named), never left to the draw below.
            other = (label == LABELLED_OTHER) | verified_no
            label[verified_no] = ""
            pos_X += [values[pos], values[other]]
            pos_y += [label[pos], np.full(int(other.sum()), BACKGROUND, dtype=object)]
            pos_g += [group[pos], group[other]]
            pos_p.append(np.full(int(pos.sum() + other.sum()), partial))
            bg = label == BACKGROUND
            bg_X.append(values[bg])
            bg_g.append(group[bg])
            if progress:
                done_files += 1
                elapsed = max(time.perf_counter() - t_start, 1e-9)
                rate = seconds / 3600.0 / elapsed
                left = (total_s - seconds) / 3600.0 / rate if rate > 0 else float("nan")
                progress(
                    f"{done_files}/{total_files} files, {seconds / 3600:.2f}/{total_s / 3600:.2f} h, "
                    f"{rate:.2f} h/s, about {left:.0f} s left; {dep.name}/{name}: {int(pos.sum())} labelled "
                    f"windows, {int(bg.sum())} background"
                )
        X_pos = np.concatenate(pos_X) if pos_X else np.empty((0, len(names)), np.float32)
        y_pos = np.concatenate(pos_y) if pos_y else np.empty(0, object)
        g_pos = np.concatenate(pos_g) if pos_g else np.empty(0, _KEY_DTYPE)
        X_bg = np.concatenate(bg_X) if bg_X else np.empty((0, len(names)), np.float32)
        g_bg = np.concatenate(bg_g) if bg_g else np.empty(0, _KEY_DTYPE)
        idx, weight = _sample_background(
            X_bg[:, snr_col],
            max(int(ratio * max(int(np.sum(y_pos != BACKGROUND)), 1)), 1),
            config.hard_fraction,
            rng,
        )
        decoy_of, X_decoy = (
            slow_decoys(X_pos, y_pos, names, target, config, sweep_path_rate_step_hz_per_s(settings))
            if target
            else (np.zeros(0, int), X_pos[:0])
        )
        n_decoy = X_decoy.shape[0]
        parts_X += [X_pos, X_bg[idx], X_decoy]
        parts_y += [y_pos, np.full(idx.size + n_decoy, BACKGROUND, dtype=object)]
        # Decoys are not windows of the recordings: they teach the trees to rank and have
        # no weight in the calibration, which stays that of the windows recorded.
        parts_w += [np.ones(len(y_pos)), weight, np.zeros(n_decoy)]
        parts_g += [g_pos, g_bg[idx], g_pos[decoy_of]]  # a decoy stays in its call's fold
        parts_s += [np.full(len(y_pos) + idx.size + n_decoy, lset.name, dtype=object)]
        # Background is drawn only from complete files (partial files give none); a decoy
        # is partial where the call it was made from is.
        p_pos = np.concatenate(pos_p) if pos_p else np.zeros(0, bool)
        parts_p += [p_pos, np.zeros(idx.size, bool), p_pos[decoy_of]]
        parts_d += [np.zeros(len(y_pos) + idx.size, bool), np.ones(n_decoy, bool)]
        counts[lset.name] = dict(Counter(y_pos.tolist())) | {BACKGROUND: int(idx.size + np.sum(y_pos == BACKGROUND))}
        if n_decoy:
            counts[lset.name][DECOY_COUNT] = n_decoy
    X = np.concatenate(parts_X).astype(np.float32)
    y = np.concatenate(parts_y).astype(str)
    if np.unique(y).size < 2:
        raise InputError(
            "the labelled sets give only one class of windows; label calls in the tables "
            "(or check --target, and that the calls fall inside annotated files)"
        )
    groups, grouping = resolve_groups(np.concatenate(parts_g), config.group_by, config.folds)
    return ExampleSet(
        X,
        y,
        np.concatenate(parts_w),
        groups,
        np.concatenate(parts_s).astype(str),
        names,
        counts,
        n_described,
        seconds / 3600.0,
        grouping,
        np.concatenate(parts_p).astype(bool),
        np.concatenate(parts_d).astype(bool),
    )


#: Key of ``ExampleSet.counts`` for the slow decoys of a set (background examples made
#: from its target examples, see :func:`slow_decoys`), apart from the labels' counts.
DECOY_COUNT = "(slow decoys)"
SWEEP_RATES = ("trace_sweep_rate_hz_per_s", "sweep_path_rate_hz_per_s", "sweep_path_long_rate_hz_per_s")


def slow_decoys(
    X: np.ndarray, y: np.ndarray, names: list[str], target: str, config: TrainingConfig, rate_step_hz_per_s: float
) -> tuple[np.ndarray, np.ndarray]:
    """Background examples made from target examples: the same windows sweeping slower.

    A model of one target learns from the target and whatever else the training site
    holds. Where the site holds no other animal sweeping the same band at another rate,
    nothing teaches the trees that the rate matters, and at another site such a call,
    longer and so filling more of its window than the target, can outrank the target
    itself. Each well-measured target example (best sweep path at least
    ``slow_decoy_min_excess_db`` above the floor) is copied with its sweep rates
    multiplied by ``slow_decoy_factor``, every other descriptor unchanged. Only where that
    moves the fastest of these rates by at least one step of the short paths' rates: a decoy
    the descriptors could not tell from its call (a flat tone, a slow drift) would teach
    the trees that the call itself is background.

    Parameters
    ----------
    X : np.ndarray [shape=(n, n_descriptors)], descriptors in physical units
    y : np.ndarray [shape=(n,)], class of each row
    names : list of str, descriptor names of the columns of ``X``
    target : str, the label of the model's target
    config : TrainingConfig, ``slow_decoy_factor`` (dimensionless) and
        ``slow_decoy_min_excess_db`` (dB)
    rate_step_hz_per_s : float, Hz/s, the step between the sweep paths' rates
        (:func:`~callsieve.features.descriptors.sweep_path_rate_step_hz_per_s`)

    Returns
    -------
    rows : np.ndarray [shape=(n_decoys,)], int, the row of ``X`` each decoy was made from
    decoys : np.ndarray [shape=(n_decoys, n_descriptors)], float32; rates in Hz/s
    """
    if config.slow_decoy_factor <= 0 or "sweep_path_excess_db" not in names:
        return np.zeros(0, dtype=int), np.empty((0, X.shape[1]), dtype=np.float32)
    path = X[:, names.index("sweep_path_excess_db")]
    rates = np.abs(X[:, [names.index(n) for n in SWEEP_RATES if n in names]])
    moved = np.max(rates, axis=1) * (1.0 - config.slow_decoy_factor)
    rows = np.flatnonzero(
        (y == target) & (path >= config.slow_decoy_min_excess_db) & (moved >= rate_step_hz_per_s * (1.0 - 1e-9))
    )
    decoys = np.array(X[rows], dtype=np.float32)
    for n in SWEEP_RATES:
        if n in names:
            decoys[:, names.index(n)] *= config.slow_decoy_factor
    return rows, decoys


#: Blocks of recording time used as groups when hours and files are too few, s.
BLOCK_S = 600.0
_KEY_DTYPE = [("deployment", object), ("file", object), ("t", float)]


def _group_keys(dep: Deployment, rec, start_s: np.ndarray) -> np.ndarray:
    """Per window: deployment, file and UTC start (s since the epoch), as one record each."""
    t = rec.start_utc.timestamp() + np.asarray(start_s, dtype=float)
    keys = np.empty(t.size, dtype=_KEY_DTYPE)
    keys["deployment"], keys["file"], keys["t"] = dep.name, f"{dep.name}/{rec.name}", t
    return keys


def _group_labels(keys: np.ndarray, unit: str) -> np.ndarray:
    if unit == "deployment":
        return keys["deployment"].astype(str)
    if unit == "file":
        return keys["file"].astype(str)
    span = 3600.0 if unit == "hour" else BLOCK_S
    # Clock hours (or 10-minute blocks) of UTC in which each window starts, per deployment.
    block = np.floor(keys["t"] / span).astype(np.int64).astype(str)
    return np.char.add(np.char.add(keys["deployment"].astype(str), "/"), block)


def resolve_groups(keys: np.ndarray, group_by: str, folds: int) -> tuple[np.ndarray, str]:
    """Cross-validation groups, and a line that says what they really are.

    ``auto`` takes the coarsest unit that gives at least ``2 * folds`` groups: clock
    hours, else files, else 10-minute blocks of recording; a few labelled hours would
    otherwise make "grouped" folds out of one or two groups. Fewer than two groups of
    any unit leaves the folds ungrouped, which is said.

    Parameters
    ----------
    keys : structured np.ndarray from ``_group_keys`` (deployment, file, t in s)
    group_by : {'auto', 'hour', 'file', 'deployment'}
    folds : int

    Returns
    -------
    groups : np.ndarray of str, one per example
    described : str, e.g. "file (12 groups)" or "none: 1 group of any unit, ungrouped folds"
    """
    units = ["hour", "file", "block"] if group_by == "auto" else [group_by]
    for unit in units:
        groups = _group_labels(keys, unit)
        n = np.unique(groups).size
        if n >= 2 * folds or unit == units[-1] and n >= 2:
            name = "10-minute block" if unit == "block" else unit
            return groups, f"{name} ({n} groups)"
    return groups, f"none: only {n} group, folds are ungrouped (neighbouring windows on both sides)"


def _sample_background(
    snr_db: np.ndarray, budget: int, hard_fraction: float, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """Indices of kept background windows and their inverse-inclusion weights."""
    n = snr_db.size
    if n <= budget:
        return np.arange(n), np.ones(n)
    n_hard = int(round(hard_fraction * budget))
    order = np.argsort(-snr_db, kind="stable")
    hard = order[:n_hard]
    rest = order[n_hard:]
    n_rand = budget - n_hard
    drawn = rng.choice(rest, size=n_rand, replace=False) if n_rand > 0 else np.empty(0, int)
    idx = np.concatenate([hard, drawn])
    weight = np.concatenate([np.ones(hard.size), np.full(drawn.size, rest.size / max(n_rand, 1))])
    order_idx = np.argsort(idx)
    return idx[order_idx], weight[order_idx]


def _is_excess(name: str) -> bool:
    """A descriptor that grows as the same call is heard louder over the same noise."""
    return name == "snr_db" or name.endswith("excess_db")


def _estimator(config: TrainingConfig, names: list[str] | None = None, target: str | None = None) -> CallClassifier:
    # The model learns from relative descriptors only; absolute levels stay in the rows
    # (and in the outputs) but would teach it the training site's noise and ranges.
    columns = None if names is None else [i for i, n in enumerate(names) if not is_absolute_level(n)]
    params = config.target_estimator_params if target else config.estimator_params
    if config.monotone_excess and target and config.kind == "gradient-boosting" and names is not None:
        params = params | {"monotonic_cst": [1 if _is_excess(names[i]) else 0 for i in columns]}
    return CallClassifier(
        kind=config.kind,
        params=params,
        calibration=config.calibration,
        class_weight=config.class_weight,
        folds=config.folds,
        random_state=config.seed,
        columns=columns,
        average_folds=bool(config.average_folds and target and config.kind == "gradient-boosting"),
    )


def _class_metrics(y: np.ndarray, proba: np.ndarray, classes: list[str], weight: np.ndarray) -> dict:
    out = {}
    for i, c in enumerate(classes):
        if c == BACKGROUND:
            continue
        truth = y == c
        if not truth.any():
            continue
        decided = proba[:, i] >= 0.5
        tp = float(weight[truth & decided].sum())
        w_decided = float(weight[decided].sum())
        out[c] = {
            "average_precision": float(average_precision_score(truth, proba[:, i], sample_weight=weight)),
            "precision_at_0.5": tp / w_decided if w_decided > 0 else float("nan"),
            "recall_at_0.5": tp / float(weight[truth].sum()),
            "examples": int(truth.sum()),
        }
    return out


def cross_validate(estimator: CallClassifier, examples: ExampleSet) -> dict[str, Any]:
    """Metrics of a fitted classifier from its grouped out-of-fold probabilities.

    No group (hour, file or deployment) was on both sides of a fold. Precision, recall
    and average precision weigh each background example by the inverse of its chance of
    being kept, so they refer to all windows of the annotated files.

    Returns
    -------
    dict
        ``folds`` (per fold: classes' metrics and confusion matrix), ``overall`` (the same
        over all out-of-fold probabilities), ``classes``, ``n_folds``.
    """
    # Decoys are not windows of the recordings: none of the figures counts them.
    real = ~examples.is_decoy()
    y, weight = examples.y[real], examples.weight[real]
    classes = [str(c) for c in estimator.classes_]
    oof = estimator.oof_proba_[real]
    fold = estimator.fold_[real]
    pred = np.array(classes)[np.argmax(oof, axis=1)]
    folds = []
    for k in range(int(estimator.fold_.max()) + 1):
        test = fold == k
        folds.append(
            {
                "metrics": _class_metrics(y[test], oof[test], classes, weight[test]),
                "confusion": confusion_matrix(y[test], pred[test], labels=classes).tolist(),
                "test_examples": int(test.sum()),
            }
        )
    return {
        "classes": classes,
        "n_folds": len(folds),
        "folds": folds,
        "overall": {
            "metrics": _class_metrics(y, oof, classes, weight),
            "confusion": confusion_matrix(y, pred, labels=classes).tolist(),
        },
    }


@dataclass
class TrainingResult:
    """The fitted model with what the experiment record needs."""

    model: CallModel
    examples: ExampleSet
    validation: dict[str, Any]
    config: TrainingConfig
    seconds: dict[str, float]
    threads: int = 1  # BLAS/OpenMP threads of the fit


def labels_for_settings(notes: list[Annotation], target: str | None = None) -> list[Annotation]:
    """The labels band, resolution and window are chosen from (:func:`choose_settings`).

    Those of ``target`` (all, without one). Verified rows carry the boxes of detections, a
    model's own extents, not an analyst's: where analysts' complete tables hold any, only
    theirs count, so that retraining on verdicts describes windows as the parent model did.
    """
    chosen = [a for a in notes if target is None or a.label == target]
    drawn = [a for a in chosen if not a.partial]
    return drawn or chosen


def short_call_durations(notes: list[Annotation], target: str | None, config: TrainingConfig) -> dict[str, float]:
    """Per class the model detects, the duration (s) below which a detection is a fragment.

    ``config.short_call_fraction`` of the median duration of the class's labelled calls
    (the analysts' rows where the class has any, else its verified rows; see
    :func:`callsieve.classifier.detections.short_call_factor`); empty when the fraction
    is 0. Background rows (verified "no") get none.
    """
    if config.short_call_fraction <= 0:
        return {}
    out: dict[str, float] = {}
    for label in sorted({a.label for a in notes} - {BACKGROUND} if target is None else {target}):
        # Verified rows carry detections' boxes, often the short ones this scales: the
        # analysts' rows of the class where it has any, as for the settings.
        durations = [a.duration_s for a in labels_for_settings(notes, label)]
        if durations:
            out[label] = round(float(config.short_call_fraction * np.median(durations)), 4)
    return out


def calibration_weight(examples: ExampleSet) -> np.ndarray:
    """Weights of the probability calibration: the examples' own, but none for verified ones.

    Verified stretches were chosen by a model, mostly among its confident detections, so
    they hold far more calls than the recordings do. They teach the trees to rank; were
    they also to set the calibration, a model retrained on a few hundred verified calls
    would give every window a higher confidence than the recordings warrant, and the
    thresholds chosen on the parent model would not carry over. Where every example is
    verified, there is nothing else to calibrate on, and all are used.
    """
    partial = examples.partial
    real = ~examples.is_decoy()
    if partial is None or not partial[real].any() or partial[real].all():
        return examples.weight
    return np.where(partial, 0.0, examples.weight)


def train_model(
    sets: list[LabelledSet],
    config: TrainingConfig,
    target: str | None = None,
    progress: Callable[[str], None] | None = None,
) -> TrainingResult:
    """Choose settings, collect examples, cross-validate, fit the final model.

    Parameters
    ----------
    sets : list of LabelledSet
    config : TrainingConfig
    target : str, optional; learn this label against everything else (else every label)
    progress : callable, optional

    Returns
    -------
    TrainingResult
    """
    all_notes = [a for s in sets for a in s.annotations]
    labels = sorted({a.label for a in all_notes})
    if target is not None and target not in labels:
        raise InputError(f"--target {target!r} is not a label of the tables (labels: {', '.join(labels)})")
    chosen_from = labels_for_settings(all_notes, target)
    rate = min(s.deployment.sample_rate_hz for s in sets)
    try:
        settings = choose_settings(chosen_from, rate, config.descriptors)
    except Exception as exc:  # a config whose settings cannot work together
        raise InputError(f"descriptor settings: {exc}") from None
    for s in sets:
        settings.grid.check_sample_rate(s.deployment.sample_rate_hz)
    t0 = time.perf_counter()
    if progress:
        progress(
            f"settings: band {settings.low_hz:g}-{settings.high_hz:g} Hz, resolution "
            f"{settings.resolution_hz:g} Hz, frame hop {settings.frame_hop_s:g} s, "
            f"window {settings.window_s:g} s every {settings.window_hop_s:g} s"
        )
    examples = collect_examples(sets, settings, config, target, progress)
    t1 = time.perf_counter()
    # OpenMP threads that share cores with other busy processes stall at every barrier of
    # the boosting (docs/threads.md): the fit takes only the cores the load leaves free.
    weight = calibration_weight(examples)
    with limited_threads(fit_threads()) as threads:
        if progress:
            progress(f"fitting with {threads} thread(s) (set {THREADS_ENV} to change)")
        estimator = _estimator(config, examples.names, target).fit(
            examples.X, examples.y, sample_weight=weight, groups=examples.groups
        )
        # The screen reads only levels over the floor, which a decoy shares with the call it
        # was made from: to the screen a decoy would be a call labelled background.
        real = ~examples.is_decoy()
        cascade = fit_cascade(
            examples.X[real],
            examples.y[real],
            examples.weight[real],
            estimator.fold_[real],
            examples.names,
            settings,
            BACKGROUND,
        )
    t2 = time.perf_counter()
    validation = cross_validate(estimator, examples) | {"group_by": config.group_by, "grouping": examples.grouping}
    t3 = time.perf_counter()
    summary = {
        "sets": [
            {
                "name": s.name,
                "deployment": s.deployment.name,
                "annotations": len(s.annotations),
                "files": len({a.file for a in s.annotations}),
            }
            for s in sets
        ],
        "examples_per_set": examples.counts,
        "examples": dict(Counter(examples.y[~examples.is_decoy()].tolist())),
        "slow_decoys": int(examples.is_decoy().sum()),
        "windows_described": examples.windows_described,
        # Verified examples rank but do not calibrate (see calibration_weight).
        "calibration_examples": int(np.sum(weight > 0)),
        "hours_described": round(examples.hours_described, 4),
        "config": config.to_dict(),
        "validation": validation,
    } | ({"cascade": cascade.summary()} if cascade is not None else {})
    model = CallModel(
        estimator, settings, examples.names, target, summary, cascade, short_call_durations(all_notes, target, config)
    )
    seconds = {"describe": t1 - t0, "fit_and_cross_validate": t2 - t1, "metrics": t3 - t2}
    return TrainingResult(model, examples, validation, replace(config), seconds, threads)


def _pair_tables(label_paths: list[Path], deployments: list[Deployment]) -> list[LabelledSet]:
    """Read each label table against the deployment(s) its rows name (or its files fit)."""
    import csv
    import io

    from .labels import read_label_table, read_table_text

    sets: list[LabelledSet] = []
    for path in label_paths:
        try:
            reader = csv.DictReader(io.StringIO(read_table_text(path)))
            columns = reader.fieldnames or []
            files = {(r.get("file") or "").strip() for r in reader}
        except csv.Error:  # read_label_table names the line
            columns, files = ["deployment"], set()
        if "deployment" in columns or len(deployments) == 1:
            notes = read_label_table(path, deployments)
        else:
            fits = [d for d in deployments if files <= {f.name for f in d.files} | {x.name for x in d.faults}]
            if len(fits) != 1:
                raise InputError(
                    f"{path}: its files fit {len(fits)} of the deployments given; add a "
                    "'deployment' column naming each row's manifest name"
                )
            notes = read_label_table(path, fits)
        for dep in deployments:
            mine = [a for a in notes if a.deployment == dep.name]
            if mine:
                sets.append(LabelledSet(dep, mine, str(path)))
    return sets


def verified_provenance(sets: list[LabelledSet]) -> dict[str, Any]:
    """What the partial (verified) rows of the training tables came from.

    Returns
    -------
    dict
        ``stretches`` (count), ``spans`` (deployment, file, start_s, end_s of every partial
        row), and from the columns `review export-labels` writes: ``runs``, ``parent_models``
        (model hashes) and ``samples`` (verification samples) that gave them.
    """
    import csv
    import io

    from .labels import read_table_text

    spans = [
        {"deployment": a.deployment, "file": a.file, "start_s": a.start_s, "end_s": a.end_s}
        for s in sets
        for a in s.annotations
        if a.partial
    ]
    runs: set[str] = set()
    models: set[str] = set()
    samples: set[str] = set()
    for path in sorted({s.name for s in sets if any(a.partial for a in s.annotations)}):
        for row in csv.DictReader(io.StringIO(read_table_text(path))):
            for key, into in (("run_id", runs), ("model_sha256", models), ("sample_id", samples)):
                if (row.get(key) or "").strip():
                    into.add(row[key].strip())
    return {
        "stretches": len(spans),
        "spans": spans,
        "runs": sorted(runs),
        "parent_models": sorted(models),
        "samples": sorted(samples),
    }


#: Fewest labelled calls of a class, and fewest cross-validation groups, below which the
#: figures of a training run are too uncertain to trust (common practice: a few dozen
#: examples per class for a tree model; two groups per fold).
MIN_CALLS_PER_CLASS = 20


def training_warnings(sets: list[LabelledSet], validation: dict[str, Any], target: str | None) -> list[str]:
    """What makes this training's own figures weak: few calls of a class, few groups."""
    out = []
    counts = Counter(a.label for s in sets for a in s.annotations if target is None or a.label == target)
    for label, n in sorted(counts.items()):
        if n < MIN_CALLS_PER_CLASS:
            out.append(
                f"only {n} labelled call(s) of {label!r} (fewer than {MIN_CALLS_PER_CLASS}): its cross-validated "
                "figures are uncertain and the model may not generalise; label more before relying on it"
            )
    if validation["grouping"].startswith("none"):
        out.append(f"cross-validation is not grouped ({validation['grouping']}); its figures are optimistic")
    elif validation["n_folds"] < 3:
        out.append(f"only {validation['n_folds']} cross-validation folds ({validation['grouping']})")
    return out


def _earlier_model(path: Path) -> bool:
    """A model file this command wrote: a skops archive holding a callsieve model's payload."""
    import zipfile

    try:
        with zipfile.ZipFile(path) as z:
            return "content_sha256" in z.read("schema.json").decode("utf-8", "replace")
    except (OSError, KeyError, zipfile.BadZipFile):
        return False


def train(
    manifests: list[str | Path],
    label_tables: list[str | Path],
    out: str | Path,
    config_path: str | Path | None = None,
    target: str | None = None,
    tracking_uri: str | None = None,
    experiment: str | None = None,
    register: str | None = None,
    track: bool = True,
    progress: Callable[[str], None] | None = None,
    force: bool = False,
) -> dict[str, Any]:
    """Train a model from labelled deployments, save it, and record the experiment.

    Parameters
    ----------
    manifests : list of manifest paths (docs/formats.md)
    label_tables : list of label tables (docs/formats.md)
    out : path of the model file to write
    config_path : training configuration (TOML); None for the defaults
    target : str, optional; a model of this label against everything else
    tracking_uri, experiment, register : MLflow store, experiment name, registered model name
    track : bool, False skips MLflow (for tests and quick trials)
    progress : callable, optional
    force : bool, replace an existing ``out`` that is not an earlier model (never an input)

    Returns
    -------
    dict
        ``model`` (path), ``content_sha256``, ``settings``, ``classes``, ``examples``,
        ``cv`` (overall metrics per class), ``seconds`` and, when tracked, ``run``.
    """
    from .config import load_training_config
    from .deployment import load_deployment
    from .model import save_model

    # Refused before hours of describing, not after: a store, a table or any file that is
    # not an earlier model is never replaced by a model.
    Path(out).parent.mkdir(parents=True, exist_ok=True)
    check_output(
        out,
        option="--out",
        inputs=(*manifests, *label_tables, *((config_path,) if config_path else ())),
        ours=_earlier_model,
        what="a model file",
        force=force,
    )
    config = load_training_config(config_path)
    thread_setting()  # a bad CALLSIEVE_THREADS is refused now, not after the describing
    deployments = [load_deployment(m) for m in manifests]
    names = [d.name for d in deployments]
    if len(set(names)) != len(names):
        raise InputError(
            f"two manifests share the deployment name {sorted(n for n in names if names.count(n) > 1)[0]!r}"
        )
    sets = _pair_tables([Path(p) for p in label_tables], deployments)
    if not sets:
        raise InputError("no label table row falls in the deployments given")
    result = train_model(sets, config, target, progress)
    verified = verified_provenance(sets)
    if verified["stretches"]:
        # Recorded in the model, so that scoring runs carry it and `estimate` can set aside
        # verdicts on audio this model learned from.
        result.model.summary["verified"] = verified
    out = Path(out)
    digest = save_model(result.model, out)
    report: dict[str, Any] = {
        "model": str(out),
        "content_sha256": digest,
        "settings": result.model.settings.to_dict(),
        "classes": result.model.classes,
        "examples": result.model.summary["examples"],
        "slow_decoys": result.model.summary.get("slow_decoys", 0),
        "short_call_s": result.model.short_call_s,
        "examples_per_set": result.model.summary["examples_per_set"],
        "cv": result.validation["overall"]["metrics"],
        "cv_folds": result.validation["n_folds"],
        "cv_grouping": result.validation["grouping"],
        "cascade": result.model.summary.get("cascade"),
        "warnings": [w for d in deployments for w in d.warnings] + training_warnings(sets, result.validation, target),
        "seconds": {k: round(v, 2) for k, v in result.seconds.items()},
        "threads": result.threads,
    }
    if verified["stretches"]:
        report["verified"] = {k: v for k, v in verified.items() if k != "spans"}
    if track:
        from .tracking import log_training_run

        report["run"] = log_training_run(result, out, tracking_uri, experiment, register, [s.name for s in sets])
    return report
