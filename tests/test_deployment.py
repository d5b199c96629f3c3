"""Manifests (docs/formats.md §1) and `callsieve calibrate`: times, effort, gaps, faults, bad input."""

from __future__ import annotations

import json
import subprocess
import sys
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
import soundfile as sf
from callsieve.classifier.cli import main
from callsieve.classifier.deployment import load_deployment, parse_file_start
from conftest import FLAT_CALIBRATION, write_files, write_manifest


def test_timestamp_found_anywhere_in_the_name():
    fmt = "%Y%m%dT%H%M%SZ"
    expected = datetime(2031, 5, 4, 6, 7, 8, tzinfo=UTC)
    assert parse_file_start("unit7.20310504T060708Z.ch0.wav", fmt) == expected
    assert parse_file_start("20310504T060708Z.flac", fmt) == expected
    # A leading run of digits that is no valid time is skipped, the real stamp is found.
    assert parse_file_start("99999999T999999Z_20310504T060708Z.wav", fmt) == expected
    assert parse_file_start("no-time-here.wav", fmt) is None
    assert parse_file_start("x_310504-060708.wav", "%y%m%d-%H%M%S") == expected


def test_effort_and_gaps_of_a_duty_cycle(duty_cycled):
    manifest, starts = duty_cycled
    dep = load_deployment(manifest)
    assert [f.start_utc for f in dep.files] == [s.replace(tzinfo=UTC) for s in starts]
    assert dep.recorded_s == pytest.approx(4 * 60.0)
    gaps = dep.gaps()
    assert len(gaps) == 3
    assert all(g.seconds == pytest.approx(240.0) for g in gaps)
    assert gaps[0].after_file == dep.files[0].name
    assert dep.overlaps() == []


def test_calibrate_json_on_a_flat_system(duty_cycled, capsys):
    # Clip level of a flat system: 20 log10(2.5) + 130 = 137.96 dB re 1 µPa (REFERENCES §4, A).
    manifest, starts = duty_cycled
    assert main(["calibrate", str(manifest), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["deployment"] == "test-site"
    assert out["files"] == 4
    assert out["recorded_hours"] == pytest.approx(4 / 60.0, abs=1e-6)
    assert out["sample_rate_hz"] == 2000
    assert out["first_start_utc"] == "2031-05-04T06:00:00Z"
    assert out["last_end_utc"] == "2031-05-04T06:16:00Z"
    assert [g["seconds"] for g in out["gaps"]] == [240.0, 240.0, 240.0]
    assert out["gaps"][0]["start_utc"] == "2031-05-04T06:01:00Z"
    assert {"after_file", "start_utc", "seconds"} <= set(out["gaps"][0])
    clip = [r["clip_level_db"] for r in out["response"]]
    assert len(clip) > 10 and all(c == pytest.approx(137.96, abs=0.005) for c in clip)
    # Third-octave grid up to Nyquist (1 kHz): last centre 1000 Hz.
    assert out["response"][-1]["nominal_hz"] == 1000.0
    assert all(r["system_db"] == pytest.approx(-130.0) for r in out["response"])


def test_response_from_tables(tmp_path):
    write_files(tmp_path, [datetime(2031, 1, 1)], 5.0, fs=8000)
    (tmp_path / "hydrophone.csv").write_text("frequency_hz,sensitivity_db\n100,-175\n1000,-170\n")
    (tmp_path / "preamp.csv").write_text("frequency_hz,gain_db\n10,20\n1000,30\n")
    cal = """
[calibration]
full_scale_volts = 1.0
preamp_gain_csv = "preamp.csv"
hydrophone_sensitivity_csv = "hydrophone.csv"
"""
    dep = load_deployment(write_manifest(tmp_path, calibration=cal))
    assert not dep.chain.is_flat
    # At 100 Hz: hydrophone -175, preamp log-interpolated 20 + 10/2 = 25 -> system -150 dB.
    assert dep.chain.system_sensitivity_db(100.0) == pytest.approx(-150.0)
    assert dep.chain.clip_level_db(4000.0) == pytest.approx(0.0 - (-170.0 + 30.0))


def test_truncated_file_is_reported_and_the_others_are_read(duty_cycled):
    manifest, starts = duty_cycled
    dep = load_deployment(manifest)
    victim = dep.files[1].path
    victim.write_bytes(victim.read_bytes()[:30000])
    dep = load_deployment(manifest)
    assert len(dep.files) == 3
    assert len(dep.faults) == 1 and dep.faults[0].name == victim.name
    assert "truncated" in dep.faults[0].error
    # The gap left by the bad file is a gap in the effort too.
    assert dep.recorded_s == pytest.approx(180.0)


def test_truncated_flac_is_a_fault_of_the_listing(tmp_path):
    # docs/formats.md §1: a FLAC that loses sync is a truncated file, listed with its reason
    # and left out. Its header still states the full length, so only decoding its end shows it.
    t0 = datetime(2031, 5, 4, 6, 0, 0)
    paths = write_files(tmp_path, [t0 + timedelta(minutes=k) for k in range(3)], 60.0, ext="flac")
    manifest = write_manifest(tmp_path, glob="*.flac")
    assert len(load_deployment(manifest).files) == 3 and load_deployment(manifest).faults == []
    paths[1].write_bytes(paths[1].read_bytes()[: paths[1].stat().st_size // 2])
    dep = load_deployment(manifest)
    assert [f.name for f in dep.files] == [paths[0].name, paths[2].name]
    assert [f.name for f in dep.faults] == [paths[1].name] and dep.faults[0].error.startswith("truncated")
    # Its minute is a gap in the effort (two 60 s files with a 60 s hole).
    assert dep.recorded_s == pytest.approx(120.0) and [g.seconds for g in dep.gaps()] == [pytest.approx(60.0)]


def test_wrong_rate_file_is_a_fault(duty_cycled):
    manifest, starts = duty_cycled
    write_files(manifest.parent, [datetime(2031, 5, 4, 7, 0, 0)], 10.0, fs=4000)
    dep = load_deployment(manifest)
    assert dep.sample_rate_hz == 2000 and len(dep.files) == 4
    assert "differs" in dep.faults[0].error


def _refused(capsys, argv):
    code = main(argv)
    err = capsys.readouterr().err.strip()
    return code, err


@pytest.mark.parametrize(
    "calibration,field",
    [
        (
            "[calibration]\nfull_scale_volts = 2.5\npreamp_gain_db = 40.0\n",
            "hydrophone_sensitivity_db",
        ),
        (
            "[calibration]\npreamp_gain_db = 40.0\nhydrophone_sensitivity_db = -170.0\n",
            "full_scale_volts",
        ),
        (FLAT_CALIBRATION + 'preamp_gain_csv = "p.csv"\n', "preamp_gain_db and preamp_gain_csv"),
        (FLAT_CALIBRATION.replace("2.5", "-1"), "full_scale_volts"),
        (FLAT_CALIBRATION + "hydrophone_sensitivty = 3\n", "hydrophone_sensitivty"),
    ],
)
def test_bad_manifest_gives_exit_2_and_one_line_naming_the_field(duty_cycled, capsys, calibration, field):
    manifest, _ = duty_cycled
    write_manifest(manifest.parent, calibration=calibration)
    code, err = _refused(capsys, ["calibrate", str(manifest)])
    assert code == 2
    assert err.startswith("callsieve: error: ") and "\n" not in err
    assert field in err and "manifest.toml" in err


def test_file_name_without_time_is_refused(duty_cycled, capsys):
    manifest, _ = duty_cycled
    sf.write(manifest.parent / "audio" / "testrec_badname.wav", np.zeros(100), 2000)
    code, err = _refused(capsys, ["calibrate", str(manifest)])
    assert code == 2 and "timestamp_format" in err and "testrec_badname.wav" in err


def test_table_whose_frequencies_do_not_increase_is_refused(duty_cycled, capsys):
    manifest, _ = duty_cycled
    (manifest.parent / "hyd.csv").write_text("frequency_hz,sensitivity_db\n100,-170\n50,-171\n")
    cal = '[calibration]\nfull_scale_volts = 2.5\npreamp_gain_db = 40.0\nhydrophone_sensitivity_csv = "hyd.csv"\n'
    write_manifest(manifest.parent, calibration=cal)
    code, err = _refused(capsys, ["calibrate", str(manifest)])
    assert code == 2 and "hyd.csv" in err and "row 3" in err and "frequency_hz" in err


def test_console_script_exit_codes(duty_cycled, tmp_path):
    manifest, _ = duty_cycled
    run = subprocess.run(
        [sys.executable, "-m", "callsieve.classifier.cli", "calibrate", str(manifest), "--json"],
        capture_output=True,
        text=True,
    )
    assert run.returncode == 0 and json.loads(run.stdout)["files"] == 4 and run.stderr == ""
    run = subprocess.run(
        [
            sys.executable,
            "-m",
            "callsieve.classifier.cli",
            "calibrate",
            str(tmp_path / "nope.toml"),
        ],
        capture_output=True,
        text=True,
    )
    assert run.returncode == 2 and run.stderr.count("\n") == 1 and "no such manifest" in run.stderr


def test_overlapping_files_are_reported(tmp_path):
    t0 = datetime(2031, 2, 2, 0, 0, 0)
    write_files(tmp_path, [t0, t0 + timedelta(seconds=50)], 60.0)
    dep = load_deployment(write_manifest(tmp_path))
    assert len(dep.overlaps()) == 1 and dep.overlaps()[0].seconds == pytest.approx(-10.0)
    assert dep.recorded_s == pytest.approx(110.0)
