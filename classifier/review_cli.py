"""The `callsieve review` verbs: draw a verification sample, serve it, move verdicts in and out."""

from __future__ import annotations

import argparse

from .cli import progress_printer

__all__ = ["add_review_verbs"]


def _cmd_sample(args: argparse.Namespace) -> int:
    from .errors import InputError
    from .review import draw_sample, extend_sample, format_sample_summary

    if args.extend is not None:
        # An extension keeps the sample's rule, blindness and share for double review.
        fixed = {"--bins": args.bins, "--finer-top": args.finer_top, "--label": args.label, "--run": args.run}
        given = [k for k, v in fixed.items() if v is not None] + (["--blind"] if args.blind else [])
        given += ["--double-share"] if args.double_share is not None else []
        if given:
            raise InputError(
                f"--extend keeps the sample's design; {', '.join(given)} cannot change it (draw a new sample instead)"
            )
        summary = extend_sample(
            args.db,
            args.extend,
            args.out,
            n=0 if args.n is None else args.n,
            edges=args.edges,
            allocation=args.allocation,
            pilot=args.pilot,
            seed=args.seed,
            segments=args.segments,
            segment_minutes=args.segment_minutes,
            jobs=args.jobs,
            deployment=args.deployment,
            progress=progress_printer(args),
        )
    else:
        summary = draw_sample(
            args.db,
            args.out,
            run_id=args.run,
            label=args.label,
            n=120 if args.n is None else args.n,
            bins=6 if args.bins is None else args.bins,
            finer_top=2.0 if args.finer_top is None else args.finer_top,
            edges=args.edges,
            allocation=args.allocation or "equal",
            pilot=args.pilot,
            seed=0 if args.seed is None else args.seed,
            segments=args.segments,
            segment_minutes=args.segment_minutes,
            blind=args.blind,
            double_share=args.double_share or 0.0,
            context_s=args.context_s,
            jobs=args.jobs,
            deployment=args.deployment,
            progress=progress_printer(args),
        )
    print(format_sample_summary(summary))
    return 0


def _cmd_import(args: argparse.Namespace) -> int:
    from .review import import_verdicts

    r = import_verdicts(args.db, args.verdicts)
    print(
        f"imported {r['rows']} rows of {r['file']}: {r['inserted']} new verdicts, {r['replaced']} replaced, "
        f"{r['unchanged']} unchanged"
        + (f", {r['older']} older than the store's (kept the store's)" if r["older"] else "")
        + (f", {r['duplicates']} overridden by a later row of the file" if r["duplicates"] else "")
    )
    if r["superseded"]:
        print(
            f"{r['superseded']} verdicts are on detections that a rescoring superseded; they are kept, attached "
            "to those detections"
        )
    return 0


def _cmd_export(args: argparse.Namespace) -> int:
    from .review import export_verdicts

    r = export_verdicts(args.db, args.out, force=args.force)
    print(
        f"wrote {r['rows']} verdicts to {r['out']}"
        + (f" ({r['superseded']} on detections a rescoring superseded)" if r["superseded"] else "")
    )
    return 0


def _add_sample_verb(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> None:
    p = sub.add_parser(
        "sample",
        parents=[common],
        help="draw a stratified random sample of a run's detections, with images and clips to review",
    )
    p.add_argument("db", metavar="DB", help="detection store")
    p.add_argument(
        "--out", required=True, metavar="DIR", help="folder for sample.csv, images and clips (new, or the sample's)"
    )
    p.add_argument("--run", type=int, metavar="ID", help="scoring run (default: the latest)")
    p.add_argument("--label", metavar="L", help="class to verify (default: the run's target, or its only class)")
    p.add_argument("--n", type=int, metavar="N", help="sample size (default 120); with --extend, items to add")
    p.add_argument("--bins", type=int, metavar="K", help="quantile strata (default 6)")
    p.add_argument(
        "--finer-top",
        type=float,
        metavar="P",
        help="1: strata of equal count; above 1 finer toward high confidence (default 2)",
    )
    p.add_argument("--edges", metavar="E", help="fixed strata edges instead, e.g. 0.1,0.3,0.5,0.7,0.9,1")
    p.add_argument(
        "--allocation",
        choices=("equal", "proportional", "neyman"),
        help="sample size per stratum: equal (default), proportional to N_h, or Neyman (needs --pilot)",
    )
    p.add_argument("--pilot", type=int, metavar="SAMPLE_ID", help="a reviewed sample whose precision sets Neyman's")
    p.add_argument("--seed", type=int, metavar="S", help="random seed (default 0)")
    p.add_argument("--segments", type=int, default=0, metavar="M", help="audit segments of recording effort to draw")
    p.add_argument("--segment-minutes", type=float, metavar="L", help="length of each audit segment, minutes")
    p.add_argument("--blind", action="store_true", help="hide confidence and label from reviewers; shuffle the order")
    p.add_argument("--double-share", type=float, metavar="F", help="share of items for two reviewers (0..1)")
    p.add_argument("--extend", type=int, metavar="SAMPLE_ID", help="add to this sample (its folder is --out)")
    p.add_argument(
        "--context-s", type=float, default=3.0, metavar="S", help="seconds shown and played on each side (default 3)"
    )
    p.add_argument("--jobs", type=int, default=1, metavar="N", help="processes rendering items (default 1)")
    p.add_argument("--deployment", metavar="MANIFEST", help="the run's manifest, where it has moved since scoring")
    p.set_defaults(func=_cmd_sample)


def add_review_verbs(verbs: argparse._SubParsersAction, common: argparse.ArgumentParser) -> None:
    """Add ``review`` and its sub-verbs (sample, serve, import, export, export-labels) to the verb parsers."""
    p = verbs.add_parser("review", parents=[common], help="verify a sample of detections by eye and ear")
    sub = p.add_subparsers(dest="review_verb", metavar="REVIEW_VERB", parser_class=type(p))
    sub.required = True
    _add_sample_verb(sub, common)
    # `review serve` lives with its web server.
    from .review_server import add_serve_verb

    add_serve_verb(sub, common)
    # `review export-labels`: verified detections as a partial label table, for retraining.
    from .verified_labels import add_export_labels_verb

    add_export_labels_verb(sub, common)

    q = sub.add_parser("import", parents=[common], help="add reviewers' verdicts from a CSV table")
    q.add_argument("db", metavar="DB", help="detection store")
    q.add_argument("verdicts", metavar="VERDICTS_CSV", help="table with detection_id,verdict,reviewer[,note]")
    q.set_defaults(func=_cmd_import)

    q = sub.add_parser("export", parents=[common], help="write every verdict in the store as CSV")
    q.add_argument("db", metavar="DB", help="detection store")
    q.add_argument("--out", required=True, metavar="CSV", help="output file (.csv)")
    q.add_argument("--force", action="store_true", help="replace an existing file that is not an earlier export")
    q.set_defaults(func=_cmd_export)
