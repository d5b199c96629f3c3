"""`callsieve demo`: write the invented scenario, then run every step of the job on it."""

from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import Any, TextIO

from .calibrate import calibration_summary
from .export import CAUTION
from .scenario import SIMULATED_NOTE, write_scenario

__all__ = ["run_demo"]


def run_demo(
    out_dir: str | Path,
    seed: int = 7,
    hours: float = 12.0,
    run: bool = True,
    log: TextIO | None = sys.stderr,
) -> dict[str, Any]:
    """Write the scenario under ``out_dir`` and, unless ``run`` is False, run the job on it.

    Parameters
    ----------
    out_dir : str or Path
    seed : int, the scenario's random seed
    hours : float, h, span of the survey deployment (the training one spans half)
    run : bool, False writes the scenario only
    log : text stream for progress, or None

    Returns
    -------
    dict
        The scenario summary, plus one entry per step that ran (``calibration`` ...).
    """

    def say(text: str) -> None:
        if log is not None:
            print(text, file=log, flush=True)

    out = Path(out_dir)
    t0 = time.perf_counter()
    say(f"demo: writing the {SIMULATED_NOTE} to {out} (seed {seed}, {hours:g} h)")
    summary = write_scenario(out, seed=seed, hours=hours)
    summary["seconds"] = {"scenario": round(time.perf_counter() - t0, 1)}
    if not run:
        return summary
    t1 = time.perf_counter()
    summary["calibration"] = {}
    for key in ("training_manifest", "survey_manifest"):
        cal = calibration_summary(summary[key])
        summary["calibration"][cal["deployment"]] = {
            k: cal[k]
            for k in (
                "files",
                "recorded_hours",
                "sample_rate_hz",
                "first_start_utc",
                "last_end_utc",
            )
        } | {
            "gaps": len(cal["gaps"]),
            "lowest_clip_level_db": min(r["clip_level_db"] for r in cal["response"]),
        }
        say(
            f"demo: checked {cal['deployment']}: {cal['files']} files, {cal['recorded_hours']:.2f} h, "
            f"{len(cal['gaps'])} gaps"
        )
    summary["seconds"]["calibration"] = round(time.perf_counter() - t1, 1)

    # Train on the training site: every label plus background, the default configuration,
    # experiments recorded in the demo's own MLflow store.
    t2 = time.perf_counter()
    from .training import train

    tracking_uri = f"sqlite:///{(out / 'mlflow.db').resolve()}"
    say(f"demo: training on {summary['training_labels']} (experiments in {tracking_uri})")
    report = train(
        [summary["training_manifest"]],
        [summary["training_labels"]],
        out / "models" / "demo-model.skops",
        tracking_uri=tracking_uri,
        experiment="callsieve-demo",
        progress=None if log is None else (lambda line: None),
    )
    summary["training"] = report
    summary["seconds"]["training"] = round(time.perf_counter() - t2, 1)

    # Screen the survey site with it, then export the detection table.
    t3 = time.perf_counter()
    from .export import export_detections
    from .scoring import score_deployment

    db = out / "detections.db"
    say(f"demo: scoring {summary['survey_manifest']} into {db}")
    scored = score_deployment(report["model"], summary["survey_manifest"], db, jobs=2)
    exported = export_detections(db, out / "detections.csv")
    import sqlite3

    con = sqlite3.connect(db)
    by_label = dict(
        con.execute(
            "SELECT label, COUNT(*) FROM detections WHERE run_id=? AND confidence>=0.5 AND superseded=0 GROUP BY label",
            (scored["run_id"],),
        ).fetchall()
    )
    con.close()
    summary["scoring"] = scored | {"export": exported["out"], "at_0.5": by_label}
    summary["seconds"]["scoring"] = round(time.perf_counter() - t3, 1)

    # Judge the run and the excess baseline against the survey's truth, which covers
    # every survey file (the scenario knows every call it wrote).
    t4 = time.perf_counter()
    from .evaluate import evaluate

    say(f"demo: evaluating run {scored['run_id']} and the excess baseline against {summary['survey_truth']}")
    summary["evaluation"] = evaluate(
        db, summary["survey_truth"], out / "evaluation", complete_truth=True, tracking_uri=tracking_uri
    )
    summary["seconds"]["evaluation"] = round(time.perf_counter() - t4, 1)

    # Verify a sample of the survey run as a team would (docs/review.md); the reviewer is
    # simulated from the survey's truth, and its verdicts go through the same import.
    t5 = time.perf_counter()
    say(f"demo: drawing a verification sample of run {scored['run_id']} into {out / 'review'}")
    summary["review"] = _review_step(out, db, summary, seed)
    summary["seconds"]["review"] = round(time.perf_counter() - t5, 1)

    # What the verified sample says of the whole run, beside what the truth says.
    if "sample" in summary["review"]:
        t6 = time.perf_counter()
        say(f"demo: estimating precision of run {scored['run_id']} from the verified sample")
        summary["estimate"] = _estimate_step(db, scored["run_id"], summary)
        summary["seconds"]["estimate"] = round(time.perf_counter() - t6, 1)

    # Close the loop: the verdicts become a partial label table, a model is retrained with
    # them, the survey is scored again, and both runs are judged on files no verdict touched.
    if "estimate" in summary:
        t8 = time.perf_counter()
        say("demo: retraining with the verified detections, scoring again, judging both runs on held-out files")
        summary["retraining"] = _retraining_step(out, db, summary, report, scored["run_id"], tracking_uri, seed)
        summary["seconds"]["retraining"] = round(time.perf_counter() - t8, 1)

    # The monitoring report: presence per hour and day against effort, the soundscape.
    t7 = time.perf_counter()
    from .report import build_report

    say(f"demo: writing the monitoring report of run {scored['run_id']} into {out / 'report'}")
    summary["report"] = build_report(db, out / "report", run_id=scored["run_id"]) | {"out": str(out / "report")}
    summary["seconds"]["report"] = round(time.perf_counter() - t7, 1)

    # The detection range: the level chain of the target's call through the survey
    # recorder, and its detection function from the evaluation (the scenario's source levels).
    t9 = time.perf_counter()
    say("demo: the level chain and detection function of the target at the survey site")
    summary["budget"] = _budget_step(out, db, summary, scored["run_id"])
    summary["seconds"]["budget"] = round(time.perf_counter() - t9, 1)
    summary["seconds"]["total"] = round(time.perf_counter() - t0, 1)
    return summary


def _budget_step(out: Path, db: Path, summary: dict[str, Any], run_id: int) -> dict[str, Any]:
    """`budget` for the target at the survey site, with the scenario's source levels."""
    import csv

    import numpy as np

    from .budget import budget_chain, budget_detection, detection_figure
    from .errors import InputError
    from .plots import save

    survey = next(site["name"] for site in summary["sites"] if site["role"] == "survey")
    with open(summary["calls_table"], newline="", encoding="utf-8") as fh:
        calls = [r for r in csv.DictReader(fh) if r["label"] == summary["target_label"] and r["deployment"] == survey]
    level = np.array([float(r["source_level_db"]) for r in calls])
    low = float(np.median([float(r["low_hz"]) for r in calls]))
    high = float(np.median([float(r["high_hz"]) for r in calls]))
    centre = float(np.sqrt(low * high))
    sl, sd = round(float(level.mean()), 1), round(float(level.std()), 1)
    result = budget_chain(summary["survey_manifest"], sl, centre)
    try:
        detection = budget_detection(
            summary["survey_manifest"],
            db,
            run_id,
            out / "evaluation",
            sl,
            sd,
            centre,
            label=summary["target_label"],
            band=(low, high),
        )
    except InputError as exc:  # too few evaluated calls in a short demo
        result["detection_skipped"] = str(exc)
        return result
    save(detection_figure(detection), out / "evaluation" / "detection-function.png")
    result["detection"] = detection
    result["detection"]["figure"] = str(out / "evaluation" / "detection-function.png")
    return result


def _retraining_step(
    out: Path, db: Path, summary: dict[str, Any], first: dict[str, Any], run_id: int, tracking_uri: str, seed: int
) -> dict[str, Any]:
    """export-labels → train → score → evaluate on held-out files → a new sample and estimate."""
    import csv

    from .evaluate import evaluate
    from .scoring import score_deployment
    from .training import train
    from .verified_labels import export_verified_labels

    exported = export_verified_labels(db, out / "review" / "verified-labels.csv", run_id=run_id, force=True)
    with open(exported["out"], newline="", encoding="utf-8") as fh:
        verified_files = {r["file"] for r in csv.DictReader(fh)}
    retrained = train(
        [summary["training_manifest"], summary["survey_manifest"]],
        [summary["training_labels"], exported["out"]],
        out / "models" / "demo-model-verified.skops",
        tracking_uri=tracking_uri,
        experiment="callsieve-demo",
        force=True,
    )
    rescored = score_deployment(retrained["model"], summary["survey_manifest"], db, jobs=2)
    # Held out: survey files holding no verified stretch, so the new model never saw them.
    with open(summary["survey_truth"], newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        rows = [r for r in reader if r["file"] not in verified_files]
        columns = reader.fieldnames or []
    held_out = out / "review" / "truth-held-out.csv"
    with open(held_out, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=columns)
        w.writeheader()
        w.writerows(rows)
    label = summary["target_label"]
    judged = {}
    for name, run in (("before", run_id), ("after", rescored["run_id"])):
        ap = None
        # A short survey can have a verdict in every file that holds a call: then nothing
        # is held out, and the comparison below is the only one (said so where printed).
        if rows:
            ev = evaluate(db, held_out, out / f"evaluation-held-out-run{run}", run_id=run, n_resamples=200)
            ap = ev["classes"].get(label, {}).get("average_precision")
        model = first["model"] if name == "before" else retrained["model"]
        judged[name] = {"run_id": run, "model": model, "average_precision": ap}
    # On every survey file too: the verified stretches are then in both training and truth,
    # which flatters the new model; said so where printed.
    ev_all = evaluate(
        db,
        summary["survey_truth"],
        out / f"evaluation-run{rescored['run_id']}",
        run_id=rescored["run_id"],
        complete_truth=True,
        n_resamples=200,
    )
    judged["before"]["average_precision_all_files"] = (
        summary["evaluation"]["classes"].get(label, {}).get("average_precision")
    )
    judged["after"]["average_precision_all_files"] = ev_all["classes"].get(label, {}).get("average_precision")
    # A fresh sample of the new run, rendered like the first: `review serve` opens the
    # latest sample of a store, and a reviewer must be able to look at it.
    review = _review_step(out, db, summary, seed + 1, folder=out / "review-after")
    if "sample" in review:
        judged["after"]["estimate"] = _estimate_step(db, rescored["run_id"], summary)
    return {
        "verified_rows": exported["rows"],
        "verified_by_label": exported["by_label"],
        "held_out_files": len({r["file"] for r in rows}),
        "held_out_target_calls": sum(r["label"] == label for r in rows),
        "held_out_truth": str(held_out),
        "model": retrained["model"],
        "before": judged["before"],
        "after": judged["after"],
    }


def _estimate_step(db: Path, run_id: int, summary: dict[str, Any]) -> dict[str, Any]:
    """`estimate` on the verified sample, with the true precision above each threshold."""
    import numpy as np

    from .estimate import estimate_run

    est = estimate_run(db, run_id=run_id, label=summary["target_label"], target_precision=0.9)
    truth = _run_truth(db, run_id, summary)
    conf = np.array(list(truth["confidence"].values()))
    correct = np.array([truth["correct"][d] for d in truth["confidence"]])
    for t in est["thresholds"]:
        above = conf >= t["threshold"]
        t["true_precision"] = round(float(correct[above].mean()), 4) if above.any() else None
        t["true_count"] = int(correct[above].sum())
    return est


def _run_truth(db: Path, run_id: int, summary: dict[str, Any]) -> dict[str, dict[int, Any]]:
    """Per detection of the target in the run: its confidence and whether it is a true call
    (the matching rule of docs/evaluation.md over the whole run)."""
    import numpy as np

    from .deployment import load_deployment
    from .evaluation import match_detections
    from .labels import read_label_table
    from .store import open_store

    label = summary["target_label"]
    truth = read_label_table(summary["survey_truth"], [load_deployment(summary["survey_manifest"])], [])
    truth = [a for a in truth if a.label == label]
    con = open_store(db, create=False)
    try:
        dets = con.execute(
            "SELECT d.detection_id, f.name, d.start_s, d.end_s, d.confidence FROM detections d "
            "JOIN files f ON f.file_id=d.file_id WHERE d.run_id=? AND d.label=? AND d.superseded=0",
            (run_id, label),
        ).fetchall()
    finally:
        con.close()
    match = match_detections(
        [r[1] for r in dets],
        np.array([r[2] for r in dets]),
        np.array([r[3] for r in dets]),
        np.array([r[4] for r in dets]),
        [a.file for a in truth],
        np.array([a.start_s for a in truth]),
        np.array([a.end_s for a in truth]),
    )
    return {
        "confidence": {r[0]: r[4] for r in dets},
        "correct": {r[0]: bool(m >= 0) for r, m in zip(dets, match, strict=True)},
    }


# The demo's verification sample: small, so that rendering stays cheap in tests and CI.
REVIEW_ITEMS = 60
REVIEW_BINS = 5
# The simulated reviewer gives the wrong verdict on this share of items (seeded), as a
# reminder that verdicts are not truth either.
REVIEW_ERROR_RATE = 0.03
SIMULATED_REVIEWER = "simulated-reviewer"


def _review_step(out: Path, db: Path, summary: dict[str, Any], seed: int, folder: Path | None = None) -> dict[str, Any]:
    """Draw the sample, answer it from the truth with errors, import the answers, count them."""
    import csv

    from .errors import InputError
    from .review import draw_sample, import_verdicts
    from .store import open_store

    folder = folder or out / "review"
    # A rerun of the demo replaces its own earlier sample (its verdicts were simulated).
    try:
        drawn = draw_sample(
            db,
            folder,
            label=summary["target_label"],
            n=REVIEW_ITEMS,
            bins=REVIEW_BINS,
            seed=seed,
            replace=True,
        )
    except InputError as exc:  # a run without a target detection has nothing to verify
        return {"skipped": str(exc)}
    answers = _simulated_verdicts(db, drawn["sample_id"], summary, seed)
    table = folder / "verdicts-simulated.csv"
    with open(table, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["detection_id", "verdict", "reviewer", "note"])
        for det, verdict, truth in answers:
            w.writerow([det, verdict, SIMULATED_REVIEWER, "" if verdict == truth else "simulated error"])
    imported = import_verdicts(db, table)
    con = open_store(db, create=False)
    try:
        counts = {
            (r[0], r[1]): r[2]
            for r in con.execute(
                "SELECT ri.stratum, v.verdict, COUNT(*) FROM review_items ri JOIN verdicts v "
                "ON v.detection_id=ri.detection_id AND v.reviewer=? WHERE ri.sample_id=? GROUP BY 1, 2",
                (SIMULATED_REVIEWER, drawn["sample_id"]),
            )
        }
    finally:
        con.close()
    for s in drawn["strata"]:
        s.update({v: counts.get((s["stratum"], v), 0) for v in ("yes", "no", "unsure")})
    return {
        "sample": drawn,
        "verdicts": str(table),
        "imported": imported,
        "error_rate": REVIEW_ERROR_RATE,
        "errors": sum(1 for _, v, t in answers if v != t),
    }


def _simulated_verdicts(db: Path, sample_id: int, summary: dict[str, Any], seed: int) -> list[tuple[int, str, str]]:
    """(detection id, verdict given, true verdict) per sampled item.

    True means the detection matches a truth call under the matching rule of
    docs/evaluation.md, applied to the whole run (matching is one-to-one, so a sampled
    detection's truth depends on its neighbours). A seeded share REVIEW_ERROR_RATE of
    the verdicts is flipped.
    """
    import numpy as np

    from .store import open_store

    con = open_store(db, create=False)
    try:
        run_id = con.execute("SELECT run_id FROM review_samples WHERE sample_id=?", (sample_id,)).fetchone()[0]
        sampled = [r[0] for r in con.execute("SELECT detection_id FROM review_items WHERE sample_id=?", (sample_id,))]
    finally:
        con.close()
    true = {d: ("yes" if c else "no") for d, c in _run_truth(db, run_id, summary)["correct"].items()}
    rng = np.random.default_rng([seed, 14])
    sampled.sort()
    wrong = rng.random(len(sampled)) < REVIEW_ERROR_RATE
    flip = {"yes": "no", "no": "yes"}
    return [(d, flip[true[d]] if w else true[d], true[d]) for d, w in zip(sampled, wrong, strict=True)]


def format_demo_summary(summary: dict[str, Any]) -> str:
    """The closing page of the demo, for the terminal."""
    lines = [f"callsieve demo — {summary['note']}", ""]
    lines.append("Scenario")
    for site in summary["sites"]:
        lines.append(
            f"  {site['name']:<12} {site['role']:<8} {site['sample_rate_hz']} Hz "
            f"{site['extension'].upper()} {site['subtype']}, {summary['files'][site['name']]} files"
        )
    lines.append("  calls written (label: training site / survey site):")
    names = [s["name"] for s in summary["sites"]]
    labels = list(summary["calls"][names[0]])
    for label in labels:
        marker = "  (target)" if label == summary["target_label"] else ""
        lines.append(
            f"    {label:<17} {summary['calls'][names[0]][label]:>5} / {summary['calls'][names[1]][label]:<5}{marker}"
        )
    snr = summary.get("survey_target_snr_db", {})
    if snr:
        lines.append(
            "  target SNR at the survey site, dB (10/25/50/75/90th percentile): "
            + " / ".join(f"{snr[k]:g}" for k in ("p10", "p25", "p50", "p75", "p90"))
        )
    if "calibration" in summary:
        lines += ["", "Calibration"]
        for name, cal in summary["calibration"].items():
            lines.append(
                f"  {name:<12} {cal['files']} files, {cal['recorded_hours']:.2f} h recorded, "
                f"{cal['gaps']} gaps, {cal['first_start_utc']} .. {cal['last_end_utc']}, "
                f"clip from {cal['lowest_clip_level_db']:.1f} dB re 1 µPa (0-pk)"
            )
    if "training" in summary:
        tr = summary["training"]
        st = tr["settings"]
        lines += ["", f"Training (cross-validation over windows, grouped by {tr['cv_grouping']})"]
        lines.append(
            f"  band {st['low_hz']:g}-{st['high_hz']:g} Hz, windows of {st['window_s']:g} s every "
            f"{st['window_hop_s']:g} s; model {tr['model']}"
        )
        for c, m in sorted(tr["cv"].items()):
            marker = "  (target)" if c == summary["target_label"] else ""
            lines.append(
                f"    {c:<17} average precision {m['average_precision']:.3f}, precision "
                f"{m['precision_at_0.5']:.3f} and recall {m['recall_at_0.5']:.3f} at 0.5{marker}"
            )
        if "run" in tr:
            lines.append(
                f"  experiment run {tr['run']['run_id']}; browse with: "
                f"mlflow ui --backend-store-uri {tr['run']['tracking_uri']}"
            )
    if "scoring" in summary:
        sc = summary["scoring"]
        lines += ["", "Scoring the survey site"]
        lines.append(
            f"  run {sc['run_id']}: {sc['files']} files, {sc['recorded_hours']:.2f} h in {sc['seconds']:.1f} s "
            f"({sc['hours_per_second']} h of audio per second); {sc['detections']} detections stored "
            "(confidence >= 0.1)"
        )
        lines.append("  at confidence >= 0.5: " + ", ".join(f"{k} {v}" for k, v in sorted(sc["at_0.5"].items())))
        lines.append(f"  detection table {sc['export']}")
    if "evaluation" in summary:
        from .evaluate import format_evaluation

        ev = summary["evaluation"]
        lines += [
            "",
            "Evaluation against the survey truth (docs/evaluation.md §1 matching; recall with its 95 % CI by hour)",
        ]
        lines += ["  " + line for line in format_evaluation(ev, summary["target_label"], caution=False).splitlines()]
        lines.append(f"  metrics, tables and figures in {ev['out']}")
    if "review" in summary:
        lines += ["", *_review_lines(summary["review"])]
    if "estimate" in summary:
        lines += ["", *_estimate_lines(summary["estimate"])]
    if "retraining" in summary:
        lines += ["", *_retraining_lines(summary)]
    if "budget" in summary:
        b = summary["budget"]
        lines += ["", "Detection range (callsieve budget)"]
        c = b["clip_range_m"]
        lines.append(
            f"  a {summary['target_label']} call of {b['source_level_db']:g} dB re 1 µPa·m (rms) at "
            f"{b['frequency_hz']:.0f} Hz clips the survey recorder "
            + ("nowhere beyond 1 m" if c == 0 else "at every range" if c is None else f"inside {c:,.0f} m")
            + f"; {b['noise_floor']}"
        )
        d = b.get("detection")
        if d:
            p = {row["range_m"]: row["p"] for row in d["ranges"]}
            lines.append(
                f"  P(detect) {p[1000.0]:.2f} at 1 km, {p[10000.0]:.2f} at 10 km, {p[50000.0]:.2f} at 50 km; effective "
                f"radius {d['effective_radius_m']:,.0f} m ({d['effective_radius_m_low']:,.0f}-"
                f"{d['effective_radius_m_high']:,.0f}); figure {d['figure']}"
            )
        else:
            lines.append(f"  no detection function: {b.get('detection_skipped')}")
    if "report" in summary:
        from .report import format_report

        lines += ["", "Monitoring report (docs/report.md)"]
        lines += [
            "  " + line for line in format_report(summary["report"], Path(summary["report"]["out"])).splitlines()[:-1]
        ]
    lines += [
        "",
        "Files",
        f"  training labels  {summary['training_labels']}",
        f"  survey truth     {summary['survey_truth']} (for evaluation only)",
        f"  every call       {summary['calls_table']} (received level, SNR, range)",
        "",
        _time_line(summary["seconds"]),
        "",
        CAUTION,
    ]
    return "\n".join(lines)


def _review_lines(review: dict[str, Any]) -> list[str]:
    """The verification sample's design and its verdicts per stratum."""
    if "skipped" in review:
        return ["Verification sample (docs/review.md)", f"  not drawn: {review['skipped']}"]
    s = review["sample"]
    d = s["design"]
    population = sum(x["population"] for x in s["strata"])
    lines = [
        "Verification sample (docs/review.md)",
        f"  sample {s['sample_id']} of run {s['run_id']}, {s['label']}: {s['items']} of {population} detections "
        f"in {len(s['strata'])} confidence strata ({d['rule']}, {d['allocation']} allocation, seed {s['seed']})",
        f"  verdicts of a simulated reviewer, answering from the survey's truth and wrong on "
        f"{100 * review['error_rate']:g} % of items by design ({review['errors']} here)",
        f"    {'stratum':>7}  {'confidence':<11}  {'N_h':>5} {'n_h':>4} {'yes':>4} {'no':>4} {'unsure':>6}",
    ]
    for x in s["strata"]:
        lines.append(
            f"    {x['stratum']:>7}  {x['low']:.3f}-{x['high']:.3f}  {x['population']:>5} {x['sampled']:>4} "
            f"{x['yes']:>4} {x['no']:>4} {x['unsure']:>6}"
        )
    lines.append(f"  images, clips and sample.csv in {s['folder']}; verdicts imported from {review['verdicts']}")
    return lines


def _retraining_lines(summary: dict[str, Any]) -> list[str]:
    """Before and after one round of verification."""
    rt = summary["retraining"]
    est0 = summary["estimate"]
    est1 = rt["after"].get("estimate")

    def at_guarantee(est: dict[str, Any] | None) -> str:
        if est is None or est["target"]["threshold_guaranteed"] is None:
            return "no guaranteed threshold"
        g = est["target"]["threshold_guaranteed"]
        t = next(x for x in est["thresholds"] if x["threshold"] == g)
        return (
            f"guaranteed threshold {g:.5f}: estimated precision {t['precision']:.3f}, true {t['true_precision']:.3f}, "
            f"{t['detections']} detections ({t['true_count']} true)"
        )

    by_label = ", ".join(f"{k} {v}" for k, v in sorted(rt["verified_by_label"].items()))
    ap0, ap1 = rt["before"]["average_precision"], rt["after"]["average_precision"]
    if rt["held_out_files"]:
        held = [
            f"  {summary['target_label']} on the {rt['held_out_files']} survey files no verdict touched "
            f"({rt['held_out_truth']}; {rt['held_out_target_calls']} of its calls there"
            + (", so no average precision" if rt["held_out_target_calls"] == 0 else "")
            + "):",
            f"    before (run {rt['before']['run_id']}): average precision {_maybe(ap0, 3)}; {at_guarantee(est0)}",
            f"    after  (run {rt['after']['run_id']}): average precision {_maybe(ap1, 3)}; {at_guarantee(est1)}",
        ]
    else:
        held = [
            "  every survey file that holds a truth call also holds a verdict: no file is held out to judge on",
            f"    before (run {rt['before']['run_id']}): {at_guarantee(est0)}",
            f"    after  (run {rt['after']['run_id']}): {at_guarantee(est1)}",
        ]
    return [
        "Retraining from the verdicts (review export-labels, train, score, evaluate)",
        f"  {rt['verified_rows']} verified detections as a partial label table ({by_label}); model {rt['model']}",
        *held,
        "  (the guaranteed thresholds come from a sample of each run, answered by the simulated reviewer)",
        f"  on every survey file: average precision {_maybe(rt['before']['average_precision_all_files'], 3)} before, "
        f"{_maybe(rt['after']['average_precision_all_files'], 3)} after (optimistic: the verified stretches are "
        "both training and truth there)",
    ]


def _maybe(threshold: float | None, digits: int = 5) -> str:
    return "none" if threshold is None else f"{threshold:.{digits}f}"


def _estimate_lines(est: dict[str, Any]) -> list[str]:
    """The estimate from the verified sample beside the truth (docs/estimates.md)."""
    lines = [
        "Estimates from the verified sample (docs/estimates.md), beside the survey's truth",
        f"  {'threshold':>10}  {'detections':>10}  {'precision estimated (95 %)':<28}{'true':>6}"
        f"  {'true detections est. (95 %)':<28}{'true':>6}",
    ]
    for t in est["thresholds"]:
        lines.append(
            f"  {t['threshold']:>10.5f}  {t['detections']:>10}  {t['precision']:.3f} ({t['precision_low']:.3f}-"
            f"{t['precision_high']:.3f}){'':<7}{t['true_precision']:>6.3f}  {t['expected_true']:>6.0f} "
            f"({t['expected_true_low']:.0f}-{t['expected_true_high']:.0f}){'':<12}{t['true_count']:>6}"
        )
    tg = est["target"]
    g = tg["threshold_guaranteed"]
    true_at_g = next((t["true_precision"] for t in est["thresholds"] if t["threshold"] == g), None)
    lines.append(
        f"  target precision {tg['precision']:g}: threshold {_maybe(tg['threshold_point'])} by point estimate, "
        f"{_maybe(g)} with a 95 % guarantee"
        + (f" (true precision there {true_at_g:.3f})" if true_at_g is not None else "")
    )
    lines.append(f"  {'DRIFT: ' if est['drift']['flag'] else ''}{est['drift']['message']}")
    return lines


def _time_line(seconds: dict) -> str:
    """'Time: 70.1 s in all (scenario 18.7 s, training 38.0 s, ...)'."""
    steps = ", ".join(f"{k} {v:.1f} s" for k, v in seconds.items() if k != "total")
    total = seconds.get("total")
    return f"Time: {total:.1f} s in all ({steps})" if total is not None else f"Time: {steps}"
