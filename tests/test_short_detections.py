"""Short detections: a detection much shorter than its class's calls has its confidence
scaled down by its duration (a minimum-duration criterion, common practice in call
detectors, made gradual so that detections of one length keep their order).

The expected values are worked by hand from the rule in README, *Short detections*;
the end-to-end check uses synthetic calls of known duration (call_waveform)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from callsieve.classifier.config import TrainingConfig, load_training_config
from callsieve.classifier.detections import pick_detections, short_call_factor
from callsieve.classifier.labels import Annotation
from callsieve.classifier.model import load_model, save_model
from callsieve.classifier.scoring import score_file
from callsieve.classifier.training import short_call_durations
from callsieve.features.synthesis import CallShape
from conftest import write_sweeps_file


def test_factor_is_one_for_whole_calls_and_proportional_below():
    # Worked by hand: min(1, d / 0.6).
    d = np.array([0.0, 0.15, 0.3, 0.6, 0.61, 2.0])
    np.testing.assert_allclose(short_call_factor(d, 0.6), [0.0, 0.25, 0.5, 1.0, 1.0, 1.0])
    np.testing.assert_array_equal(short_call_factor(d, 0.0), np.ones(6))  # off


def test_a_fragment_ranks_below_a_whole_call_of_the_same_peak_probability():
    # Three peaks of equal window probability 0.9: windows that saw a 1.2 s trace, a
    # 0.3 s one and a 0.15 s one. With short_call_s 0.6 s and floor 0.25, a fragment keeps
    # its duration's share of the probability above the floor: 0.25 + 0.65 * 0.5 and
    # 0.25 + 0.65 * 0.25 (worked by hand). Without it, the three tie.
    p = np.array([0.0, 0.9, 0.0, 0.0, 0.9, 0.0, 0.0, 0.9, 0.0])
    proba = np.column_stack([1 - p, p])
    seg = np.array([[0, 1], [10.0, 11.2], [0, 1], [0, 1], [20.0, 20.3], [0, 1], [0, 1], [30.0, 30.15], [0, 1]])
    band = np.tile([80.0, 160.0], (p.size, 1))
    plain = pick_detections(proba, ["background", "up"], seg, band, 0.25)
    assert [d.confidence for d in plain] == [0.9, 0.9, 0.9]
    scaled = pick_detections(proba, ["background", "up"], seg, band, 0.25, short_call_s={"up": 0.6})
    assert [d.start_s for d in scaled] == [10.0, 20.0, 30.0]
    np.testing.assert_allclose([d.confidence for d in scaled], [0.9, 0.575, 0.4125])
    # Every peak that reached the floor is kept at or above it, however short.
    seg[7] = [30.0, 30.0001]
    tiny = pick_detections(proba, ["background", "up"], seg, band, 0.25, short_call_s={"up": 0.6})
    assert len(tiny) == 3 and 0.25 <= tiny[2].confidence < 0.2502
    # A class left out of the mapping is not scaled.
    other = pick_detections(proba, ["background", "up"], seg, band, 0.25, short_call_s={"down": 0.6})
    assert [d.confidence for d in other] == [0.9, 0.9, 0.9]


def test_whole_calls_keep_their_window_probability_bit_for_bit_at_any_floor():
    # floor + (p - floor) * 1 is not always p in floating point (at floor 0.2 about one
    # value in five moves by an ulp); a detection that is not scaled must store p itself,
    # so that models without the setting score exactly as before.
    rng = np.random.default_rng(3)
    p = np.zeros(41)
    p[1::2] = rng.uniform(0.3, 0.99, 20)
    proba = np.column_stack([1 - p, p])
    seg = np.column_stack([np.arange(p.size) * 5.0, np.arange(p.size) * 5.0 + 1.2])
    band = np.tile([80.0, 160.0], (p.size, 1))
    for floor in (0.2, 0.3):
        for short in ({}, {"up": 0.6}):
            dets = pick_detections(proba, ["background", "up"], seg, band, floor, short_call_s=short)
            assert [d.confidence for d in dets] == p[1::2].tolist()


def test_of_two_overlapping_peaks_the_whole_call_wins_over_its_fragment():
    # Two peaks on one call: window 1 saw only 0.3 s of it at probability 0.95, window 3
    # the whole 1.2 s at 0.8 (a dip between). Unscaled, the fragment's peak is kept
    # (non-maximum suppression keeps the more confident); scaled (0.1 + 0.85 * 0.5 =
    # 0.525 < 0.8, worked by hand), the whole call is kept with its extent.
    p = np.array([0.0, 0.95, 0.3, 0.8, 0.0])
    proba = np.column_stack([1 - p, p])
    seg = np.array([[0, 1], [10.4, 10.7], [0, 1], [10.0, 11.2], [0, 1]])
    band = np.tile([80.0, 160.0], (p.size, 1))
    plain = pick_detections(proba, ["background", "up"], seg, band, 0.1)
    assert [(d.window, d.start_s, d.end_s) for d in plain] == [(1, 10.4, 10.7)]
    scaled = pick_detections(proba, ["background", "up"], seg, band, 0.1, short_call_s={"up": 0.6})
    assert [(d.window, d.start_s, d.end_s, d.confidence) for d in scaled] == [(3, 10.0, 11.2, 0.8)]


def test_durations_come_from_the_labelled_calls_of_each_class_the_model_detects():
    # Medians worked by hand. Rows of verified tables (partial) carry detections' boxes,
    # not the analysts' calls, and a verified "no" is a background row: where a class has
    # analysts' rows only theirs count, and background gets no duration.
    def note(label, duration, partial=False):
        return Annotation("site", "f.wav", 0.0, duration, label, 80.0, 160.0, 0, partial)

    notes = [note("up", d) for d in (1.0, 1.2, 1.4)] + [note("down", d) for d in (0.4, 0.6)]
    notes += [note("up", 0.3, True), note("up", 0.2, True), note("background", 0.5, True)]
    notes += [note("fin", 0.8, True), note("fin", 1.0, True)]  # verified rows only: theirs
    config = TrainingConfig(short_call_fraction=0.5)
    assert short_call_durations(notes, None, config) == {"down": 0.25, "fin": 0.45, "up": 0.6}
    assert short_call_durations(notes, "up", config) == {"up": 0.6}
    assert short_call_durations(notes, None, replace(config, short_call_fraction=0.0)) == {}
    with pytest.raises(Exception, match="short_call_fraction"):
        TrainingConfig(short_call_fraction=1.5)


def test_scoring_scales_fragments_and_leaves_whole_calls(labelled, sweep_model, tmp_path):
    # The fixture's calls sweep 80 -> 160 Hz in 0.9-1.3 s. Written here, loud: six whole
    # calls (1.1 s) and six 0.25 s pieces of the same sweep (110 -> 128 Hz, the same rate).
    # Synthetic truth: call_waveform writes them at known times. A whole call's detection
    # spans at least the model's short-call duration, so it keeps the window's probability;
    # a piece's detection is short, so it keeps its duration's share of the probability
    # above the floor (0.1).
    model = load_model(sweep_model)
    short = model.short_call_s["up"]
    assert 0.4 < short < 0.6  # half the median labelled call (0.9-1.3 s)
    whole = [CallShape("sweep", 80.0, 160.0, 1.1)] * 6
    piece = [CallShape("sweep", 110.0, 128.0, 0.25)] * 6
    chain, starts = write_sweeps_file(tmp_path / "test.wav", whole + piece, 113.0)

    def detections(m):
        rows = score_file(m, tmp_path / "test.wav", "test.wav", chain, 0, 0.1).rows
        return [r for r in rows if r[4] == "up"]

    def near(rows, s0):
        hits = [r for r in rows if r[0] < s0 + 1.5 and r[1] > s0 - 0.5]
        return max(hits, key=lambda r: r[5]) if hits else None

    plain_model = load_model(sweep_model)
    plain_model.short_call_s = {}
    scaled, plain = detections(model), detections(plain_model)
    for s0 in starts[:6]:
        a, b = near(scaled, s0), near(plain, s0)
        assert a is not None and b is not None
        assert a[1] - a[0] >= short and a[5] == b[5]
    lowered = 0
    for s0 in starts[6:]:
        a, b = near(scaled, s0), near(plain, s0)
        if b is None:
            continue
        if b[1] - b[0] < short:
            lowered += 1
            assert a is not None and a[0] == b[0] and a[1] == b[1]
            # Times are stored to 0.1 ms, so the duration's share holds to about 1e-3.
            np.testing.assert_allclose(a[5], 0.1 + (b[5] - 0.1) * (b[1] - b[0]) / short, rtol=2e-3)
    assert lowered >= 3  # most pieces are detected, and as short as they are


def test_the_setting_is_saved_with_the_model_and_old_models_load_without_it(labelled, tmp_path):
    from callsieve.classifier.training import train

    manifest, labels, config_path = labelled
    config = load_training_config(config_path)
    assert config.short_call_fraction == 0.5  # the default
    path = tmp_path / "m.skops"
    train([manifest], [labels], path, config_path=config_path, track=False)
    model = load_model(path)
    assert set(model.short_call_s) == {"up", "down"}
    # A model without it (made before it existed): the key is left out of the metadata the
    # content hash covers, so its hash is what it was, and it loads with no scaling.
    model.short_call_s = {}
    assert "short_call_s" not in model.metadata()
    save_model(model, tmp_path / "old.skops")
    assert load_model(tmp_path / "old.skops").short_call_s == {}
