"""`callsieve review export-labels`: verified detections as a partial label table, for retraining.

Only the verified stretches of a file are known: the table marks every row ``partial``, so
that training learns from these stretches and never takes the rest of those files for
background (docs/formats.md §3, "Partial tables").
"""

from __future__ import annotations

import argparse
import sqlite3
import sys
from pathlib import Path
from typing import Any

from .errors import InputError
from .labels import BACKGROUND
from .outputs import check_output, csv_header_is, write_csv
from .store import latest_run_id, open_store
from .verdicts import consensus, verdict_on_label

__all__ = ["VERIFIED_LABEL_COLUMNS", "export_verified_labels", "verified_label_rows", "add_export_labels_verb"]

VERIFIED_LABEL_COLUMNS = [
    "deployment",
    "file",
    "start_s",
    "end_s",
    "label",
    "low_hz",
    "high_hz",
    "partial",
    "detection_id",
    "run_id",
    "model_sha256",
    "sample_id",
    "verdict",
    "reviewers",
]


def verified_label_rows(con: sqlite3.Connection, run_id: int) -> tuple[list[dict[str, Any]], dict[str, int]]:
    """Rows of the partial label table for a run's verified detections, and what was left out.

    Each verified detection gives one row: ``yes`` its class, ``no`` background (a hard
    negative), "another call type" that type, ``unsure`` nothing. With several reviewers the
    majority decides (a tie is unsure; a vote naming another type counts as no, see
    ``verdicts.verdict_on_label``), and the type named most often when the majority is no
    and most of those reviewers named one. A detection that runs past its file's end (or
    starts before it), as one across a join of a continuous recording may, gives the part
    inside its file; one wholly outside it is left out and counted (``outside_file``).
    """
    # One read: every verdict of the run with its detection, file, model and latest sample.
    rows = con.execute(
        "SELECT v.detection_id, v.verdict, v.note, v.reviewer, d.start_s, d.end_s, d.low_hz, d.high_hz, "
        "d.label, d.superseded, f.name AS file, f.duration_s, dep.name AS deployment, r.model_sha256, "
        "(SELECT MAX(i.sample_id) FROM review_items i WHERE i.detection_id=d.detection_id) AS sample_id "
        "FROM verdicts v JOIN detections d USING (detection_id) JOIN files f ON f.file_id=d.file_id "
        "JOIN runs r ON r.run_id=d.run_id JOIN deployments dep ON dep.deployment_id=f.deployment_id "
        "WHERE d.run_id=? ORDER BY v.detection_id, v.reviewer",
        (run_id,),
    ).fetchall()
    by_detection: dict[int, list[sqlite3.Row]] = {}
    for r in rows:
        by_detection.setdefault(r["detection_id"], []).append(r)
    left_out = {"unsure": 0, "superseded": 0, "outside_file": 0}
    out = []
    for det_id, vs in by_detection.items():
        d = vs[0]
        if d["superseded"]:
            # Its file changed and was scored again: the times may no longer hold.
            left_out["superseded"] += 1
            continue
        judged = [verdict_on_label(v["verdict"], v["note"], d["label"]) for v in vs]
        plain = [verdict for verdict, _ in judged]
        types = [heard for _, heard in judged if heard]
        verdict = consensus(plain)
        if types and plain.count("no") * 2 > len(plain) and len(types) * 2 > plain.count("no"):
            label = max(set(types), key=types.count)
        elif verdict == "yes":
            label = d["label"]
        elif verdict == "no":
            label = BACKGROUND
        else:
            left_out["unsure"] += 1
            continue
        # In a continuous recording a detection belongs to the file where its peak window
        # starts, and may run past that file's end (or start before it): a label table
        # holds stretches of one file, so the verified stretch is the part inside it.
        start, end = max(d["start_s"], 0.0), min(d["end_s"], d["duration_s"])
        if end <= start:
            left_out["outside_file"] += 1
            continue
        out.append(
            {
                "deployment": d["deployment"],
                "file": d["file"],
                "start_s": round(start, 4),
                "end_s": round(end, 4),
                "label": label,
                "low_hz": round(d["low_hz"], 2),
                "high_hz": round(d["high_hz"], 2),
                "partial": 1,
                "detection_id": det_id,
                "run_id": run_id,
                "model_sha256": d["model_sha256"],
                "sample_id": d["sample_id"],
                "verdict": verdict,
                "reviewers": ";".join(sorted({v["reviewer"] for v in vs})),
            }
        )
    return out, left_out


def export_verified_labels(
    db: str | Path, out: str | Path, run_id: int | None = None, force: bool = False
) -> dict[str, Any]:
    """Write a run's verified detections as a partial label table (CSV).

    Returns
    -------
    dict
        ``run_id``, ``rows``, ``by_label`` (rows per label), ``left_out`` (unsure,
        superseded, outside_file: detections of a continuous recording that lie wholly
        outside their file, in a neighbouring one), ``out``.
    """
    out = check_output(
        out,
        option="--out",
        suffixes=(".csv",),
        inputs=(db,),
        ours=lambda path: csv_header_is(path, VERIFIED_LABEL_COLUMNS),
        what="a verified label table",
        force=force,
    )
    con = open_store(db, create=False)
    try:
        run_id = latest_run_id(con, run_id)
        rows, left_out = verified_label_rows(con, run_id)
    finally:
        con.close()
    if not rows:
        raise InputError(
            f"run {run_id} has no verified detection to export (yes, no or another type); "
            "review a sample first ('callsieve review serve' or 'review import')"
        )
    write_csv(out, VERIFIED_LABEL_COLUMNS, rows)
    by_label: dict[str, int] = {}
    for r in rows:
        by_label[r["label"]] = by_label.get(r["label"], 0) + 1
    return {"run_id": run_id, "rows": len(rows), "by_label": by_label, "left_out": left_out, "out": str(out)}


def _cmd_export_labels(args: argparse.Namespace) -> int:
    r = export_verified_labels(args.db, args.out, run_id=args.run, force=args.force)
    labels = ", ".join(f"{k} {v}" for k, v in sorted(r["by_label"].items()))
    print(
        f"run {r['run_id']}: {r['rows']} verified detections written to {r['out']} as a partial label table "
        f"({labels}); left out: {r['left_out']['unsure']} unsure or tied, "
        f"{r['left_out']['superseded']} on superseded detections, "
        f"{r['left_out']['outside_file']} lying wholly in a neighbouring file of a continuous recording"
    )
    if not args.quiet:
        print(
            "callsieve: retrain with the original tables plus this one: 'callsieve train ... --labels "
            f"{r['out']}'; only its rows' stretches are known, the rest of those files is not background",
            file=sys.stderr,
        )
    return 0


def add_export_labels_verb(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> None:
    """Add ``review export-labels`` to the review sub-verbs."""
    p = sub.add_parser(
        "export-labels", parents=[common], help="write verified detections as a partial label table for retraining"
    )
    p.add_argument("db", metavar="DB", help="detection store with verdicts")
    p.add_argument("--out", required=True, metavar="CSV", help="label table to write (.csv)")
    p.add_argument("--run", type=int, metavar="ID", help="scoring run (default: the latest)")
    p.add_argument("--force", action="store_true", help="replace an existing file that is not an earlier export")
    p.set_defaults(func=_cmd_export_labels)
