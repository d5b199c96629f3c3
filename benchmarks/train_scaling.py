"""Training time and peak memory against the number of windows, for both model kinds.

Run: python benchmarks/train_scaling.py [--sizes 10000 50000 200000] [--folder /tmp/cs-bench]

The examples are the demo scenario's training windows (seed 7, 12 h), described by the
real pipeline, then resampled with replacement to each size with a little Gaussian jitter
(1 % of each descriptor's spread) so that copies are not identical. Each fit runs in a
fresh process: the time is CallClassifier.fit (grouped folds + final fit, 4 folds), the
memory is that process's peak RSS.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from _common import peak_rss_mb


def prepare(folder: Path) -> Path:
    from callsieve.classifier.config import TrainingConfig
    from callsieve.classifier.deployment import load_deployment
    from callsieve.classifier.labels import read_label_table
    from callsieve.classifier.scenario import write_scenario
    from callsieve.classifier.training import LabelledSet, choose_settings, collect_examples

    cache = folder / "examples.npz"
    if cache.exists():
        return cache
    scenario = folder / "scenario"
    if not (scenario / "scenario.json").exists():
        write_scenario(scenario, seed=7, hours=12.0)
    dep = load_deployment(scenario / "north-shelf" / "manifest.toml")
    notes = read_label_table(scenario / "north-shelf" / "labels.csv", [dep])
    settings = choose_settings(notes, dep.sample_rate_hz)
    t0 = time.perf_counter()
    ex = collect_examples([LabelledSet(dep, notes, "labels")], settings, TrainingConfig())
    seconds = time.perf_counter() - t0
    print(
        f"described {ex.windows_described} windows ({ex.hours_described:.1f} h of audio) in {seconds:.1f} s: "
        f"{ex.hours_described / seconds * 3600:.0f} x real time"
    )
    np.savez(cache, X=ex.X, y=ex.y, w=ex.weight, g=ex.groups, names=np.array(ex.names))
    return cache


def measure(cache: str, size: int, kind: str) -> None:
    from callsieve.classifier.config import TrainingConfig
    from callsieve.classifier.training import _estimator

    data = np.load(cache, allow_pickle=False)
    rng = np.random.default_rng(0)
    idx = rng.integers(0, data["y"].size, size)
    X = data["X"][idx] + rng.normal(0, 0.01, (size, data["X"].shape[1])) * data["X"].std(axis=0)
    cfg = TrainingConfig(kind=kind)
    t0 = time.perf_counter()
    # The model's own inputs: the relative descriptors, as `train` chooses them.
    _estimator(cfg, [str(n) for n in data["names"]]).fit(
        X.astype(np.float32), data["y"][idx], sample_weight=data["w"][idx], groups=data["g"][idx]
    )
    seconds = time.perf_counter() - t0
    peak = peak_rss_mb()
    print(json.dumps({"kind": kind, "windows": size, "seconds": round(seconds, 1), "peak_rss_mb": round(peak)}))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--sizes", type=int, nargs="+", default=[10000, 50000, 200000])
    parser.add_argument("--kinds", nargs="+", default=["gradient-boosting", "random-forest"])
    parser.add_argument("--folder", type=Path, default=Path("/tmp/cs-bench"))
    parser.add_argument("--measure", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.measure:
        measure(args.measure[0], int(args.measure[1]), args.measure[2])
        return
    args.folder.mkdir(parents=True, exist_ok=True)
    cache = prepare(args.folder)
    for kind in args.kinds:
        for size in args.sizes:
            subprocess.run([sys.executable, __file__, "--measure", str(cache), str(size), kind], check=True)


if __name__ == "__main__":
    main()
