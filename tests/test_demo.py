"""`callsieve demo`: writes the scenario and runs the job's steps on it."""

from __future__ import annotations

import json

from callsieve.classifier.cli import main


def test_demo_writes_scenario_and_reports(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", str(out), "--hours", "2", "--seed", "5", "--quiet"]) == 0
    page = capsys.readouterr().out
    assert "invented scenario" in page and "candidates for trained analysts" in page
    scenario = json.loads((out / "scenario.json").read_text())
    assert scenario["seed"] == 5 and scenario["files"]["south-slope"] == 4
    for site in ("north-shelf", "south-slope"):
        assert (out / site / "manifest.toml").exists()
    assert (out / "north-shelf" / "labels.csv").exists() and (out / "south-slope" / "truth.csv").exists()
    assert "Calibration" in page
    # The training step: a model file, and the experiment in the demo's own MLflow store.
    assert "Training" in page and "average precision" in page
    assert (out / "models" / "demo-model.skops").exists() and (out / "mlflow.db").exists()
    # The scoring step: the survey site screened into a store, and its detection table.
    assert "Scoring the survey site" in page
    import csv

    from callsieve.classifier.export import DETECTION_COLUMNS

    rows = list(csv.DictReader(open(out / "detections.csv")))
    assert list(rows[0]) == DETECTION_COLUMNS and {r["deployment"] for r in rows} == {"south-slope"}
    # The evaluation step: model and excess baseline side by side, logged to the training run.
    assert "AP model" in page and "AP excess" in page
    metrics = json.loads((out / "evaluation" / "metrics.json").read_text())
    assert metrics["complete_truth"] and metrics["files_judged"] == 4
    assert metrics["mlflow_run_id"] == scenario_run_id(out)
    target = metrics["classes"]["tarsel-upsweep"]
    assert target["truth_calls"] > 0
    model_ap, baseline_ap = target["average_precision"], target["baseline"]["average_precision"]
    # The demo's measured values, with margin: at its defaults (seed 7, 12 h, 173 target
    # calls) the README gives AP 0.717 for the model and 0.267 for the excess baseline; on
    # this run (seed 5, 2 h, 6 target calls) they were 1.00 and 0.17 (2026-12-02). The
    # floors keep the model above 0.5 and at least 0.2 above the baseline (less than half
    # the default run's gap of 0.45).
    assert model_ap > 0.5
    assert model_ap > baseline_ap + 0.2
    # The review step: a sample of the target's detections, answered by a simulated
    # reviewer and imported; every sampled item has exactly one simulated verdict.
    assert "Verification sample" in page and "simulated reviewer" in page
    import sqlite3

    con = sqlite3.connect(out / "detections.db")
    # Sample 1 is of the first run (sample 2, of the retrained model's run, comes later).
    items = con.execute("SELECT COUNT(*) FROM review_items WHERE sample_id=1").fetchone()[0]
    answered = con.execute(
        "SELECT COUNT(*) FROM verdicts v JOIN review_items ri USING (detection_id) "
        "WHERE v.reviewer='simulated-reviewer' AND ri.sample_id=1"
    ).fetchone()[0]
    con.close()
    assert items > 0 and answered == items
    sample = list(csv.DictReader(open(out / "review" / "sample.csv")))
    assert len(sample) == items and all((out / "review" / r["image"]).exists() for r in sample)
    # The estimate from those verdicts is printed beside the truth, and the report is written.
    assert "Estimates from the verified sample" in page and "Monitoring report" in page
    # One round of retraining from the verdicts: a second model and a second run of the survey.
    assert "Retraining from the verdicts" in page and (out / "models" / "demo-model-verified.skops").exists()
    assert (out / "review" / "verified-labels.csv").exists()
    # Judged on the survey files no verdict touched, with the number of target calls there,
    # or said plainly that none is left (a 2-hour survey can hold a verdict in every file
    # with a call); read back from the held-out truth table the step wrote.
    held = list(csv.DictReader(open(out / "review" / "truth-held-out.csv")))
    if held:
        n_target = sum(r["label"] == "tarsel-upsweep" for r in held)
        assert f"{n_target} of its calls there" in page
    else:
        assert "no file is held out to judge on" in page
    # The detection range of the target at the survey site (callsieve budget).
    assert "Detection range (callsieve budget)" in page and "clips the survey recorder" in page
    report = json.loads((out / "report" / "report.json").read_text())
    assert report["run_id"] == 1 and (out / "report" / "report.html").is_file()
    assert (out / "report" / "soundscape.npz").is_file()


def scenario_run_id(out):
    """The MLflow run the demo's training recorded (read from its store)."""
    import mlflow

    mlflow.set_tracking_uri(f"sqlite:///{out / 'mlflow.db'}")
    runs = mlflow.search_runs(search_all_experiments=True, output_format="list")
    # The first training run, and the retraining from verdicts, which names it as parent.
    first = [r for r in runs if "callsieve.parent_models" not in r.data.tags]
    retrained = [r for r in runs if "callsieve.parent_models" in r.data.tags]
    assert len(first) == 1 and len(retrained) == 1
    assert retrained[0].data.tags["callsieve.parent_models"] == first[0].data.tags["callsieve.model_sha256"]
    return first[0].info.run_id


def test_demo_refuses_a_foreign_folder(tmp_path, capsys):
    (tmp_path / "mine.txt").write_text("an analyst's notes")
    assert main(["demo", str(tmp_path), "--no-run"]) == 2
    assert "not an earlier demo" in capsys.readouterr().err
    assert (tmp_path / "mine.txt").read_text() == "an analyst's notes"
