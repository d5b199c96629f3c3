"""`callsieve estimate` on a real scoring run with a verification sample and verdicts.

The run is conftest.py's labelled sweep site scored by its model; its label table is the
truth. The sample is written into the store by hand (quantile strata, a fixed number per
stratum, drawn without replacement), and each verdict is the truth by the matching rule of
docs/evaluation.md §1, so the estimate can be checked against the precision and recall that
the truth gives.
"""

from __future__ import annotations

import csv
import json
import shutil
import sqlite3

import numpy as np
import pytest
from callsieve.classifier.cli import main
from callsieve.classifier.estimate import ESTIMATE_KEYS, consensus, estimate_run
from callsieve.classifier.evaluation import match_detections
from callsieve.classifier.store import Transaction, now_utc, open_store

LABEL = "up"
PER_STRATUM = 12


def _truth(labels):
    with open(labels) as fh:
        return [r for r in csv.DictReader(fh) if r["label"] == LABEL]


def _judge(con, truth):
    """Per detection of LABEL: True where it matches a truth call (the evaluation rule)."""
    rows = con.execute(
        "SELECT d.detection_id, f.name, d.start_s, d.end_s, d.confidence FROM detections d JOIN files f "
        "USING (file_id) WHERE d.label=? AND d.superseded=0 ORDER BY d.detection_id",
        (LABEL,),
    ).fetchall()
    match = match_detections(
        np.array([r[1] for r in rows]),
        np.array([r[2] for r in rows]),
        np.array([r[3] for r in rows]),
        np.array([r[4] for r in rows]),
        np.array([t["file"] for t in truth]),
        np.array([float(t["start_s"]) for t in truth]),
        np.array([float(t["end_s"]) for t in truth]),
    )
    return {r[0]: bool(m >= 0) for r, m in zip(rows, match, strict=True)}, {r[0]: r[4] for r in rows}


def _write_sample(con, run_id, conf, edges, rng, blind=False):
    ids = np.array(sorted(conf))
    c = np.array([conf[i] for i in ids])
    stratum = np.clip(np.searchsorted(edges, c, side="right") - 1, 0, len(edges) - 2)
    with Transaction(con):
        sid = con.execute(
            "INSERT INTO review_samples (run_id, label, design, seed, blind, folder, created_utc) "
            "VALUES (?, ?, ?, 5, ?, '.', ?)",
            (run_id, LABEL, json.dumps({"rule": "edges", "edges": list(edges)}), int(blind), now_utc()),
        ).lastrowid
        order = 0
        for h in range(len(edges) - 1):
            members = ids[stratum == h]
            take = rng.choice(members, min(PER_STRATUM, members.size), replace=False)
            con.execute(
                "INSERT INTO review_strata VALUES (?, ?, ?, ?, ?, ?)",
                (sid, h + 1, edges[h], edges[h + 1], int(members.size), int(take.size)),
            )
            for d in take:
                order += 1
                con.execute(
                    "INSERT INTO review_items (sample_id, detection_id, stratum, inclusion_probability, draw_order) "
                    "VALUES (?, ?, ?, ?, ?)",
                    (sid, int(d), h + 1, take.size / members.size, order),
                )
    return sid


@pytest.fixture
def verified(reference, labelled, tmp_path):
    """A copy of the reference store with a sample of 'up' detections and truthful verdicts."""
    db = tmp_path / "store.db"
    shutil.copy2(reference[0], db)
    con = open_store(db, create=False)
    truth = _truth(labelled[1])
    correct, conf = _judge(con, truth)
    values = np.array(list(conf.values()))
    edges = np.unique(np.concatenate([[0.1], np.quantile(values, [0.4, 0.7, 0.85]), [1.0]]))
    sid = _write_sample(con, 1, conf, edges, np.random.default_rng(4))
    items = [r[0] for r in con.execute("SELECT detection_id FROM review_items WHERE sample_id=?", (sid,))]
    with Transaction(con):
        for d in items:
            con.execute(
                "INSERT INTO verdicts (detection_id, reviewer, verdict, recorded_utc) VALUES (?, 'rev-a', ?, ?)",
                (d, "yes" if correct[d] else "no", now_utc()),
            )
    con.close()
    return db, correct, conf, edges, truth


def test_majority_of_reviewers_and_ties_as_unsure():
    assert consensus(["yes", "yes", "no"]) == "yes"
    assert consensus(["yes", "no"]) == "unsure"
    assert consensus(["unsure", "no", "no"]) == "no"


def test_another_call_type_is_a_no_for_the_label_whatever_the_button():
    """docs/estimates.md §1: a note naming another call type makes the verdict a false
    detection of the sampled label; the same type as the label changes nothing."""
    from callsieve.classifier.verdicts import verdict_on_label

    assert verdict_on_label("unsure", "[type: down] falls", LABEL) == ("no", "down")
    assert verdict_on_label("yes", "[type: down]", LABEL) == ("no", "down")
    assert verdict_on_label("yes", f"[type: {LABEL}]", LABEL) == ("yes", None)
    assert verdict_on_label("unsure", "faint", LABEL) == ("unsure", None)


def test_estimate_covers_the_true_precision_and_documents_every_key(verified, tmp_path, capsys):
    db, correct, conf, edges, _ = verified
    assert main(["estimate", str(db), "--json", "--target-precision", "0.8", "--out", str(tmp_path / "e")]) == 0
    r = json.loads(capsys.readouterr().out)
    assert set(ESTIMATE_KEYS) <= set(r)
    # SPEC-fixed keys of the sample's strata and thresholds (docs/estimates.md).
    for key in ("low", "high", "population", "sampled", "yes", "no", "unsure", "precision"):
        assert key in r["strata"][0]
    assert r["verdicts"]["yes"] + r["verdicts"]["no"] == sum(s["sampled"] for s in r["strata"])
    assert sum(s["population"] for s in r["strata"]) == len(conf)
    assert [t["threshold"] for t in r["thresholds"]] == pytest.approx(list(edges[:-1]))
    for t in r["thresholds"]:
        above = [correct[d] for d, c in conf.items() if c >= t["threshold"]]
        assert t["detections"] == len(above)
        # The truth's precision above the threshold lies in the 95 % interval (and the
        # expected number of true detections likewise).
        assert t["precision_low"] <= np.mean(above) <= t["precision_high"]
        assert t["expected_true_low"] <= sum(above) <= t["expected_true_high"]
    tg = r["target"]
    # The sweep site's detections are mostly true: a guarantee for 0.8 exists, never below the point.
    assert tg["threshold_guaranteed"] is not None and tg["threshold_point"] is not None
    assert tg["threshold_guaranteed"] >= tg["threshold_point"]
    # The logistic fit's confidence for the target probability inverts the fit (Wood & Kahl 2024).
    fit, at = r["calibration"]["logistic"], r["calibration"]["confidence_at_target"]
    if fit is not None and fit["beta1"] > 0:
        z = fit["beta0"] + fit["beta1"] * np.log(at / (1 - at))
        assert 1 / (1 + np.exp(-z)) == pytest.approx(0.8, abs=1e-3)
    assert (tmp_path / "e" / "estimate.json").is_file()
    assert (tmp_path / "e" / "precision-by-threshold.png").stat().st_size > 1000
    assert r["presence"]["hours_expected"] <= r["presence"]["hours_detected"]


def test_unsure_verdicts_are_left_out_with_a_sensitivity_line(verified):
    db, *_ = verified
    con = sqlite3.connect(db)
    with con:
        # Three verdicts of the stratum with the most, 'no' ones first (a good model leaves
        # few of them), so that every stratum keeps judged verdicts and a precision.
        largest = con.execute(
            "SELECT stratum FROM review_items GROUP BY stratum ORDER BY COUNT(*) DESC LIMIT 1"
        ).fetchone()[0]
        first = con.execute(
            "SELECT v.detection_id FROM verdicts v JOIN review_items ri USING (detection_id) "
            "WHERE ri.stratum=? ORDER BY v.verdict='no' DESC, v.detection_id LIMIT 3",
            (largest,),
        ).fetchall()
        judged = con.execute(
            "SELECT COUNT(*) FROM verdicts v JOIN review_items ri USING (detection_id) "
            "WHERE ri.stratum=? AND v.verdict IN ('yes', 'no')",
            (largest,),
        ).fetchone()[0]
        assert judged > 3
        con.executemany("UPDATE verdicts SET verdict='unsure' WHERE detection_id=?", first)
    con.close()
    r = estimate_run(db)
    assert r["verdicts"]["unsure"] == len(first)
    low, high = r["sensitivity"][1]["precision_above_floor"], r["sensitivity"][0]["precision_above_floor"]
    assert low <= r["thresholds"][0]["precision"] <= high and low < high


def test_recall_from_annotated_audit_segments(verified, labelled, tmp_path, capsys):
    """Audit segments of whole files, annotated from the truth: recall equals the truth's."""
    db, correct, conf, edges, truth = verified
    con = open_store(db, create=False)
    files = con.execute("SELECT file_id, name, duration_s FROM files ORDER BY name").fetchall()
    with Transaction(con):
        for fid, _name, dur in files[:4]:
            con.execute(
                "INSERT INTO audit_segments (sample_id, file_id, start_s, end_s, stratum, inclusion_probability) "
                "VALUES (1, ?, 0, ?, 'all', ?)",
                (fid, dur, 4 / len(files)),
            )
    con.close()
    names = {f[1] for f in files[:4]}
    audit = tmp_path / "audit.csv"
    with open(audit, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=["file", "start_s", "end_s", "label"])
        w.writeheader()
        w.writerows({k: t[k] for k in w.fieldnames} for t in truth if t["file"] in names)
    assert main(["estimate", str(db), "--audit", str(audit), "--json"]) == 0
    r = json.loads(capsys.readouterr().out)
    floor = r["thresholds"][0]
    # Recall at the floor over the audited files, by the matching rule (independent count).
    con = sqlite3.connect(db)
    det = con.execute(
        "SELECT f.name, d.start_s, d.end_s, d.confidence FROM detections d JOIN files f USING (file_id) "
        "WHERE d.label=? AND d.confidence>=?",
        (LABEL, floor["threshold"]),
    ).fetchall()
    con.close()
    sub = [t for t in truth if t["file"] in names]
    m = match_detections(
        np.array([d[0] for d in det]),
        np.array([d[1] for d in det]),
        np.array([d[2] for d in det]),
        np.array([d[3] for d in det]),
        np.array([t["file"] for t in sub]),
        np.array([float(t["start_s"]) for t in sub]),
        np.array([float(t["end_s"]) for t in sub]),
    )
    assert floor["recall"] == pytest.approx((m >= 0).sum() / len(sub))
    assert floor["recall_low"] <= floor["recall"] <= floor["recall_high"]
    assert r["density"]["annotated_calls"] == len(sub)
    assert r["density"]["calls_per_hour"] == pytest.approx(len(sub) / (4 * 240 / 3600))


def test_an_audit_call_outside_every_segment_is_one_line_and_exit_2(verified, tmp_path, capsys):
    db, *_ = verified
    con = open_store(db, create=False)
    with Transaction(con):
        con.execute(
            "INSERT INTO audit_segments (sample_id, file_id, start_s, end_s, stratum, inclusion_probability) "
            "VALUES (1, 1, 0, 60, 'all', 0.1)"
        )
    name = con.execute("SELECT name FROM files WHERE file_id=1").fetchone()[0]
    con.close()
    audit = tmp_path / "audit.csv"
    audit.write_text(f"file,start_s,end_s,label\n{name},100,101,{LABEL}\n")
    assert main(["estimate", str(db), "--audit", str(audit)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no audit segment" in err[0]


def test_a_run_without_a_sample_says_how_to_draw_one(reference, tmp_path, capsys):
    db = tmp_path / "store.db"
    shutil.copy2(reference[0], db)
    assert main(["estimate", str(db)]) == 2
    assert "callsieve review sample" in capsys.readouterr().err
