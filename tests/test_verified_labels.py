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


def test_export_labels_never_replaces_the_store(judged, capsys):
    db, _ = judged
    before = db.read_bytes()
    assert main(["review", "export-labels", str(db), "--out", str(db)]) == 2
    assert db.read_bytes() == before
    assert len(capsys.readouterr().err.strip().splitlines()) == 1
