"""The verification loop on the hard scenario: do verdicts on new recordings make the detector better on others?

Run: python benchmarks/verification_loop.py [--seeds 1 2 3] [--hours 5] [--review 100] [--json OUT] [--folder DIR]

For each seed, in a fresh temporary folder (or under `--folder DIR/seed-N`, where a scenario
written earlier is used again, as generalisation.py does):

1. writes the hard preset of the invented scenario (the training site `reed-bank`, the test
   site `ash-trench`: generalisation.py's docstring says what they hold), trains
   `callsieve train --target tarsel-upsweep` at the training site, and scores the whole
   test site (judged with `evaluate --complete-truth`, the figure generalisation.py gives);
2. splits the test site's files by time: the first half (rounded down) is the REVIEW half,
   the rest the HELD-OUT half. Each half gets a manifest of its own (the site's, same
   deployment name, its audio folder a folder of links to the half's files), so that a run
   holds only that half's detections (`review sample` draws from a whole run and cannot be
   limited to some files);
3. scores the review half with the original model once and copies that store, one copy
   per sampling policy (`review export-labels` takes every verdict of a run), and answers from
   the test site's truth like an analyst who is never wrong: a detection is "yes" if it
   matches a target call under the matching rule of docs/evaluation.md (the demo's
   simulated reviewer, `demo._run_truth`), else "no".
   Policy (a): `callsieve review sample --n N` with its defaults (6 quantile strata finer
   toward the top, equal allocation, seed 0), the product's stratified sample. Policy (b):
   the N most confident target detections of the review half, what an analyst checking top
   hits does. Where the review half holds N target detections or fewer, both policies
   verify all of them and give the same model. The verdicts go in with `callsieve review import`;
4. per policy, `callsieve review export-labels` gives a partial label table, and
   `callsieve train` with both deployments and the original labels plus that table gives a
   retrained model (same `--target`);
5. scores the HELD-OUT half with the original model and with each retrained model into one
   store, and judges each run with `evaluate --complete-truth` against the truth of the
   held-out files only (the run holds only those files, so every held-out file is judged).

Every step is a subprocess of the command line with BLAS/OpenMP threads set to 1 and one
scoring process, timed by wall clock. It prints, per seed and as mean / min / max: the
target's average precision and recall at precision 0.9 on the held-out half before and
after retraining with each policy, the verdicts (yes / no) each policy gave, the target
detections each model stores in the held-out half, and the times.
`--json OUT` writes every figure. A seed takes about 3-3.5 minutes on a shared 2-core machine
(scenario 10-14 s when written; training 20-24 s, each retraining 20-41 s; scoring the whole
site 8-10 s, a half 6-7 s; drawing, rendering and answering the sample of 100 6-16 s; the five
evaluations most of the rest; 2026-12-02).
"""

from __future__ import annotations

import argparse
import csv
import json
import re
import shutil
import sys
import time
from pathlib import Path

from generalisation import _cli, _table, hard_scenario, seed_folder, write_record

# Columns of the tables: key in the per-seed result, heading, format.
HELD_OUT = [
    ("held_out_calls", "calls", "{:.0f}"),
    ("ap_before", "AP before", "{:.3f}"),
    ("ap_a", "AP (a)", "{:.3f}"),
    ("ap_b", "AP (b)", "{:.3f}"),
    ("rp90_before", "R@P0.9 before", "{:.3f}"),
    ("rp90_a", "R@P0.9 (a)", "{:.3f}"),
    ("rp90_b", "R@P0.9 (b)", "{:.3f}"),
    ("ap_site_before", "AP whole site", "{:.3f}"),
]
VERDICTS = [
    ("review_calls", "calls", "{:.0f}"),
    ("review_detections", "detections", "{:.0f}"),
    ("yes_a", "yes (a)", "{:.0f}"),
    ("no_a", "no (a)", "{:.0f}"),
    ("yes_b", "yes (b)", "{:.0f}"),
    ("no_b", "no (b)", "{:.0f}"),
    ("lowest_confidence_b", "lowest conf. (b)", "{:.3f}"),
]
# Target detections above the storage floor in the held-out half, per model.
STORED = [
    ("detections_before", "before", "{:.0f}"),
    ("detections_a", "(a)", "{:.0f}"),
    ("detections_b", "(b)", "{:.0f}"),
]
TIMES = [
    ("training_s", "train s", "{:.1f}"),
    ("retraining_a_s", "retrain (a) s", "{:.1f}"),
    ("retraining_b_s", "retrain (b) s", "{:.1f}"),
    ("sampling_a_s", "sample (a) s", "{:.1f}"),
    ("scoring_held_out_s", "score held-out s", "{:.1f}"),
    ("seed_s", "seed s", "{:.0f}"),
]
REVIEWER = "simulated-analyst"


def _half_manifest(dep, files: list[str], folder: Path) -> Path:
    """The site's manifest for some of its files: the same deployment name and calibration,
    its audio folder ``folder / "audio"`` of links to those files, every path absolute.

    ``dep`` is the site's Deployment (``callsieve.classifier.deployment.load_deployment``).
    """
    audio = folder / "audio"
    audio.mkdir(parents=True)
    for name in files:
        (audio / name).symlink_to(dep.audio_dir.resolve() / name)
    here = dep.manifest_path.resolve().parent

    def absolute(m: re.Match) -> str:
        path = audio.absolute() if m.group(1) == "audio_dir" else (here / m.group(2)).resolve()
        return f'{m.group(1)} = "{path}"'

    out = folder / "manifest.toml"
    out.write_text(re.sub(r'^(audio_dir|\w+_csv)\s*=\s*"(.*)"', absolute, dep.manifest_path.read_text(), flags=re.M))
    return out


def _truth_rows(truth: Path, files: set[str], target: str, out: Path) -> int:
    """Write the truth rows of ``files`` to ``out``; return how many are of ``target``."""
    with open(truth, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        rows = [r for r in reader if r["file"] in files]
        columns = reader.fieldnames or []
    with open(out, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=columns)
        w.writeheader()
        w.writerows(rows)
    return sum(r["label"] == target for r in rows)


def _answers(db: Path, summary: dict, ids: list[int] | None, n: int) -> tuple[dict[int, str], list[float], int]:
    """The never-wrong analyst's verdicts from the test site's truth: on ``ids``, or, when
    None, on the ``n`` most confident target detections of the store's (latest) run.

    Returns the verdicts, the confidences of the detections judged, and how many target
    detections the run holds.
    """
    from callsieve.classifier.demo import _run_truth
    from callsieve.classifier.store import latest_run_id, open_store

    con = open_store(db, create=False)
    try:
        run_id = latest_run_id(con, None)
    finally:
        con.close()
    truth = _run_truth(db, run_id, summary)
    conf = truth["confidence"]
    if ids is None:
        ids = sorted(conf, key=lambda d: (-conf[d], d))[:n]
    return {d: "yes" if truth["correct"][d] else "no" for d in ids}, [conf[d] for d in ids], len(conf)


def _review(db: Path, answers: dict[int, str], folder: Path, log: Path) -> Path:
    """Import the verdicts with `review import`; return the partial label table `review export-labels` writes."""
    table = folder / "verdicts.csv"
    with open(table, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["detection_id", "verdict", "reviewer", "note"])
        w.writerows([d, v, REVIEWER, "from the invented scenario's truth"] for d, v in sorted(answers.items()))
    labels = folder / "verified-labels.csv"
    _cli(["review", "import", str(db), str(table), "--quiet"], folder, log)
    _cli(["review", "export-labels", str(db), "--out", str(labels), "--quiet"], folder, log)
    return labels


def run_seed(seed: int, folder: Path, hours: float, n_review: int) -> dict:
    """The whole loop for one seed in ``folder``; returns its figures."""
    t_seed = time.perf_counter()
    summary, scenario_s = hard_scenario(folder, seed, hours)
    target = summary["target_label"]
    log = folder / "log.txt"
    tracking = f"sqlite:///{(folder / 'mlflow.db').resolve()}"
    from callsieve.classifier.deployment import load_deployment

    site = load_deployment(summary["survey_manifest"])
    files = [f.name for f in site.files]  # sorted by start time
    halves = {"review": files[: len(files) // 2], "held-out": files[len(files) // 2 :]}
    manifests = {name: _half_manifest(site, names, folder / name) for name, names in halves.items()}
    calls = {
        name: _truth_rows(Path(summary["survey_truth"]), set(names), target, folder / f"truth-{name}.csv")
        for name, names in halves.items()
    }

    def train(model: Path, extra_labels: list[Path]) -> float:
        deployments = [summary["training_manifest"]] + ([summary["survey_manifest"]] if extra_labels else [])
        args = ["train", "--out", str(model), "--target", target, "--tracking-uri", tracking]
        args += ["--experiment", "verification-loop", "--quiet"]
        for d in deployments:
            args += ["--deployment", d]
        for labels in [summary["training_labels"], *extra_labels]:
            args += ["--labels", str(labels)]
        return _cli(args, folder, log)

    def score(model: Path, manifest: Path | str, db: Path) -> float:
        return _cli(
            ["score", str(model), "--deployment", str(manifest), "--db", str(db), "--jobs", "1", "--quiet"], folder, log
        )

    def judge(db: Path, truth: Path | str, name: str) -> dict:
        _cli(
            ["evaluate", str(db), "--truth", str(truth), "--out", str(folder / name), "--complete-truth", "--quiet"],
            folder,
            log,
        )
        m = json.loads((folder / name / "metrics.json").read_text())["classes"][target]
        # Where precision never reaches 0.9, no recall is reached at it: 0 (metrics.json: null).
        return {
            "ap": m["average_precision"],
            "rp90": m["recall_at_target_precision"] or 0.0,
            "calls": m["truth_calls"],
            "detections": m["detections"],
        }

    model = folder / "model.skops"
    training_s = train(model, [])
    site_scoring_s = score(model, summary["survey_manifest"], folder / "site.db")
    whole = judge(folder / "site.db", summary["survey_truth"], "evaluation-site")

    result: dict = {"seed": seed, "review_files": len(halves["review"]), "held_out_files": len(halves["held-out"])}
    models = {"before": model}
    # One scoring of the review half; each policy verifies in its own copy of that store,
    # since `review export-labels` takes every verdict of a run.
    reviewed = folder / "review.db"
    score(model, manifests["review"], reviewed)
    for policy in ("a", "b"):
        work = folder / f"policy-{policy}"
        work.mkdir()
        db = work / "review.db"
        shutil.copy2(reviewed, db)
        t0 = time.perf_counter()
        if policy == "a":
            sample = work / "sample"
            _cli(["review", "sample", str(db), "--out", str(sample), "--n", str(n_review), "--quiet"], work, log)
            with open(sample / "sample.csv", newline="", encoding="utf-8") as fh:
                ids = [int(r["detection_id"]) for r in csv.DictReader(fh)]
            answers, confidence, population = _answers(db, summary, ids, n_review)
        else:
            answers, confidence, population = _answers(db, summary, None, n_review)
        labels = _review(db, answers, work, log)
        result[f"sampling_{policy}_s"] = round(time.perf_counter() - t0, 1)
        result[f"yes_{policy}"] = sum(v == "yes" for v in answers.values())
        result[f"no_{policy}"] = sum(v == "no" for v in answers.values())
        result[f"lowest_confidence_{policy}"] = min(confidence) if confidence else None
        with open(labels, newline="", encoding="utf-8") as fh:
            result[f"exported_rows_{policy}"] = sum(1 for _ in csv.DictReader(fh))
        models[policy] = work / "model.skops"
        result[f"retraining_{policy}_s"] = round(train(models[policy], [labels]), 1)
    result["review_detections"] = population
    result["review_calls"] = calls["review"]

    scoring_held_out = []
    for name, path in models.items():
        scoring_held_out.append(score(path, manifests["held-out"], folder / "held-out.db"))
        m = judge(folder / "held-out.db", folder / "truth-held-out.csv", f"evaluation-held-out-{name}")
        result[f"ap_{name}"], result[f"rp90_{name}"] = m["ap"], m["rp90"]
        result[f"detections_{name}"] = m["detections"]
        result["held_out_calls"] = m["calls"]
    return result | {
        "held_out_truth_calls": calls["held-out"],
        "ap_site_before": whole["ap"],
        "rp90_site_before": whole["rp90"],
        "site_calls": whole["calls"],
        "scenario_s": round(scenario_s, 1),
        "training_s": round(training_s, 1),
        "scoring_site_s": round(site_scoring_s, 1),
        "scoring_held_out_s": round(sum(scoring_held_out) / len(scoring_held_out), 1),
        "seed_s": round(time.perf_counter() - t_seed, 1),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--seeds", type=int, nargs="+", default=[1, 2, 3], help="scenario seeds (default 1 2 3)")
    parser.add_argument("--hours", type=float, default=5.0, help="test site span, h (default 5)")
    parser.add_argument("--review", type=int, default=100, metavar="N", help="verdicts per policy (default 100)")
    parser.add_argument("--json", type=Path, metavar="OUT", help="write every figure to this JSON file")
    parser.add_argument(
        "--folder",
        type=Path,
        help="keep each seed's files under DIR/seed-N (default: temporary); a scenario already there is used again",
    )
    args = parser.parse_args()

    results = []
    for seed in args.seeds:
        with seed_folder(args.folder, f"seed-{seed}", f"callsieve-loop-{seed}-") as folder:
            results.append(run_seed(seed, folder, args.hours, args.review))
        r = results[-1]
        print(
            f"seed {seed}: held-out AP {r['ap_before']:.3f} before, {r['ap_a']:.3f} after (a), "
            f"{r['ap_b']:.3f} after (b); {r['seed_s']:.0f} s",
            file=sys.stderr,
            flush=True,
        )

    print(
        f"Verification loop, hard scenario, target tarsel-upsweep, test site {args.hours:g} h, "
        f"{args.review} verdicts per policy ({len(results)} seeds)"
    )
    print()
    print("Held-out half of the test site: before retraining, after (a) stratified sample, after (b) top hits")
    print()
    print(_table(results, HELD_OUT))
    print("R@P0.9: recall at precision 0.9; 0 where the precision never reaches 0.9 (metrics.json: null).")
    print("AP whole site: the original model on every test file (generalisation.py's figure).")
    print()
    print("Review half: target calls, target detections of the original model, verdicts per policy")
    print()
    print(_table(results, VERDICTS))
    print()
    print("Target detections stored (confidence >= the floor, 0.1) in the held-out half, per model")
    print()
    print(_table(results, STORED))
    print()
    print("Times (wall clock, one process each; score held-out: mean of the three runs)")
    print()
    print(_table(results, TIMES))
    if args.json:
        keys = [k for k, _, _ in HELD_OUT + VERDICTS + STORED + TIMES] + ["scenario_s", "scoring_site_s"]
        write_record(args.json, "verification_loop", {"hours": args.hours, "review": args.review}, results, keys)


if __name__ == "__main__":
    main()
