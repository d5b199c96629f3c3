"""`callsieve budget`: the level chain, against the worked chains of the trade.

Worked examples A and B: the hydrophone -> preamplifier -> converter arithmetic of
REFERENCES §4 (computed from the chain's definitions; the quantisation rule LSB/√12 is the
standard converter result, from memory).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from callsieve.classifier.budget import clip_range_m, level_chain, quantisation_floor_db
from callsieve.classifier.cli import main
from callsieve.features.propagation import Seawater

WATER = Seawater()


def test_worked_example_a_clip_level_lsb_and_quantisation_floor():
    # Example A: -170 dB hydrophone + 40 dB preamp = -130 dB re 1 V/µPa, ±2.5 V, 16 bits:
    # clip 137.96 dB re 1 µPa (0-pk); LSB 47.65 dB re 1 µPa; quantisation noise 36.86 dB
    # re 1 µPa broadband, -6.94 dB re 1 µPa²/Hz at 48 kHz.
    q = quantisation_floor_db(2.5, 16, -130.0, 48000)
    assert q["lsb_db"] == pytest.approx(47.65, abs=0.005)
    assert q["noise_db"] == pytest.approx(36.86, abs=0.005)
    assert q["psd_db"] == pytest.approx(-6.94, abs=0.005)
    # 120 dB re 1 µPa rms (1 Pa) gives 0.31623 V rms, sample value 0.12649 (at 1 m, no loss).
    chain = level_chain(120.0, 1.0, np.array([1.0]), -130.0, 2.5, 16, WATER)
    assert chain["volts"][0] == pytest.approx(0.31623, rel=1e-4)
    assert chain["sample_value"][0] == pytest.approx(0.12649, rel=1e-4)
    assert chain["counts"][0] == pytest.approx(0.12649 * 32768, rel=1e-4)
    # Headroom of that rms sine: 137.96 - (120 + 3.01) dB.
    assert chain["headroom_db"][0] == pytest.approx(137.96 - 123.01, abs=0.01)


def test_worked_example_b_24_bit_lsb_and_a_100_db_level():
    # Example B: -165 dB + 12 dB, ±1.0 V, 24 bits: LSB 14.53 dB re 1 µPa; 100 dB re 1 µPa rms
    # gives 2.2387e-3 V rms and the same sample value.
    assert quantisation_floor_db(1.0, 24, -153.0, 96000)["lsb_db"] == pytest.approx(14.53, abs=0.005)
    chain = level_chain(100.0, 1.0, np.array([1.0]), -153.0, 1.0, 24, WATER)
    assert chain["volts"][0] == pytest.approx(2.2387e-3, rel=1e-4)
    assert chain["sample_value"][0] == pytest.approx(2.2387e-3, rel=1e-4)


def test_a_source_20_db_above_one_volt_at_1_km_clips_a_10_volt_converter_inside_1_km():
    """Common practice: with spherical spreading and no absorption, a source 20 dB above the
    level that gives 1 V at 1 km gives 10 V at 1 km, so a ±10 V converter clips inside 1 km,
    and at 100 m (20 dB closer) it is 20 dB over."""
    sensitivity = -150.0
    one_volt_at_1km = 0.0 - sensitivity + 60.0  # RL for 1 V is 150 dB re 1 µPa; TL(1 km) 60 dB
    source = one_volt_at_1km + 20.0
    # At 1 Hz, absorption is 1e-4 dB/km or less: spreading alone, to this test's precision.
    r = clip_range_m(source, 1.0, sensitivity, 10.0, WATER, peak=True)
    assert r == pytest.approx(1000.0, rel=0.005)
    chain = level_chain(source, 1.0, np.array([100.0, 1000.0]), sensitivity, 10.0, None, WATER, peak=True)
    assert chain["headroom_db"] == pytest.approx([-20.0, 0.0], abs=0.01)
    assert chain["volts"] == pytest.approx([100.0, 10.0], rel=1e-3)
    assert np.isnan(chain["counts"]).all()  # a float file has no counts


def test_absorption_columns_follow_both_published_formulas():
    # At 10 kHz the two formulas agree within about 10 % (both tabulated in REFERENCES §1);
    # the loss grows with range as alpha r / 1000.
    chain = level_chain(180.0, 10000.0, np.array([1000.0, 10000.0]), -160.0, 1.0, 16, WATER)
    fg, am = chain["absorption_fg_db"], chain["absorption_am_db"]
    assert fg[1] == pytest.approx(10 * fg[0]) and am[1] == pytest.approx(10 * am[0])
    assert am[0] == pytest.approx(fg[0], rel=0.15)
    assert chain["tl_db"] == pytest.approx(chain["spreading_db"] + fg)


def test_budget_command_on_a_deployment(labelled, capsys):
    manifest = labelled[0]  # conftest: -170 dB + 40 dB, ±2.5 V, 16-bit WAV at 2 kHz, 65 dB noise
    assert main(["budget", str(manifest), "--source-level", "170", "--frequency", "500", "--json"]) == 0
    b = json.loads(capsys.readouterr().out)
    assert b["bits"] == 16 and b["clip_level_db"] == pytest.approx(137.96, abs=0.005)
    assert b["quantisation"]["psd_db"] == pytest.approx(36.86 - 10 * math.log10(1000), abs=0.01)
    # The site's white noise is 65 dB re 1 µPa²/Hz: far above the converter's, so the sea sets the floor.
    assert b["site_noise"]["psd_db"] == pytest.approx(65.0, abs=0.5)
    assert b["noise_floor"].startswith("the sea sets the floor")
    rows = b["table"]
    assert [r["range_m"] for r in rows][:3] == [1.0, 2.0, 5.0]
    assert all(a["headroom_db"] < c["headroom_db"] for a, c in zip(rows, rows[1:], strict=False))
    assert 0 < b["clip_range_m"] < 1000
    assert "regulations" in b["caution"]


def test_budget_refuses_a_frequency_above_nyquist(labelled, capsys):
    code = main(["budget", str(labelled[0]), "--source-level", "170", "--frequency", "5000"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "at most 1000 Hz" in err[0]


# --- the detection function and the effective area ---


def test_effective_area_of_a_step_and_a_half_normal_detection_function():
    """Buckland et al. (2001): a step P = 1 to R gives πR²; a half-normal exp(-r²/2σ²) gives
    2πσ² (effective radius σ√2); the integration error must stay within 0.5 %."""
    from callsieve.classifier.budget import effective_area_m2

    r = np.geomspace(1.0, 2e5, 600)
    r = np.union1d(r, [5000.0])  # the step's edge on the grid
    assert effective_area_m2(r, (r <= 5000.0).astype(float)) == pytest.approx(math.pi * 5000.0**2, rel=0.005)
    sigma = 3000.0
    area = effective_area_m2(r, np.exp(-(r**2) / (2 * sigma**2)))
    assert area == pytest.approx(2 * math.pi * sigma**2, rel=0.005)
    assert math.sqrt(area / math.pi) == pytest.approx(sigma * math.sqrt(2), rel=0.005)


def test_a_step_recall_gives_the_normal_chance_that_the_call_clears_the_noise():
    """With recall a step at 0 dB SNR and one noise level, P(detect | r) is the chance that a
    normal source level exceeds TL(r) + NL: Φ((SL - TL - NL)/σ) (the sonar equation)."""
    from callsieve.classifier.budget import detection_function
    from scipy.stats import norm

    r = np.array([10.0, 1000.0, 3000.0, 10000.0, 30000.0])
    loss = 20 * np.log10(r)
    p = detection_function(r, 160.0, 6.0, loss, np.array([90.0]), np.array([-0.01, 0.01]), np.array([0.0, 1.0]))
    assert p == pytest.approx(norm.cdf((160.0 - loss - 90.0) / 6.0), abs=0.01)
    assert np.all(np.diff(p) <= 1e-12)  # never more likely farther away


def test_budget_with_a_run_gives_its_detection_function(labelled, reference, tmp_path, capsys):
    db, _ = reference
    out = tmp_path / "ev"
    assert main(["evaluate", str(db), "--truth", str(labelled[1]), "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    argv = ["budget", str(labelled[0]), "--source-level", "160", "--frequency", "120", "--db", str(db)]
    argv += ["--evaluation", str(out), "--label", "up", "--figure", str(tmp_path / "p.png"), "--json"]
    assert main(argv) == 0
    d = json.loads(capsys.readouterr().out)["detection"]
    assert d["label"] == "up" and d["noise_minutes"] == 24  # 6 files of 4 one-minute bins
    p = [row["p"] for row in d["ranges"]]
    assert all(b <= a + 1e-9 for a, b in zip(p, p[1:], strict=False))
    assert all(row["p_low"] <= row["p"] <= row["p_high"] for row in d["ranges"])
    assert d["effective_area_km2_low"] <= d["effective_area_km2"] <= d["effective_area_km2_high"]
    assert (tmp_path / "p.png").stat().st_size > 1000
    assert main(["budget", str(labelled[0]), "--source-level", "160", "--frequency", "120", "--db", str(db)]) == 2
