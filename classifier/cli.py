"""The `callsieve` command. Each verb parses its arguments and calls one API function."""

from __future__ import annotations

import argparse
import json
import math
import sqlite3
import sys
import traceback
from collections.abc import Sequence
from pathlib import Path

from callsieve.features._validation import ParameterError

from .errors import InputError
from .export import CAUTION

__all__ = ["main", "build_parser", "progress_printer"]

EXIT_OK, EXIT_FAILED, EXIT_INPUT = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    """argparse, but a wrong call is one line and exit 2 (docs/formats.md, "Exit status")."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise InputError(
            f"{message} (see 'callsieve {self.prog.split(None, 1)[1]} --help')"
            if " " in self.prog
            else f"{message} (see 'callsieve --help')"
        )


def _cmd_calibrate(args: argparse.Namespace) -> int:
    from .calibrate import calibration_summary, format_calibration_summary

    summary = calibration_summary(args.manifest)
    if args.json:
        json.dump(summary, sys.stdout, indent=2, ensure_ascii=False)
        sys.stdout.write("\n")
    else:
        print(format_calibration_summary(summary))
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from .demo import format_demo_summary, run_demo

    if not math.isfinite(args.hours) or args.hours <= 0:
        raise InputError(f"--hours must be a number of hours > 0, got {args.hours:g}")
    out = Path(args.outdir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: is a file; OUTDIR must be a new folder (or an earlier demo's)")
    if out.exists() and any(out.iterdir()) and not (out / "scenario.json").exists():
        raise InputError(f"{out}: folder exists and is not an earlier demo's; choose a new OUTDIR")
    summary = run_demo(
        out,
        seed=args.seed,
        hours=args.hours,
        run=not args.no_run,
        log=None if args.quiet else sys.stderr,
    )
    print(format_demo_summary(summary))
    return EXIT_OK


def progress_printer(args: argparse.Namespace):
    """Where a verb's progress lines go: stderr, prefixed, or nowhere with ``--quiet``."""
    if args.quiet:
        return None
    return lambda line: print(f"callsieve: {line}", file=sys.stderr, flush=True)


def _cmd_train(args: argparse.Namespace) -> int:
    from .training import train

    report = train(
        args.deployment,
        args.labels,
        args.out,
        config_path=args.config,
        target=args.target,
        tracking_uri=args.tracking_uri,
        experiment=args.experiment,
        register=args.register,
        progress=progress_printer(args),
        force=args.force,
    )
    print(format_training_report(report))
    for w in report["warnings"]:
        print(f"callsieve: warning: {w}", file=sys.stderr)
    return EXIT_OK


def format_training_report(report: dict) -> str:
    """A page about a trained model for the terminal."""
    s = report["settings"]
    lines = [
        f"model            {report['model']} (sha256 {report['content_sha256'][:12]})",
        f"band             {s['low_hz']:g}-{s['high_hz']:g} Hz, resolution {s['resolution_hz']:g} Hz, "
        f"window {s['window_s']:g} s every {s['window_hop_s']:g} s",
        "examples         " + ", ".join(f"{k} {v}" for k, v in sorted(report["examples"].items())),
        *(
            [f"slow decoys      {report['slow_decoys']} background rows made from target rows, in no count or metric"]
            if report.get("slow_decoys")
            else []
        ),
        *(
            [
                "short detections confidence scaled by duration below "
                + ", ".join(f"{v:g} s ({k})" for k, v in sorted(report["short_call_s"].items()))
            ]
            if report.get("short_call_s")
            else []
        ),
        f"cross-validation {report['cv_folds']} folds, grouped by {report['cv_grouping']}; per class: "
        "average precision, precision and recall at 0.5",
    ]
    for c, m in sorted(report["cv"].items()):
        lines.append(
            f"  {c:<16} AP {m['average_precision']:.3f}   P {m['precision_at_0.5']:.3f}   "
            f"R {m['recall_at_0.5']:.3f}   ({m['examples']} windows)"
        )
    cascade = report.get("cascade")
    if cascade:
        lines.append(
            f"cascade          first stage keeps {cascade['min_recall']:.4f} of the least-kept class's windows "
            f"(out of fold; target {cascade['target_recall']:g}) and rejects "
            f"{100 * cascade['background_rejected']:.1f} % of background windows; "
            + ("used at scoring" if cascade["used_at_scoring"] else "too few to pay: not used at scoring")
        )
        lines.append("  recall per class " + ", ".join(f"{c} {v:.4f}" for c, v in sorted(cascade["recall"].items())))
    if "run" in report:
        r = report["run"]
        lines.append(f"experiment run   {r['run_id']} in {r['tracking_uri']}")
        if "model_version" in r:
            lines.append(f"registered       version {r['model_version']}")
    return "\n".join(lines)


def _cmd_score(args: argparse.Namespace) -> int:
    from .scoring import score_deployment

    summary = score_deployment(
        args.model,
        args.deployment,
        args.db,
        threshold=args.threshold,
        jobs=args.jobs,
        scheduler=args.scheduler,
        progress=progress_printer(args),
    )
    hps = summary["hours_per_second"]
    print(
        f"run {summary['run_id']} of {summary['deployment']}: scored {summary['files']} files "
        f"({summary['recorded_hours']:.2f} h) in {summary['seconds']:.1f} s"
        + (f", {hps:.2f} h of audio per second" if hps else "")
        + f"; {summary['skipped']} already done; {summary['detections']} detections in {args.db}"
    )
    for f in summary["failed"]:
        print(f"failed: {f['file']}: {f['error']}")
    for f in summary["set_aside"]:
        print(f"left out: {f['file']}: {f['error']}")
    for w in summary["warnings"]:
        print(f"callsieve: warning: {w}", file=sys.stderr)
    for f in summary["nonfinite"]:
        print(
            f"warning: {f['file']}: {f['samples']} samples are not numbers (NaN or infinite); they were scored "
            "as zeros, and calls in the windows that hold them may be missed"
        )
    print(CAUTION)
    if summary["failed"]:
        print(
            f"callsieve: error: {len(summary['failed'])} file(s) could not be scored (listed above); fix or "
            "remove them and run the same command again",
            file=sys.stderr,
        )
        return EXIT_FAILED
    return EXIT_OK


def _cmd_export(args: argparse.Namespace) -> int:
    from .export import export_detections

    result = export_detections(
        args.db, args.out, run_id=args.run, label=args.label, min_confidence=args.min_confidence, force=args.force
    )
    print(f"wrote {result['rows']} detections of run {result['run_id']} to {result['out']}")
    print(CAUTION)
    return EXIT_OK


def _cmd_evaluate(args: argparse.Namespace) -> int:
    from .evaluate import evaluate, format_evaluation

    metrics = evaluate(
        args.db,
        args.truth,
        args.out,
        run_id=args.run,
        target_precision=args.target_precision,
        tolerance_s=args.tolerance_s,
        tracking_uri=args.tracking_uri,
        complete_truth=args.complete_truth,
        progress=progress_printer(args),
        deployment=args.deployment,
    )
    print(format_evaluation(metrics))
    print(f"metrics, tables and figures in {metrics['out']}")
    return EXIT_OK


def _cmd_estimate(args: argparse.Namespace) -> int:
    from .estimate import estimate_run, format_estimate

    out = None
    if args.out is not None:
        out = Path(args.out)
        if out.exists() and not out.is_dir():
            raise InputError(f"--out {out}: is a file; give a folder for the estimate's outputs")
    result = estimate_run(
        args.db,
        run_id=args.run,
        label=args.label,
        target_precision=args.target_precision,
        sample_id=args.sample,
        audit=args.audit,
    )
    if out is not None:
        from .outputs import write_text
        from .plots import confidence_calibration_figure, save, verified_precision_figure

        out.mkdir(parents=True, exist_ok=True)
        write_text(out / "estimate.json", json.dumps(result, indent=2, ensure_ascii=False) + "\n")
        save(
            verified_precision_figure(result["thresholds"], result["label"], args.target_precision),
            out / "precision-by-threshold.png",
        )
        save(
            confidence_calibration_figure(result["strata"], result["calibration"]["logistic"], result["label"]),
            out / "confidence-calibration.png",
        )
    if args.json:
        json.dump(result, sys.stdout, indent=2, ensure_ascii=False)
        sys.stdout.write("\n")
    else:
        print(format_estimate(result))
    if result["drift"]["flag"]:
        print(f"callsieve: warning: {result['drift']['message']}", file=sys.stderr)
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every verb."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--debug", action="store_true", help="show a traceback on errors")
    common.add_argument("--quiet", action="store_true", help="no progress on stderr")
    parser = _Parser(
        prog="callsieve",
        description="Find animal calls in long-term underwater recordings, in calibrated units.",
        parents=[common],
    )
    verbs = parser.add_subparsers(dest="verb", metavar="VERB", parser_class=_Parser)
    verbs.required = True

    p = verbs.add_parser(
        "calibrate",
        parents=[common],
        help="check a deployment: files, effort, gaps, system response and clip level",
    )
    p.add_argument("manifest", metavar="MANIFEST", help="deployment manifest (TOML)")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_calibrate)

    p = verbs.add_parser(
        "demo",
        parents=[common],
        help="write an invented monitoring scenario with known truth and run the job on it",
    )
    p.add_argument("outdir", metavar="OUTDIR", help="folder to write the scenario and results to")
    p.add_argument("--seed", type=int, default=7, help="random seed (default 7)")
    p.add_argument(
        "--hours",
        type=float,
        default=12.0,
        help="span of the survey deployment in hours (default 12)",
    )
    p.add_argument("--no-run", action="store_true", help="write the scenario only")
    p.set_defaults(func=_cmd_demo)

    p = verbs.add_parser(
        "train",
        parents=[common],
        help="train a classifier from labelled deployments and record the experiment",
    )
    p.add_argument(
        "--deployment",
        action="append",
        required=True,
        metavar="MANIFEST",
        help="deployment manifest (repeat for several)",
    )
    p.add_argument("--labels", action="append", required=True, metavar="CSV", help="label table (repeat for several)")
    p.add_argument("--out", required=True, metavar="MODEL", help="model file to write")
    p.add_argument("--config", metavar="TOML", help="training configuration (see configs/)")
    p.add_argument("--target", metavar="LABEL", help="learn this label against everything else")
    p.add_argument("--tracking-uri", metavar="URI", help="MLflow store (default: MLflow's own)")
    p.add_argument("--experiment", metavar="NAME", help="MLflow experiment (default 'callsieve')")
    p.add_argument("--register", metavar="NAME", help="register the model under this name")
    p.add_argument("--force", action="store_true", help="replace an existing file that is not an earlier model")
    p.set_defaults(func=_cmd_train)

    p = verbs.add_parser("score", parents=[common], help="screen a deployment with a model into a detection store")
    p.add_argument("model", metavar="MODEL", help="model file from 'callsieve train'")
    p.add_argument("--deployment", required=True, metavar="MANIFEST", help="deployment manifest")
    p.add_argument("--db", required=True, metavar="DB", help="detection store (SQLite; made if missing)")
    p.add_argument(
        "--threshold",
        type=float,
        default=0.1,
        metavar="P",
        help="probability below which nothing is stored (default 0.1)",
    )
    p.add_argument("--jobs", type=int, default=1, metavar="N", help="worker processes on this machine")
    p.add_argument("--scheduler", metavar="ADDRESS", help="address of a running Dask scheduler")
    p.set_defaults(func=_cmd_score)

    p = verbs.add_parser("export", parents=[common], help="write a run's detections as CSV or Parquet")
    p.add_argument("db", metavar="DB", help="detection store")
    p.add_argument("--out", required=True, metavar="CSV", help="output file (.csv, or .parquet)")
    p.add_argument("--run", type=int, metavar="ID", help="scoring run (default: the latest)")
    p.add_argument("--label", metavar="L", help="only this class")
    p.add_argument("--min-confidence", type=float, metavar="P", help="only detections at or above P")
    p.add_argument("--force", action="store_true", help="replace an existing file that is not an earlier export")
    p.set_defaults(func=_cmd_export)

    p = verbs.add_parser(
        "evaluate", parents=[common], help="judge a scoring run and a floor-excess baseline against labelled truth"
    )
    p.add_argument("db", metavar="DB", help="detection store")
    p.add_argument(
        "--truth", required=True, metavar="CSV", help="label table of fully annotated files (docs/formats.md)"
    )
    p.add_argument("--out", required=True, metavar="DIR", help="folder for metrics.json, tables and figures")
    p.add_argument("--run", type=int, metavar="ID", help="scoring run (default: the latest)")
    p.add_argument(
        "--target-precision",
        type=float,
        default=0.9,
        metavar="P",
        help="precision the reported threshold must reach (default 0.9)",
    )
    p.add_argument(
        "--tolerance-s",
        type=float,
        default=0.5,
        metavar="S",
        help="seconds by which truth intervals are widened for matching (default 0.5)",
    )
    p.add_argument("--tracking-uri", metavar="URI", help="MLflow store of the model's training run, to log to")
    p.add_argument(
        "--complete-truth",
        action="store_true",
        help="the truth table covers every file of the deployment: files it does not name hold no call",
    )
    p.add_argument(
        "--deployment",
        metavar="MANIFEST",
        help="the run's deployment manifest, where it has moved since scoring (default: as the store records)",
    )
    p.set_defaults(func=_cmd_evaluate)

    p = verbs.add_parser(
        "estimate", parents=[common], help="precision, recall, thresholds and presence from verified detections"
    )
    p.add_argument("db", metavar="DB", help="detection store with a verification sample and verdicts")
    p.add_argument("--run", type=int, metavar="ID", help="scoring run (default: the latest)")
    p.add_argument("--label", metavar="L", help="class the sample verified (default: the latest sample's)")
    p.add_argument("--sample", type=int, metavar="ID", help="verification sample (default: the run's latest)")
    p.add_argument(
        "--target-precision",
        type=float,
        default=0.9,
        metavar="P",
        help="precision the reported thresholds must reach (default 0.9)",
    )
    p.add_argument(
        "--audit", metavar="CSV", help="label table of every call annotated in the sample's audit segments, for recall"
    )
    p.add_argument("--out", metavar="DIR", help="also write estimate.json and the figures into this folder")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_estimate)

    from .budget import add_budget_verb
    from .report import add_report_verb

    add_budget_verb(verbs, common)

    add_report_verb(verbs, common)
    from .review_cli import add_review_verbs

    add_review_verbs(verbs, common)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status (0 done, 1 failed, 2 bad input)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    try:
        args = build_parser().parse_args(argv)
        return int(args.func(args))
    except (InputError, ParameterError) as exc:
        if debug:
            traceback.print_exc()
        # One line, whatever a path or value typed on the command line held.
        print(f"callsieve: error: {' '.join(str(exc).splitlines())}", file=sys.stderr)
        return EXIT_INPUT
    except BrokenPipeError:
        # The reader of stdout stopped early (`callsieve calibrate --json | head`): not an
        # error of ours. Point stdout at nothing so the interpreter's last flush is quiet.
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK
    except sqlite3.OperationalError as exc:
        if debug:
            traceback.print_exc()
        text = str(exc)
        if "readonly" in text or "read-only" in text:
            print(
                f"callsieve: error: the detection store cannot be written ({text}); make the file and its "
                "folder writable, or copy the store to a writable folder and use the copy",
                file=sys.stderr,
            )
            return EXIT_INPUT
        if "full" in text:
            print(
                f"callsieve: error: the disk holding the detection store is full ({text}); the file being "
                "stored was rolled back and every finished file is kept: free space and run the same command again",
                file=sys.stderr,
            )
            return EXIT_FAILED
        print(f"callsieve: error: the detection store: {text} (run with --debug for details)", file=sys.stderr)
        return EXIT_FAILED
    except KeyboardInterrupt:
        print("callsieve: error: interrupted; run the same command again to carry on", file=sys.stderr)
        return EXIT_FAILED
    except Exception as exc:  # the work failed: one line unless --debug
        if debug:
            traceback.print_exc()
        print(
            f"callsieve: error: {type(exc).__name__}: {exc} (run with --debug for details)",
            file=sys.stderr,
        )
        return EXIT_FAILED


if __name__ == "__main__":
    sys.exit(main())
