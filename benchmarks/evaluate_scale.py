"""Matching and figures of merit at archive scale (the pure part of `callsieve evaluate`).

Run: python benchmarks/evaluate_scale.py [--detections 1000000] [--calls 100000] [--files 2000]

Random detections and calls spread over files of one hour, one label: the time of the
the matching of docs/evaluation.md, of the precision-recall curve and average precision, of the threshold
table and of 2,000 bootstrap replicates over the hours. The audio pass of `evaluate`
(truth-call levels and the excess baseline) costs about what scoring does and is not
measured here.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from callsieve.classifier.evaluate import THRESHOLDS
from callsieve.classifier.evaluation import (
    average_precision,
    bootstrap_over_hours,
    match_detections,
    precision_recall,
    threshold_table,
)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--detections", type=int, default=1_000_000)
    parser.add_argument("--calls", type=int, default=100_000)
    parser.add_argument("--files", type=int, default=2000)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    nd, nt = args.detections, args.calls
    dk, tk = rng.integers(0, args.files, nd), rng.integers(0, args.files, nt)
    ds, ts = rng.uniform(0, 3600, nd), rng.uniform(0, 3600, nt)
    de, te = ds + rng.uniform(0.5, 3.0, nd), ts + rng.uniform(0.5, 2.0, nt)
    dc = rng.uniform(0, 1, nd)
    times = {}
    t0 = time.perf_counter()
    match = match_detections(dk, ds, de, dc, tk, ts, te, 0.5)
    times["match_s"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    curve = precision_recall(dc, match >= 0, nt)
    ap = average_precision(curve)
    threshold_table(dc, match >= 0, nt, THRESHOLDS)
    times["curve_table_s"] = time.perf_counter() - t0
    # One file per hour: the hour of a detection or call is its file.
    found = np.zeros(nt, dtype=bool)
    found[match[match >= 0]] = True
    t0 = time.perf_counter()
    bootstrap_over_hours(
        np.bincount(dk[match >= 0], minlength=args.files),
        np.bincount(dk, minlength=args.files),
        np.bincount(tk[found], minlength=args.files),
        np.bincount(tk, minlength=args.files),
    )
    times["bootstrap_s"] = time.perf_counter() - t0
    print(
        f"{nd} detections, {nt} calls, {args.files} hours: matched {int((match >= 0).sum())}, AP {ap:.3f}; "
        + ", ".join(f"{k} {v:.2f}" for k, v in times.items())
    )


if __name__ == "__main__":
    main()
