"""Fits, training and scoring with and without competing busy processes, old and new thread policy.

Run: python benchmarks/threads_under_load.py [--repeats 3] [--busy 0 1 2] [--steps fit train score]
     [--hours 3] [--folder /tmp/cs-threads] [--timeout 300] [--json threads.json]

Steps, each timed in a fresh process (imports and data loading not timed):
- ``fit``: a bare HistGradientBoostingClassifier (the default configuration's parameters)
  on 20,000 x 60 random rows of three classes;
- ``train``: ``callsieve.classifier.training.train`` on the invented scenario's training
  site (``--hours`` of survey, the training site spans half), no MLflow record;
- ``score``: ``score_deployment`` of that model over the survey site, ``--jobs 1``, into
  a new store.

Policies: ``old`` is OpenMP's default (one thread per core; set here as
CALLSIEVE_THREADS=<cores>, the same thing); ``new`` is callsieve's automatic choice
(``classifier/threads.py``). Scoring's step wraps ``score_deployment`` in the policy as
scoring does in one process. Competing processes are pure-Python busy loops, one core
each, started before a condition's runs and kept running through them; the two
policies alternate within each repeat so that drift in the machine's load hits both.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

STEPS = ("fit", "train", "score")
POLICIES = ("old", "new")


def _spin(stop) -> None:  # a competing process: one core, pure Python
    x = 0
    while not stop.is_set():
        for _ in range(200_000):
            x += 1


def prepare(folder: Path, hours: float) -> dict[str, str]:
    """The invented scenario and a model of it (trained once, with the new policy)."""
    from callsieve.classifier.scenario import write_scenario
    from callsieve.classifier.training import train

    scenario = folder / "scenario"
    if not (scenario / "scenario.json").exists():
        write_scenario(scenario, seed=7, hours=hours)
    paths = {
        "training_manifest": str(scenario / "north-shelf" / "manifest.toml"),
        "training_labels": str(scenario / "north-shelf" / "labels.csv"),
        "survey_manifest": str(scenario / "south-slope" / "manifest.toml"),
        "model": str(folder / "model.skops"),
    }
    if not Path(paths["model"]).exists():
        train([paths["training_manifest"]], [paths["training_labels"]], paths["model"], track=False)
    return paths


def child(step: str, paths: dict[str, str]) -> dict:
    """One timed run of ``step`` in this process, under the policy the environment sets."""
    from callsieve.classifier.threads import fit_threads, limited_threads

    if step == "fit":
        import numpy as np
        from callsieve.classifier.config import DEFAULT_PARAMS
        from sklearn.ensemble import HistGradientBoostingClassifier

        rng = np.random.default_rng(0)
        X = rng.normal(size=(20_000, 60)).astype(np.float32)
        y = np.digitize(X[:, 0] + 0.5 * X[:, 1] + rng.normal(size=20_000), [-1.0, 1.0])
        params = DEFAULT_PARAMS["gradient-boosting"]
        with limited_threads(fit_threads()) as threads:
            t0 = time.perf_counter()
            HistGradientBoostingClassifier(**params, early_stopping=False, random_state=0).fit(X, y)
            seconds = time.perf_counter() - t0
        return {"seconds": seconds, "threads": threads}
    with tempfile.TemporaryDirectory() as tmp:
        if step == "train":
            from callsieve.classifier.training import train

            t0 = time.perf_counter()
            report = train([paths["training_manifest"]], [paths["training_labels"]], Path(tmp) / "m.skops", track=False)
            return {
                "seconds": time.perf_counter() - t0,
                "threads": report["threads"],
                "fit_seconds": report["seconds"]["fit_and_cross_validate"],
                "examples": sum(report["examples"].values()),
            }
        from callsieve.classifier.scoring import score_deployment

        with limited_threads(fit_threads()) as threads:
            t0 = time.perf_counter()
            out = score_deployment(paths["model"], paths["survey_manifest"], Path(tmp) / "d.db", jobs=1)
            seconds = time.perf_counter() - t0
        return {"seconds": seconds, "threads": threads, "recorded_hours": out["recorded_hours"]}


def run_one(step: str, policy: str, paths: dict[str, str], timeout_s: float) -> dict:
    """``step`` in a fresh process; ``seconds`` is None when it ran past ``timeout_s``."""
    env = dict(os.environ)
    env.pop("CALLSIEVE_THREADS", None)
    env.pop("OMP_NUM_THREADS", None)
    if policy == "old":
        env["CALLSIEVE_THREADS"] = str(os.cpu_count() or 1)
    load_before = os.getloadavg()[0]
    cmd = [sys.executable, __file__, "--child", step, "--paths", json.dumps(paths)]
    try:
        done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=timeout_s, check=True)
        out = json.loads(done.stdout.strip().splitlines()[-1])
    except subprocess.TimeoutExpired:
        out = {"seconds": None, "threads": None}
    return out | {"load_before": round(load_before, 2), "load_after": round(os.getloadavg()[0], 2)}


def summarise(runs: list[dict]) -> dict:
    secs = [r["seconds"] for r in runs]
    done = [s for s in secs if s is not None]
    timed_out = len(secs) - len(done)
    return {
        "median_s": statistics.median(done) if done and not timed_out else None,
        "max_s": max(done) if done and not timed_out else None,
        "timed_out": timed_out,
        "threads": runs[0]["threads"],
        "runs": secs,
    }


def fmt(seconds: float | None, timeout_s: float) -> str:
    return f">{timeout_s:.0f}" if seconds is None else f"{seconds:.1f}"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--busy", type=int, nargs="+", default=[0, 1, 2], help="competing busy processes")
    ap.add_argument("--steps", nargs="+", default=list(STEPS), choices=STEPS)
    ap.add_argument("--hours", type=float, default=3.0, help="span of the scenario's survey site, h")
    ap.add_argument("--folder", type=Path, default=Path(tempfile.gettempdir()) / "cs-threads")
    ap.add_argument("--timeout", type=float, default=300.0, help="s per run; longer runs count as timed out")
    ap.add_argument("--json", type=Path, help="write the figures here")
    ap.add_argument("--child", choices=STEPS, help=argparse.SUPPRESS)
    ap.add_argument("--paths", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(child(args.child, json.loads(args.paths))))
        return

    args.folder.mkdir(parents=True, exist_ok=True)
    paths = prepare(args.folder, args.hours)
    started = datetime.now(UTC)
    load_start = os.getloadavg()
    results = []
    for busy in args.busy:
        stop = mp.Event()
        spinners = [mp.Process(target=_spin, args=(stop,), daemon=True) for _ in range(busy)]
        for p in spinners:
            p.start()
        try:
            time.sleep(5.0 if busy else 0.0)  # the competitors are running before the first run
            for step in args.steps:
                runs: dict[str, list[dict]] = {p: [] for p in POLICIES}
                for _ in range(args.repeats):
                    for policy in POLICIES:
                        runs[policy].append(run_one(step, policy, paths, args.timeout))
                        print(f"  {step:5s} busy={busy} {policy}: {runs[policy][-1]}", file=sys.stderr, flush=True)
                for policy in POLICIES:
                    results.append({"step": step, "busy": busy, "policy": policy} | summarise(runs[policy]))
        finally:
            stop.set()
            for p in spinners:
                p.join(timeout=5)
                if p.is_alive():
                    p.terminate()
                    p.join()
    load_end = os.getloadavg()

    print(f"{'step':6s} {'competing':>9s} {'policy':6s} {'threads':>7s} {'median s':>9s} {'max s':>8s}")
    for r in results:
        print(
            f"{r['step']:6s} {r['busy']:9d} {r['policy']:6s} {r['threads'] or '-':>7} "
            f"{fmt(r['median_s'], args.timeout):>9s} {fmt(r['max_s'], args.timeout):>8s}"
        )
    print(
        f"{os.cpu_count()} cores, {args.repeats} runs each, load average (1, 5, 15 min) "
        f"{'/'.join(f'{x:.1f}' for x in load_start)} at start, {'/'.join(f'{x:.1f}' for x in load_end)} at end"
    )
    if args.json:
        doc = {
            "command": " ".join([Path(sys.executable).name, *sys.argv]),
            "started_utc": started.strftime("%Y-%m-%dT%H:%M:%SZ"),
            "cores": os.cpu_count(),
            "machine": platform.platform(),
            "load_start": load_start,
            "load_end": load_end,
            "results": results,
        }
        args.json.write_text(json.dumps(doc, indent=2))


if __name__ == "__main__":
    main()
