"""Verified detections as a partial label table (`callsieve review export-labels`)."""

from __future__ import annotations

import csv
import shutil

import pytest
from callsieve.classifier.cli import main
from callsieve.classifier.labels import BACKGROUND
from callsieve.classifier.store import Transaction, now_utc, open_store
from callsieve.classifier.verified_labels import VERIFIED_LABEL_COLUMNS, export_verified_labels


@pytest.fixture
def judged(reference, tmp_path):
    """The reference run with verdicts: yes, no, unsure, another type, and a split vote."""
    db = tmp_path / "store.db"
    shutil.copy2(reference[0], db)
    con = open_store(db, create=False)
    ids = [r[0] for r in con.execute("SELECT detection_id FROM detections WHERE label='up' ORDER BY 1 LIMIT 6")]
    votes = [
        (ids[0], "rev-a", "yes", None),
        (ids[1], "rev-a", "no", None),
        (ids[2], "rev-a", "unsure", None),
        (ids[3], "rev-a", "no", "[type: down] falls, not rises"),
        (ids[4], "rev-a", "yes", None),  # a tie between two reviewers: unsure, left out
        (ids[4], "rev-b", "no", None),
        (ids[5], "rev-a", "yes", None),  # two of three say yes
        (ids[5], "rev-b", "yes", None),
        (ids[5], "rev-c", "no", None),
    ]
    with Transaction(con):
        for d, who, verdict, note in votes:
            con.execute(
                "INSERT INTO verdicts (detection_id, reviewer, verdict, note, recorded_utc) VALUES (?, ?, ?, ?, ?)",
                (d, who, verdict, note, now_utc()),
            )
    con.close()
    return db, ids


def test_verdicts_become_a_partial_label_table(judged, tmp_path):
    db, ids = judged
    out = tmp_path / "verified.csv"
    result = export_verified_labels(db, out)
    with open(out, newline="") as fh:
        reader = csv.DictReader(fh)
        assert reader.fieldnames == VERIFIED_LABEL_COLUMNS
        rows = {int(r["detection_id"]): r for r in reader}
    assert rows[ids[0]]["label"] == "up"
    assert rows[ids[1]]["label"] == BACKGROUND  # a verified false detection: a hard negative
    assert ids[2] not in rows and ids[4] not in rows  # unsure, and a tie
    assert rows[ids[3]]["label"] == "down"  # another call type heard
    assert rows[ids[5]]["label"] == "up" and rows[ids[5]]["reviewers"] == "rev-a;rev-b;rev-c"
    assert all(r["partial"] == "1" for r in rows.values())
    assert result["left_out"]["unsure"] == 2 and result["rows"] == 4


def test_a_detection_across_a_join_gives_the_part_inside_its_file(judged, tmp_path):
    # In a continuous recording a detection belongs to the file where its peak window
    # starts and may run past that file's end (DEVELOPERS.md, "Continuous recordings"),
    # but `train` refuses a label that ends more than 0.5 s past its file's end. The part
    # inside the file is exported; a detection wholly past the end is left out, counted.
    db, ids = judged
    con = open_store(db, create=False)
    (duration,) = con.execute(
        "SELECT f.duration_s FROM detections d JOIN files f USING (file_id) WHERE d.detection_id=?", (ids[0],)
    ).fetchone()
    with Transaction(con):
        con.execute(
            "UPDATE detections SET start_s=?, end_s=? WHERE detection_id=?", (duration - 0.4, duration + 0.9, ids[0])
        )
        con.execute(
            "UPDATE detections SET start_s=?, end_s=? WHERE detection_id=?", (duration + 0.3, duration + 0.8, ids[1])
        )
    con.close()
    out = tmp_path / "verified.csv"
    result = export_verified_labels(db, out)
    with open(out, newline="") as fh:
        rows = {int(r["detection_id"]): r for r in csv.DictReader(fh)}
    assert float(rows[ids[0]]["start_s"]) == pytest.approx(duration - 0.4)
    assert float(rows[ids[0]]["end_s"]) == pytest.approx(duration)
    assert ids[1] not in rows and result["left_out"]["outside_file"] == 1
    assert all(float(r["end_s"]) <= duration + 1e-6 for r in rows.values())


def test_export_labels_never_replaces_the_store(judged, capsys):
    db, _ = judged
    before = db.read_bytes()
    assert main(["review", "export-labels", str(db), "--out", str(db)]) == 2
    assert db.read_bytes() == before
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_partial_rows_teach_their_own_stretches_and_nothing_else(labelled, sweep_model):
    """docs/formats.md §3, "Partial tables": in a file with only partial rows, windows on a
    verified call are examples of it, windows on a stretch verified as no call are kept
    background examples, and the rest of the file is not background."""
    from callsieve.classifier.config import load_training_config
    from callsieve.classifier.deployment import load_deployment
    from callsieve.classifier.labels import Annotation
    from callsieve.classifier.model import load_model
    from callsieve.classifier.training import LabelledSet, collect_examples

    manifest, labels, config_path = labelled
    dep = load_deployment(manifest)
    with open(labels) as fh:
        rows = [r for r in csv.DictReader(fh) if r["file"] == dep.files[0].name]
    up = next(r for r in rows if r["label"] == "up")
    call = Annotation(dep.name, up["file"], float(up["start_s"]), float(up["end_s"]), "up", None, None, 2, True)
    # A stretch between two calls, verified as holding none.
    gap = sorted(float(r["start_s"]) for r in rows)
    quiet = next((a + 2.5, b - 2.5) for a, b in zip(gap, gap[1:], strict=False) if b - a > 8.5)
    no = Annotation(dep.name, up["file"], quiet[0], quiet[1], BACKGROUND, None, None, 3, True)
    settings = load_model(sweep_model).settings
    config = load_training_config(config_path)
    ex = collect_examples([LabelledSet(dep, [call, no], "verified.csv")], settings, config)
    hop, window = settings.window_hop_s, settings.window_s
    # Windows overlapping the 'no' stretch by the minimum overlap: a handful, all kept.
    n_bg = int((ex.y == BACKGROUND).sum())
    assert 1 <= n_bg <= (quiet[1] - quiet[0] + window) / hop + 1
    assert 1 <= int((ex.y == "up").sum()) <= (float(up["end_s"]) - float(up["start_s"]) + window) / hop + 1
    # A complete table naming the same file makes its whole unlabelled time background.
    full = Annotation(dep.name, up["file"], call.start_s, call.end_s, "up", None, None, 2, False)
    ex_full = collect_examples([LabelledSet(dep, [full], "complete.csv")], settings, config)
    assert ex_full.windows_described == ex.windows_described
    assert int((ex_full.y == BACKGROUND).sum()) > n_bg


def test_retraining_from_verdicts_records_them_and_estimate_sets_them_aside(
    judged, labelled, sweep_model, tmp_path, capsys
):
    """export-labels -> train with the original table plus the verified one -> score: the
    model and the run name the verified stretches, and a sample of the new run does not count
    verdicts on them."""
    import json

    from callsieve.classifier.estimate import estimate_run
    from callsieve.classifier.model import load_model
    from callsieve.classifier.scoring import score_deployment
    from callsieve.classifier.training import train

    db, ids = judged
    manifest, labels, config_path = labelled
    verified = tmp_path / "verified.csv"
    assert main(["review", "export-labels", str(db), "--out", str(verified), "--quiet"]) == 0
    model = tmp_path / "retrained.skops"
    report = train([manifest], [labels, verified], model, config_path=config_path, track=False)
    assert report["verified"]["stretches"] == 4 and report["verified"]["runs"] == ["1"]
    assert load_model(model).summary["verified"]["parent_models"]  # the parent model's hash
    # Band and window still come from the analysts' table. On this fixture the verified
    # boxes would not move them anyway; the next test is the one that fails without the rule.
    assert load_model(model).settings == load_model(sweep_model).settings
    summary = score_deployment(model, manifest, db)
    assert summary["run_id"] == 2
    con = open_store(db, create=False)
    params = json.loads(con.execute("SELECT parameters FROM runs WHERE run_id=2").fetchone()[0])
    assert len(params["verified_spans"]) == 4
    # A sample of the new run holding a detection on a verified stretch, with a verdict.
    span = params["verified_spans"][0]
    det = con.execute(
        "SELECT d.detection_id, d.confidence FROM detections d JOIN files f USING (file_id) WHERE d.run_id=2 "
        "AND f.name=? AND d.start_s<? AND d.end_s>? LIMIT 1",
        (span["file"], span["end_s"], span["start_s"]),
    ).fetchone()
    assert det is not None
    with Transaction(con):
        sid = con.execute(
            "INSERT INTO review_samples (run_id, label, design, seed, folder, created_utc) "
            "VALUES (2, ?, '{}', 0, '.', ?)",
            (con.execute("SELECT label FROM detections WHERE detection_id=?", (det[0],)).fetchone()[0], now_utc()),
        ).lastrowid
        con.execute("INSERT INTO review_strata VALUES (?, 1, 0.0, 1.0, 10, 1)", (sid,))
        con.execute(
            "INSERT INTO review_items (sample_id, detection_id, stratum, inclusion_probability, draw_order) "
            "VALUES (?, ?, 1, 0.1, 1)",
            (sid, det[0]),
        )
        con.execute(
            "INSERT INTO verdicts (detection_id, reviewer, verdict, recorded_utc) VALUES (?, 'rev-a', 'yes', ?)",
            (det[0], now_utc()),
        )
    con.close()
    r = estimate_run(db, run_id=2)
    assert r["trained_on_verified"]["verdicts_set_aside"] == 1
    assert r["verdicts"]["yes"] == 0


def test_verified_calls_rank_but_do_not_inflate_the_calibrated_confidence():
    """Verified stretches are mostly a model's confident detections, far richer in calls
    than the recordings: they train the trees but are left out of the calibration
    (training.calibration_weight). So the out-of-fold confidences on the completely
    annotated windows still average to the share of those windows that hold the call
    (isotonic regression keeps the weighted mean of what it is fitted to: the
    pool-adjacent-violators solution, Barlow et al. 1972, Statistical Inference under
    Order Restrictions, ch. 1; from memory). With the verified rows in the calibration
    too, the same average is biased upward; the test checks both, so it can fail."""
    import numpy as np
    from callsieve.classifier.model import CallClassifier
    from callsieve.classifier.training import ExampleSet, calibration_weight

    rng = np.random.default_rng(4)
    # Complete tables: 5 % of windows hold the call; verified stretches: 70 %. One
    # descriptor, the classes overlapping (a unit shift of unit-variance noise).
    n_full, n_verified = 4000, 600
    y = np.concatenate([rng.random(n_full) < 0.05, rng.random(n_verified) < 0.7])
    X = (rng.normal(0.0, 1.0, y.size) + 1.0 * y)[:, None].astype(np.float32)
    labels = np.where(y, "up", BACKGROUND)
    partial = np.arange(y.size) >= n_full
    groups = np.arange(y.size) % 8
    examples = ExampleSet(X, labels, np.ones(y.size), groups, np.full(y.size, "t"), ["x"], partial=partial)

    def bias(weight: np.ndarray) -> float:
        model = CallClassifier(params={"max_iter": 20}, folds=4).fit(X, labels, sample_weight=weight, groups=groups)
        j = list(model.classes_).index("up")
        full = ~partial
        return float(np.mean(model.oof_proba_[full, j]) - np.mean(y[full]))

    assert np.array_equal(calibration_weight(examples) == 0, partial)
    fixed, inflated = bias(calibration_weight(examples)), bias(examples.weight)
    assert abs(fixed) < 0.01 < inflated
    # Where every example is verified, they are all the calibration has.
    only = ExampleSet(X, labels, np.ones(y.size), groups, np.full(y.size, "t"), ["x"], partial=np.ones(y.size, bool))
    assert np.array_equal(calibration_weight(only), only.weight)


def test_verified_boxes_do_not_move_the_band_or_the_window():
    """A verified row's box is a detection's extent; retraining takes band, resolution and
    window from the analysts' complete tables, as the parent model did."""
    from callsieve.classifier.labels import Annotation
    from callsieve.classifier.training import choose_settings, labels_for_settings

    drawn = [Annotation("d", "f", 10.0 * k, 10.0 * k + 1.3, "up", 60.0, 200.0, k + 2) for k in range(20)]
    # Detections of the same calls, boxed wider and longer than the analysts did.
    boxes = [Annotation("d", "g", 10.0 * k, 10.0 * k + 2.4, "up", 40.0, 320.0, k + 2, True) for k in range(20)]
    parent = choose_settings(drawn, 2000)
    assert choose_settings(drawn + boxes, 2000) != parent  # the boxes would move them
    assert choose_settings(labels_for_settings(drawn + boxes, "up"), 2000) == parent
    # Verified rows alone: they are all there is.
    assert labels_for_settings(boxes, "up") == boxes
