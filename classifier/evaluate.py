"""`callsieve evaluate`: a scoring run and the excess baseline judged against truth.

Reads the store, the truth table and (for the baseline and the calls' levels) the
audio; writes ``metrics.json``, CSV tables and figures into the output folder, and,
when the model's MLflow run is reachable, logs the evaluation to it. The figures
themselves come from the pure functions of :mod:`callsieve.classifier.evaluation`.
"""

from __future__ import annotations

import csv
import json
import math
import os
import sys
import time
from collections.abc import Callable
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np
from callsieve.features.descriptors import DescriptorSettings
from callsieve.features.streaming import AudioReadError

from .baseline import ExcessDetector, call_levels, excess_detections
from .deployment import FileFault, load_deployment
from .errors import InputError
from .evaluation import (
    PrecisionRecall,
    average_precision,
    bootstrap_over_hours,
    hour_presence,
    match_detections,
    precision_recall,
    recall_by_bin,
    threshold_table,
)
from .export import CAUTION
from .labels import BACKGROUND, read_label_table
from .outputs import write_csv, write_text
from .plots import (
    confusion_figure,
    precision_recall_figure,
    recall_by_level_figure,
    save,
    threshold_figure,
)
from .scoring import Progress
from .store import epoch_s, latest_run_id, open_store

__all__ = ["evaluate", "format_evaluation", "METRIC_KEYS", "THRESHOLDS"]

#: Thresholds of the threshold table (the model's confidence).
THRESHOLDS = np.round(np.r_[np.arange(0.1, 0.951, 0.05), 0.99], 2)
#: SNR bins of the recall curve, dB; values beyond go to the end bins.
SNR_EDGES_DB = np.arange(-20.0, 40.1, 5.0)
#: Width of the received-level bins, dB.
LEVEL_BIN_DB = 5.0

#: Keys of ``metrics.json`` per class (see the README's evaluation section).
METRIC_KEYS = (
    "truth_calls",
    "detections",
    "average_precision",
    "threshold_for_target_precision",
    "recall_at_target_precision",
    "f1_optimal_threshold",
    "f1_at_optimal",
    "operating_threshold",
    "operating",
    "hour_presence",
    "baseline",
)


def _finite(x: float) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


def _curve_points(curve: PrecisionRecall, target_precision: float) -> dict[str, Any]:
    """Threshold for a target precision (the lowest that reaches it) and the F1 optimum."""
    out: dict[str, Any] = {
        "threshold_for_target_precision": None,
        "precision_at_target": None,
        "recall_at_target_precision": None,
    }
    ok = np.flatnonzero(curve.precision >= target_precision)
    if ok.size:
        i = int(ok[-1])  # thresholds descend: the last that reaches it is the lowest
        out |= {
            "threshold_for_target_precision": float(curve.threshold[i]),
            "precision_at_target": float(curve.precision[i]),
            "recall_at_target_precision": float(curve.recall[i]),
        }
    f1 = curve.f1
    if f1.size:
        i = int(np.argmax(f1))
        out |= {
            "f1_optimal_threshold": float(curve.threshold[i]),
            "f1_at_optimal": float(f1[i]),
            "precision_at_f1_optimal": float(curve.precision[i]),
            "recall_at_f1_optimal": float(curve.recall[i]),
        }
    else:
        out |= {"f1_optimal_threshold": None, "f1_at_optimal": 0.0}
    return out


def evaluate(
    db: str | Path,
    truth_csv: str | Path,
    out_dir: str | Path,
    run_id: int | None = None,
    target_precision: float = 0.9,
    tolerance_s: float = 0.5,
    tracking_uri: str | None = None,
    complete_truth: bool = False,
    n_resamples: int = 2000,
    progress: Callable[[str], None] | None = None,
    deployment: str | Path | None = None,
) -> dict[str, Any]:
    """Judge a scoring run and the excess baseline against a truth table (docs/evaluation.md).

    Parameters
    ----------
    db : detection store
    truth_csv : label table (docs/formats.md) of the run's deployment; its files count as fully
        annotated, and only they are judged
    out_dir : folder for metrics.json, tables and figures (made if missing)
    run_id : int, optional, the scoring run (default the latest)
    target_precision : float, 0..1, precision the reported threshold must reach
    tolerance_s : float, s, widening of truth intervals for matching
    tracking_uri : str, optional, MLflow store holding the model's training run
        (default ``MLFLOW_TRACKING_URI``, else ``./mlflow.db`` where it exists)
    complete_truth : bool
        The truth table annotates every file of the deployment: the files it does not
        name hold no call and are judged too (their detections are false positives).
    n_resamples : int, bootstrap replicates over recording hours

    deployment : str or Path, optional; the run's deployment manifest where it has moved
        since scoring (same deployment name), else the store's record is used

    Returns
    -------
    dict, the content of metrics.json plus ``out`` (the folder)
    """
    if not 0.0 < target_precision < 1.0:
        raise InputError(f"--target-precision must be between 0 and 1, got {target_precision:g}")
    if not tolerance_s >= 0.0:
        raise InputError(f"--tolerance-s must be >= 0, got {tolerance_s:g}")
    if Path(out_dir).exists() and not Path(out_dir).is_dir():
        raise InputError(f"--out {out_dir}: is a file; give a folder for the evaluation's outputs")
    say = progress or (lambda line: None)
    t0 = time.perf_counter()
    con = open_store(db, create=False)
    try:
        run_id = latest_run_id(con, run_id)
        run = con.execute(
            "SELECT r.*, d.name AS deployment, d.manifest FROM runs r JOIN deployments d "
            "ON d.deployment_id=r.deployment_id WHERE r.run_id=?",
            (run_id,),
        ).fetchone()
        params = json.loads(run["parameters"])
        settings = DescriptorSettings(**{k: v for k, v in params["settings"].items() if k != "version"})
        # The store's own record is a resolved path; a moved deployment is named with
        # --deployment (the same deployment: its name must match the run's).
        manifest = Path(deployment) if deployment is not None else Path(run["manifest"] or params.get("manifest"))
        if not manifest.is_file():
            raise InputError(
                f"{manifest}: the run's deployment manifest is not there; restore it, or give its new place "
                f"with --deployment MANIFEST to evaluate run {run_id}"
            )
        dep = load_deployment(manifest)
        if dep.name != run["deployment"]:
            raise InputError(
                f"{manifest}: deployment {dep.name!r}, but run {run_id} scored {run['deployment']!r}; "
                "give that deployment's manifest"
            )
        # A file the run scored that the listing no longer finds (deleted, moved, renamed)
        # cannot be read now: its truth rows are left out and reported, like a broken file's.
        listed = {f.name for f in dep.files} | {x.name for x in dep.faults}
        for (name,) in con.execute(
            "SELECT f.name FROM files f JOIN run_files rf ON rf.file_id=f.file_id AND rf.run_id=? ORDER BY f.name",
            (run_id,),
        ):
            if name not in listed:
                dep.faults.append(FileFault(name, "no longer in the deployment's audio folder"))
        unreadable: list[tuple[str, str]] = []
        truth = read_label_table(truth_csv, [dep], unreadable)
        for name, error in unreadable:
            say(f"evaluate: {name} cannot be read ({error}); its truth rows are left out")
        files = {
            r["name"]: r
            for r in con.execute(
                "SELECT f.file_id, f.name, f.start_utc, f.duration_s, rf.status FROM files f "
                "LEFT JOIN run_files rf ON rf.file_id=f.file_id AND rf.run_id=? WHERE f.deployment_id=?",
                (run_id, run["deployment_id"]),
            )
        }
        truth_files = sorted({a.file for a in truth} | ({f.name for f in dep.files} if complete_truth else set()))
        judged = [f for f in truth_files if f in files and files[f]["status"] == "done"]
        not_scored = [f for f in truth_files if f not in judged]
        if not judged:
            raise InputError(
                f"{truth_csv}: none of its {len(truth_files)} files was scored in run {run_id}; "
                "score the deployment first or pass the right --run"
            )
        for name in not_scored:
            say(f"evaluate: {name} is in the truth table but was not scored in run {run_id}; left out")
    finally:
        con.close()

    classes = [c for c in json.loads(run["classes"]) if c != BACKGROUND]
    truth = [a for a in truth if a.file in set(judged)]
    say(f"evaluate: measuring the levels of {len(truth)} truth calls and running the excess baseline")
    detector = ExcessDetector()
    audio = _audio_pass(dep, judged, truth, settings, detector, say)
    # A file that cannot be read now is left out whole: its calls, detections and effort.
    keep = [i for i, a in enumerate(truth) if a.file not in audio["failed"]]
    judged = [f for f in judged if f not in audio["failed"]]
    truth = [truth[i] for i in keep]
    t_rl, t_snr = audio["received_level_db"][keep], audio["snr_db"][keep]
    if not judged:
        raise InputError(f"{truth_csv}: none of its files can be read now; check the deployment's audio")
    con = open_store(db, create=False)
    try:
        dets = _detections(con, run_id, files, judged)
    finally:
        con.close()
    named = {a.file for a in truth}
    unnamed = [f for f in judged if f not in named] if complete_truth else []
    b_file, b_start, b_end, b_score = audio["baseline"]
    labels_not_in_model = sorted({a.label for a in truth} - set(classes))
    t_file = [a.file for a in truth]
    t_label = [a.label for a in truth]
    t_start = np.array([a.start_s for a in truth])
    t_end = np.array([a.end_s for a in truth])
    file_code = {f: k for k, f in enumerate(judged)}
    t_code = np.array([file_code[f] for f in t_file], dtype=np.int64)
    start_epoch = np.array([epoch_s(files[f]["start_utc"]) for f in judged])
    t_hour = ((start_epoch[t_code] + t_start) // 3600).astype(np.int64)
    d_hour = ((start_epoch[dets["file_code"]] + dets["start_s"]) // 3600).astype(np.int64)
    effort = _effort_hours([(start_epoch[k], float(files[f]["duration_s"])) for k, f in enumerate(judged)])
    hour_index = {h: i for i, h in enumerate(effort)}
    # Position of each call's and each detection's hour among the hours with effort.
    t_hpos = np.array([hour_index[h] for h in t_hour], dtype=np.int64)
    d_hpos = np.array([hour_index[h] for h in d_hour], dtype=np.int64)

    say(f"evaluate: matching {len(dets['label'])} detections of run {run_id} to {len(truth)} truth calls")
    # The matching keys: same file, same label, as one integer per detection and call.
    label_code = {c: k for k, c in enumerate(dict.fromkeys([*classes, *t_label]))}
    n_labels = len(label_code)
    d_label_code = np.array([label_code.get(c, -1) for c in dets["label"]], dtype=np.int64)
    t_label_code = np.array([label_code[c] for c in t_label], dtype=np.int64)
    b_code = np.array([file_code[f] for f in b_file], dtype=np.int64)
    t_key = t_code * n_labels + t_label_code
    match = match_detections(
        dets["file_code"] * n_labels + d_label_code,
        dets["start_s"],
        dets["end_s"],
        dets["confidence"],
        t_key,
        t_start,
        t_end,
        tolerance_s,
    )

    per_class: dict[str, Any] = {}
    curves: dict[str, tuple[PrecisionRecall, PrecisionRecall]] = {}
    table_rows: list[dict[str, Any]] = []
    recall_rows: list[dict[str, Any]] = []
    operating: dict[str, float] = {}
    for c in classes:
        in_c = dets["label"] == c
        truth_c = np.asarray(t_label) == c
        n_truth = int(truth_c.sum())
        curve = precision_recall(dets["confidence"][in_c], match[in_c] >= 0, n_truth)
        points = _curve_points(curve, target_precision)
        tab = threshold_table(dets["confidence"][in_c], match[in_c] >= 0, n_truth, THRESHOLDS)
        for k in range(THRESHOLDS.size):
            table_rows.append(
                {"detector": "model", "label": c} | {key: _cell(tab[key][k]) for key in tab} | {"unit": "probability"}
            )
        # The operating point: the target-precision threshold where one exists, else F1's.
        thr = points["threshold_for_target_precision"]
        thr = thr if thr is not None else points.get("f1_optimal_threshold")
        thr = float(thr) if thr is not None else 1.0
        operating[c] = thr
        above = in_c & (dets["confidence"] >= thr)
        tp = above & (match >= 0)
        found = np.zeros(len(truth), dtype=bool)
        found[match[tp]] = True
        ci = bootstrap_over_hours(
            np.bincount(d_hpos[tp], minlength=len(effort)),
            np.bincount(d_hpos[above], minlength=len(effort)),
            np.bincount(t_hpos[found & truth_c], minlength=len(effort)),
            np.bincount(t_hpos[truth_c], minlength=len(effort)),
            n_resamples=n_resamples,
        )
        n_above, n_tp = int(above.sum()), int(tp.sum())
        presence = hour_presence(np.array(effort), t_hour[truth_c], d_hour[above])
        snr_bins = recall_by_bin(t_snr[truth_c], found[truth_c], SNR_EDGES_DB)
        rl_c = t_rl[truth_c]
        rl_edges = _level_edges(rl_c)
        rl_bins = recall_by_bin(rl_c, found[truth_c], rl_edges)
        for measure, bins in (("snr_db", snr_bins), ("received_level_db", rl_bins)):
            for k in range(bins["calls"].size):
                recall_rows.append({"label": c, "measure": measure} | {key: _cell(v[k]) for key, v in bins.items()})

        # The baseline: every floor-excess event is a candidate of this class, judged by the same rule.
        b_match = match_detections(
            b_code * n_labels + label_code[c],
            b_start,
            b_end,
            b_score,
            t_key,
            t_start,
            t_end,
            tolerance_s,
        )
        b_curve = precision_recall(b_score, b_match >= 0, n_truth)
        b_points = _curve_points(b_curve, target_precision)
        b_tab = threshold_table(b_score, b_match >= 0, n_truth, np.arange(3.0, 30.1, 1.0))
        for k in range(b_tab["threshold"].size):
            table_rows.append(
                {"detector": "baseline", "label": c} | {key: _cell(b_tab[key][k]) for key in b_tab} | {"unit": "dB"}
            )
        curves[c] = (curve, b_curve)
        per_class[c] = {
            "truth_calls": n_truth,
            "detections": int(in_c.sum()),
            "average_precision": _finite(average_precision(curve)),
        } | {k: _finite(v) if isinstance(v, float) else v for k, v in points.items()}
        per_class[c] |= {
            "operating_threshold": thr,
            "operating": {
                "detections": n_above,
                "true_positives": n_tp,
                "precision": _finite(n_tp / n_above) if n_above else None,
                "recall": _finite(found[truth_c].sum() / n_truth) if n_truth else None,
                "precision_ci95": [_finite(x) for x in ci["precision"]],
                "recall_ci95": [_finite(x) for x in ci["recall"]],
            },
            "hour_presence": {k: _finite(v) if isinstance(v, float) else v for k, v in presence.items()},
            "baseline": {
                "average_precision": _finite(average_precision(b_curve)),
                "events": int(b_score.size),
                "threshold_for_target_precision_db": b_points["threshold_for_target_precision"],
                "recall_at_target_precision": b_points["recall_at_target_precision"],
                "f1_at_optimal": b_points["f1_at_optimal"],
            },
        }

    confusion_labels, confusion = _confusion(dets, operating, t_file, t_label, t_start, t_end, tolerance_s, classes)
    metrics = {
        "run_id": run_id,
        "deployment": run["deployment"],
        "model_sha256": run["model_sha256"],
        "truth": str(Path(truth_csv).resolve()),
        "complete_truth": complete_truth,
        "files_judged": len(judged),
        "files_not_scored": not_scored,
        # With --complete-truth, judged files the table names no call in: their detections
        # are all false. Said on the terminal, since a table cut to some files turns every
        # detection in the others into a false positive.
        "files_without_truth_calls": unnamed,
        "detections_in_files_without_truth_calls": int(
            np.isin(dets["file_code"], [file_code[f] for f in unnamed]).sum()
        ),
        "files_unreadable": sorted({n for n, _ in unreadable} | audio["failed"]),
        "recorded_hours": round(sum(float(files[f]["duration_s"]) for f in judged) / 3600.0, 4),
        "effort_hours": len(effort),
        "tolerance_s": tolerance_s,
        "target_precision": target_precision,
        "bootstrap": {"unit": "recording hour", "resamples": n_resamples, "interval": "percentile, 95 %"},
        "baseline_detector": {
            "kind": "floor excess: in-band power over its running floor",
            "band_hz": [settings.low_hz, settings.high_hz],
            "floor": f"{settings.noise_percentile:g}th percentile over {settings.noise_span_s:g} s",
        }
        | asdict(detector),
        "labels_not_in_model": labels_not_in_model,
        "classes": per_class,
        "confusion": {"labels": confusion_labels, "counts": confusion.tolist()},
        # The model's first stage as recorded at training (None: a model without one).
        "cascade": params.get("cascade"),
        "caution": CAUTION,
        "seconds": round(time.perf_counter() - t0, 1),
    }
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    (out / "metrics.json").write_text(json.dumps(metrics, indent=2) + "\n")
    _write_csv(out / "thresholds.csv", table_rows)
    _write_csv(out / "recall_by_level.csv", recall_rows)
    _write_matches(out / "matches.csv", dets, match, truth)
    _write_truth_calls(out / "truth_calls.csv", dets, match, truth, t_rl, t_snr)
    where = f"{run['deployment']}, run {run_id}"
    figures = _figures(out, curves, per_class, recall_rows, confusion_labels, confusion, where)
    logged = _log_to_mlflow(run["model_sha256"], run_id, out, metrics, tracking_uri)
    if logged:
        metrics["mlflow_run_id"] = logged
        (out / "metrics.json").write_text(json.dumps(metrics, indent=2) + "\n")
    return metrics | {"out": str(out), "figures": [str(p) for p in figures]}


def _audio_pass(dep, judged: list[str], truth: list, settings, detector: ExcessDetector, say) -> dict[str, Any]:
    """Levels of the truth calls and the baseline's events, file by file.

    Returns ``received_level_db`` and ``snr_db`` (per truth call, in ``truth``'s order),
    ``baseline`` (file, start_s, end_s, score) and ``failed`` (files unreadable now).
    """
    rl_all, snr_all = np.full(len(truth), np.nan), np.full(len(truth), np.nan)
    calls_in: dict[str, list[int]] = {}
    for i, a in enumerate(truth):
        calls_in.setdefault(a.file, []).append(i)
    b_file: list[str] = []
    b_parts: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
    failed: set[str] = set()
    records = {r.name: r for r in dep.files}
    meter = Progress(len(judged), sum(records[f].duration_s for f in judged if f in records), say, "excess events")
    for f in judged:
        rec = records.get(f)
        if rec is None:
            failed.add(f)
            say(f"evaluate: {f} is no longer in the deployment's audio folder; left out")
            continue
        idx = calls_in.get(f, [])
        try:
            if idx:
                start = np.array([truth[i].start_s for i in idx])
                end = np.array([truth[i].end_s for i in idx])
                lo = np.array([np.nan if truth[i].low_hz is None else truth[i].low_hz for i in idx])
                hi = np.array([np.nan if truth[i].high_hz is None else truth[i].high_hz for i in idx])
                rl, snr = call_levels(rec.path, dep.channel, dep.chain, settings, start, end, lo, hi)
            events = excess_detections(rec.path, dep.channel, dep.chain, settings, detector)
        except AudioReadError as exc:
            failed.add(f)
            say(f"evaluate: {exc}; left out")
            continue
        if idx:
            rl_all[idx], snr_all[idx] = rl, snr
        b_file += [f] * events[0].size
        b_parts.append(events)
        meter.add(rec.duration_s, events[0].size)
    cat = [np.concatenate([p[k] for p in b_parts]) if b_parts else np.empty(0) for k in range(3)]
    return {"received_level_db": rl_all, "snr_db": snr_all, "baseline": (b_file, *cat), "failed": failed}


def _cell(v: Any) -> Any:
    if isinstance(v, (np.integer, int)):
        return int(v)
    v = float(v)
    return "" if not math.isfinite(v) else round(v, 6)


def _level_edges(values: np.ndarray) -> np.ndarray:
    ok = values[np.isfinite(values)]
    if ok.size == 0:
        return np.array([0.0, LEVEL_BIN_DB])
    lo = np.floor(ok.min() / LEVEL_BIN_DB) * LEVEL_BIN_DB
    hi = np.ceil(ok.max() / LEVEL_BIN_DB) * LEVEL_BIN_DB
    return np.arange(lo, max(hi, lo + LEVEL_BIN_DB) + 0.5 * LEVEL_BIN_DB, LEVEL_BIN_DB)


def _effort_hours(spans: list[tuple[float, float]]) -> list[int]:
    """Clock hours (since the epoch) that hold any recording."""
    hours: set[int] = set()
    for start, duration in spans:
        if duration <= 0:
            continue
        hours.update(range(int(start // 3600), int(math.ceil((start + duration) / 3600))))
    return sorted(hours)


def _detections(con, run_id: int, files: dict[str, Any], judged: list[str]) -> dict[str, Any]:
    """The run's detections in the judged files, as arrays (read in chunks).

    ``file`` and ``label`` are object arrays whose entries share one string per file and
    per label; ``file_code`` is each detection's position in ``judged``.
    """
    code_of = {int(files[f]["file_id"]): k for k, f in enumerate(judged)}
    names = [sys.intern(f) for f in judged]
    labels: dict[str, str] = {}
    cols: dict[str, list] = {k: [] for k in ("detection_id", "file_code", "start_s", "end_s", "label", "confidence")}
    ids = list(code_of)
    for a in range(0, len(ids), 500):
        part = ids[a : a + 500]
        cur = con.execute(
            "SELECT detection_id, file_id, start_s, end_s, label, confidence FROM detections "
            f"WHERE run_id=? AND superseded=0 AND file_id IN ({','.join('?' * len(part))}) ORDER BY detection_id",
            (run_id, *part),
        )
        while rows := cur.fetchmany(100_000):
            for r in rows:
                cols["detection_id"].append(r[0])
                cols["file_code"].append(code_of[r[1]])
                cols["start_s"].append(r[2])
                cols["end_s"].append(r[3])
                cols["label"].append(labels.setdefault(r[4], r[4]))
                cols["confidence"].append(r[5])
    file_code = np.array(cols["file_code"], dtype=np.int64)
    return {
        "detection_id": np.array(cols["detection_id"], dtype=np.int64),
        "file_code": file_code,
        "file": np.array(names, dtype=object)[file_code] if file_code.size else np.empty(0, dtype=object),
        "start_s": np.array(cols["start_s"], dtype=float),
        "end_s": np.array(cols["end_s"], dtype=float),
        "label": np.array(cols["label"], dtype=object),
        "confidence": np.array(cols["confidence"], dtype=float),
    }


def _confusion(dets, operating, t_file, t_label, t_start, t_end, tolerance_s, classes):
    """Truth label against the label of the most confident detection over each call.

    Detections count at their class's operating threshold. Rows: truth labels, then
    'no call' (detections over no truth call); columns: detected labels, then 'not detected'.
    """
    truth_labels = sorted(set(t_label) | set(classes))
    rows = truth_labels + ["no call"]
    cols = classes + ["not detected"]
    counts = np.zeros((len(rows), len(cols)), dtype=np.int64)
    thr = np.array([operating.get(lab, 1.0) for lab in dets["label"]])
    keep = dets["confidence"] >= thr
    d_file = np.asarray(dets["file"], dtype=object)[keep]
    d_label = np.asarray(dets["label"], dtype=object)[keep]
    d_start, d_end, d_conf = dets["start_s"][keep], dets["end_s"][keep], dets["confidence"][keep]
    over_any = np.zeros(d_start.size, dtype=bool)
    by_file: dict[str, np.ndarray] = {}
    for f in set(d_file):
        by_file[f] = np.flatnonzero(d_file == f)
    for i, f in enumerate(t_file):
        idx = by_file.get(f, np.empty(0, dtype=int))
        hit = idx[(d_start[idx] < t_end[i] + tolerance_s) & (d_end[idx] > t_start[i] - tolerance_s)]
        over_any[hit] = True
        r = rows.index(t_label[i])
        if hit.size:
            counts[r, cols.index(d_label[hit[np.argmax(d_conf[hit])]])] += 1
        else:
            counts[r, -1] += 1
    for lab in d_label[~over_any]:
        counts[-1, cols.index(lab)] += 1
    return {"rows": rows, "columns": cols}, counts


def _write_csv(path: Path, rows: list[dict[str, Any]]) -> None:
    if rows:
        write_csv(path, list(rows[0]), rows)
    else:
        write_text(path, "")


def _write_matches(path: Path, dets: dict[str, Any], match: np.ndarray, truth: list) -> None:
    """Each detection and the truth row it matched (the truth CSV's row number), for audit."""
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["detection_id", "file", "start_s", "end_s", "label", "confidence", "truth_row"])
        for k in range(match.size):
            w.writerow(
                [
                    int(dets["detection_id"][k]),
                    dets["file"][k],
                    dets["start_s"][k],
                    dets["end_s"][k],
                    dets["label"][k],
                    dets["confidence"][k],
                    truth[match[k]].row if match[k] >= 0 else "",
                ]
            )


def _write_truth_calls(
    path: Path, dets: dict[str, Any], match: np.ndarray, truth: list, level_db: np.ndarray, snr_db: np.ndarray
) -> None:
    """Each judged truth call, its measured levels and the detection that found it (if any).

    The missed calls, with their received level and SNR, are what an analyst looks at
    first: whether they were audible at all, or of a kind the model was never shown.
    """
    found = np.full(len(truth), -1, dtype=np.int64)
    hit = np.flatnonzero(match >= 0)
    found[match[hit]] = hit
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(
            [
                "truth_row",
                "file",
                "start_s",
                "end_s",
                "label",
                "received_level_db",
                "snr_db",
                "detection_id",
                "confidence",
            ]
        )
        for i, a in enumerate(truth):
            k = int(found[i])
            w.writerow(
                [
                    a.row,
                    a.file,
                    a.start_s,
                    a.end_s,
                    a.label,
                    "" if not np.isfinite(level_db[i]) else float(level_db[i]),
                    "" if not np.isfinite(snr_db[i]) else float(snr_db[i]),
                    int(dets["detection_id"][k]) if k >= 0 else "",
                    dets["confidence"][k] if k >= 0 else "",
                ]
            )


def _figures(out, curves, per_class, recall_rows, confusion_labels, confusion, where: str) -> list[Path]:
    pr_panels, thr_panels = [], []
    for c, (model, base) in curves.items():
        pc = per_class[c]
        op = pc["operating"]
        pr_panels.append(
            {
                "label": c,
                "model": {"recall": model.recall, "precision": model.precision, "ap": pc["average_precision"]},
                "baseline": {
                    "recall": base.recall,
                    "precision": base.precision,
                    "ap": pc["baseline"]["average_precision"],
                },
                "operating": {
                    "threshold": pc["operating_threshold"],
                    "recall": op["recall"],
                    "precision": op["precision"],
                },
            }
        )
        thr_panels.append(
            {
                "label": c,
                "threshold": model.threshold,
                "precision": model.precision,
                "recall": model.recall,
                "operating_threshold": pc["operating_threshold"],
            }
        )
    return [
        save(precision_recall_figure(pr_panels, where), out / "precision_recall.png"),
        save(threshold_figure(thr_panels, where), out / "precision_recall_vs_threshold.png"),
        save(recall_by_level_figure(recall_rows, list(curves), where), out / "recall_vs_level.png"),
        save(
            confusion_figure(
                confusion,
                confusion_labels["rows"],
                confusion_labels["columns"],
                "detected as (at each class's operating threshold)",
                "truth",
                f"Truth calls against detections, {where}",
            ),
            out / "confusion.png",
        ),
    ]


def _log_to_mlflow(model_sha256: str, run_id: int, out: Path, metrics: dict, tracking_uri: str | None) -> str | None:
    """Log the evaluation to the training run of this model, where that run can be found."""
    uri = tracking_uri or os.environ.get("MLFLOW_TRACKING_URI")
    if uri is None and Path("mlflow.db").is_file():
        uri = "sqlite:///mlflow.db"
    if uri is None:
        return None
    import logging

    import mlflow

    logging.getLogger("mlflow").setLevel(logging.WARNING)
    mlflow.set_tracking_uri(uri)
    try:
        found = mlflow.search_runs(
            search_all_experiments=True,
            filter_string=f"tags.`callsieve.model_sha256` = '{model_sha256}'",
            output_format="list",
        )
    except Exception:  # an unreachable or foreign store: the files on disk are the record
        return None
    if not found:
        return None
    train_run = found[0].info.run_id
    values = {}
    for c, m in metrics["classes"].items():
        for key in ("average_precision", "recall_at_target_precision", "threshold_for_target_precision"):
            if m.get(key) is not None:
                values[f"eval_{key}.{c}"] = m[key]
        if m["baseline"]["average_precision"] is not None:
            values[f"eval_baseline_average_precision.{c}"] = m["baseline"]["average_precision"]
    with mlflow.start_run(run_id=train_run):
        mlflow.log_metrics(values, step=run_id)
        mlflow.log_artifacts(str(out), artifact_path=f"evaluation/scoring-run-{run_id}")
    return train_run


def format_evaluation(metrics: dict[str, Any], target: str | None = None, caution: bool = True) -> str:
    """The short summary of an evaluation, for the terminal: model and baseline side by side.

    ``target`` marks that class's row; ``caution`` ends with the usual caution.
    """
    w = max([len("label")] + [len(c) for c in metrics["classes"]])
    lines = [
        f"Evaluation of scoring run {metrics['run_id']} ({metrics['deployment']}): {metrics['files_judged']} files, "
        f"{metrics['recorded_hours']:.2f} h, {metrics['effort_hours']} hours with effort; "
        f"match tolerance {metrics['tolerance_s']:g} s",
        f"{'label':<{w}} {'calls':>6} {'AP model':>9} {'AP excess':>10} "
        f"{'thr@P' + format(metrics['target_precision'], 'g'):>9} {'recall (95% CI)':>22} {'hours P/R':>11}",
    ]
    for c, m in metrics["classes"].items():
        op = m["operating"]
        rec = op["recall"]
        ci = op["recall_ci95"]
        if rec is None:
            rec_txt = "-"
        elif ci[0] is None or ci[1] is None:
            # Too few hours for an interval: say so rather than print a zero-width one.
            rec_txt = f"{rec:.2f} (n/a: {metrics['effort_hours']} h)"
        else:
            rec_txt = f"{rec:.2f} ({ci[0]:.2f}-{ci[1]:.2f})"
        thr = m["threshold_for_target_precision"]
        hp = m["hour_presence"]
        hours = f"{hp['precision'] or 0:.2f}/{hp['recall'] or 0:.2f}"
        lines.append(
            f"{c:<{w}} {m['truth_calls']:>6} {m['average_precision'] or 0:>9.3f} "
            f"{m['baseline']['average_precision'] or 0:>10.3f} {'none' if thr is None else format(thr, '.2f'):>9} "
            f"{rec_txt:>22} {hours:>11}" + ("  (target)" if c == target else "")
        )
    cascade = metrics.get("cascade")
    if cascade:
        lines.append(
            f"cascade: its first stage kept {cascade['min_recall']:.4f} of the least-kept class's training "
            f"windows (out of fold) and rejects {100 * cascade['background_rejected']:.1f} % of background windows"
            + ("" if cascade.get("used_at_scoring", True) else " (too few to pay: not used at scoring)")
        )
    unnamed = metrics.get("files_without_truth_calls") or []
    if unnamed:
        lines.append(
            f"complete truth: {len(unnamed)} of the {metrics['files_judged']} files judged hold no truth call, so "
            f"their {metrics['detections_in_files_without_truth_calls']} detections all count as false "
            "(without --complete-truth only the files the table names are judged)"
        )
    if metrics["labels_not_in_model"]:
        lines.append("truth labels the model does not know: " + ", ".join(metrics["labels_not_in_model"]))
    if metrics.get("mlflow_run_id"):
        lines.append(f"logged to MLflow run {metrics['mlflow_run_id']}")
    if caution:
        lines.append(CAUTION)
    return "\n".join(lines)
