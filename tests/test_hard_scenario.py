"""The hard preset of the invented scenario has what it promises, measured on its audio and truth.

Expectations come from the preset's own documented parameters (`hard_sites()`,
`HARD_CALL_TYPES` in classifier/scenario.py) or, for realistic ranges, from common
practice; each check names which.
"""

from __future__ import annotations

import csv
import dataclasses

import numpy as np
import pytest
import soundfile as sf
from callsieve.classifier.deployment import load_deployment
from callsieve.classifier.scenario import (
    CONFUSER_LABELS,
    HARD_CALL_TYPES,
    HARD_DEFAULT_HOURS,
    HARD_TRAINING_FRACTION,
    TARGET_LABEL,
    _plan_hard_calls,
    hard_sites,
    write_scenario,
)
from callsieve.features.calibration import pressure_from_samples
from callsieve.features.levels import band_spl_db
from callsieve.features.synthesis import CallShape, flow_surge, harmonic_call_waveform
from conftest import isolated_call_level_db
from scipy import signal

HOURS = 2.0  # test site 2 h (one full period of the level's sinusoid), training site 0.6 h
SEED = 3


@pytest.fixture(scope="module")
def hard(tmp_path_factory):
    out = tmp_path_factory.mktemp("hard")
    return out, write_scenario(out, seed=SEED, hours=HOURS, preset="hard")


@pytest.fixture(scope="module")
def test_site_pressure(hard):
    """The test site's calibrated pressure (µPa, float32) per file name, and its deployment."""
    _, summary = hard
    dep = load_deployment(summary["survey_manifest"])
    fs = dep.sample_rate_hz
    return dep, {f.name: pressure_from_samples(sf.read(f.path, dtype="float32")[0], fs, dep.chain) for f in dep.files}


def _rows(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def _site_calls(summary, manifest_key):
    name = load_deployment(summary[manifest_key]).name
    return [r for r in _rows(summary["calls_table"]) if r["deployment"] == name]


def test_ambient_level_moves_at_least_8_db_within_an_hour(test_site_pressure):
    # The preset swings the ambient level 10 dB peak to trough with a 2-hour period
    # (HardSite.level_swing_db, level_period_s): trough to peak within one hour. Measured:
    # the band level (60-200 Hz) of each second of the calibrated test-site audio, its 20th
    # percentile per minute (a robust noise level that calls and clicks barely move; common
    # practice), and the largest range of those within any 60 minutes. 8 dB leaves 2 dB for
    # the random walk and the estimate.
    dep, pressure = test_site_pressure
    fs = dep.sample_rate_hz
    per_minute = []
    for f in dep.files:
        p = pressure[f.name]
        n = p.size // fs
        seconds = band_spl_db(p[: n * fs].reshape(n, fs), fs, 60.0, 200.0)
        per_minute += [np.percentile(seconds[k : k + 60], 20) for k in range(0, n - 59, 60)]
    per_minute = np.array(per_minute)
    assert per_minute.size >= 100
    ranges = [np.ptp(per_minute[k : k + 60]) for k in range(per_minute.size - 59)]
    assert max(ranges) >= 8.0
    # Passing ships and the weather move the level too; that the sinusoid is there: a
    # least-squares fit of a 2-hour sinusoid (plus a constant and a linear trend) to the
    # per-minute levels has a peak-to-trough swing of at least 7 dB. (With the preset's
    # swing set to 0, for this seed, the fit gives 0.6 dB and the largest range within an
    # hour 1.6 dB; with it, 10.2 and 9.4 dB.)
    t = (np.arange(per_minute.size) + 0.5) * 60.0
    w = 2 * np.pi / hard_sites()[1].level_period_s
    design = np.column_stack([np.sin(w * t), np.cos(w * t), np.ones_like(t), t / 3600.0])
    coef = np.linalg.lstsq(design, per_minute, rcond=None)[0]
    assert 2 * np.hypot(coef[0], coef[1]) >= 7.0


def test_confusers_four_times_as_common_at_the_test_site():
    # HardSite.rate_factors: the vesk animal's bout rate is 4 times the training site's at
    # the test site. Calls planned over 200 hours at each site (the planner the writer
    # uses; bouts make counts overdispersed, so a long span): the ratio of calls per hour
    # is 4 within 20 %, and the target's rate is the same at both sites (no target count
    # is imposed here).
    training, test = hard_sites()
    span = 200 * 3600.0
    counts = []
    for k, site in enumerate((training, test)):
        calls = _plan_hard_calls(dataclasses.replace(site, target_calls=None), span, np.random.default_rng(k))
        counts.append((sum(c.label in CONFUSER_LABELS for c in calls), sum(c.label == TARGET_LABEL for c in calls)))
    assert dict(test.rate_factors) == {c: 4.0 for c in CONFUSER_LABELS}
    assert counts[1][0] / counts[0][0] == pytest.approx(4.0, rel=0.2)
    assert counts[1][1] / counts[0][1] == pytest.approx(1.0, rel=0.2)


def test_the_other_animal_is_rarer_at_the_training_site_not_absent():
    # HardSite.min_bouts: with 0.9 bouts of each confuser expected in 1.5 hours, a Poisson
    # draw gives none 41 % of the time; the benchmark asks for an animal at different rates
    # at the two sites, so the training site always holds at least one bout of each.
    training, _ = hard_sites()
    assert dict(training.min_bouts) == {c: 1 for c in CONFUSER_LABELS}
    for seed in range(12):
        calls = _plan_hard_calls(training, 5400.0, np.random.default_rng(seed))
        for label in CONFUSER_LABELS:
            assert any(c.label == label for c in calls), (seed, label)


def test_confuser_sweeps_in_the_target_band_are_written_at_the_test_site(hard):
    # HARD_CALL_TYPES: vesk-rise 70 -> 140 Hz over 2.5 s and vesk-yip, a 0.4 s upsweep, both
    # inside the target's 60 -> 200 Hz band.
    _, summary = hard
    calls = _site_calls(summary, "survey_manifest")
    for label, duration in (("vesk-rise", 2.5), ("vesk-yip", 0.4)):
        rows = [r for r in calls if r["label"] == label]
        assert rows, label
        d = np.array([float(r["end_s"]) - float(r["start_s"]) for r in rows])
        assert np.all(np.abs(d / duration - 1.0) <= 0.2 + 1e-9)
        assert min(float(r["low_hz"]) for r in rows) >= 50.0
        assert max(float(r["high_hz"]) for r in rows) <= 230.0


def test_faint_calls_partly_unlabelled_and_label_boxes_jittered(hard):
    # HardSite.faint_missed = 0.3 of the calls below 0 dB SNR (per label, rounded) are left
    # out of the training labels; every call at or above 0 dB is labelled; label starts and
    # ends move by at most label_jitter_s = 0.2 s. Measured by matching labels.csv against
    # the site's exact truth (same file and label, start and end within 0.2 s).
    _, summary = hard
    training = hard_sites()[0]
    truth = _site_calls(summary, "training_manifest")
    labels = _rows(summary["training_labels"])
    jitter = training.label_jitter_s

    def labelled(call):
        s0, s1 = float(call["start_s"]), float(call["end_s"])
        return any(
            lab["file"] == call["file"]
            and lab["label"] == call["label"]
            and abs(float(lab["start_s"]) - s0) <= jitter + 1e-6
            and (abs(float(lab["end_s"]) - s1) <= jitter + 1e-6 or float(lab["end_s"]) - float(lab["start_s"]) <= 0.11)
            for lab in labels
        )

    faint = [c for c in truth if float(c["snr_db"]) < training.faint_snr_db]
    loud = [c for c in truth if float(c["snr_db"]) >= training.faint_snr_db]
    assert len(faint) >= 15
    found = [labelled(c) for c in faint]
    n_labels = len({c["label"] for c in faint})
    # Rounding per label moves the count by at most half a call per label.
    assert sum(found) == pytest.approx((1 - training.faint_missed) * len(faint), abs=0.5 * n_labels + 1)
    assert all(labelled(c) for c in loud)
    assert len(labels) == len(truth) - (len(faint) - sum(found))
    # Jitter: present (uniform in ±0.2 s has mean |shift| 0.1 s), and bounded.
    by_key = {(c["file"], c["label"], round(float(c["start_s"]), 1)): c for c in truth}
    shifts = []
    for lab in labels:
        near = [
            c
            for k, c in by_key.items()
            if k[0] == lab["file"] and k[1] == lab["label"] and abs(float(c["start_s"]) - float(lab["start_s"])) <= 0.2
        ]
        if len(near) == 1:
            shifts.append(float(lab["start_s"]) - float(near[0]["start_s"]))
    assert np.max(np.abs(shifts)) <= jitter + 1e-6
    assert 0.05 <= np.mean(np.abs(shifts)) <= 0.15


def _harmonic_excess_db(psd, f, band, noise, frames):
    """Median over ``frames`` of the excess (dB) over ``noise`` at 2 and 3 times the band's peak."""
    out = []
    for k in np.where(frames)[0]:
        i = int(np.argmax(np.where(band, psd[:, k], 0.0)))
        row = []
        for h in (2, 3):
            j = int(np.argmin(np.abs(f - h * f[i])))
            jj = j - 1 + int(np.argmax(psd[j - 1 : j + 2, k]))
            row.append(10 * np.log10(psd[jj, k] / noise[jj]))
        out.append(row)
    return np.median(out, axis=0)


def test_target_call_spectrum_shows_its_harmonics(hard, test_site_pressure):
    # HARD_CALL_TYPES: the target has a second harmonic 6-12 dB and a third 12-20 dB below
    # the fundamental. In the spectrogram of strong isolated target calls (SNR > 10 dB; 0.1 s
    # frames), per frame of the call's middle: the fundamental is the strongest bin of the
    # call's band, and the strongest bin within one bin of twice and three times its frequency
    # stands >= 10 dB above that bin's noise (median over frames 2-10 s before the call). The
    # same measurement on the noise itself, 5 s before the call, gives < 5 dB (a control).
    _, summary = hard
    dep, pressure = test_site_pressure
    fs = dep.sample_rate_hz
    calls = _site_calls(summary, "survey_manifest")
    strong = sorted(
        (c for c in calls if c["label"] == TARGET_LABEL and float(c["snr_db"]) > 10.0),
        key=lambda c: -float(c["snr_db"]),
    )
    checked = 0
    for c in strong:
        s0, s1 = float(c["start_s"]), float(c["end_s"])
        if s0 < 11.0 or any(
            o is not c and o["file"] == c["file"] and float(o["start_s"]) < s1 + 1 and float(o["end_s"]) > s0 - 11
            for o in calls
        ):
            continue
        p = pressure[c["file"]].astype(np.float64)
        i0 = int((s0 - 10.0) * fs)
        f, t, psd = signal.spectrogram(p[i0 : int((s1 + 0.1) * fs)], fs, nperseg=int(0.1 * fs), noverlap=int(0.05 * fs))
        t = t + s0 - 10.0
        noise = np.median(psd[:, t < s0 - 2.0], axis=1)
        band = (f >= float(c["low_hz"])) & (f <= float(c["high_hz"]))

        d = s1 - s0
        during = (t > s0 + 0.2 * d) & (t < s1 - 0.2 * d)
        before = (t > s0 - 5.0 + 0.2 * d) & (t < s1 - 5.0 - 0.2 * d)
        assert np.all(_harmonic_excess_db(psd, f, band, noise, during) >= 10.0), c
        assert np.all(_harmonic_excess_db(psd, f, band, noise, before) < 5.0), c
        checked += 1
        if checked == 3:
            break
    assert checked >= 2


def test_received_levels_come_back_through_the_test_recorders_gain_curve(hard, test_site_pressure):
    # The test recorder's gain climbs 20 dB from 10 to 100 Hz; the writer passes pressure
    # through that response and the manifest's tables undo it. The band rms of each isolated
    # call above 10 dB SNR, less the median power of 1-s pieces of noise around it, must come
    # back at the received level the truth states within 1 dB (ISO 18405 SPL; incoherent
    # power addition; as tests/test_scenario.py checks for the demo's recorders).
    _, summary = hard
    dep, pressure = test_site_pressure
    fs = dep.sample_rate_hz
    calls = _site_calls(summary, "survey_manifest")
    checked = 0
    for f in dep.files:
        mine = [c for c in calls if c["file"] == f.name]
        busy = [(float(c["start_s"]) - 0.3, float(c["end_s"]) + 0.3) for c in mine]
        p = pressure[f.name].astype(np.float64)
        for c in (c for c in mine if float(c["snr_db"]) > 10.0):
            signal_db = isolated_call_level_db(p, fs, c, busy, f.duration_s)
            if signal_db is None:
                continue
            assert signal_db == pytest.approx(float(c["received_level_db"]), abs=1.0), c
            checked += 1
    assert checked >= 20


def test_target_calls_jittered_around_a_baleen_like_upsweep(hard):
    # HARD_CALL_TYPES[0]: 60 -> 200 Hz (start and end ±10 %) in 1.3 s (±20 %); label bands
    # are the contour's range widened by 10 % (as in the demo).
    _, summary = hard
    calls = [r for r in _rows(summary["calls_table"]) if r["label"] == TARGET_LABEL]
    d = np.array([float(r["end_s"]) - float(r["start_s"]) for r in calls])
    low = np.array([float(r["low_hz"]) for r in calls])
    high = np.array([float(r["high_hz"]) for r in calls])
    assert np.all((d >= 1.3 * 0.8 - 1e-3) & (d <= 1.3 * 1.2 + 1e-3))
    assert d.max() - d.min() >= 0.2
    assert np.all((low >= np.floor(54 * 0.9)) & (low <= np.ceil(66 * 0.9)))
    assert np.all((high >= np.floor(180 * 1.1)) & (high <= np.ceil(220 * 1.1)))
    assert high.max() - high.min() >= 15.0
    # Fades: each call's envelope knots are written; they differ from flat.
    env = [np.array(r["envelope_db"].split(), dtype=float) for r in calls]
    assert np.median([np.ptp(e) for e in env]) >= 3.0


def test_small_training_set_and_complete_test_truth(hard):
    # The brief's sizes (the preset's parameters): 20-60 target calls at the training site,
    # which spans 1-2 h at the default 5-hour test site. Test-site truth holds every call
    # written there (complete), and the target's SNRs spread from below 0 to above +10 dB
    # (faint baleen-like calls are common in practice).
    _, summary = hard
    training, _ = hard_sites()
    assert 1.0 <= HARD_TRAINING_FRACTION * HARD_DEFAULT_HOURS <= 2.0
    assert 20 <= training.target_calls[0] <= training.target_calls[1] <= 60
    n_train = summary["calls"][training.recorder.name][TARGET_LABEL]
    assert training.target_calls[0] <= n_train <= training.target_calls[1]
    written = _site_calls(summary, "survey_manifest")
    truth = _rows(summary["survey_truth"])
    key = ("file", "start_s", "end_s", "label")
    assert sorted(tuple(r[k] for k in key) for r in truth) == sorted(tuple(r[k] for k in key) for r in written)
    assert {r["label"] for r in truth} >= {h.label for h in HARD_CALL_TYPES[:3]}
    snr = np.array([float(r["snr_db"]) for r in written if r["label"] == TARGET_LABEL])
    assert snr.min() < 0.0 and snr.max() > 10.0


def test_test_site_has_another_recorder_and_other_noise(hard):
    # hard_sites(): 2 kHz 16-bit flat recorder at the training site, 3 kHz 24-bit with a
    # preamplifier gain climbing 20 dB from 10 to 100 Hz at the test site; another electronic
    # tone; another shipping / wind mix (Wenz-curve parameters).
    _, summary = hard
    training, test = hard_sites()
    dep_train = load_deployment(summary["training_manifest"])
    dep_test = load_deployment(summary["survey_manifest"])
    assert (dep_train.sample_rate_hz, dep_test.sample_rate_hz) == (2000, 3000)
    assert sf.info(dep_train.files[0].path).subtype == "PCM_16"
    assert sf.info(dep_test.files[0].path).subtype == "PCM_24"
    f = np.array([10.0, 100.0])
    assert np.ptp(dep_train.chain.system_sensitivity_db(f)) == pytest.approx(0.0, abs=1e-9)
    assert np.ptp(dep_test.chain.system_sensitivity_db(f)) >= 15.0
    assert training.recorder.electronic_tone_hz != test.recorder.electronic_tone_hz
    assert training.recorder.shipping < test.recorder.shipping
    assert training.wind_mps[0] > test.wind_mps[0]


def test_harmonic_call_waveform_levels_and_fade():
    # A constant-frequency "sweep" of 100 Hz with a second harmonic at -6 dB: the periodogram
    # peaks at 100 and 200 Hz differ by 6 dB (amplitudes add linearly; common practice).
    # An envelope falling linearly (in dB) by 20 dB from start to end puts the last tenth's
    # rms 18 dB below the first tenth's (their centres lie 0.9 of the call apart).
    fs = 4000
    t = np.arange(2 * fs) / fs
    shape = CallShape("sweep", 100.0, 100.0, 2.0)
    x = harmonic_call_waveform(shape, t, 1.0, harmonics_db=(-6.0,), taper=0.0)
    spec = np.abs(np.fft.rfft(x))
    f = np.fft.rfftfreq(x.size, 1 / fs)
    ratio_db = 20 * np.log10(spec[np.argmin(np.abs(f - 200))] / spec[np.argmin(np.abs(f - 100))])
    assert ratio_db == pytest.approx(-6.0, abs=0.05)
    y = harmonic_call_waveform(shape, t, 1.0, envelope_db=(0.0, -20.0), taper=0.0)
    first, last = y[: fs // 5], y[-fs // 5 :]
    drop = 10 * np.log10(np.mean(first**2) / np.mean(last**2))
    assert drop == pytest.approx(18.0, abs=0.3)


def test_flow_surge_is_low_frequency():
    # flow_surge: PSD flat below the corner and falling 30 dB per decade above it, so a
    # decade above a 20 Hz corner lies about 30 dB below it (10 log10(1 + 10^3) = 30.0 dB).
    fs = 2000
    x = flow_surge(60 * fs, fs, 120.0, 20.0, np.random.default_rng(0))
    f, pxx = signal.welch(x, fs, nperseg=2 * fs)
    low = np.mean(pxx[(f >= 2) & (f <= 8)])
    high = np.mean(pxx[(f >= 190) & (f <= 210)])
    assert 10 * np.log10(low / high) == pytest.approx(30.0, abs=3.0)
