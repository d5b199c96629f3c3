"""`callsieve review sample`: the stratified design, its extension, audit segments and rendered items.

Stores are built by hand in tmp_path (a deployment of short noise files, a run, detections
with chosen confidences), so each test is fast and knows its population exactly.
"""

from __future__ import annotations

import csv
import json
import math
import sqlite3
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from callsieve.classifier.cli import main
from callsieve.classifier.review import (
    allocate,
    day_groups,
    draw_sample,
    extend_sample,
    neyman_weights,
    pilot_precision,
    quantile_edges,
    stratum_index,
)
from callsieve.classifier.review_render import (
    PSD_LABEL,
    ItemSpec,
    item_figure,
    listening_clip,
    speed_factor,
    time_compress,
    view_spectrogram,
)
from callsieve.classifier.store import open_store, replace_file_result, upsert_deployment, upsert_file
from callsieve.features.calibration import RecordingChain
from callsieve.features.spectrogram import SpectrogramGrid
from conftest import write_files, write_manifest

LABEL = "test-call"


def make_store(
    tmp_path: Path,
    n_det: int = 300,
    files: int = 3,
    file_s: float = 60.0,
    start: datetime = datetime(2031, 5, 4, 6, 0, 0),
    step: timedelta = timedelta(minutes=5),
    seed: int = 0,
    failed: tuple[int, ...] = (),
    labels: tuple[str, ...] = (LABEL,),
) -> tuple[Path, dict]:
    """A store with one finished run over ``files`` noise files and ``n_det`` detections per label.

    Confidences are uniform in 0.1..1 (seeded); detections are 1 s long, 80-160 Hz, spread over
    the files that scored 'done' (``failed`` lists file indices scored 'failed').
    """
    folder = tmp_path / "dep"
    starts = [start + step * i for i in range(files)]
    paths = write_files(folder, starts, file_s, seed=seed)
    manifest = write_manifest(folder)
    db = tmp_path / "detections.db"
    con = open_store(db)
    dep_id = upsert_deployment(con, "test-site", str(manifest.resolve()), 2000, 0)
    settings = {"low_hz": 50.0, "high_hz": 400.0, "resolution_hz": 4.0, "frame_hop_s": 0.05}
    con.execute(
        "INSERT INTO runs (run_key, deployment_id, model_sha256, model_path, classes, target, threshold, parameters, "
        "versions, host, started_utc, status) VALUES ('k', ?, 'sha', 'm', ?, NULL, 0.1, ?, '{}', 'h', "
        "'2031-01-01T00:00:00Z', 'finished')",
        (dep_id, json.dumps(["background", *labels]), json.dumps({"settings": settings, "manifest": str(manifest)})),
    )
    rng = np.random.default_rng(seed)
    done = [i for i in range(files) if i not in failed]
    file_ids = []
    for t, p in zip(starts, paths, strict=True):
        st = p.stat()
        fid = upsert_file(con, dep_id, p.name, f"{t:%Y-%m-%dT%H:%M:%S}Z", file_s, 2000, st.st_size, st.st_mtime_ns)
        file_ids.append(fid)
    per_file: dict[int, list] = {i: [] for i in done}
    for label in labels:
        for k in range(n_det):
            i = done[k % len(done)]
            s0 = float(rng.uniform(0.5, file_s - 2.0))
            per_file[i].append((s0, s0 + 1.0, 80.0, 160.0, label, float(rng.uniform(0.1, 1.0)), 100.0, 6.0, 0))
    for i, fid in enumerate(file_ids):
        status = "done" if i in done else "failed"
        replace_file_result(con, 1, fid, status, None, 1, 1, 10, per_file.get(i, []))
    con.close()
    return db, {"manifest": manifest, "file_ids": file_ids, "starts": starts}


def rows(db: Path, sql: str, args=()) -> list[sqlite3.Row]:
    con = open_store(db, create=False)
    try:
        return con.execute(sql, args).fetchall()
    finally:
        con.close()


def add_verdicts(db: Path, ids, verdict: str = "yes", reviewer: str = "ana") -> None:
    con = open_store(db, create=False)
    con.executemany(
        "INSERT INTO verdicts (detection_id, reviewer, verdict, recorded_utc) VALUES (?, ?, ?, '2031-06-01T00:00:00Z')",
        [(int(i), reviewer, verdict) for i in ids],
    )
    con.close()


# --- the design, pure -----------------------------------------------------------------------


def test_quantile_strata_hold_equal_counts():
    # Equal-count (quantile) strata: K bins of N/K each (common practice; Cochran 1977 §5A.7
    # on the cum √f rule is the refinement we do not use). Ties are absent in uniform data.
    c = np.random.default_rng(1).uniform(0.1, 1.0, 1000)
    edges = quantile_edges(c, 5, finer_top=1.0, low=0.1, high=1.0)
    counts = np.bincount(stratum_index(c, edges))
    assert counts.size == 5 and counts.max() - counts.min() <= 1 and counts.sum() == 1000


def test_finer_top_strata_shrink_toward_the_top():
    # finer_top=2: stratum k of K holds (2(K-k)+1)/K² of the detections (docs/review.md).
    c = np.random.default_rng(2).uniform(0.1, 1.0, 3600)
    edges = quantile_edges(c, 6, finer_top=2.0, low=0.1, high=1.0)
    counts = np.bincount(stratum_index(c, edges))
    expected = np.array([(2 * (6 - k) + 1) / 36 for k in range(1, 7)]) * 3600
    assert np.all(np.abs(counts - expected) <= 1)
    assert np.all(np.diff(counts) < 0)


def test_ties_merge_strata_instead_of_leaving_one_empty():
    c = np.array([0.2] * 50 + [0.9] * 50)
    edges = quantile_edges(c, 4, finer_top=1.0, low=0.1, high=1.0)
    counts = np.bincount(stratum_index(c, edges), minlength=edges.size - 1)
    assert np.all(counts > 0) and counts.sum() == 100


def test_stratum_index_edges_are_closed_below_and_the_top_includes_one():
    edges = np.array([0.1, 0.5, 1.0])
    got = stratum_index(np.array([0.05, 0.1, 0.4999, 0.5, 1.0]), edges)
    assert got.tolist() == [-1, 0, 0, 1, 1]


def test_neyman_shares_match_the_worked_example():
    # ../shared/REFERENCES.md §6.3 (Cochran 1977 §5.5): N_h = 10000, 2000, 500, 100 and
    # p_h = 0.10, 0.40, 0.80, 0.98 give shares 0.7153, 0.2336, 0.0477, 0.0033.
    w = neyman_weights(np.array([10000, 2000, 500, 100]), np.array([0.10, 0.40, 0.80, 0.98]))
    assert np.allclose(w / w.sum(), [0.7153, 0.2336, 0.0477, 0.0033], atol=5e-5)
    # Whole sizes: the shares of 1000, except that the floor of 2 lifts the last (3.3 -> 3 stays).
    n = allocate(w, 1000, np.array([10000, 2000, 500, 100]))
    assert n.sum() == 1000 and np.all(np.abs(n - 1000 * w / w.sum()) <= 1)


def test_pilot_precision_never_reaches_0_or_1():
    # Laplace's rule of succession (from memory): (k+1)/(n+2); 0.5 with no verdicts.
    assert pilot_precision(np.array([0, 10, 0]), np.array([10, 0, 0])).tolist() == [1 / 12, 11 / 12, 0.5]


def test_allocation_respects_caps_and_floor_and_hands_on_the_surplus():
    # Equal allocation of 30 over N_h = (3, 100, 100): the small stratum gives all it has,
    # the rest is shared (Cochran 1977 §5.9, strata where n_h > N_h are censused).
    n = allocate(np.ones(3), 30, np.array([3, 100, 100]))
    assert n[0] == 3 and n.sum() == 30 and abs(int(n[1]) - int(n[2])) <= 1
    # Proportional with a floor: the tiny stratum still gets 2 (common practice: a variance needs 2).
    n = allocate(np.array([1000, 5]), 20, np.array([1000, 5]))
    assert n.tolist() == [18, 2]
    # More than the population: a census.
    assert allocate(np.ones(2), 50, np.array([4, 6])).tolist() == [4, 6]
    # A minimum (an extension's earlier sizes) is never undercut.
    n = allocate(np.ones(2), 20, np.array([100, 100]), minimum=np.array([15, 0]))
    assert n.tolist() == [15, 5]
    with pytest.raises(ValueError):
        allocate(np.ones(5), 6, np.full(5, 100))


def test_day_groups_join_days_when_segments_are_fewer_than_days():
    days = ["2031-05-01", "2031-05-02", "2031-05-03", "2031-05-04"]
    assert set(day_groups(days, 4).values()) == set(days)
    groups = day_groups(days, 2)
    assert sorted(set(groups.values())) == ["2031-05-01..2031-05-02", "2031-05-03..2031-05-04"]


# --- drawing, from the store -------------------------------------------------------------


def test_inclusion_probabilities_are_n_h_over_N_h_and_weights_sum_to_N(tmp_path):
    db, _ = make_store(tmp_path, n_det=300)
    s = draw_sample(db, tmp_path / "s", n=40, bins=4, seed=3, render=False)
    strata = {r["stratum"]: r for r in rows(db, "SELECT * FROM review_strata WHERE sample_id=?", (s["sample_id"],))}
    items = rows(db, "SELECT * FROM review_items WHERE sample_id=?", (s["sample_id"],))
    assert len(items) == 40 == sum(r["sampled"] for r in strata.values())
    assert sum(r["population"] for r in strata.values()) == 300
    for it in items:
        st = strata[it["stratum"]]
        assert it["inclusion_probability"] == pytest.approx(st["sampled"] / st["population"])
    # Horvitz–Thompson: Σ 1/π over the sample estimates N exactly under stratified SRS
    # (Cochran 1977, §5.2: N_h/n_h weights sum to N_h in each stratum).
    assert sum(1.0 / it["inclusion_probability"] for it in items) == pytest.approx(300)
    # Every sampled detection lies in its stratum's confidence range.
    conf = {r[0]: r[1] for r in rows(db, "SELECT detection_id, confidence FROM detections")}
    for it in items:
        st = strata[it["stratum"]]
        assert st["low"] <= conf[it["detection_id"]] <= st["high"]
    # The design is stored with its seed.
    design = json.loads(rows(db, "SELECT design FROM review_samples")[0][0])
    assert design["rule"] == "quantile" and design["bins"] == 4 and design["allocation"] == "equal"
    assert rows(db, "SELECT seed FROM review_samples")[0][0] == 3


def test_same_seed_same_sample_other_seed_other_sample(tmp_path):
    db, _ = make_store(tmp_path, n_det=200)
    a = draw_sample(db, tmp_path / "a", n=20, seed=5, render=False)
    b = draw_sample(db, tmp_path / "b", n=20, seed=5, render=False)
    c = draw_sample(db, tmp_path / "c", n=20, seed=6, render=False)

    def ids(s):
        return {r[0] for r in rows(db, "SELECT detection_id FROM review_items WHERE sample_id=?", (s["sample_id"],))}

    assert ids(a) == ids(b) and ids(a) != ids(c)


def test_fixed_edges_and_proportional_allocation(tmp_path):
    db, _ = make_store(tmp_path, n_det=400)
    s = draw_sample(db, tmp_path / "s", n=40, edges="0.1,0.5,0.9,1", allocation="proportional", render=False)
    st = rows(db, "SELECT low, high, population, sampled FROM review_strata ORDER BY low")
    assert [(r[0], r[1]) for r in st] == [(0.1, 0.5), (0.5, 0.9), (0.9, 1.0)]
    pop = np.array([r[2] for r in st])
    # Proportional: n_h/N_h equal across strata up to rounding (Cochran 1977 §5.3).
    assert np.all(np.abs(np.array([r[3] for r in st]) - 40 * pop / pop.sum()) <= 1)
    assert s["design"]["rule"] == "edges"


def test_extension_keeps_items_verdicts_and_draws_without_replacement(tmp_path):
    db, _ = make_store(tmp_path, n_det=300)
    s = draw_sample(db, tmp_path / "s", n=24, bins=3, seed=1, render=False)
    before = {r[0]: r for r in rows(db, "SELECT detection_id, stratum, draw_order FROM review_items")}
    add_verdicts(db, list(before)[:10])
    e = extend_sample(db, s["sample_id"], tmp_path / "s", n=30, render=False)
    after = {r["detection_id"]: r for r in rows(db, "SELECT * FROM review_items")}
    # Earlier items stay, with their stratum and draw order; 30 new ones, none drawn twice
    # (PRIMARY KEY (sample_id, detection_id) would also refuse a repeat).
    assert set(before) <= set(after) and len(after) == 54 and e["added"] == 30
    assert all(after[d]["stratum"] == before[d][1] and after[d]["draw_order"] == before[d][2] for d in before)
    orders = sorted(r["draw_order"] for r in after.values())
    assert orders == list(range(1, 55))
    assert rows(db, "SELECT COUNT(*) FROM verdicts")[0][0] == 10
    # Probabilities of old and new items follow the stratum's new n_h/N_h, and still sum to N.
    strata = {r["stratum"]: r for r in rows(db, "SELECT * FROM review_strata")}
    for it in after.values():
        st = strata[it["stratum"]]
        assert it["inclusion_probability"] == pytest.approx(st["sampled"] / st["population"])
    assert sum(1 / it["inclusion_probability"] for it in after.values()) == pytest.approx(300)
    design = json.loads(rows(db, "SELECT design FROM review_samples")[0][0])
    assert design["extensions"][0]["items_added"] == 30
    # sample.csv lists every item, old and new.
    with open(tmp_path / "s" / "sample.csv") as fh:
        assert len(list(csv.DictReader(fh))) == 54


def test_extension_adds_a_new_stratum_where_the_sample_had_none(tmp_path):
    db, _ = make_store(tmp_path, n_det=300)
    s = draw_sample(db, tmp_path / "s", n=10, edges="0.5,0.75,1", render=False)
    extend_sample(db, s["sample_id"], tmp_path / "s", n=6, edges="0.2,0.5,0.75,1", render=False)
    st = rows(db, "SELECT stratum, low, high, sampled FROM review_strata ORDER BY low")
    assert [(r[1], r[2]) for r in st] == [(0.2, 0.5), (0.5, 0.75), (0.75, 1.0)]
    assert st[0][0] == 3  # new strata are numbered after the existing ones
    assert sum(r[3] for r in st) == 16 and st[0][3] >= 2
    # A stratum overlapping an existing one would break the design: refused.
    with pytest.raises(Exception, match="overlaps a stratum"):
        extend_sample(db, s["sample_id"], tmp_path / "s", n=2, edges="0.2,0.6,1", render=False)


def test_extension_refused_when_the_run_changed(tmp_path):
    db, _ = make_store(tmp_path, n_det=100)
    s = draw_sample(db, tmp_path / "s", n=10, bins=2, render=False)
    con = open_store(db, create=False)
    con.execute(
        "INSERT INTO detections (run_id, file_id, start_s, end_s, low_hz, high_hz, label, confidence, clipped) "
        "VALUES (1, 1, 1, 2, 80, 160, ?, 0.55, 0)",
        (LABEL,),
    )
    con.close()
    assert (
        main(["review", "sample", str(db), "--out", str(tmp_path / "s"), "--extend", str(s["sample_id"]), "--n", "2"])
        == 2
    )


def test_neyman_allocation_from_a_pilot(tmp_path):
    db, _ = make_store(tmp_path, n_det=400)
    pilot = draw_sample(db, tmp_path / "pilot", n=20, edges="0.1,0.55,1", render=False)
    items = rows(db, "SELECT ri.detection_id, d.confidence FROM review_items ri JOIN detections d USING (detection_id)")
    # The pilot finds every low detection false and every high one true.
    add_verdicts(db, [d for d, c in items if c < 0.55], "no")
    add_verdicts(db, [d for d, c in items if c >= 0.55], "yes")
    s = draw_sample(
        db, tmp_path / "s", n=60, edges="0.1,0.55,1", allocation="neyman", pilot=pilot["sample_id"], render=False
    )
    p = s["design"]["pilot_precision"]
    assert p == pytest.approx([1 / 12, 11 / 12], abs=1e-6)  # (0+1)/(10+2), (10+1)/(10+2)
    with pytest.raises(Exception, match="needs --pilot"):
        draw_sample(db, tmp_path / "t", n=10, allocation="neyman", render=False)


def test_double_share_marks_that_share_of_items(tmp_path):
    db, _ = make_store(tmp_path, n_det=200)
    draw_sample(db, tmp_path / "s", n=40, double_share=0.25, render=False)
    assert rows(db, "SELECT SUM(double_review), COUNT(*) FROM review_items")[0][:] == (10, 40)


def test_segments_lie_within_effort_and_are_stratified_by_day(tmp_path):
    # Six 10-min files, one every 3 h from 18:00: they span two UTC days; file 2 failed.
    db, info = make_store(
        tmp_path,
        n_det=30,
        files=6,
        file_s=600.0,
        start=datetime(2031, 5, 4, 18, 0),
        step=timedelta(hours=3),
        failed=(2,),
    )
    s = draw_sample(db, tmp_path / "s", n=10, bins=2, segments=6, segment_minutes=2, render=False)
    segs = rows(db, "SELECT * FROM audit_segments")
    assert len(segs) == 6
    failed_id = info["file_ids"][2]
    by_day: dict[str, int] = {}
    for g in segs:
        assert g["file_id"] != failed_id  # effort means files scored 'done'
        assert 0 <= g["start_s"] < g["end_s"] <= 600.0 and g["end_s"] - g["start_s"] == 120.0
        i = info["file_ids"].index(g["file_id"])
        day = (info["starts"][i] + timedelta(seconds=g["start_s"])).date().isoformat()
        assert g["stratum"] == day
        by_day[day] = by_day.get(day, 0) + 1
    # Day 1 has 2 done files (18:00, 21:00; 00:00 is day 2 and failed), day 2 has 3:
    # 10 and 15 stretches of 2 min; 6 segments proportional -> 2 and 4 (floor 1 each).
    frame = s["design"]["segments"]["frame"]
    assert frame == {"2031-05-04": 10, "2031-05-05": 15}
    assert sum(by_day.values()) == 6 and set(by_day) == set(frame)
    for g in segs:
        assert g["inclusion_probability"] == pytest.approx(by_day[g["stratum"]] / frame[g["stratum"]])
    # No stretch drawn twice.
    assert len({(g["file_id"], g["start_s"]) for g in segs}) == 6
    with open(tmp_path / "s" / "segments.csv") as fh:
        table = list(csv.DictReader(fh))
    assert list(table[0])[:5] == ["deployment", "file", "start_s", "end_s", "inclusion_probability"]
    # Extending adds stretches not drawn before.
    extend_sample(db, s["sample_id"], tmp_path / "s", n=0, segments=4, segment_minutes=2, render=False)
    segs = rows(db, "SELECT file_id, start_s, stratum, inclusion_probability FROM audit_segments")
    assert len({(g[0], g[1]) for g in segs}) == 10


# --- rendering -----------------------------------------------------------------------------


def test_a_tone_of_known_level_shows_its_psd_in_the_image_array():
    # A tone of rms pressure level L on a bin of a Hann-windowed grid has PSD
    # L - 10 log10(1.5 Δf) dB re 1 µPa²/Hz: 1.5 bins is the Hann window's equivalent noise
    # bandwidth (F. J. Harris, Proc. IEEE 66, 1978, Table 1). Δf = 1 Hz here.
    fs, level = 2000, 120.0
    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    t = np.arange(fs * 6) / fs
    amplitude_upa = math.sqrt(2) * 10 ** (level / 20)
    x = (amplitude_upa / chain.upa_per_unit(100.0)) * np.sin(2 * np.pi * 100.0 * t)
    spec = view_spectrogram(x, fs, chain, 0, SpectrogramGrid(1.0, 0.25, 50.0, 200.0))
    k = int(np.argmin(np.abs(spec.frequency_hz - 100.0)))
    assert np.median(spec.psd_db[k]) == pytest.approx(level - 10 * math.log10(1.5), abs=0.05)


def test_item_image_has_a_labelled_colour_bar_and_both_boxes():
    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    x = np.random.default_rng(0).normal(0, 0.01, 2000 * 8)
    grid = SpectrogramGrid(4.0, 0.05, 20.0, 400.0)
    spec = ItemSpec(
        1, "x.wav", 0, chain, 3.0, 4.0, 80.0, 160.0, 3.0, 4.0, 0.05, 50.0, 400.0, "t", ((5.0, 6.0, 90, 120),)
    )
    fig = item_figure(spec, view_spectrogram(x, 2000, chain, 0, grid))
    ax, bar = fig.axes
    # matplotlib draws a colour bar in its own axes; its label is the unit (STYLE: dB re 1 µPa²/Hz).
    assert bar.get_ylabel() == PSD_LABEL and "dB re 1 µPa²/Hz" in PSD_LABEL
    assert ax.get_xlabel().endswith(", s") and ax.get_ylabel().endswith(", Hz")
    styles = sorted(p.get_linestyle() for p in ax.patches)
    assert styles.count("--") == 1 and styles.count("solid") == 2  # other dashed; this one solid (two strokes)


def test_speed_factor_lifts_low_calls_into_hearing():
    # Chosen so the call's lowest frequency reaches 300 Hz, as a whole factor 2..10 (docs/review.md).
    assert speed_factor(70.0) == 5 and speed_factor(160.0) == 2 and speed_factor(20.0) == 10
    assert speed_factor(300.0) == 1 and speed_factor(1000.0) == 1


def test_time_compression_multiplies_frequency_and_divides_duration():
    # Resampling theory (from memory): samples played `factor` times faster scale every
    # frequency by the factor and the duration by its inverse.
    fs = 2000
    x = np.sin(2 * np.pi * 100.0 * np.arange(fs * 4) / fs)
    y, rate = time_compress(x, fs, 5)
    assert rate == 10000 and y.size / rate == pytest.approx(4 / 5, rel=1e-3)
    f = np.fft.rfftfreq(y.size, 1 / rate)
    assert f[np.argmax(np.abs(np.fft.rfft(y)))] == pytest.approx(500.0, abs=2.0)


def test_listening_clip_peaks_at_minus_1_dbfs_and_notes_its_gain():
    x = 0.01 * np.sin(np.linspace(0, 200, 4000))
    y, gain_db = listening_clip(x)
    assert np.max(np.abs(y)) == pytest.approx(10 ** (-1 / 20))
    assert gain_db == pytest.approx(20 * math.log10(10 ** (-1 / 20) / np.max(np.abs(x - x.mean()))))


def test_rendered_sample_writes_images_clips_and_sample_csv(tmp_path, capsys):
    db, _ = make_store(tmp_path, n_det=40)
    out = tmp_path / "s"
    assert main(["review", "sample", str(db), "--out", str(out), "--n", "4", "--bins", "2", "--quiet"]) == 0
    with open(out / "sample.csv") as fh:
        table = list(csv.DictReader(fh))
    assert len(table) == 4
    assert list(table[0])[:5] == ["detection_id", "stratum", "inclusion_probability", "image", "clip"]
    for r in table:
        assert (out / r["image"]).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        info = sf.info(str(out / r["clip"]))
        # 1 s detection + 3 s on each side, at a playable rate.
        assert info.duration == pytest.approx(7.0, abs=0.01) and info.samplerate == 8000
        # 80-160 Hz calls: compressed ×4 (ceil(300/80)), a quarter as long.
        assert r["clip_speed"] == "4.0" and sf.info(str(out / r["clip_fast"])).duration == pytest.approx(
            7 / 4, abs=0.01
        )
        assert float(r["clip_gain_db"]) > 0 and r["label"] == LABEL
    stored = rows(db, "SELECT image, clip, clip_fast, clip_speed, clip_gain_db FROM review_items")
    assert {r[0] for r in stored} == {r["image"] for r in table} and all(r[4] is not None for r in stored)


def test_blind_sample_hides_label_and_confidence_and_shuffles(tmp_path):
    db, _ = make_store(tmp_path, n_det=300)
    s = draw_sample(db, tmp_path / "s", n=60, bins=3, blind=True, render=False)
    with open(tmp_path / "s" / "sample.csv") as fh:
        table = list(csv.DictReader(fh))
    for hidden in ("label", "confidence", "stratum_low", "stratum_high"):
        assert hidden not in table[0]
    # Shuffled: in draw order, which is a random permutation, not grouped by stratum.
    assert [int(r["draw_order"]) for r in table] == list(range(1, 61))
    strata = [int(r["stratum"]) for r in table]
    assert strata != sorted(strata) and strata != sorted(strata, reverse=True)
    assert s["design"]["blind"] and rows(db, "SELECT blind FROM review_samples")[0][0] == 1
    # Not blind: the columns are there.
    draw_sample(db, tmp_path / "t", n=10, bins=2, render=False)
    with open(tmp_path / "t" / "sample.csv") as fh:
        assert {"label", "confidence"} <= set(next(csv.DictReader(fh)))


def test_blind_image_title_holds_no_label_or_confidence(tmp_path):
    db, _ = make_store(tmp_path, n_det=10)
    import callsieve.classifier.review_render as rr

    titles = []
    real = rr.item_figure

    def spy(spec, psd):
        titles.append(spec.title)
        return real(spec, psd)

    rr.item_figure = spy
    try:
        draw_sample(db, tmp_path / "s", n=3, bins=1, blind=True)
    finally:
        rr.item_figure = real
    assert len(titles) == 3 and all(LABEL not in t and "0." not in t.split("Z", 1)[1] for t in titles)


# --- the folder and bad calls ----------------------------------------------------------------


def test_refuses_a_folder_that_is_not_a_sample_of_this_store(tmp_path, capsys):
    db, _ = make_store(tmp_path, n_det=50)
    foreign = tmp_path / "notes"
    foreign.mkdir()
    (foreign / "mine.txt").write_text("an analyst's notes")
    assert main(["review", "sample", str(db), "--out", str(foreign), "--n", "4", "--bins", "2", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("callsieve: error: ") and err.count("\n") == 1 and "not a sample folder" in err
    assert (foreign / "mine.txt").read_text() == "an analyst's notes" and len(list(foreign.iterdir())) == 1
    # A sample folder of another store is refused too.
    other = tmp_path / "other"
    other.mkdir()
    db2, _ = make_store(other, n_det=20)
    draw_sample(db2, tmp_path / "s2", n=4, bins=2, render=False)
    assert main(["review", "sample", str(db), "--out", str(tmp_path / "s2"), "--n", "4", "--bins", "2", "--quiet"]) == 2
    assert "another store" in capsys.readouterr().err


def test_redraw_into_own_folder_replaces_an_unreviewed_sample_and_keeps_a_reviewed_one(tmp_path, capsys):
    db, _ = make_store(tmp_path, n_det=50)
    out = tmp_path / "s"
    first = draw_sample(db, out, n=6, bins=2, render=False)
    second = draw_sample(db, out, n=8, bins=2, render=False)  # nobody reviewed the first: replaced
    assert second["replaced"] == first["sample_id"]
    assert [r[0] for r in rows(db, "SELECT sample_id FROM review_samples")] == [second["sample_id"]]
    add_verdicts(db, [r[0] for r in rows(db, "SELECT detection_id FROM review_items")][:2])
    assert main(["review", "sample", str(db), "--out", str(out), "--n", "4", "--bins", "2", "--quiet"]) == 2
    assert "--extend" in capsys.readouterr().err
    assert rows(db, "SELECT COUNT(*) FROM review_items")[0][0] == 8


@pytest.mark.parametrize(
    "extra, message",
    [
        (["--n", "0"], "--n must be >= 1"),
        (["--edges", "0.5,0.3,1"], "increase strictly"),
        (["--edges", "a,b"], "numbers separated by commas"),
        (["--allocation", "neyman"], "needs --pilot"),
        (["--double-share", "1.5"], "--double-share"),
        (["--segments", "3"], "--segment-minutes"),
        (["--label", "nope"], "no detection of that class"),
        (["--n", "3", "--bins", "6"], "larger --n"),
        (["--extend", "9"], "no such sample"),
    ],
)
def test_bad_calls_are_one_line_and_exit_2(tmp_path, capsys, extra, message):
    db, _ = make_store(tmp_path, n_det=60)
    assert main(["review", "sample", str(db), "--out", str(tmp_path / "s"), "--quiet", *extra]) == 2
    err = capsys.readouterr().err
    assert err.startswith("callsieve: error: ") and err.count("\n") == 1 and message in err


def test_several_classes_need_a_label(tmp_path, capsys):
    db, _ = make_store(tmp_path, n_det=20, labels=("call-a", "call-b"))
    assert main(["review", "sample", str(db), "--out", str(tmp_path / "s"), "--quiet"]) == 2
    assert "choose one with --label" in capsys.readouterr().err
    s = draw_sample(db, tmp_path / "s", label="call-b", n=4, bins=2, render=False)
    assert s["label"] == "call-b"
    assert {r[0] for r in rows(db, "SELECT d.label FROM review_items JOIN detections d USING (detection_id)")} == {
        "call-b"
    }


def test_superseded_detections_are_not_in_the_population(tmp_path):
    db, _ = make_store(tmp_path, n_det=30)
    con = open_store(db, create=False)
    con.execute("UPDATE detections SET superseded=1 WHERE detection_id <= 10")
    con.close()
    s = draw_sample(db, tmp_path / "s", n=100, render=False)  # more than there are: a census
    assert s["items"] == 20 and all(r["population"] == r["sampled"] for r in s["strata"])
    assert all(r[0] > 10 for r in rows(db, "SELECT detection_id FROM review_items"))


def test_an_extension_must_add_something_and_keep_the_design(tmp_path, capsys):
    db, _ = make_store(tmp_path, n_det=60)
    s = draw_sample(db, tmp_path / "s", n=8, bins=2, render=False)
    base = ["review", "sample", str(db), "--out", str(tmp_path / "s"), "--extend", str(s["sample_id"]), "--quiet"]
    assert main(base) == 2
    assert "needs what to add" in capsys.readouterr().err
    assert main([*base, "--n", "4", "--blind"]) == 2
    assert "keeps the sample's design" in capsys.readouterr().err
    # Another folder than the sample's is refused.
    assert main([*base[:4], str(tmp_path / "elsewhere"), *base[5:], "--n", "4"]) == 2
    assert "is not the folder of sample" in capsys.readouterr().err
    assert rows(db, "SELECT COUNT(*) FROM review_items")[0][0] == 8
