"""`callsieve estimate`: what a verified sample says about a whole scoring run.

Reads the sample's design (strata, populations, inclusion probabilities) and every
verdict from the store, and, where audit segments were annotated, their label table. The
arithmetic is in ``estimates.py``; this module gathers, decides and reports.
"""

from __future__ import annotations

import csv
import json
import sqlite3
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from . import estimates as est
from .errors import InputError
from .evaluation import match_detections
from .export import CAUTION
from .store import epoch_s, latest_run_id, open_store
from .verdicts import consensus, verdict_on_label

__all__ = ["estimate_run", "format_estimate", "consensus", "ESTIMATE_KEYS"]

# Keys of `estimate --json` (docs/estimates.md documents each).
ESTIMATE_KEYS = (
    "run_id",
    "label",
    "sample_id",
    "design",
    "verdicts",
    "reviewers",
    "strata",
    "thresholds",
    "target",
    "sensitivity",
    "calibration",
    "drift",
    "recall_audit",
    "density",
    "presence",
    "trained_on_verified",
    "caution",
)
# A stratum whose verified precision lies this far below the confidence the model gave
# its detections, beyond the interval, raises the drift alarm (common practice: a
# calibrated model's confidence should be within a few points of verified precision).
DRIFT_MARGIN = 0.10
_BOOTSTRAP = 2000


def _sample(con: sqlite3.Connection, run_id: int, label: str | None, sample_id: int | None) -> sqlite3.Row:
    if sample_id is not None:
        row = con.execute("SELECT * FROM review_samples WHERE sample_id=?", (sample_id,)).fetchone()
        if row is None or row["run_id"] != run_id:
            raise InputError(f"--sample {sample_id}: no verification sample of run {run_id} with that id")
        return row
    sql = "SELECT * FROM review_samples WHERE run_id=?"
    args: list[Any] = [run_id]
    if label is not None:
        sql += " AND label=?"
        args.append(label)
    row = con.execute(sql + " ORDER BY sample_id DESC LIMIT 1", args).fetchone()
    if row is None:
        raise InputError(
            f"run {run_id} has no verification sample{f' of {label!r}' if label else ''}; "
            "draw one with 'callsieve review sample'"
        )
    return row


def _item_verdicts(con: sqlite3.Connection, sample_id: int, label: str) -> dict[int, dict]:
    """Per sampled detection: stratum, inclusion probability, confidence, consensus verdict."""
    items: dict[int, dict] = {}
    for r in con.execute(
        "SELECT i.detection_id, i.stratum, i.inclusion_probability, d.confidence, d.file_id, d.start_s, d.end_s, "
        "d.superseded, f.start_utc, f.name AS file, dep.name AS deployment FROM review_items i "
        "JOIN detections d USING (detection_id) JOIN files f ON f.file_id=d.file_id "
        "JOIN deployments dep ON dep.deployment_id=f.deployment_id WHERE i.sample_id=?",
        (sample_id,),
    ):
        items[r[0]] = dict(r) | {"votes": []}
    for r in con.execute(
        "SELECT v.detection_id, v.verdict, v.note, v.reviewer FROM verdicts v JOIN review_items i "
        "ON i.detection_id=v.detection_id AND i.sample_id=?",
        (sample_id,),
    ):
        verdict, _ = verdict_on_label(r["verdict"], r["note"], label)
        items[r["detection_id"]]["votes"].append(verdict)
    for it in items.values():
        it["verdict"] = consensus(it["votes"]) if it["votes"] else None
    return items


def _counts(items: dict[int, dict], n_strata: int, unsure_as: str | None = None) -> tuple[np.ndarray, ...]:
    yes, no, unsure = (np.zeros(n_strata, int) for _ in range(3))
    for it in items.values():
        v = it["verdict"]
        if v == "unsure" and unsure_as is not None:
            v = unsure_as
        h = it["stratum"] - 1
        if v == "yes":
            yes[h] += 1
        elif v == "no":
            no[h] += 1
        elif v == "unsure":
            unsure[h] += 1
    return yes, no, unsure


def _interval(x: float) -> float | None:
    return None if x is None or not np.isfinite(x) else float(x)


def _read_audit(path: Path, label: str, segments: list[dict]) -> dict[int, list[tuple[float, float]]]:
    """Annotated calls of ``label`` per audit segment (a label table of docs/formats.md §3)."""
    by_file: dict[str, list[dict]] = {}
    for s in segments:
        by_file.setdefault(s["file"], []).append(s)
    calls: dict[int, list[tuple[float, float]]] = {s["segment_id"]: [] for s in segments}
    try:
        fh = open(path, newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"{path}: cannot read the audit label table: {exc.strerror}") from None
    with fh:
        reader = csv.DictReader(fh)
        missing = [c for c in ("file", "start_s", "end_s", "label") if c not in (reader.fieldnames or [])]
        if missing:
            raise InputError(f"{path}: missing column(s) {', '.join(missing)}; see docs/formats.md §3")
        for row_no, row in enumerate(reader, start=2):
            try:
                start, end = float(row["start_s"]), float(row["end_s"])
            except (TypeError, ValueError):
                raise InputError(f"{path}: row {row_no}: start_s and end_s must be numbers") from None
            if not (np.isfinite(start) and np.isfinite(end) and end > start):
                raise InputError(f"{path}: row {row_no}: end_s must be after start_s")
            if (row.get("label") or "").strip() != label:
                continue
            owner = [s for s in by_file.get((row.get("file") or "").strip(), []) if s["start_s"] <= start < s["end_s"]]
            if not owner:
                raise InputError(
                    f"{path}: row {row_no}: the call at {start:g} s in {row.get('file')!r} lies in no audit "
                    "segment of the sample; annotate only inside the segments of segments.csv"
                )
            calls[owner[0]["segment_id"]].append((start, end))
    return calls


def _recall_over_segments(
    con: sqlite3.Connection, run_id: int, label: str, segments: list[dict], calls: dict, thresholds: list[float]
) -> tuple[list[dict], dict]:
    """Per threshold, recall over the audit segments (weighted by 1/π), and call density."""
    seg_ids = [s["segment_id"] for s in segments]
    truth_key, truth_start, truth_end, truth_seg = [], [], [], []
    for s in segments:
        for a, b in calls[s["segment_id"]]:
            truth_key.append(s["file_id"])
            truth_start.append(a)
            truth_end.append(b)
            truth_seg.append(s["segment_id"])
    det = con.execute(
        "SELECT file_id, start_s, end_s, confidence FROM detections WHERE run_id=? AND label=? AND superseded=0 "
        f"AND file_id IN ({','.join('?' * len({s['file_id'] for s in segments}))})",
        (run_id, label, *sorted({s["file_id"] for s in segments})),
    ).fetchall()
    d_key = np.array([r[0] for r in det], dtype=np.int64)
    d_start = np.array([r[1] for r in det], dtype=float)
    d_end = np.array([r[2] for r in det], dtype=float)
    d_conf = np.array([r[3] for r in det], dtype=float)
    position = {i: k for k, i in enumerate(seg_ids)}
    t_pos = np.array([position[i] for i in truth_seg], dtype=np.int64)
    weight = np.array([1.0 / s["inclusion_probability"] for s in segments])
    annotated = np.array([len(calls[i]) for i in seg_ids], dtype=float)
    out = []
    for t in thresholds:
        keep = d_conf >= t
        match = match_detections(
            d_key[keep],
            d_start[keep],
            d_end[keep],
            d_conf[keep],
            np.array(truth_key, dtype=np.int64),
            np.array(truth_start, dtype=float),
            np.array(truth_end, dtype=float),
        )
        found_calls = np.zeros(len(truth_key), bool)
        found_calls[match[match >= 0]] = True
        matched = np.bincount(t_pos[found_calls], minlength=len(seg_ids)).astype(float)
        r, _, low, high = est.ratio_estimate(matched, annotated, weights=weight)
        out.append(
            {"threshold": t, "recall": _interval(r), "recall_low": _interval(low), "recall_high": _interval(high)}
        )
    hours = np.array([(s["end_s"] - s["start_s"]) / 3600.0 for s in segments])
    rate, se, low, high = est.rate_estimate(annotated, hours, weights=weight)
    density = {
        "segments": len(segments),
        "annotated_calls": int(annotated.sum()),
        "audited_hours": round(float(hours.sum()), 4),
        "calls_per_hour": _interval(rate),
        "calls_per_hour_low": _interval(low),
        "calls_per_hour_high": _interval(high),
    }
    return out, density


def _effort_hours(con: sqlite3.Connection, run_id: int) -> float:
    row = con.execute(
        "SELECT SUM(f.duration_s) FROM run_files rf JOIN files f USING (file_id) "
        "WHERE rf.run_id=? AND rf.status='done'",
        (run_id,),
    ).fetchone()
    return float(row[0] or 0.0) / 3600.0


def _presence(
    con: sqlite3.Connection,
    run_id: int,
    label: str,
    edges: np.ndarray,
    first: int,
    yes: np.ndarray,
    no: np.ndarray,
    items: dict[int, dict],
    seed: int,
) -> dict:
    """Hours and days holding at least one true detection at or above stratum ``first``.

    Each detection counts with its stratum's verified precision (a verified one with its
    own verdict), detections taken as independent. A stratum's precision is drawn from its
    Jeffreys posterior Beta(k + ½, n − k + ½) for the interval, and the point is that
    posterior's mean (½ for a stratum without verdicts).
    """
    from .review import stratum_index

    files = con.execute("SELECT file_id, start_utc FROM files WHERE start_utc<>'' ORDER BY file_id").fetchall()
    file_key = np.array([f[0] for f in files], dtype=np.int64)
    file_epoch = np.array([epoch_s(f[1]) for f in files])
    cur = con.cursor()
    cur.row_factory = None  # plain tuples: a year's run may hold millions of rows
    cur.execute(
        "SELECT detection_id, confidence, start_s, file_id FROM detections "
        "WHERE run_id=? AND label=? AND superseded=0 AND confidence>=?",
        (run_id, label, float(edges[first])),
    )
    ids, conf, t = [], [], []
    while chunk := cur.fetchmany(100_000):  # a year's run may hold millions
        a = np.array(chunk, dtype=float)
        ids.append(a[:, 0].astype(np.int64))
        conf.append(a[:, 1])
        t.append(a[:, 2] + file_epoch[np.searchsorted(file_key, a[:, 3].astype(np.int64))])
    if not ids:
        return {"hours_detected": 0, "days_detected": 0, "hours_expected": 0.0, "days_expected": 0.0}
    ids, t = np.concatenate(ids), np.concatenate(t)
    h_idx = stratum_index(np.concatenate(conf), edges)
    # Verified detections enter with their own verdict (1 or 0), the rest by stratum (NaN here).
    fixed_p = np.full(ids.size, np.nan)
    judged = [(d, it["verdict"] == "yes") for d, it in items.items() if it["verdict"] in ("yes", "no")]
    if judged:
        keys = np.array([j[0] for j in judged], dtype=np.int64)
        yes_of = np.array([j[1] for j in judged], dtype=float)
        order = np.argsort(keys)
        where = np.isin(ids, keys)
        fixed_p[where] = yes_of[order][np.searchsorted(keys[order], ids[where])]
    hour_of = np.floor(t / 3600.0).astype(np.int64)
    day_of = np.floor(t / 86400.0).astype(np.int64)
    rng = np.random.default_rng(seed)
    n_strata = edges.size - 1
    draws = rng.beta(yes[:, None] + 0.5, no[:, None] + 0.5, size=(n_strata, _BOOTSTRAP))
    # The posterior mean, so the point and its interval come from one distribution.
    point = (yes + 0.5) / (yes + no + 1.0)
    out: dict[str, Any] = {}
    for unit, keys in (("hours", hour_of), ("days", day_of)):
        names, inverse = np.unique(keys, return_inverse=True)
        # log(1 − p) summed per unit: known verdicts enter as 0 or certain; others by stratum.
        known = ~np.isnan(fixed_p)
        certain = np.bincount(inverse[known & (fixed_p == 1.0)], minlength=names.size) > 0
        counts = np.zeros((names.size, n_strata))
        np.add.at(counts, (inverse[~known], h_idx[~known]), 1.0)
        p_unit = est.presence_probability(counts, point, certain)
        reps = est.presence_probability(counts, draws, certain).sum(axis=0)
        out[f"{unit}_detected"] = int(names.size)
        out[f"{unit}_expected"] = round(float(p_unit.sum()), 3)
        out[f"{unit}_expected_low"] = round(float(np.percentile(reps, 2.5)), 3)
        out[f"{unit}_expected_high"] = round(float(np.percentile(reps, 97.5)), 3)
        fmt = "%Y-%m-%dT%H" if unit == "hours" else "%Y-%m-%d"
        step = 3600 if unit == "hours" else 86400
        out[f"{unit}_probability"] = {
            datetime.fromtimestamp(int(n) * step, UTC).strftime(fmt): round(float(p), 4)
            for n, p in zip(names, p_unit, strict=True)
        }
    return out


def estimate_run(
    db: str | Path,
    run_id: int | None = None,
    label: str | None = None,
    target_precision: float = 0.9,
    sample_id: int | None = None,
    audit: str | Path | None = None,
    confidence_level: float = 0.95,
    seed: int = 0,
) -> dict[str, Any]:
    """Precision, expected true detections, thresholds, recall, density and presence of a run.

    Parameters
    ----------
    db : detection store holding the run, its verification sample and verdicts
    run_id : int, optional, the scoring run (default: the latest)
    label : str, optional, the class the sample verified (default: the latest sample's)
    target_precision : float, 0..1, precision the reported thresholds must reach
    sample_id : int, optional, which sample (default: the run's latest)
    audit : path, optional, label table of every call annotated in the audit segments
    confidence_level : float, of every interval (0..1)
    seed : int, of the presence interval's random draws

    Returns
    -------
    dict with the keys of ``ESTIMATE_KEYS`` (docs/estimates.md).
    """
    if not 0.0 < target_precision < 1.0:
        raise InputError(f"--target-precision must be between 0 and 1, got {target_precision:g}")
    con = open_store(db, create=False)
    try:
        run_id = latest_run_id(con, run_id)
        sample = _sample(con, run_id, label, sample_id)
        label = str(sample["label"])
        design = json.loads(sample["design"])
        strata_rows = [
            dict(r)
            for r in con.execute("SELECT * FROM review_strata WHERE sample_id=? ORDER BY low", (sample["sample_id"],))
        ]
        if not strata_rows:
            raise InputError(
                f"sample {sample['sample_id']} has no strata; draw it again with 'callsieve review sample'"
            )
        numbers = [s["stratum"] for s in strata_rows]
        renumber = {n: i + 1 for i, n in enumerate(numbers)}
        items = _item_verdicts(con, sample["sample_id"], label)
        for it in items.values():
            it["stratum"] = renumber[it["stratum"]]
        trained = _set_aside_training_audio(con, run_id, items)
        L = len(strata_rows)
        N = np.array([s["population"] for s in strata_rows], int)
        edges = np.array([strata_rows[0]["low"]] + [s["high"] for s in strata_rows], float)
        yes, no, unsure = _counts(items, L)
        reviewers = sorted(
            {
                r[0]
                for r in con.execute(
                    "SELECT DISTINCT v.reviewer FROM verdicts v JOIN review_items i ON i.detection_id=v.detection_id "
                    "AND i.sample_id=?",
                    (sample["sample_id"],),
                )
            }
        )
        strata = []
        lo_w, hi_w = est.wilson_interval(yes, yes + no, confidence_level)
        for h, s in enumerate(strata_rows):
            judged = yes[h] + no[h]
            conf_mean = [
                it["confidence"] for it in items.values() if it["stratum"] == h + 1 and it["verdict"] in ("yes", "no")
            ]
            strata.append(
                {
                    "stratum": h + 1,
                    "low": s["low"],
                    "high": s["high"],
                    "population": int(N[h]),
                    "sampled": int(s["sampled"]),
                    "yes": int(yes[h]),
                    "no": int(no[h]),
                    "unsure": int(unsure[h]),
                    "pending": int(s["sampled"] - yes[h] - no[h] - unsure[h]),
                    "precision": _interval(yes[h] / judged) if judged else None,
                    "precision_low": _interval(lo_w[h]) if judged else None,
                    "precision_high": _interval(hi_w[h]) if judged else None,
                    "mean_confidence": round(float(np.mean(conf_mean)), 4) if conf_mean else None,
                }
            )
        n_judged = yes + no
        thresholds = []
        for h in range(L):
            p = est.precision_above(N, n_judged, yes, h)
            low, high = est.korn_graubard_interval(p, confidence_level)
            n_above = int(N[h:].sum())
            thresholds.append(
                {
                    "threshold": float(edges[h]),
                    "detections": n_above,
                    "precision": _interval(p.estimate),
                    "precision_low": _interval(low),
                    "precision_high": _interval(high),
                    "expected_true": _interval(round(n_above * p.estimate, 1)),
                    "expected_true_low": _interval(round(n_above * low, 1)),
                    "expected_true_high": _interval(round(n_above * high, 1)),
                    "recall": None,
                    "recall_low": None,
                    "recall_high": None,
                }
            )
        h_point = est.point_threshold_index(N, n_judged, yes, target_precision)
        h_sure = est.guaranteed_threshold_index(N, n_judged, yes, target_precision, confidence_level)
        target = {
            "precision": target_precision,
            "threshold_point": None if h_point is None else float(edges[h_point]),
            "threshold_guaranteed": None if h_sure is None else float(edges[h_sure]),
        }
        sensitivity = []
        for case in ("yes", "no"):
            y2, n2, _ = _counts(items, L, unsure_as=case)
            p = est.precision_above(N, y2 + n2, y2, 0)
            sensitivity.append({"unsure_as": case, "precision_above_floor": _interval(p.estimate)})
        calibration = _calibration(items, strata, target_precision)
        drift = _drift(strata)
        recall_audit, density = None, None
        if audit is not None:
            segments = [
                dict(r)
                for r in con.execute(
                    "SELECT g.*, f.name AS file FROM audit_segments g JOIN files f USING (file_id) WHERE g.sample_id=?",
                    (sample["sample_id"],),
                )
            ]
            if not segments:
                raise InputError(
                    f"--audit {audit}: sample {sample['sample_id']} has no audit segments; "
                    "draw them with 'callsieve review sample --segments M --segment-minutes L'"
                )
            calls = _read_audit(Path(audit), label, segments)
            recall_audit, density = _recall_over_segments(
                con, run_id, label, segments, calls, [t["threshold"] for t in thresholds]
            )
            for t, r in zip(thresholds, recall_audit, strict=True):
                t.update({k: r[k] for k in ("recall", "recall_low", "recall_high")})
            effort = _effort_hours(con, run_id)
            density["effort_hours"] = round(effort, 3)
            for key in ("", "_low", "_high"):
                rate = density[f"calls_per_hour{key}"]
                density[f"total_calls{key}"] = None if rate is None else round(rate * effort, 1)
        first = h_sure if h_sure is not None else 0
        presence = _presence(con, run_id, label, edges, first, yes, no, items, seed)
        presence["threshold"] = float(edges[first])
        presence["threshold_is"] = "guaranteed" if h_sure is not None else "floor"
    finally:
        con.close()
    return {
        "run_id": run_id,
        "label": label,
        "sample_id": int(sample["sample_id"]),
        "design": design,
        "verdicts": {"yes": int(yes.sum()), "no": int(no.sum()), "unsure": int(unsure.sum())},
        "reviewers": reviewers,
        "strata": strata,
        "thresholds": thresholds,
        "target": target,
        "sensitivity": sensitivity,
        "calibration": calibration,
        "drift": drift,
        "recall_audit": recall_audit,
        "density": density,
        "presence": presence,
        "trained_on_verified": trained,
        "caution": f"Estimates hold for this run and its verified sample only. {CAUTION}",
    }


def _set_aside_training_audio(con: sqlite3.Connection, run_id: int, items: dict[int, dict]) -> dict:
    """Leave out verdicts on audio the run's model was trained on (its verified stretches).

    A model retrained from verdicts knows those stretches: counting their verdicts again
    would flatter its precision. They are set aside (verdict None) and counted.
    """
    row = con.execute("SELECT parameters FROM runs WHERE run_id=?", (run_id,)).fetchone()
    spans = json.loads(row[0]).get("verified_spans", []) if row else []
    by_file: dict[tuple[str, str], list[tuple[float, float]]] = {}
    for sp in spans:
        by_file.setdefault((sp["deployment"], sp["file"]), []).append((sp["start_s"], sp["end_s"]))
    left_out = 0
    for it in items.values():
        near = by_file.get((it["deployment"], it["file"]), [])
        if it["verdict"] is not None and any(a < it["end_s"] and it["start_s"] < b for a, b in near):
            it["verdict"] = None
            left_out += 1
    return {
        "training_stretches": len(spans),
        "verdicts_set_aside": left_out,
        "message": (
            f"{left_out} verdict(s) lie on audio this model was trained on and are left out"
            if left_out
            else "no verdict lies on audio this model was trained on"
        ),
    }


def _calibration(items: dict[int, dict], strata: list[dict], target: float) -> dict:
    judged = [it for it in items.values() if it["verdict"] in ("yes", "no")]
    fit = None
    if judged:
        conf = np.array([it["confidence"] for it in judged])
        correct = np.array([it["verdict"] == "yes" for it in judged])
        weight = np.array([1.0 / it["inclusion_probability"] for it in judged])
        fit = est.fit_confidence_calibration(conf, correct, weight / weight.mean())
    return {
        "per_stratum": [
            {"stratum": s["stratum"], "mean_confidence": s["mean_confidence"], "precision": s["precision"]}
            for s in strata
        ],
        "logistic": None if fit is None else {"beta0": round(fit[0], 4), "beta1": round(fit[1], 4)},
        # The confidence at which the fit gives a detection the target's chance of being
        # true (Wood & Kahl 2024); none where the fit does not rise with confidence.
        "confidence_at_target": (None if fit is None or fit[1] <= 0 else est.score_for_probability(target, *fit)),
    }


def _drift(strata: list[dict]) -> dict:
    """Alarm where verified precision lies well below the confidence the model claimed."""
    low = [
        s
        for s in strata
        if s["precision_high"] is not None
        and s["mean_confidence"] is not None
        and s["precision_high"] < s["mean_confidence"] - DRIFT_MARGIN
    ]
    if not low:
        return {"flag": False, "message": "verified precision agrees with the model's confidence within the intervals"}
    worst = min(low, key=lambda s: s["precision_high"] - s["mean_confidence"])
    return {
        "flag": True,
        "strata": [s["stratum"] for s in low],
        "message": (
            f"verified precision falls well below the model's confidence in {len(low)} stratum(s): in stratum "
            f"{worst['stratum']} the model gave {worst['mean_confidence']:.2f} on average, the reviewers found "
            f"{worst['precision']:.2f} (at most {worst['precision_high']:.2f}); the model may not suit this "
            "deployment; verify more, or retrain with these verdicts (review export-labels)"
        ),
    }


def _fmt(x: float | None, digits: int = 3) -> str:
    return "n/a" if x is None else f"{x:.{digits}f}"


def _edge_digits(edges: list[float]) -> int:
    """Decimals that print every stratum edge apart (confidences crowd near 1)."""
    for d in range(4, 10):
        if len({f"{e:.{d}f}" for e in edges}) == len(set(edges)):
            return d
    return 10


def format_estimate(r: dict[str, Any]) -> str:
    """The estimate as a page of text."""
    d = _edge_digits([s["low"] for s in r["strata"]] + [r["strata"][-1]["high"]])
    v = r["verdicts"]
    lines = [
        f"run {r['run_id']}, {r['label']}: sample {r['sample_id']}, verdicts yes {v['yes']}, no {v['no']}, "
        f"unsure {v['unsure']} (unsure left out), reviewers {len(r['reviewers'])}",
        "",
        f"stratum  {'confidence':<{2 * d + 5}}      N     n  yes   no  uns.  precision (95 %)",
    ]
    for s in r["strata"]:
        lines.append(
            f"{s['stratum']:>7}  {s['low']:.{d}f}-{s['high']:.{d}f}  {s['population']:>6} {s['sampled']:>5} "
            f"{s['yes']:>4} {s['no']:>4} {s['unsure']:>5}  {_fmt(s['precision'], 2)} "
            f"({_fmt(s['precision_low'], 2)}-{_fmt(s['precision_high'], 2)})"
        )
    lines += [
        "",
        f"{'threshold':>{d + 2}}  detections  precision above (95 %)   expected true (95 %)     recall (95 %)",
    ]
    for t in r["thresholds"]:
        lines.append(
            f"{t['threshold']:>{d + 2}.{d}f}  {t['detections']:>10}  {_fmt(t['precision'], 3)} "
            f"({_fmt(t['precision_low'], 3)}-{_fmt(t['precision_high'], 3)})    "
            f"{_fmt(t['expected_true'], 0)} ({_fmt(t['expected_true_low'], 0)}-{_fmt(t['expected_true_high'], 0)})"
            + (
                f"     {_fmt(t['recall'], 2)} ({_fmt(t['recall_low'], 2)}-{_fmt(t['recall_high'], 2)})"
                if t["recall"] is not None
                else "     n/a (no audit)"
            )
        )
    tg = r["target"]
    lines += [
        "",
        f"target precision {tg['precision']:g}: lowest threshold by point estimate {_fmt(tg['threshold_point'], d)}; "
        f"with a 95 % guarantee {_fmt(tg['threshold_guaranteed'], d)} (act on this one)",
    ]
    s_yes, s_no = r["sensitivity"]
    lines.append(
        f"unsure verdicts: precision above the floor would be {_fmt(s_yes['precision_above_floor'])} if all were yes, "
        f"{_fmt(s_no['precision_above_floor'])} if all were no"
    )
    if r["density"]:
        d = r["density"]
        lines.append(
            f"call density from {d['segments']} audit segments ({d['annotated_calls']} calls in "
            f"{d['audited_hours']:.2f} h): {_fmt(d['calls_per_hour'], 2)} calls per hour "
            f"({_fmt(d['calls_per_hour_low'], 2)}-{_fmt(d['calls_per_hour_high'], 2)}); about "
            f"{_fmt(d['total_calls'], 0)} calls in the {d['effort_hours']:.1f} recorded hours "
            f"({_fmt(d['total_calls_low'], 0)}-{_fmt(d['total_calls_high'], 0)})"
        )
    p = r["presence"]
    if "hours_expected_low" in p:
        lines.append(
            f"presence at {p['threshold']:.{d}f} ({p['threshold_is']}): "
            f"{p['hours_detected']} detection-positive hours, "
            f"of which {p['hours_expected']:.1f} expected truly present ({p['hours_expected_low']:.1f}-"
            f"{p['hours_expected_high']:.1f}); {p['days_detected']} days, {p['days_expected']:.1f} "
            f"({p['days_expected_low']:.1f}-{p['days_expected_high']:.1f})"
        )
    lines.append(("DRIFT: " if r["drift"]["flag"] else "calibration: ") + r["drift"]["message"])
    if r["trained_on_verified"]["training_stretches"]:
        lines.append(f"training audio: {r['trained_on_verified']['message']}")
    lines.append(r["caution"])
    return "\n".join(lines)
