"""The invented scenario: levels it claims are the levels in its audio; times and effort."""

from __future__ import annotations

import csv
import hashlib
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
import soundfile as sf
from callsieve.classifier.deployment import load_deployment
from callsieve.classifier.scenario import TARGET_LABEL, demo_sites, write_scenario
from callsieve.features.calibration import pressure_from_samples
from conftest import isolated_call_level_db

HOURS = 2.0


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    out = tmp_path_factory.mktemp("scenario")
    return out, write_scenario(out, seed=11, hours=HOURS)


def _rows(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def test_received_levels_measured_back_through_each_recorders_calibration(scenario):
    # The generator's received level is the band rms of the call's own pressure. Measured
    # back with the project's level functions from the written files, through the manifest's
    # calibration, with the noise power around the call subtracted, the two must agree within
    # 1 dB for calls above 10 dB SNR (ISO 18405 SPL; incoherent power addition).
    out, summary = scenario
    calls = _rows(summary["calls_table"])
    checked = 0
    for manifest_key in ("training_manifest", "survey_manifest"):
        dep = load_deployment(summary[manifest_key])
        fs = dep.sample_rate_hz
        site_calls = [c for c in calls if c["deployment"] == dep.name]
        by_file = {}
        for c in site_calls:
            by_file.setdefault(c["file"], []).append(c)
        for f in dep.files:
            strong = [c for c in by_file.get(f.name, []) if float(c["snr_db"]) > 10.0]
            if not strong:
                continue
            x = sf.read(f.path, dtype="float64")[0]
            p = pressure_from_samples(x, fs, dep.chain)
            busy = [(float(c["start_s"]) - 0.3, float(c["end_s"]) + 0.3) for c in by_file[f.name]]
            for c in strong:
                signal_db = isolated_call_level_db(p, fs, c, busy, f.duration_s)
                if signal_db is None:
                    continue
                assert signal_db == pytest.approx(float(c["received_level_db"]), abs=1.0), c
                checked += 1
    assert checked >= 20


def test_manifests_give_the_times_effort_and_gaps_that_were_written(scenario):
    out, summary = scenario
    north, south = demo_sites()
    train = load_deployment(summary["training_manifest"])
    survey = load_deployment(summary["survey_manifest"])
    # Training site: continuous 30-minute files over half the span.
    assert train.faults == [] and survey.faults == []
    assert train.sample_rate_hz == north.sample_rate_hz == sf.info(train.files[0].path).samplerate
    assert len(train.files) == int(HOURS / 2 * 2)
    assert train.recorded_s == pytest.approx(HOURS / 2 * 3600.0)
    assert train.gaps() == [] and train.overlaps() == []
    assert train.first_start_utc == north.start_utc
    # Survey site: 10-minute files every 30 minutes, gaps of 20 minutes.
    assert len(survey.files) == int(HOURS * 2)
    assert survey.recorded_s == pytest.approx(HOURS * 3600.0 / 3)
    gaps = survey.gaps()
    assert len(gaps) == len(survey.files) - 1
    assert all(g.seconds == pytest.approx(1200.0) for g in gaps)
    starts = [f.start_utc for f in survey.files]
    assert starts == [south.start_utc + timedelta(minutes=30 * i) for i in range(len(starts))]
    assert starts[0] == datetime(2031, 4, 11, tzinfo=UTC)


def test_label_tables_cover_every_call_and_truth_stays_apart(scenario):
    out, summary = scenario
    calls = _rows(summary["calls_table"])
    labels = _rows(summary["training_labels"])
    truth = _rows(summary["survey_truth"])
    assert len(labels) == sum(c["deployment"] == "north-shelf" for c in calls)
    assert len(truth) == sum(c["deployment"] == "south-slope" for c in calls)
    assert not (Path(summary["training_manifest"]).parent / "truth.csv").exists()
    assert not (Path(summary["survey_manifest"]).parent / "labels.csv").exists()
    assert {"file", "start_s", "end_s", "label", "low_hz", "high_hz"} <= set(labels[0])
    assert all(float(r["end_s"]) > float(r["start_s"]) for r in labels + truth)
    assert len({c["label"] for c in calls}) == 4 and any(c["label"] == TARGET_LABEL for c in calls)


def _digest(folder: Path) -> str:
    h = hashlib.sha256()
    for p in sorted(folder.rglob("*")):
        if p.is_file():
            h.update(p.relative_to(folder).as_posix().encode())
            h.update(p.read_bytes() if p.suffix != ".json" else p.read_text().replace(str(folder), "").encode())
    return h.hexdigest()


def test_two_runs_with_one_seed_are_identical(tmp_path):
    a = write_scenario(tmp_path / "a", seed=3, hours=1.0)
    b = write_scenario(tmp_path / "b", seed=3, hours=1.0)
    assert a["calls"] == b["calls"]
    assert _digest(tmp_path / "a") == _digest(tmp_path / "b")
    write_scenario(tmp_path / "c", seed=4, hours=1.0)
    assert _digest(tmp_path / "c") != _digest(tmp_path / "a")
