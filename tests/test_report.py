"""`callsieve report`: presence against effort, the threshold rule, the soundscape arrays.

Every case is a store written by hand (files, their status in the run, detections and
soundscape rows of known level), so each expected number follows from the case by
arithmetic stated beside it. Deployment and site names are invented.
"""

from __future__ import annotations

import csv
import json
import math
from datetime import UTC, datetime

import numpy as np
import pytest
from callsieve.classifier.cli import main
from callsieve.classifier.report import (
    DONE,
    FAILED,
    UNSCORED,
    UTC_ZONE,
    Zone,
    build_report,
    covered_seconds,
    presence_grid,
    presence_tables,
    probability_grid,
    resolve_thresholds,
    union_intervals,
)
from callsieve.classifier.report_soundscape import (
    SoundscapeAccumulator,
    choose_bin_s,
    decode_soundscape_row,
    duty_cycle_s,
    encode_soundscape_row,
    long_term_spectrogram,
    read_soundscape,
    third_octave_levels,
    union_band_edges,
    write_soundscape,
)
from callsieve.classifier.store import Transaction, open_store
from callsieve.classifier.sun import solar_coordinates, solar_elevation_deg, sunrise_sunset_utc_s

DAY0 = "2031-05-04"  # an invented survey day


def t(text: str) -> float:
    """UNIX seconds of an ISO UTC time."""
    return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()


def _grid(spans, dets, labels=("moan",), zone=UTC_ZONE):
    """presence_grid of (start_iso, duration_s, status) spans and (time_iso, label) detections."""
    a = np.array([t(s) for s, _, _ in spans])
    return presence_grid(
        a,
        a + np.array([d for _, d, _ in spans], float),
        np.array([st for _, _, st in spans]),
        np.array([t(x) for x, _ in dets], float),
        np.array([lab for _, lab in dets], dtype=str),
        list(labels),
        zone,
    )


def _rows(rows, **where):
    return [r for r in rows if all(r[k] == v for k, v in where.items())]


# --- effort intervals ----------------------------------------------------------------


def test_union_of_overlapping_files_counts_shared_time_once():
    a, b = union_intervals(np.array([0.0, 50.0, 200.0, 10.0]), np.array([100.0, 120.0, 300.0, 20.0]))
    assert a.tolist() == [0.0, 200.0] and b.tolist() == [120.0, 300.0]
    # Bins [0, 60), [60, 180), [180, 360): 60 + 60 + 100 s.
    assert covered_seconds(a, b, np.array([0.0, 60.0, 180.0, 360.0])).tolist() == [60.0, 60.0, 100.0]


# --- presence on hand-built cases ------------------------------------------------------


def test_duty_cycled_day_with_calls_in_known_hours():
    # 10 minutes recorded at the top of every hour (a 1-in-6 duty cycle), one day.
    spans = [(f"{DAY0}T{h:02d}:00:00Z", 600.0, DONE) for h in range(24)]
    dets = [
        (f"{DAY0}T03:04:00Z", "moan"),
        (f"{DAY0}T07:01:10Z", "moan"),
        (f"{DAY0}T07:01:50Z", "moan"),  # same minute as the one before
        (f"{DAY0}T07:08:00Z", "moan"),
        (f"{DAY0}T15:09:59Z", "moan"),
    ]
    hourly, daily = presence_tables(_grid(spans, dets), Zone())
    assert len(hourly) == 24 and len(daily) == 1
    for r in hourly:
        assert r["effort_min"] == 10.0 and r["flag_partial_effort"] == 1 and r["flag_no_effort"] == 0
        assert r["effort_1min_bins"] == 10 and r["effort_10min_bins"] == 1
    positive = {r["hour_of_day"]: r for r in hourly if r["detection_positive"] == 1}
    assert sorted(positive) == [3, 7, 15]
    assert positive[7]["detections"] == 3 and positive[7]["positive_1min_bins"] == 2
    assert positive[7]["positive_10min_bins"] == 1
    # 3 detections in 10 recorded minutes: 18 per recorded hour (not 3 per clock hour).
    assert positive[7]["detections_per_recorded_hour"] == pytest.approx(18.0)
    assert all(r["detection_positive"] == 0 for r in hourly if r["hour_of_day"] not in positive)
    d = daily[0]
    assert d["effort_min"] == 240.0 and d["hours_with_effort"] == 24 and d["positive_hours"] == 3
    assert d["detections"] == 5 and d["positive_1min_bins"] == 4 and d["positive_10min_bins"] == 3
    assert d["detections_per_recorded_hour"] == pytest.approx(5 / 4.0)
    assert d["detections_per_recorded_day"] == pytest.approx(5 / (240 / 1440))
    assert d["flag_partial_effort"] == 1


def test_gap_across_midnight_leaves_hours_without_effort_on_both_days():
    # 20:00–23:30 on day 0, silence, 00:30–04:00 on day 1.
    spans = [(f"{DAY0}T20:00:00Z", 3.5 * 3600, DONE), ("2031-05-05T00:30:00Z", 3.5 * 3600, DONE)]
    dets = [(f"{DAY0}T23:10:00Z", "moan"), ("2031-05-05T00:45:00Z", "moan")]
    hourly, daily = presence_tables(_grid(spans, dets), Zone())
    assert [r["date"] for r in daily] == [DAY0, "2031-05-05"]
    assert [r["effort_min"] for r in daily] == [210.0, 210.0]
    h23 = _rows(hourly, date=DAY0, hour_of_day=23)[0]
    h00 = _rows(hourly, date="2031-05-05", hour_of_day=0)[0]
    assert h23["effort_min"] == 30.0 and h23["flag_partial_effort"] == 1 and h23["detection_positive"] == 1
    assert h00["effort_min"] == 30.0 and h00["flag_partial_effort"] == 1 and h00["detection_positive"] == 1
    h22 = _rows(hourly, date=DAY0, hour_of_day=22)[0]
    assert h22["effort_min"] == 60.0 and h22["flag_partial_effort"] == 0 and h22["detection_positive"] == 0
    # Hours outside the recording are not "absent": no effort, and no yes/no.
    for r in _rows(hourly, date=DAY0, hour_of_day=5) + _rows(hourly, date="2031-05-05", hour_of_day=12):
        assert r["flag_no_effort"] == 1 and r["detection_positive"] is None and r["effort_min"] == 0.0


def test_failed_file_inside_an_hour_is_flagged_and_its_time_is_not_effort():
    spans = [
        (f"{DAY0}T10:00:00Z", 1200.0, DONE),
        (f"{DAY0}T10:20:00Z", 1200.0, FAILED),  # could not be read
        (f"{DAY0}T10:40:00Z", 1200.0, DONE),
        (f"{DAY0}T12:00:00Z", 0.0, FAILED),  # unreadable header: no length known
        (f"{DAY0}T13:00:00Z", 3600.0, DONE),
        (f"{DAY0}T13:00:00Z", 600.0, FAILED),  # a failed copy of recorded time: nothing lost
        (f"{DAY0}T14:00:00Z", 600.0, UNSCORED),
        (f"{DAY0}T15:00:00Z", 3600.0, FAILED),  # a whole hour lost, ending where hour 16 starts
    ]
    hourly, daily = presence_tables(_grid(spans, []), Zone())
    h10 = _rows(hourly, hour_of_day=10)[0]
    assert h10["effort_min"] == 40.0 and h10["failed_min"] == 20.0
    assert h10["flag_failed_files"] == 1 and h10["flag_partial_effort"] == 1
    h12 = _rows(hourly, hour_of_day=12)[0]
    assert h12["flag_failed_files"] == 1 and h12["flag_no_effort"] == 1 and h12["failed_min"] == 0.0
    h13 = _rows(hourly, hour_of_day=13)[0]
    assert h13["flag_failed_files"] == 0 and h13["failed_min"] == 0.0 and h13["effort_min"] == 60.0
    h14 = _rows(hourly, hour_of_day=14)[0]
    assert h14["unscored_min"] == 10.0 and h14["flag_no_effort"] == 1
    assert [r["flag_failed_files"] for r in _rows(hourly, hour_of_day=15) + _rows(hourly, hour_of_day=16)] == [1, 0]
    assert daily[0]["failed_min"] == 80.0 and daily[0]["flag_failed_files"] == 1


def test_day_with_no_effort_at_all_is_no_effort_not_absent():
    spans = [(f"{DAY0}T00:00:00Z", 86400.0, DONE), ("2031-05-06T00:00:00Z", 86400.0, DONE)]
    dets = [(f"{DAY0}T09:00:00Z", "moan"), ("2031-05-06T09:00:00Z", "moan")]
    hourly, daily = presence_tables(_grid(spans, dets, labels=("moan", "click")), Zone())
    gap = _rows(daily, date="2031-05-05", label="moan")[0]
    assert gap["flag_no_effort"] == 1 and gap["detection_positive"] is None and gap["effort_min"] == 0.0
    assert gap["detections_per_recorded_hour"] is None
    assert all(r["detection_positive"] is None for r in _rows(hourly, date="2031-05-05"))
    # Recorded days: positive for the class heard, a true 0 (absent) for the other.
    assert [r["detection_positive"] for r in _rows(daily, label="moan")] == [1, None, 1]
    assert [r["detection_positive"] for r in _rows(daily, label="click")] == [0, None, 0]
    assert _rows(daily, date=DAY0, label="moan")[0]["flag_partial_effort"] == 0


def test_utc_offset_moves_calls_across_the_date_line():
    spans = [(f"{DAY0}T00:00:00Z", 2 * 86400.0, DONE)]
    dets = [(f"{DAY0}T22:30:00Z", "moan"), ("2031-05-05T02:00:00Z", "moan")]
    _, utc = presence_tables(_grid(spans, dets), Zone())
    assert {r["date"]: r["detections"] for r in utc} == {DAY0: 1, "2031-05-05": 1}
    # UTC+3: 22:30Z is 01:30 next day; 02:00Z is 05:00 that same day.
    east = Zone.from_hours(3)
    hourly, daily = presence_tables(_grid(spans, dets, zone=east), east)
    assert {r["date"]: r["detections"] for r in daily} == {DAY0: 0, "2031-05-05": 2, "2031-05-06": 0}
    h = _rows(hourly, date="2031-05-05", hour_of_day=1)[0]
    assert h["detections"] == 1 and h["hour_start"] == "2031-05-05T01:00+03:00"
    assert h["hour_start_utc"] == "2031-05-04T22:00Z" and h["zone"] == "UTC+03:00"
    # The first local day starts at 03:00 local: three hours without effort, flagged.
    d0 = _rows(daily, date=DAY0)[0]
    assert d0["effort_min"] == 21 * 60 and d0["flag_partial_effort"] == 1
    # UTC-5: 02:00Z is 21:00 the evening before.
    west = Zone.from_hours(-5)
    _, daily = presence_tables(_grid(spans, dets, zone=west), west)
    assert {r["date"]: r["detections"] for r in daily} == {"2031-05-03": 0, DAY0: 2, "2031-05-05": 0}


def test_solar_zone_is_longitude_over_15_hours_to_the_minute():
    z = Zone.solar(174.8)  # invented position; 174.8 / 15 h = 11 h 39.2 min
    assert z.offset_s == (11 * 60 + 39) * 60 and z.kind == "solar" and not z.whole_hours
    assert "longitude / 15" in z.description and z.name == "UTC+11:39 solar"
    assert Zone.solar(350.0).offset_s == -40 * 60  # 350° E is 10° W
    assert Zone.from_hours(-3.5).suffix == "-03:30"


def test_estimated_presence_maps_utc_hours_and_combines_hours_into_days():
    spans = [(f"{DAY0}T00:00:00Z", 86400.0, DONE)]
    dets = [(f"{DAY0}T05:10:00Z", "moan"), (f"{DAY0}T06:10:00Z", "moan")]
    probs = {f"{DAY0}T05": 0.5, f"{DAY0}T06": 0.8}
    zone = Zone.from_hours(2)
    grid = _grid(spans, dets, zone=zone)
    p = probability_grid(probs, grid["days"], zone)
    hourly, daily = presence_tables(grid, zone, {"moan": p})
    assert _rows(hourly, date=DAY0, hour_of_day=7)[0]["presence_probability"] == 0.5
    assert _rows(hourly, date=DAY0, hour_of_day=8)[0]["presence_probability"] == 0.8
    assert _rows(hourly, date=DAY0, hour_of_day=9)[0]["presence_probability"] == 0.0
    # Before 02:00 local there is no effort: no probability either.
    assert _rows(hourly, date=DAY0, hour_of_day=1)[0]["presence_probability"] is None
    # 1 − (1 − 0.5)(1 − 0.8) = 0.9 (hours independent, as the estimate takes detections).
    assert _rows(daily, date=DAY0)[0]["presence_probability"] == pytest.approx(0.9)
    assert probability_grid(probs, grid["days"], Zone.solar(174.8)) is None


# --- the operating threshold ------------------------------------------------------------


def _estimate(guaranteed):
    return {"target": {"threshold_guaranteed": guaranteed}, "sample_id": 3, "verdicts": {"yes": 40, "no": 5}}


def test_threshold_rule_given_then_guaranteed_then_floor_with_warning():
    labels = ["moan", "click", "whistle"]
    est = {"moan": _estimate(0.72), "click": _estimate(None)}
    given, warn = resolve_thresholds(labels, 0.1, threshold=0.5, estimates=est)
    assert {k: v["threshold"] for k, v in given.items()} == {"moan": 0.5, "click": 0.5, "whistle": 0.5}
    assert {v["source"] for v in given.values()} == {"given"} and warn == []
    chosen, warn = resolve_thresholds(labels, 0.1, target_precision=0.95, estimates=est)
    assert chosen["moan"] == {"threshold": 0.72, "source": "guaranteed", "reason": chosen["moan"]["reason"]}
    assert "0.95" in chosen["moan"]["reason"] and "sample 3" in chosen["moan"]["reason"]
    assert chosen["click"]["source"] == "floor" and "cannot show precision 0.95" in chosen["click"]["reason"]
    assert chosen["whistle"]["source"] == "floor" and chosen["whistle"]["threshold"] == 0.1
    assert len(warn) == 2 and all("floor 0.1" in w for w in warn)


# --- a store written by hand ------------------------------------------------------------

EDGES = (1000.0 * 10.0 ** (0.3 * np.arange(-9, 10) / 6.0)).astype(np.float32)  # sixth-octave, 355–2818 Hz


def make_store(tmp_path, files, detections=(), soundscape=None, classes=("moan", "background"), manifest=None):
    """A store with one run: ``files`` (name, start_iso, duration_s, status or None),
    ``detections`` (file index, start_s, label, confidence, received level, SNR) and,
    per file index, soundscape ``(seconds, psd_db)`` on EDGES at 60-s bins."""
    db = tmp_path / "store.db"
    con = open_store(db)
    with Transaction(con):
        con.execute(
            "INSERT INTO deployments (name, manifest, sample_rate_hz, channel) VALUES ('shoal-bank-test', ?, 8000, 0)",
            (str(manifest or tmp_path / "missing.toml"),),
        )
        con.execute(
            "INSERT INTO runs (run_key, deployment_id, model_sha256, model_path, classes, target, threshold, "
            "parameters, versions, host, started_utc, status) VALUES ('k', 1, 'abc', '/nowhere/m.skops', ?, "
            "NULL, 0.1, '{}', '{}', 'test-host', '2031-06-01T00:00:00Z', 'finished')",
            (json.dumps(list(classes)),),
        )
        for i, (name, start, duration, status) in enumerate(files, start=1):
            con.execute(
                "INSERT INTO files (deployment_id, name, start_utc, duration_s, sample_rate_hz, size_bytes, "
                "mtime_ns) VALUES (1, ?, ?, ?, 8000, 1, 1)",
                (name, start, duration),
            )
            if status is not None:
                con.execute(
                    "INSERT INTO run_files (run_id, file_id, status, size_bytes, mtime_ns, scored_utc) "
                    "VALUES (1, ?, ?, 1, 1, '2031-06-01T00:00:00Z')",
                    (i, status),
                )
        for f, start_s, label, conf, rl, snr in detections:
            con.execute(
                "INSERT INTO detections (run_id, file_id, start_s, end_s, low_hz, high_hz, label, confidence, "
                "received_level_db, snr_db, clipped) VALUES (1, ?, ?, ?, 900.0, 1100.0, ?, ?, ?, ?, 0)",
                (f + 1, start_s, start_s + 1.5, label, conf, rl, snr),
            )
        for f, (seconds, psd) in (soundscape or {}).items():
            con.execute(
                "INSERT INTO soundscape (run_id, file_id, start_utc, bin_s, seconds, band_edges_hz, psd_db) "
                "VALUES (1, ?, ?, 60.0, ?, ?, ?)",
                (f + 1, files[f][1], *encode_soundscape_row(seconds, EDGES, psd)),
            )
    con.close()
    return db


def _read_csv(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def test_report_writes_tables_and_report_json_with_the_floor_warning(tmp_path):
    files = [
        ("a_20310504T000000Z.wav", f"{DAY0}T00:00:00Z", 3600.0, "done"),
        ("b_20310504T010000Z.wav", f"{DAY0}T01:00:00Z", 3600.0, "failed"),
        ("c_20310504T020000Z.wav", f"{DAY0}T02:00:00Z", 3600.0, "done"),
    ]
    dets = [
        (0, 100.0, "moan", 0.9, 120.0, 12.0),
        (0, 200.0, "moan", 0.05, 110.0, 3.0),
        (2, 50.0, "moan", 0.4, 115.0, 8),
    ]
    db = make_store(tmp_path, files, dets)
    out = tmp_path / "rep"
    r = build_report(db, out, figures=False)
    assert r["thresholds"]["moan"]["source"] == "floor" and r["thresholds"]["moan"]["threshold"] == 0.1
    assert any("floor 0.1" in w for w in r["warnings"])
    assert any("no soundscape rows" in w for w in r["warnings"])
    hourly = _read_csv(out / "presence_hourly.csv")
    assert [h["detections"] for h in hourly[:3]] == ["1", "0", "1"]  # 0.05 is below the floor's 0.1
    assert [h["detection_positive"] for h in hourly[:4]] == ["1", "", "1", ""]
    assert hourly[1]["flag_failed_files"] == "1" and hourly[1]["failed_min"] == "60.0"
    assert (out / "presence_daily.parquet").exists() and (out / "presence_hourly.parquet").exists()
    saved = json.loads((out / "report.json").read_text())
    assert saved["files"] == {"done": 2, "failed": 1, "unscored": 0} and saved["recorded_hours"] == 2.0
    assert "trained analysts" in saved["caution"]
    # --threshold 0.5 keeps only the 0.9 detection; below the floor it is refused.
    r = build_report(db, out, threshold=0.5, figures=False)
    assert r["thresholds"]["moan"]["source"] == "given" and r["summary"][0]["detections"] == 1
    with pytest.raises(Exception, match="below run 1's floor"):
        build_report(db, out, threshold=0.05, figures=False)


def test_report_command_exit_codes(tmp_path, capsys):
    db = make_store(tmp_path, [("a_20310504T000000Z.wav", f"{DAY0}T00:00:00Z", 3600.0, "done")])
    assert main(["report", str(db), "--out", str(tmp_path / "r"), "--quiet", "--utc-offset", "99"]) == 2
    assert "--utc-offset" in capsys.readouterr().err
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "keep.txt").write_text("mine")
    assert main(["report", str(db), "--out", str(tmp_path / "other"), "--quiet"]) == 2


def _write_sample(db, label, conf_to_verdict, edges):
    """A verification sample written by hand: one stratum per pair of edges, every item judged."""
    con = open_store(db, create=False)
    with Transaction(con):
        sid = con.execute(
            "INSERT INTO review_samples (run_id, label, design, seed, blind, folder, created_utc) "
            "VALUES (1, ?, '{}', 1, 0, '.', '2031-06-02T00:00:00Z')",
            (label,),
        ).lastrowid
        rows = con.execute("SELECT detection_id, confidence FROM detections WHERE label=?", (label,)).fetchall()
        for h in range(len(edges) - 1):
            members = [r for r in rows if edges[h] <= r[1] < edges[h + 1]]
            con.execute(
                "INSERT INTO review_strata VALUES (?, ?, ?, ?, ?, ?)",
                (sid, h + 1, edges[h], edges[h + 1], len(members), len(members)),
            )
            for k, (d, c) in enumerate(members):
                con.execute(
                    "INSERT INTO review_items (sample_id, detection_id, stratum, inclusion_probability, draw_order) "
                    "VALUES (?, ?, ?, 1.0, ?)",
                    (sid, d, h + 1, k),
                )
                con.execute(
                    "INSERT INTO verdicts (detection_id, reviewer, verdict, recorded_utc) "
                    "VALUES (?, 'analyst-a', ?, '2031-06-02T00:00:00Z')",
                    (d, conf_to_verdict(c)),
                )
    con.close()


def test_guaranteed_threshold_from_a_verified_sample_sets_the_operating_threshold(tmp_path):
    # 60 detections per stratum: below 0.5 all false, at or above 0.5 all true. With every
    # detection verified (f_h = 1) the top stratum's precision is known exactly (estimates §2).
    files = [(f"f{h:02d}_2031.wav", f"{DAY0}T{h:02d}:00:00Z", 3600.0, "done") for h in range(4)]
    dets = [(h, 10.0 + 50 * k, "moan", 0.2 + 0.004 * k, 110.0, 6.0) for h in (0, 1) for k in range(30)]
    dets += [(h, 10.0 + 50 * k, "moan", 0.6 + 0.004 * k, 120.0, 12.0) for h in (2, 3) for k in range(30)]
    db = make_store(tmp_path, files, dets)
    _write_sample(db, "moan", lambda c: "yes" if c >= 0.5 else "no", [0.1, 0.5, 1.0])
    r = build_report(db, tmp_path / "rep", target_precision=0.9, figures=False)
    assert r["thresholds"]["moan"]["source"] == "guaranteed" and r["thresholds"]["moan"]["threshold"] == 0.5
    hourly = _read_csv(tmp_path / "rep" / "presence_hourly.csv")
    assert [h["detection_positive"] for h in hourly[:4]] == ["0", "0", "1", "1"]
    # Verified-yes hours are certainly present, and hours without a detection hold none.
    assert [h["presence_probability"] for h in hourly[:4]] == ["0.0", "0.0", "1.0", "1.0"]


# --- the soundscape ----------------------------------------------------------------


def _band(low_hz):
    return int(np.argmin(np.abs(EDGES[:-1] - low_hz)))


def test_a_tone_of_known_level_stands_at_its_psd_level_and_its_third_octave_level(tmp_path):
    # A 1 kHz tone of 120 dB re 1 µPa (rms) in the sixth-octave band 1000–1122 Hz: its mean
    # PSD over the band is 120 − 10 log10(width) dB re 1 µPa²/Hz (ISO 18405 levels; the
    # band holds all of the tone's power). Elsewhere a flat 40 dB re 1 µPa²/Hz.
    k = _band(1000.0)
    width = float(EDGES[k + 1]) - float(EDGES[k])
    psd = np.full((60, EDGES.size - 1), 40.0)
    psd[:, k] = 120.0 - 10 * np.log10(width)
    files = [("t_20310504T000000Z.wav", f"{DAY0}T00:00:00Z", 3600.0, "done")]
    db = make_store(tmp_path, files, soundscape={0: (np.full(60, 60.0), psd)})
    r = build_report(db, tmp_path / "rep", figures=False)
    lts, arrays = read_soundscape(tmp_path / "rep" / "soundscape.npz")
    assert r["soundscape"]["bin_s"] == 60.0 and lts.psd_db.shape == (60, EDGES.size - 1)
    # float16 storage: spacing 0.0625 dB near 100 dB, so within half of it.
    np.testing.assert_allclose(lts.psd_db[:, k], 120.0 - 10 * np.log10(width), atol=0.032)
    # The 1 kHz third-octave band (891–1122 Hz, IEC 61260-1) holds the tone and 891–1000 Hz
    # of the 40 dB floor: 10 log10(10^12 + 10^4 · 108.7) = 120.0000047 dB re 1 µPa.
    j = list(arrays["third_octave_names"]).index("1 kHz")
    np.testing.assert_allclose(arrays["third_octave_db"][:, j], 120.0, atol=0.03)
    assert float(arrays["third_octave_lower_hz"][j]) == pytest.approx(891.2509, abs=1e-3)
    # The 5th, 50th and 95th percentiles of a steady tone are its level (0.05-dB histogram).
    np.testing.assert_allclose(lts.percentile_db[:, k], 120.0 - 10 * np.log10(width), atol=0.07)


def test_third_octave_level_of_a_flat_psd_is_psd_plus_ten_log_bandwidth():
    # IEC 61260-1:2014 base-10 edges (REFERENCES §2): bandwidth 0.2307675 f_m, so a flat
    # 60 dB re 1 µPa²/Hz gives 83.63 dB re 1 µPa in the 1 kHz band (REFERENCES §5).
    psd = np.full((3, EDGES.size - 1), 60.0)
    third = third_octave_levels(psd, EDGES)
    assert third["names"] == [
        "400 Hz",
        "500 Hz",
        "630 Hz",
        "800 Hz",
        "1 kHz",
        "1.25 kHz",
        "1.6 kHz",
        "2 kHz",
        "2.5 kHz",
    ]
    expected = 60.0 + 10 * np.log10(0.2307675 * third["centre_hz"])
    np.testing.assert_allclose(third["level_db"], np.broadcast_to(expected, (3, 9)), atol=1e-3)
    assert third["level_db"][0, 4] == pytest.approx(83.63, abs=0.01)
    # A band partly unmeasured (a NaN finer band: no frequency bin in it) is the mean of
    # what was measured, times its width; under half measured it is NaN.
    psd[:, _band(891.25)] = np.nan  # 891–1000 Hz: 47 % of the band, 53 % left measured
    assert third_octave_levels(psd, EDGES)["level_db"][0, 4] == pytest.approx(83.63, abs=0.01)
    psd[:, _band(891.25)] = 60.0
    psd[:, _band(1000.0)] = np.nan  # 1000–1122 Hz: 53 % unmeasured
    assert np.isnan(third_octave_levels(psd, EDGES)["level_db"][0, 4])


def _random_rows(rng, n_files, n_bins=30):
    starts = 1_955_000_000.0 + 3600.0 * np.arange(n_files) + rng.uniform(0, 100, n_files)
    rows = []
    for s in starts:
        sec = np.full(n_bins, 60.0)
        sec[-1] = rng.uniform(1, 59)  # the file's last, partial bin
        psd = rng.uniform(50, 110, (n_bins, EDGES.size - 1))
        psd[rng.random(psd.shape) < 0.05] = np.nan
        rows.append((s, sec, decode_soundscape_row(*encode_soundscape_row(sec, EDGES, psd))[2]))
    return rows


def test_streaming_bin_by_bin_and_file_by_file_equals_one_shot():
    rows = _random_rows(np.random.default_rng(7), 5)
    start = math.floor(rows[0][0] / 300.0) * 300.0
    n_time = 62
    t0 = np.concatenate([s + 60.0 * np.arange(sec.size) for s, sec, _ in rows])
    sec = np.concatenate([r[1] for r in rows])
    psd = np.concatenate([r[2] for r in rows])
    one_shot, seconds = long_term_spectrogram(t0, sec, psd, start, 300.0, n_time)
    by_file = SoundscapeAccumulator(start, 300.0, n_time, EDGES)
    by_bin = SoundscapeAccumulator(start, 300.0, n_time, EDGES)
    for s, sc, p in rows:
        by_file.add_file(s, 60.0, sc, p, EDGES)
    for i in np.random.default_rng(1).permutation(t0.size):  # any order, one bin at a time
        by_bin.add(t0[i : i + 1], sec[i : i + 1], psd[i : i + 1], EDGES)
    for acc in (by_file.result(), by_bin.result()):
        np.testing.assert_allclose(acc.psd_db, one_shot, atol=1e-5, equal_nan=True)
        np.testing.assert_allclose(acc.seconds, seconds, rtol=1e-12)
    np.testing.assert_array_equal(by_file.result().percentile_db, by_bin.result().percentile_db)
    # Weighted mean of power by hand for one output bin.
    k = 3
    mid = t0 + 30.0
    inside = np.floor((mid - start) / 300.0) == k
    col = 4
    ok = inside & np.isfinite(psd[:, col])
    expected = 10 * np.log10(np.sum(10 ** (psd[ok, col] / 10) * sec[ok]) / np.sum(sec[ok]))
    assert one_shot[k, col] == pytest.approx(expected, abs=1e-5)


def test_gaps_stay_gaps_in_the_spectrogram_and_the_band_levels(tmp_path):
    # Two one-hour files with two hours of silence between them.
    psd = np.full((60, EDGES.size - 1), 70.0)
    files = [
        ("g1_20310504T000000Z.wav", f"{DAY0}T00:00:00Z", 3600.0, "done"),
        ("g2_20310504T030000Z.wav", f"{DAY0}T03:00:00Z", 3600.0, "done"),
    ]
    db = make_store(tmp_path, files, soundscape={0: (np.full(60, 60.0), psd), 1: (np.full(60, 60.0), psd)})
    build_report(db, tmp_path / "rep", figures=False)
    lts, arrays = read_soundscape(tmp_path / "rep" / "soundscape.npz")
    assert lts.psd_db.shape[0] == 240
    gap = slice(60, 180)
    assert np.isnan(lts.psd_db[gap]).all() and (lts.seconds[gap] == 0).all()
    assert np.isnan(arrays["third_octave_db"][gap]).all()
    assert np.isfinite(lts.psd_db[:60]).all() and np.isfinite(lts.psd_db[180:]).all()
    third = _read_csv(tmp_path / "rep" / "third_octave_levels.csv")
    assert third[100]["1 kHz"] == "" and third[10]["1 kHz"] != ""


def test_soundscape_file_reads_back_without_pickles(tmp_path):
    rows = _random_rows(np.random.default_rng(3), 2)
    acc = SoundscapeAccumulator(math.floor(rows[0][0] / 60) * 60, 60.0, 200, EDGES)
    for s, sc, p in rows:
        acc.add_file(s, 60.0, sc, p, EDGES)
    lts = acc.result()
    path = write_soundscape(tmp_path / "s.npz", lts, {"detection_label": np.array(["moan", "click"])})
    back, arrays = read_soundscape(path)
    np.testing.assert_array_equal(back.psd_db, lts.psd_db)
    np.testing.assert_array_equal(back.time_utc_s, lts.time_utc_s)
    assert arrays["detection_label"].tolist() == ["moan", "click"]


def test_time_bin_grows_with_the_deployment_and_spans_a_duty_cycle():
    assert [choose_bin_s(d * 86400.0) for d in (0.5, 1, 2, 31, 32, 200)] == [60, 60, 300, 300, 1800, 3600]
    # 20 minutes every hour: a bin of one hour, so no bin falls wholly into the recorder's sleep.
    starts = 3600.0 * np.arange(48)
    assert duty_cycle_s(starts, np.full(48, 1200.0)) == 3600.0
    assert duty_cycle_s(starts, np.full(48, 3600.0)) is None
    assert choose_bin_s(8 * 86400.0, 3600.0) == 3600.0 and choose_bin_s(8 * 86400.0, 2400.0) == 3600.0
    assert choose_bin_s(300 * 86400.0, 600.0) == 3600.0


def test_files_at_another_rate_add_the_bands_they_share():
    # A file with only the lower half of the bands (a lower sample rate) adds to those bands.
    acc = SoundscapeAccumulator(0.0, 60.0, 2, EDGES)
    acc.add_file(0.0, 60.0, np.array([60.0]), np.full((1, EDGES.size - 1), 50.0), EDGES)
    low = EDGES[:10]
    acc.add_file(60.0, 60.0, np.array([60.0]), np.full((1, low.size - 1), 80.0), low)
    r = acc.result()
    assert np.isfinite(r.psd_db[1, :9]).all() and np.isnan(r.psd_db[1, 9:]).all()
    assert r.psd_db[1, 0] == pytest.approx(80.0, abs=0.01) and r.psd_db[0, 0] == pytest.approx(50.0, abs=0.01)


def test_a_top_band_cut_at_a_lower_nyquist_frequency_joins_the_full_layout():
    # As scoring writes them: the last band of a file is cut at its Nyquist frequency, so
    # a 2.2 kHz file ends at 1100 Hz inside a band (1000–1122 Hz) a faster file has whole.
    low = np.append(EDGES[EDGES < 1100.0], np.float32(1100.0))
    edges = union_band_edges([EDGES, low])
    assert np.isclose(edges, 1100.0).sum() == 1 and edges.size == EDGES.size + 1
    acc = SoundscapeAccumulator(0.0, 60.0, 2, edges)
    acc.add_file(0.0, 60.0, np.array([60.0]), np.full((1, low.size - 1), 70.0), low)
    acc.add_file(60.0, 60.0, np.array([60.0]), np.full((1, EDGES.size - 1), 60.0), EDGES)
    r = acc.result()
    top = int(np.flatnonzero(np.isclose(edges, 1100.0))[0])  # first band above the cut
    assert np.isfinite(r.psd_db[0, :top]).all() and np.isnan(r.psd_db[0, top:]).all()
    # The full layout's band across 1100 Hz gives its PSD to both parts of it.
    np.testing.assert_allclose(r.psd_db[1], 60.0, atol=0.01)


# --- the sun --------------------------------------------------------------------------


def test_sun_position_against_meeus_example():
    # Meeus, Astronomical Algorithms (1998), Example 25.a, 1992 October 13.0 TD: apparent
    # declination −7.78507°, right ascension 198.38083° (13h 13m 31.4s); Example 28.b:
    # equation of time 13.711 min. Values recalled from memory; the low-accuracy method
    # is good to 0.01° (Meeus ch. 25).
    c = solar_coordinates(t("1992-10-13T00:00:00Z"))
    assert float(c["declination_deg"]) == pytest.approx(-7.78507, abs=0.01)
    assert float(c["right_ascension_deg"]) == pytest.approx(198.38083, abs=0.01)
    assert float(c["equation_of_time_min"]) == pytest.approx(13.711, abs=0.1)


def test_sunrise_and_sunset_at_the_equator_at_equinox_and_polar_night():
    # At the equator near an equinox the day is 12 h plus the time the sun takes to move
    # 2 × 0.833° (refraction and semi-diameter): 12 h 6.7 min (common practice).
    rise, noon, sset = sunrise_sunset_utc_s(t("2031-03-20T00:00:00Z"), 0.0, 0.0)
    assert float(sset - rise) / 60.0 == pytest.approx(726.7, abs=1.0)
    # Solar noon at longitude 0 is 12:00 UTC minus the equation of time (~−7.5 min then).
    assert float(noon - t("2031-03-20T12:00:00Z")) / 60.0 == pytest.approx(7.5, abs=1.0)
    assert solar_elevation_deg(float(noon), 0.0, 0.0) == pytest.approx(90.0, abs=0.5)
    # 80° S in June: the sun stays down all day; in December it stays up.
    r, _, s = sunrise_sunset_utc_s(t("2031-06-21T00:00:00Z"), -80.0, 30.0)
    assert np.isnan(r) and np.isnan(s)
    r, _, s = sunrise_sunset_utc_s(t("2031-12-21T00:00:00Z"), -80.0, 30.0)
    assert r == -np.inf and s == np.inf
    # Elevation at sunrise is −0.833° (the rise convention), within the method's accuracy.
    rise, _, _ = sunrise_sunset_utc_s(t("2031-09-01T00:00:00Z"), -41.0, 174.0)
    assert solar_elevation_deg(float(rise), -41.0, 174.0) == pytest.approx(-0.833, abs=0.05)


def test_zone_of_the_table_is_written_in_every_row(tmp_path):
    files = [("a_20310504T000000Z.wav", f"{DAY0}T00:00:00Z", 3600.0, "done")]
    db = make_store(tmp_path, files)
    build_report(db, tmp_path / "rep", utc_offset_h=-3.5, figures=False)
    rows = _read_csv(tmp_path / "rep" / "presence_hourly.csv")
    assert {r["zone"] for r in rows} == {"UTC-03:30"}
    assert rows[0]["hour_start"].endswith("-03:30") and rows[0]["date"] == "2031-05-03"
    assert datetime.fromisoformat(rows[0]["hour_start_utc"].replace("Z", "+00:00")).tzinfo == UTC


# --- a survey store for the figures and the page ------------------------------------------

SURVEY_EDGES = (1000.0 * 10.0 ** (0.3 * np.arange(-40, 13) / 6.0)).astype(np.float32)  # 10 Hz – 4 kHz


def survey_store(tmp_path, days=8, seed=0, sample=True):
    """An invented 8-day survey: 20 minutes recorded at the top of each hour, a day lost,
    a failed file, night-time calls of 'moan', a few 'click' detections, ship passages in
    the soundscape, and (``sample``) a fully verified sample of 'moan'. Site position in
    the manifest (invented)."""
    rng = np.random.default_rng(seed)
    manifest = tmp_path / "survey.toml"
    manifest.write_text(
        '[deployment]\nname = "shoal-bank-test"\naudio_dir = "audio"\nglob = "*.wav"\n'
        'timestamp_format = "%Y%m%dT%H%M%SZ"\n[site]\nlatitude = -38.5\nlongitude = 150.25\n'
    )
    files, dets, scape = [], [], {}
    centre = np.sqrt(SURVEY_EDGES[:-1].astype(float) * SURVEY_EDGES[1:])
    base = 92.0 - 18.0 * np.log10(centre / 10.0)
    for d in range(days):
        if d == 4:
            continue  # the recorder was down for a day
        for h in range(24):
            start = datetime(2031, 5, 4 + d, h, tzinfo=UTC)
            name = f"sb_{start:%Y%m%dT%H%M%SZ}.wav"
            status = "failed" if (d, h) == (2, 13) else "done"
            files.append((name, start.strftime("%Y-%m-%dT%H:%M:%SZ"), 1200.0, status))
            i = len(files) - 1
            if status != "done":
                continue
            local_h = (h + 10) % 24  # about UTC+10 at this invented site
            night = local_h >= 19 or local_h < 6
            if night and rng.random() < 0.7:
                for _ in range(rng.integers(1, 6)):
                    c = float(rng.uniform(0.12, 0.99))
                    dets.append((i, float(rng.uniform(0, 1190)), "moan", c, 110 + 15 * c, 3 + 12 * c))
            if rng.random() < 0.05:
                dets.append((i, float(rng.uniform(0, 1190)), "click", float(rng.uniform(0.1, 0.6)), 100.0, 4.0))
            psd = base + 3.0 * np.sin(2 * np.pi * local_h / 24) + rng.normal(0, 1.5, (20, centre.size))
            if d in (1, 6) and 8 <= h <= 10:
                psd += 18.0 * np.exp(-(((np.arange(20)[:, None] - 10) / 6.0) ** 2))  # a ship passing
            if night:
                psd[:, (centre > 100) & (centre < 200)] += 6.0
            psd[:, centre < 14] = np.nan  # bands without a frequency bin
            scape[i] = (np.full(20, 60.0), psd)
    db = make_store(tmp_path, files, dets, soundscape=None, classes=("moan", "click", "background"), manifest=manifest)
    con = open_store(db, create=False)
    with Transaction(con):
        for i, (sec, psd) in scape.items():
            con.execute(
                "INSERT INTO soundscape (run_id, file_id, start_utc, bin_s, seconds, band_edges_hz, psd_db) "
                "VALUES (1, ?, ?, 60.0, ?, ?, ?)",
                (i + 1, files[i][1], *encode_soundscape_row(sec, SURVEY_EDGES, psd)),
            )
    con.close()
    if sample:
        _write_sample(
            db, "moan", lambda c: "yes" if c > 0.35 or int(c * 1000) % 3 == 0 else "no", [0.1, 0.35, 0.7, 1.0]
        )
    return db


def test_report_command_states_the_threshold_rule_and_writes_every_output(tmp_path, capsys):
    db = survey_store(tmp_path, days=3)
    out = tmp_path / "rep"
    assert main(["report", str(db), "--out", str(out), "--quiet", "--target-precision", "0.9"]) == 0
    text = capsys.readouterr().out
    assert "moan: threshold 0.35 (guaranteed" in text and "click: threshold 0.1 (floor" in text
    assert "warning: click: operating at the run's floor" in text
    assert "local mean solar time, UTC+10:01" in text  # the manifest's longitude 150.25° E
    r = json.loads((out / "report.json").read_text())
    for name in (
        "presence_hourly.csv",
        "presence_daily.parquet",
        "soundscape.npz",
        "report.html",
        "presence-raster-moan.png",
        "long-term-spectrogram.png",
        "verified-precision-moan.png",
    ):
        assert name in r["outputs"] and (out / name).exists(), name
    assert r["thresholds"]["moan"]["source"] == "guaranteed" and r["site"] == {"latitude": -38.5, "longitude": 150.25}
    # Running it again into the same folder replaces the earlier report.
    assert main(["report", str(db), "--out", str(out), "--quiet", "--threshold", "0.5"]) == 0
    assert json.loads((out / "report.json").read_text())["thresholds"]["moan"]["source"] == "given"


def test_day_probability_from_hours_equals_the_estimates_own_day_probability(tmp_path):
    # In UTC each day is 24 UTC hours, and 1 − Π(1 − p_hour) over them is the estimate's
    # own 1 − Π(1 − p_detection) over the day's detections (docs/estimates.md §6).
    from callsieve.classifier.estimate import estimate_run

    db = survey_store(tmp_path, days=3)
    est = estimate_run(db, label="moan", target_precision=0.9)
    r = build_report(db, tmp_path / "rep", target_precision=0.9, figures=False)
    assert r["thresholds"]["moan"]["threshold"] == est["presence"]["threshold"]
    daily = {d["date"]: d for d in _read_csv(tmp_path / "rep" / "presence_daily.csv") if d["label"] == "moan"}
    for day, p in est["presence"]["days_probability"].items():
        assert float(daily[day]["presence_probability"]) == pytest.approx(p, abs=2e-4)
    hourly = [h for h in _read_csv(tmp_path / "rep" / "presence_hourly.csv") if h["label"] == "moan"]
    for h in hourly:
        key = h["hour_start_utc"][:13]
        if key in est["presence"]["hours_probability"]:
            assert float(h["presence_probability"]) == est["presence"]["hours_probability"][key]


def test_figures_redraw_from_the_soundscape_file_alone(tmp_path):
    from callsieve.classifier.report_plots import long_term_spectrogram_figure, percentile_spectra_figure

    rows = _random_rows(np.random.default_rng(5), 3)
    acc = SoundscapeAccumulator(math.floor(rows[0][0] / 300) * 300, 300.0, 40, EDGES)
    for s, sc, p in rows:
        acc.add_file(s, 60.0, sc, p, EDGES)
    path = write_soundscape(
        tmp_path / "s.npz",
        acc.result(),
        {"detection_time_utc_s": np.array([rows[0][0] + 90.0]), "detection_label": np.array(["moan"])},
    )
    lts, a = read_soundscape(path)
    fig = long_term_spectrogram_figure(
        lts, "an invented site", {"time_s": a["detection_time_utc_s"], "label": a["detection_label"]}
    )
    labels = [ax.get_ylabel() for ax in fig.axes]
    assert "mean PSD, dB re 1 µPa²/Hz" in labels and "frequency, Hz" in labels
    fig = percentile_spectra_figure(lts, "an invented site")
    assert fig.axes[0].get_ylabel() == "PSD, dB re 1 µPa²/Hz" and len(fig.axes[0].get_lines()) == 3
