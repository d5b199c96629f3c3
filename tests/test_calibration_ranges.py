"""Plausible calibration values: impossible ones refused in one line, unusual ones noted.

The ranges are common practice, from memory (hydrophone and recorder data sheets seen in
use), not from a standard; ``features/calibration.py::PLAUSIBLE`` states each with its
reasoning. The tests check the behaviour at values well inside or well outside them.
"""

from __future__ import annotations

import json
from datetime import datetime, timedelta

import numpy as np
import pytest
import soundfile as sf
from callsieve.classifier.cli import main
from callsieve.classifier.deployment import load_deployment
from callsieve.features.calibration import PLAUSIBLE, PlausibleRange
from conftest import write_files, write_manifest


def _calibration(full_scale="2.5", gain="40.0", sensitivity="-170.0"):
    return (
        f"[calibration]\nfull_scale_volts = {full_scale}\npreamp_gain_db = {gain}\n"
        f"hydrophone_sensitivity_db = {sensitivity}\n"
    )


@pytest.fixture
def site(tmp_path):
    """Two 10-s files at 2 kHz (16-bit): a folder a manifest can point at."""
    t0 = datetime(2031, 5, 4, 6, 0, 0)
    write_files(tmp_path, [t0, t0 + timedelta(minutes=1)], 10.0)
    return tmp_path


def _calibrate(capsys, manifest, *extra):
    code = main(["calibrate", str(manifest), *extra])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _one_error_line(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("callsieve: error: "), err
    assert "Traceback" not in err
    return lines[0]


def test_the_reported_positive_sensitivity_is_refused_naming_value_file_and_range(site, capsys):
    # The case of the report: +170 dB re 1 V/µPa (a clip level of -190 dB re 1 µPa) was
    # accepted. A sensitivity in dB re 1 V/µPa is negative for every hydrophone (0 dB would
    # be 1 V per µPa); common practice puts them at about -220 .. -120.
    manifest = write_manifest(site, calibration=_calibration(sensitivity="170.0"))
    code, out, err = _calibrate(capsys, manifest)
    line = _one_error_line(err)
    assert code == 2 and out == ""
    assert "manifest.toml" in line and "hydrophone_sensitivity_db" in line and "170 dB re 1 V/µPa" in line
    assert "usual range -220 .. -120 dB re 1 V/µPa" in line and "common practice" in line
    assert "did you mean -170?" in line


@pytest.mark.parametrize(
    "calibration,names,hint",
    [
        # Millivolts typed as volts (common practice: converters' full scale 0.1-20 V).
        (_calibration(full_scale="2500"), ("full_scale_volts", "2500 V", "usual range 0.1 .. 20 V"), "write 2.5"),
        # 0.1 mV full scale: no recorder's converter (common practice).
        (_calibration(full_scale="0.0001"), ("full_scale_volts", "0.0001 V"), ""),
        # 150 dB of gain: no recording amplifier (common practice: 0-70 dB).
        (_calibration(gain="150"), ("preamp_gain_db", "150 dB", "usual range 0 .. 70 dB"), ""),
        (_calibration(gain="-150"), ("preamp_gain_db", "-150 dB"), ""),
        # -50 dB re 1 V/µPa is -170 dB re 1 V/Pa + 120 (1 Pa = 1e6 µPa, 20 log10 1e6 = 120 dB).
        (_calibration(sensitivity="-50"), ("hydrophone_sensitivity_db", "-50 dB re 1 V/µPa"), "write -170"),
        # Below -260 dB re 1 V/µPa: beyond even blast gauges (common practice, from memory).
        (_calibration(sensitivity="-300"), ("hydrophone_sensitivity_db", "-300 dB re 1 V/µPa"), ""),
    ],
)
def test_impossible_flat_values_are_refused_in_one_line(site, capsys, calibration, names, hint):
    manifest = write_manifest(site, calibration=calibration)
    code, out, err = _calibrate(capsys, manifest)
    line = _one_error_line(err)
    assert code == 2 and out == ""
    assert "manifest.toml" in line and "usual range" in line and "common practice" in line
    for text in names:
        assert text in line
    assert hint in line


@pytest.mark.parametrize(
    "calibration,key",
    [
        # -110 dB re 1 V/µPa: a hydrophone with a strong built-in preamplifier, possible but
        # above the usual -120 (common practice; the least sure edge). With no further gain
        # it clips at 8 + 110 = 118 dB re 1 µPa, a usual clip level (REFERENCES §4).
        (_calibration(gain="0", sensitivity="-110"), "hydrophone_sensitivity_db"),
        # A 10 dB attenuator instead of a preamplifier: unusual, possible.
        (_calibration(gain="-10"), "preamp_gain_db"),
        # A 50 mV full scale: unusual, possible.
        (_calibration(full_scale="0.05"), "full_scale_volts"),
    ],
)
def test_unusual_values_are_noted_and_accepted(site, capsys, calibration, key):
    manifest = write_manifest(site, calibration=calibration)
    code, out, err = _calibrate(capsys, manifest)
    assert code == 0 and err == ""
    notes = [x for x in out.splitlines() if x.startswith("warning")]
    assert len(notes) == 1 and key in notes[0] and "unusual" in notes[0] and "usual range" in notes[0]
    code, out, _ = _calibrate(capsys, manifest, "--json")
    doc = json.loads(out)
    assert code == 0 and len(doc["warnings"]) == 1 and key in doc["warnings"][0]


def test_values_in_the_usual_ranges_give_no_note(site, capsys):
    # -170 dB re 1 V/µPa, 40 dB, 2.5 V: the textbook chain (clip level 138 dB re 1 µPa, REFERENCES §4).
    code, out, _ = _calibrate(capsys, write_manifest(site), "--json")
    assert code == 0 and json.loads(out)["warnings"] == []


def test_a_table_row_with_an_impossible_value_is_refused_with_its_row(site, capsys):
    (site / "hyd.csv").write_text("frequency_hz,sensitivity_db\n10,-172\n100,+170\n1000,-171\n")
    cal = '[calibration]\nfull_scale_volts = 2.5\npreamp_gain_db = 40.0\nhydrophone_sensitivity_csv = "hyd.csv"\n'
    code, out, err = _calibrate(capsys, write_manifest(site, calibration=cal))
    line = _one_error_line(err)
    assert code == 2 and "hyd.csv" in line and "row 3" in line and "sensitivity_db" in line
    assert "usual range -220 .. -120 dB re 1 V/µPa" in line


def test_gain_table_values_are_checked_as_gains(site, capsys):
    (site / "pre.csv").write_text("frequency_hz,gain_db\n10,20\n1000,400\n")
    cal = '[calibration]\nfull_scale_volts = 2.5\npreamp_gain_csv = "pre.csv"\nhydrophone_sensitivity_db = -170\n'
    code, _, err = _calibrate(capsys, write_manifest(site, calibration=cal))
    line = _one_error_line(err)
    assert code == 2 and "pre.csv" in line and "row 3" in line and "400 dB" in line and "0 .. 70 dB" in line


def test_table_frequencies_beyond_sound_in_water_are_refused(site, capsys):
    # 20 MHz: no calibration of an acoustic recorder goes there (common practice: 1 Hz - 1 MHz).
    (site / "hyd.csv").write_text("frequency_hz,sensitivity_db\n10,-172\n2e7,-171\n")
    cal = '[calibration]\nfull_scale_volts = 2.5\npreamp_gain_db = 40.0\nhydrophone_sensitivity_csv = "hyd.csv"\n'
    code, _, err = _calibrate(capsys, write_manifest(site, calibration=cal))
    line = _one_error_line(err)
    assert code == 2 and "row 3" in line and "frequency_hz" in line and "1 .. 1e+06 Hz" in line


def test_table_frequencies_that_look_like_kilohertz_are_noted(site, capsys):
    # 0.01-2 "Hz" is what a table written in kHz looks like; possible, so only a note.
    (site / "hyd.csv").write_text("frequency_hz,sensitivity_db\n0.01,-172\n0.1,-170\n2,-171\n")
    cal = '[calibration]\nfull_scale_volts = 2.5\npreamp_gain_db = 40.0\nhydrophone_sensitivity_csv = "hyd.csv"\n'
    code, out, _ = _calibrate(capsys, write_manifest(site, calibration=cal), "--json")
    doc = json.loads(out)
    assert code == 0 and len(doc["warnings"]) == 1 and "hyd.csv" in doc["warnings"][0] and "in Hz" in doc["warnings"][0]


def test_a_chain_of_possible_values_whose_clip_level_is_not_is_refused(site, capsys):
    # -120 dB re 1 V/µPa + 70 dB into a 0.1 V converter: each value is usual, together they
    # clip at 20 log10(0.1) + 120 - 70 = 30 dB re 1 µPa (REFERENCES §4), far below the
    # quietest sea's noise (tens of dB re 1 µPa²/Hz over a band: above 60 dB re 1 µPa,
    # from memory of the Wenz curves).
    manifest = write_manifest(site, calibration=_calibration(full_scale="0.1", gain="70", sensitivity="-120"))
    code, _, err = _calibrate(capsys, manifest)
    line = _one_error_line(err)
    assert code == 2 and "clip level" in line and "30.0 dB re 1 µPa" in line and "usual range 100 .. 250" in line


def test_a_file_whose_header_gives_an_impossible_rate_is_a_fault_not_the_deployments_rate(site, capsys):
    # 5 samples per second: no sound recorder (common practice: about 1 kHz - 1 MHz; the
    # lowest possible kept at 10 Hz). A damaged header is a fault of that file only.
    sf.write(site / "audio" / "testrec_20310504T060500Z.wav", np.zeros(50), 5, subtype="PCM_16")
    dep = load_deployment(write_manifest(site))
    assert dep.sample_rate_hz == 2000 and len(dep.files) == 2
    fault = [f for f in dep.faults if f.name == "testrec_20310504T060500Z.wav"]
    assert len(fault) == 1 and "5 Hz is not possible" in fault[0].error


def test_an_unusual_sample_rate_and_8_bit_samples_are_noted(tmp_path):
    # 500 Hz: a low-frequency recorder (an ocean-bottom seismometer's hydrophone channel),
    # possible but under the usual 1 kHz; 8-bit samples hold about 48 dB of dynamic range
    # (6 dB per bit, common practice).
    write_files(tmp_path, [datetime(2031, 1, 1)], 10.0, fs=500, subtype="PCM_U8")
    dep = load_deployment(write_manifest(tmp_path))
    assert dep.sample_rate_hz == 500 and len(dep.files) == 1
    assert len(dep.warnings) == 2
    assert "500 Hz is unusual" in dep.warnings[0] and "PCM_U8" in dep.warnings[1]


def test_calibrate_with_no_usable_file_exits_2_naming_the_first_fault(site, capsys):
    # Exit 2, not 1: nothing of the work failed; the deployment as given holds nothing to
    # calibrate, and the fix (the files or the glob) is the user's (docs/formats.md, exit status).
    for p in (site / "audio").iterdir():
        p.write_bytes(b"not a sound file")
    manifest = write_manifest(site)
    for extra in ((), ("--json",)):
        code, out, err = _calibrate(capsys, manifest, *extra)
        line = _one_error_line(err)
        assert code == 2 and out == ""
        assert "none of the 2 file(s)" in line and "manifest.toml" in line and "testrec_" in line


def test_the_shipped_example_and_the_demo_scenario_are_in_the_usual_ranges(tmp_path):
    # Our own examples follow common practice: no note on any of them.
    from callsieve.classifier.scenario import write_scenario

    assert load_deployment("configs/example/manifest.toml").warnings == []
    summary = write_scenario(tmp_path / "demo", seed=3, hours=0.5)
    for key in ("training_manifest", "survey_manifest"):
        assert load_deployment(summary[key]).warnings == []


def test_judge_includes_the_edges():
    r = PlausibleRange("x", "dB", (-1.0, 1.0), (-2.0, 2.0))
    assert [r.judge(v) for v in (-2.0, -1.5, -1.0, 0.0, 1.0, 1.5, 2.0)] == [
        "unusual",
        "unusual",
        "usual",
        "usual",
        "usual",
        "unusual",
        "unusual",
    ]
    assert r.judge(-2.01) == r.judge(2.01) == "impossible"
    # Every range nests: usual inside possible.
    for rng in PLAUSIBLE.values():
        assert rng.possible[0] <= rng.usual[0] < rng.usual[1] <= rng.possible[1]
