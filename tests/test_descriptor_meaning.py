"""Every descriptor against what its meaning predicts for an analytic signal.

Each test builds pressure with plain numpy (tones, polynomial sweeps, sinusoidal FM, band
noise, all in white noise of known PSD), runs it through ``describe_file`` and compares a
descriptor with the value its one-line meaning (``descriptor_table()``, README) predicts,
with tolerances from the grid (bin spacing ``DF``, frame length ``FRAME_S``, hop ``HOP``).
The expected values do not come from the descriptor code, so these tests should survive a
rework of how the descriptors are computed.

Two scenes are described once per module: scene A (hop 0.05 s) holds the sweeps, tones,
bursts and band noise; scene B (hop 0.1 s) the frequency modulations, whose curvature per
hop must exceed a bin to count as a turn.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
import soundfile as sf
from callsieve.features.calibration import RecordingChain, samples_from_pressure
from callsieve.features.descriptors import DescriptorSettings, descriptor_names, descriptor_table
from callsieve.features.pipeline import describe_file

FS = 2000  # Hz; no decimation for a band up to 640 Hz
CHAIN = RecordingChain.flat(2.5, -170.0, 0.0)  # full scale 7.9e8 µPa (178 dB): nothing here clips
N0_DB = 50.0  # white-noise PSD, dB re 1 µPa²/Hz
N0 = 10.0 ** (N0_DB / 10.0)  # µPa²/Hz

SETTINGS = DescriptorSettings(
    low_hz=40.0, high_hz=640.0, resolution_hz=10.0, frame_hop_s=0.05, window_s=2.0, window_hop_s=0.5
)
FM_SETTINGS = replace(SETTINGS, frame_hop_s=0.1)
NAMES = descriptor_names(SETTINGS)
DF = SETTINGS.resolution_hz  # bin spacing, Hz
FRAME_S = 1.0 / DF  # one spectrogram frame, s
HOP = SETTINGS.frame_hop_s
N_W = SETTINGS.frames_per_window  # frames per analysis window (39)
BAND_HZ = SETTINGS.high_hz - SETTINGS.low_hz  # 600 Hz
NOISE_BAND_DB = N0_DB + 10.0 * np.log10(BAND_HZ)  # flat PSD: L_band = L_PSD + 10 log10(Δf) (REFERENCES §5)


def _amplitude_for_bin_snr(snr_db: float) -> float:
    """Amplitude (µPa) of a bin-centred tone whose PSD at its bin is ``snr_db`` over N0.

    Hann window: ENBW = 1.5 bins (REFERENCES §5), so the density at the tone's bin is
    (A²/2) / (1.5 DF).
    """
    return float(np.sqrt(2.0 * 1.5 * DF * N0 * 10.0 ** (snr_db / 10.0)))


def _faint_sweep_amplitude(span_hz: float, seconds: float, db_over_n0: float) -> float:
    """Amplitude (µPa) of a linear sweep whose power, spread evenly over the band it
    crosses, has a density ``db_over_n0`` dB relative to N0: P = A²/2 over ``span_hz``.
    """
    return float(np.sqrt(2.0 * span_hz * N0 * 10.0 ** (db_over_n0 / 10.0)))


class Scene:
    """Pressure in µPa on a time axis, built event by event."""

    def __init__(self, seconds: float, seed: int, fs: int = FS) -> None:
        self.fs = fs
        self.t = np.arange(int(fs * seconds)) / fs
        # White noise of PSD N0: variance N0·fs/2 (one-sided PSD 2σ²/fs, REFERENCES §5).
        self.p = np.random.default_rng(seed).normal(0.0, np.sqrt(N0 * fs / 2.0), self.t.size)

    def _gate(self, t0: float, seconds: float) -> tuple[np.ndarray, np.ndarray]:
        inside = (self.t >= t0) & (self.t < t0 + seconds)
        return inside, self.t[inside] - t0

    def tone(self, t0: float, seconds: float, f_hz: float, amplitude: float, phase: float = 0.0) -> None:
        """A rectangular tone burst, amplitude · sin(2π f τ + phase)."""
        inside, tau = self._gate(t0, seconds)
        self.p[inside] += amplitude * np.sin(2 * np.pi * f_hz * tau + phase)

    def sweep(self, t0: float, seconds: float, f0: float, b: float, a: float, amplitude: float) -> None:
        """Instantaneous frequency f0 + b τ + a τ² (phase = 2π ∫ f dτ, closed form)."""
        inside, tau = self._gate(t0, seconds)
        self.p[inside] += amplitude * np.sin(2 * np.pi * (f0 * tau + b * tau**2 / 2 + a * tau**3 / 3))

    def fm(self, t0: float, seconds: float, fc: float, deviation: float, rate_hz: float, amplitude: float) -> None:
        """Instantaneous frequency fc + Δ sin(2π r τ)."""
        inside, tau = self._gate(t0, seconds)
        phase = fc * tau - deviation / (2 * np.pi * rate_hz) * (np.cos(2 * np.pi * rate_hz * tau) - 1.0)
        self.p[inside] += amplitude * np.sin(2 * np.pi * phase)

    def band_noise(self, t0: float, seconds: float, low_hz: float, high_hz: float, psd: float, seed: int) -> None:
        """Gaussian noise of flat PSD ``psd`` (µPa²/Hz) between low_hz and high_hz (FFT mask)."""
        inside, tau = self._gate(t0, seconds)
        white = np.random.default_rng(seed).normal(0.0, np.sqrt(psd * self.fs / 2.0), tau.size)
        spectrum = np.fft.rfft(white)
        f = np.fft.rfftfreq(tau.size, 1.0 / self.fs)
        spectrum[(f < low_hz) | (f > high_hz)] = 0.0
        self.p[inside] += np.fft.irfft(spectrum, n=tau.size)

    def describe(self, folder, settings: DescriptorSettings, name: str) -> tuple[np.ndarray, np.ndarray]:
        path = folder / name
        sf.write(path, samples_from_pressure(self.p, self.fs, CHAIN), self.fs, subtype="FLOAT")
        tables = list(describe_file(path, CHAIN, settings))
        return np.concatenate([t.start_s for t in tables]), np.concatenate([t.values for t in tables])


# Scene A events (window start times in s; windows last 2 s).
DOWN_SWEEP = (20.5, 1.0, 250.0, 100.0)  # start, duration, f0, f1: linear, -150 Hz/s; window 20.0
QUAD = (40.0, 4.0, 100.0, 20.0, 15.0)  # start, duration, f0, b, a: f = 100 + 20τ + 15τ²
EXCESS_TONES = [(60.0, 130.0, 15.0), (75.0, 230.0, 20.0), (90.0, 330.0, 25.0), (105.0, 430.0, 30.0)]  # t0, Hz, dB
BURSTS = [(120.5, 1.0), (140.2, 1.6), (160.6, 0.8)]  # start, duration; 300 Hz; windows 120, 140, 160
TWO_TONES = (180.0, 120.0, 1e5, 480.0, 2e5)  # t0, f1, A1, f2, A2
HALF_BIN_TONE = (200.0, 355.0)  # t0, Hz: half-way between bins 350 and 360
BAND_NOISE = (220.0, 245.0, 355.0, 20.0)  # t0, low, high, dB over N0
P2P = (240.0, 500.0, 1e7, 900.0, 3e7)  # t0, in-band f, A, out-of-band f, A
LOPSIDED = (255.0, 200.0, 1e6)  # t0, f, A: A (cos ωt + 0.5 cos 2ωt), peaks +1.5 A and -0.75 A
QUIET = (270.0, 296.0)  # windows starting in this span hold noise only
FAINT_SWEEP = (186.0, 1.5, 150.0, 330.0, -3.0)  # start, duration, f0, f1, PSD over the band crossed re N0, dB


@pytest.fixture(scope="module")
def scene_a(tmp_path_factory):
    s = Scene(300.0, seed=7)
    t0, dur, f0, f1 = DOWN_SWEEP
    s.sweep(t0, dur, f0, (f1 - f0) / dur, 0.0, 1e5)
    s.sweep(*QUAD, 1e5)
    for t0, f, snr in EXCESS_TONES:
        s.tone(t0, 3.0, f, _amplitude_for_bin_snr(snr))
    for t0, dur in BURSTS:
        s.tone(t0, dur, 300.0, 1e5)
    t0, fa, aa, fb, ab = TWO_TONES
    s.tone(t0, 3.0, fa, aa)
    s.tone(t0, 3.0, fb, ab)
    s.tone(HALF_BIN_TONE[0], 3.0, HALF_BIN_TONE[1], 1e5)
    t0, lo, hi, db = BAND_NOISE
    s.band_noise(t0, 3.0, lo, hi, N0 * 10.0 ** (db / 10.0), seed=8)
    t0, fa, aa, fb, ab = P2P
    s.tone(t0, 3.0, fa, aa)
    s.tone(t0, 3.0, fb, ab)
    t0, f, a = LOPSIDED
    s.tone(t0, 3.0, f, a, phase=np.pi / 2)
    s.tone(t0, 3.0, 2 * f, a / 2, phase=np.pi / 2)
    t0, dur, f0, f1, db = FAINT_SWEEP
    s.sweep(t0, dur, f0, (f1 - f0) / dur, 0.0, _faint_sweep_amplitude(f1 - f0, dur, db))
    return s.describe(tmp_path_factory.mktemp("meaning"), SETTINGS, "a.wav")


# Scene B: frequency modulations (start, duration, fc, Δ, r) and a slow linear sweep.
FM_FAST = (10.0, 6.0, 300.0, 20.0, 2.0)
FM_MID = (45.0, 6.0, 300.0, 60.0, 1.0)
FM_SLOW = (80.0, 8.0, 300.0, 60.0, 0.25)
LINEAR = (115.0, 6.0, 100.0, 300.0)  # start, duration, f0, f1


@pytest.fixture(scope="module")
def scene_b(tmp_path_factory):
    s = Scene(150.0, seed=9)
    for t0, dur, fc, dev, r in (FM_FAST, FM_MID, FM_SLOW):
        s.fm(t0, dur, fc, dev, r, 1e5)
    t0, dur, f0, f1 = LINEAR
    s.sweep(t0, dur, f0, (f1 - f0) / dur, 0.0, 1e5)
    return s.describe(tmp_path_factory.mktemp("meaning-fm"), FM_SETTINGS, "b.wav")


def _row(scene, window_start_s: float) -> dict[str, float]:
    start, values = scene
    i = int(np.argmin(np.abs(start - window_start_s)))
    assert abs(start[i] - window_start_s) < 1e-6, "no window starts there"
    return {n: float(values[i, k]) for k, n in enumerate(NAMES)}


def _windows_inside(t0: float, seconds: float, hop_s: float = 0.5) -> np.ndarray:
    """Starts of the 2-s windows that lie wholly inside [t0, t0 + seconds]."""
    first = np.ceil(t0 / hop_s - 1e-9) * hop_s
    return np.arange(first, t0 + seconds - SETTINGS.window_s + 1e-9, hop_s)


def test_every_descriptor_of_the_table_is_covered_here():
    # The table is the contract; a descriptor added to it must get a meaning test here.
    covered = {
        "trace_first_hz", "trace_last_hz", "trace_lowest_hz", "trace_highest_hz", "trace_median_hz",
        "trace_sweep_rate_hz_per_s", "trace_sweep_change_hz_per_s2", "trace_turns", "trace_cover_fraction",
        "trace_duration_s", "trace_fit_rms_hz", "trace_excess_db", "band_level_db", "noise_level_db", "snr_db",
        "peak_to_peak_db", "psd_evenness", "excess_centroid_hz", "peak_run_width_hz", "excess_core_duration_s",
        "sweep_path_excess_db", "sweep_path_rate_hz_per_s", "sweep_path_centre_hz",
        "sweep_path_long_excess_db", "sweep_path_long_rate_hz_per_s",
    }  # fmt: skip
    names = {n for n, _, _ in descriptor_table(SETTINGS)}
    # Sub-band levels, excesses and peak excesses, and the patch cells, are tested below
    # for every sub-band and slice by name pattern.
    per_band = {n for n in names if n.startswith(("subband", "patch_"))}
    assert names - per_band == covered
    k, q = SETTINGS.n_subbands, SETTINGS.n_time_slices
    assert len(per_band) == 3 * k + k * q
    assert {n for n in per_band if n.startswith("subband")} == {
        f"subband{i}_{kind}" for i in range(1, k + 1) for kind in ("level_db", "excess_db", "peak_excess_db")
    }


# --- trace: frequencies -----------------------------------------------------------------


def test_down_sweep_first_last_lowest_highest_median(scene_a):
    # A linear down-sweep 250 -> 100 Hz over 1 s, wholly inside its window. By the meanings:
    # first = 250, last = 100 (in time order), lowest = 100, highest = 250 (in frequency
    # order), median = 175 (a linear sweep spends equal time at every frequency, so its
    # median frequency is the mid-point). Tolerance: the edge frames see the sweep for up to
    # half a frame, i.e. |rate|·FRAME_S/2 = 7.5 Hz, plus half a bin (common practice).
    t0, dur, f0, f1 = DOWN_SWEEP
    row = _row(scene_a, 20.0)
    rate = (f1 - f0) / dur
    tol = abs(rate) * FRAME_S / 2 + DF / 2
    assert row["trace_first_hz"] == pytest.approx(f0, abs=tol)
    assert row["trace_last_hz"] == pytest.approx(f1, abs=tol)
    assert row["trace_lowest_hz"] == pytest.approx(f1, abs=tol)
    assert row["trace_highest_hz"] == pytest.approx(f0, abs=tol)
    assert row["trace_median_hz"] == pytest.approx((f0 + f1) / 2, abs=DF / 2)
    # Slope of a linear sweep: (f1 - f0)/T = -150 Hz/s (definition), within 2 %.
    assert row["trace_sweep_rate_hz_per_s"] == pytest.approx(rate, rel=0.02)


def test_quadratic_sweep_rate_curvature_median_and_ends(scene_a):
    # f(τ) = f0 + bτ + aτ² across whole windows: the slope at the window centre τc is
    # f'(τc) = b + 2aτc and the second derivative is 2a = 30 Hz/s² (calculus). All frames
    # stand above the floor, so the first and last frames are the window's own, centred
    # FRAME_S/2 after its start and before its end; the median of a monotonic f over
    # symmetric frame times is f(τc) (the mean would be f(τc) + a·T²/12, 4.8 Hz higher).
    # Tolerances: rate 2 %; a trace error of DF/5 bent over the window (half-width 0.975 s)
    # moves the curvature by 2·(DF/5)/0.975² = 4.2 Hz/s²; median and ends DF/4 and DF/2.
    t0, dur, f0, b, a = QUAD
    starts = _windows_inside(t0, dur)
    assert starts.size == 5
    half = (N_W - 1) * HOP / 2  # frame-centre span of a window, either side of its centre

    def f(tau):
        return f0 + b * tau + a * tau**2

    for ws in starts:
        row = _row(scene_a, ws)
        tau_c = ws + SETTINGS.window_s / 2 - t0
        assert row["trace_sweep_rate_hz_per_s"] == pytest.approx(b + 2 * a * tau_c, rel=0.02)
        assert row["trace_sweep_change_hz_per_s2"] == pytest.approx(2 * a, abs=2 * (DF / 5) / half**2)
        assert row["trace_median_hz"] == pytest.approx(f(tau_c), abs=DF / 4)
        assert row["trace_first_hz"] == pytest.approx(f(tau_c - half), abs=DF / 2)
        assert row["trace_last_hz"] == pytest.approx(f(tau_c + half), abs=DF / 2)


def test_linear_sweep_has_no_curvature_no_turns_and_fits_exactly(scene_b):
    # A linear sweep (33 Hz/s) through whole windows: its second derivative is 0, its
    # second difference never exceeds a bin (no turns), and a quadratic fits it exactly, so
    # the rms deviation from the fit is only the trace's interpolation error (< DF/10).
    t0, dur, f0, f1 = LINEAR
    half = (FM_SETTINGS.frames_per_window - 1) * FM_SETTINGS.frame_hop_s / 2
    for ws in _windows_inside(t0, dur):
        row = _row(scene_b, ws)
        assert row["trace_sweep_rate_hz_per_s"] == pytest.approx((f1 - f0) / dur, rel=0.02)
        assert abs(row["trace_sweep_change_hz_per_s2"]) <= 2 * (DF / 5) / half**2
        assert row["trace_turns"] == 0
        assert row["trace_fit_rms_hz"] < DF / 10


# The straight sweep paths on SETTINGS' grid (descriptor_table): 0.3 window lengths =
# 0.6 s, points every other frame (7 points), rates a step of 2 coarse bins (2 × 20 Hz)
# over 0.6 s = 66.7 Hz/s apart, and frequencies on pairs of bins (20 Hz).
PATH_S = 0.6
PATH_POINTS = 7
PATH_RATE_STEP = 2 * 2 * DF / PATH_S
PATH_CAP_DB = 20.0
PATH_SOFT_SHARE, PATH_SOFT_DB = 0.01, 60.0  # each cell also counts 1 % of its excess up to 60 dB


def _path_cell(excess_db: float) -> float:
    """What one cell of a given excess (dB) adds to a path: capped, plus the soft share."""
    return min(max(excess_db, 0.0), PATH_CAP_DB) + PATH_SOFT_SHARE * min(max(excess_db, 0.0), PATH_SOFT_DB)


def test_down_sweep_best_path_rate_and_midpoint(scene_a):
    # A linear down-sweep of -150 Hz/s lasting 1 s, wholly inside the window: the best
    # straight path of 0.6 s follows it, so its rate is the sweep's within half a rate step,
    # and its midpoint lies where a 0.6-s stretch of the sweep can have its middle,
    # 250 - 150·0.3 = 205 down to 100 + 150·0.3 = 145 Hz, within a coarse bin. A loud sweep stands far above
    # the floor in every cell, so its mean is near the cap (frame smearing of 150 Hz/s over a
    # 0.1-s frame costs a few dB at most).
    t0, dur, f0, f1 = DOWN_SWEEP
    row = _row(scene_a, 20.0)
    assert row["sweep_path_rate_hz_per_s"] == pytest.approx((f1 - f0) / dur, abs=PATH_RATE_STEP / 2)
    mid_lo, mid_hi = f1 + 150.0 * PATH_S / 2, f0 - 150.0 * PATH_S / 2
    assert mid_lo - 2 * DF <= row["sweep_path_centre_hz"] <= mid_hi + 2 * DF
    assert row["sweep_path_excess_db"] >= 15.0


def test_path_along_a_steady_tone_is_its_bins_snr_up_to_the_cap(scene_a):
    # A steady tone is a path of rate 0 at its frequency; each cell stands
    # 10 log10(10^(s/10) + 1) dB over the floor (as for trace_excess_db above), clipped at
    # 20 dB, plus 1 % of it, so the path's mean is that (15 dB tone: 15.3 dB) or the cap and
    # 1 % of the tone's excess (25 and 30 dB tones: every cell above the cap, 20.25 and
    # 20.30 dB; a cell's scatter of a dB or two moves its 1 % by 0.02). Tolerance as for
    # trace_excess_db (2 dB) plus 0.5 dB for the best of the paths being taken (their means
    # scatter by about 1 dB / sqrt(7)).
    for t0, f, snr in EXCESS_TONES:
        row = _row(scene_a, t0 + 0.5)
        expected = _path_cell(10.0 * np.log10(10.0 ** (snr / 10.0) + 1.0))
        if snr >= 25:
            assert row["sweep_path_excess_db"] == pytest.approx(expected, abs=0.03), f"{snr} dB"
        else:
            assert row["sweep_path_excess_db"] == pytest.approx(expected, abs=2.5), f"{snr} dB"
        assert row["sweep_path_rate_hz_per_s"] == 0.0
        assert abs(row["sweep_path_centre_hz"] - f) <= DF


def test_faint_sweep_stands_out_along_its_path_not_in_its_strongest_cell(scene_a):
    # A sweep of 120 Hz/s whose power, spread over the 180 Hz it crosses, lies 3 dB below
    # the noise PSD: in one spectrogram cell it stands only a few dB above the noise (the
    # strongest cells of pure noise reach as high), but along its path the mean of 7 cells
    # scatters about 2.6 times less (1/sqrt(7); spectrogram correlation, Mellinger & Clark 2000,
    # J. Acoust. Soc. Am. 107(6)), so its best path lies above that of every noise-only window
    # while its strongest sub-band frame does not stand out as clearly.
    t0, dur, f0, f1, _ = FAINT_SWEEP
    noise = np.array([_row(scene_a, ws)["sweep_path_excess_db"] for ws in np.arange(*QUIET, 0.5)])
    # The windows that hold the whole sweep start from t0 + dur - 2 s to t0.
    sweep_rows = [_row(scene_a, ws) for ws in np.arange(t0 + dur - SETTINGS.window_s, t0 + 1e-9, 0.5)]
    best = max(r["sweep_path_excess_db"] for r in sweep_rows)
    assert best > noise.max() + 1.0
    assert (best - noise.mean()) / noise.std() > 4.0

    # Cell by cell it is lost: its strongest sub-band frame is no higher than noise's.
    def strongest(row):
        return max(row[f"subband{i}_peak_excess_db"] for i in range(1, SETTINGS.n_subbands + 1))

    quiet = [strongest(_row(scene_a, ws)) for ws in np.arange(*QUIET, 0.5)]
    assert max(strongest(r) for r in sweep_rows) < max(quiet)
    rates = [r["sweep_path_rate_hz_per_s"] for r in sweep_rows if r["sweep_path_excess_db"] == best]
    assert rates[0] == pytest.approx((f1 - f0) / dur, abs=PATH_RATE_STEP / 2)


# The long paths: 0.6 window lengths = 1.2 s, points every other frame (13 points), rates
# 2 coarse bins over 1.2 s = 33.3 Hz/s apart.
LONG_PATH_S = 1.2
LONG_PATH_POINTS = 13
LONG_PATH_RATE_STEP = 2 * 2 * DF / LONG_PATH_S


def test_long_path_fills_with_a_call_as_long_as_it_and_partly_with_a_shorter_one(scene_a):
    # Two loud 300 Hz tone bursts (far above the cap in every cell they cover): the 1.6 s
    # burst holds a whole 1.2 s path of rate 0, so its long path's mean is that of the same
    # tone's cells as its short path's, above the cap. The 0.8 s burst covers at most 10 of
    # the long path's 13 points (0.8 s, points 0.1 s apart, plus one frame of smear at each
    # end) and at least 7 (8 points span 0.7 s), so the long mean lies between 7 of those
    # cells over 13 and 10 of them plus 3 of the loudest noise any quiet window's long path
    # found: a call shorter than the long path stands lower along it than along the short one.
    (t_short, d_short), (t_long, d_long) = BURSTS[2], BURSTS[1]
    assert d_short < LONG_PATH_S < d_long
    # The windows starting on the half-second before each burst hold it whole.
    whole = _row(scene_a, np.floor(t_long / 0.5) * 0.5)
    tone_cell = whole["sweep_path_excess_db"]
    assert tone_cell > PATH_CAP_DB
    assert whole["sweep_path_long_excess_db"] == pytest.approx(tone_cell, abs=0.05)
    assert whole["sweep_path_long_rate_hz_per_s"] == 0.0
    quiet = max(_row(scene_a, ws)["sweep_path_long_excess_db"] for ws in np.arange(*QUIET, 0.5))
    part = _row(scene_a, np.floor(t_short / 0.5) * 0.5)
    assert part["sweep_path_excess_db"] == pytest.approx(tone_cell, abs=0.05)
    low, high = 7 * PATH_CAP_DB / LONG_PATH_POINTS, (10 * tone_cell + 3 * quiet) / LONG_PATH_POINTS
    assert low <= part["sweep_path_long_excess_db"] <= high


def test_long_path_follows_a_long_faint_sweep(scene_a):
    # The faint sweep of 120 Hz/s lasts 1.5 s, longer than the long path: along it the
    # long path stands above every noise-only window's (the same matched-filter sum as the
    # short path's, over 13 cells) and its rate is the sweep's within half a long rate step.
    t0, dur, f0, f1, _ = FAINT_SWEEP
    noise = [_row(scene_a, ws)["sweep_path_long_excess_db"] for ws in np.arange(*QUIET, 0.5)]
    rows = [_row(scene_a, ws) for ws in np.arange(t0 + dur - SETTINGS.window_s, t0 + 1e-9, 0.5)]
    best = max(rows, key=lambda r: r["sweep_path_long_excess_db"])
    assert best["sweep_path_long_excess_db"] > max(noise) + 1.0
    assert best["sweep_path_long_rate_hz_per_s"] == pytest.approx((f1 - f0) / dur, abs=LONG_PATH_RATE_STEP / 2)


def test_paths_filled_to_the_cap_go_to_the_louder_call(tmp_path):
    # A steady tone 25 dB over the floor in its bin and a down-sweep of -150 Hz/s far
    # louder (as DOWN_SWEEP) in the same windows: both fill a 0.6 s path with cells above
    # the 20 dB cap. The soft share (1 % of each cell's excess) gives the path to the
    # louder call: its rate within half a rate step of the sweep's, not the tone's 0 Hz/s,
    # and a mean above the tone's own (20.25 dB). The 1 s sweep does not fill a 1.2 s
    # path, so the long path keeps to the tone.
    scene = Scene(30.0, seed=13)
    tone_snr = 25.0
    scene.tone(8.0, 6.0, 200.0, _amplitude_for_bin_snr(tone_snr))
    t0, dur, rate = 10.5, 1.0, -150.0
    scene.sweep(t0, dur, 250.0, rate, 0.0, 1e5)
    found = scene.describe(tmp_path, SETTINGS, "crossing.wav")
    tone_path = _path_cell(10.0 * np.log10(10.0 ** (tone_snr / 10.0) + 1.0))
    for ws in (9.5, 10.0, 10.5):  # windows that hold the whole sweep and the tone
        row = _row(found, ws)
        assert row["sweep_path_rate_hz_per_s"] == pytest.approx(rate, abs=PATH_RATE_STEP / 2), ws
        assert row["sweep_path_excess_db"] > tone_path, ws
        assert row["sweep_path_long_rate_hz_per_s"] == 0.0, ws
        assert row["sweep_path_long_excess_db"] == pytest.approx(tone_path, abs=0.03), ws


def test_fast_sweep_in_a_short_window_on_a_high_band_keeps_its_rate(tmp_path):
    # A whistle-like upsweep of 15 kHz/s (3 -> 7.5 kHz in 0.3 s) in half-second windows on a
    # 2-10 kHz band. The fastest path must reach it: in windows shorter than a second, rates
    # reach the whole band within one window (16 kHz/s here), where a band-width per second
    # (8 kHz/s) would stop at about half the sweep's. Expected from the signal: its rate
    # within half a rate step, and a loud sweep near the cap all along (A²/2 = 5e9 µPa²
    # spread over the 150 Hz it crosses in one 10-ms frame is about 3e7 µPa²/Hz, 25 dB over
    # N0 = 1e5 µPa²/Hz).
    settings = DescriptorSettings(
        low_hz=2000.0, high_hz=10000.0, resolution_hz=100.0, frame_hop_s=0.005, window_s=0.5, window_hop_s=0.125
    )
    path_s = round(0.3 * settings.window_s / (2 * settings.frame_hop_s)) * 2 * settings.frame_hop_s
    rate_step = 2 * 2 * settings.resolution_hz / path_s  # paths of 0.3 windows, as PATH_S above
    scene = Scene(4.0, seed=11, fs=32000)
    t0, dur, f0, f1 = 2.0, 0.3, 3000.0, 7500.0
    scene.sweep(t0, dur, f0, (f1 - f0) / dur, 0.0, 1e5)
    start, values = scene.describe(tmp_path, settings, "whistle.wav")
    names = descriptor_names(settings)
    # The window that starts 0.125 s before the sweep holds all of it.
    i = int(np.argmin(np.abs(start - 1.875)))
    assert abs(start[i] - 1.875) < 1e-6, "no window starts there"
    row = dict(zip(names, values[i], strict=True))
    assert (f1 - f0) / dur > (settings.high_hz - settings.low_hz) * 1.5  # well above a band per second
    assert row["sweep_path_rate_hz_per_s"] == pytest.approx((f1 - f0) / dur, abs=rate_step / 2 + 1e-6)
    assert row["sweep_path_excess_db"] >= 15.0


def test_path_on_the_lone_top_bin_of_an_odd_grid_is_centred_on_it(tmp_path):
    # SETTINGS' grid holds the multiples of 10 Hz from 40 to 640 Hz: 61 bins, so the paths'
    # bin pairs end with bin 640 Hz alone. A steady tone there (15 dB over the floor in its
    # bin, about 9 dB in the next one down: the DFT of a periodic Hann window of N samples,
    # 0.5 - 0.5 cos(2πn/N), is N/2 at bin 0 and -N/4 at bins ±1, so the neighbour holds a
    # quarter of the power, -6 dB) is a path of rate 0 on that lone bin, whose centre is
    # 640 Hz itself, not half a bin above the band.
    assert (SETTINGS.high_hz - SETTINGS.low_hz) / DF + 1 == 61
    scene = Scene(20.0, seed=12)
    scene.tone(8.0, 6.0, SETTINGS.high_hz, _amplitude_for_bin_snr(15.0))
    start, values = scene.describe(tmp_path, SETTINGS, "top.wav")
    row = _row((start, values), 10.0)
    assert row["sweep_path_rate_hz_per_s"] == 0.0
    assert row["sweep_path_centre_hz"] == pytest.approx(SETTINGS.high_hz, abs=DF / 4)
    assert row["sweep_path_excess_db"] >= 10.0


def _fm_frame_times(ws: float, t0: float) -> np.ndarray:
    """Frame centres of the window starting at ws, in s from the FM's start."""
    n = FM_SETTINGS.frames_per_window
    return ws - t0 + np.arange(n) * FM_SETTINGS.frame_hop_s + 1.0 / FM_SETTINGS.resolution_hz / 2


@pytest.mark.parametrize("fm", [FM_FAST, FM_MID], ids=["r=2Hz", "r=1Hz"])
def test_fm_turns_count_curvature_sign_changes(scene_b, fm):
    # f = fc + Δ sin(2πrτ) has f'' = -Δ(2πr)² sin(2πrτ), whose sign changes 2r times per
    # second. The second differences of the trace span (n_w - 3) hops = 1.7 s, so a window
    # wholly inside the FM shows 2r·1.7 ± 1 sign changes (6.8 and 3.4). Each half-period has
    # a second difference of Δ(2πr)²·hop² ≥ 24 Hz > DF, so every one registers.
    t0, dur, fc, dev, r = fm
    span = (FM_SETTINGS.frames_per_window - 3) * FM_SETTINGS.frame_hop_s
    assert dev * (2 * np.pi * r) ** 2 * FM_SETTINGS.frame_hop_s**2 > 2 * DF
    starts = _windows_inside(t0, dur)
    assert starts.size >= 5
    for ws in starts:
        assert abs(_row(scene_b, ws)["trace_turns"] - 2 * r * span) <= 1.0


@pytest.mark.parametrize("fm", [FM_MID, FM_SLOW], ids=["r=1Hz", "r=0.25Hz"])
def test_fm_fit_rms_is_the_residual_of_a_quadratic_fit(scene_b, fm):
    # By its meaning, trace_fit_rms_hz is the rms deviation of the trace from a quadratic fit
    # over the window. Predicted here with numpy: fit f = fc + Δ sin(2πrτ) at the window's
    # frame centres (equal weights: constant amplitude) and take the rms residual. For r = 1 Hz
    # (two periods per window) it is near Δ/√2 (39 Hz against 42); for r = 0.25 Hz the
    # quadratic absorbs most of the half period (1 to 5 Hz, while the spread about the mean
    # is 18 to 42 Hz), which tells a fit residual from a standard deviation. Tolerance 10 % +
    # DF/10: the frame-long Hann window smooths the FM (< 1 % at 1 Hz) and the trace's bin
    # interpolation errs by up to about DF/10.
    t0, dur, fc, dev, r = fm
    starts = _windows_inside(t0, dur)
    assert starts.size >= 9
    for ws in starts:
        tau = _fm_frame_times(ws, t0)
        f = fc + dev * np.sin(2 * np.pi * r * tau)
        predicted = float(np.sqrt(np.mean((f - np.polyval(np.polyfit(tau, f, 2), tau)) ** 2)))
        measured = _row(scene_b, ws)["trace_fit_rms_hz"]
        assert measured == pytest.approx(predicted, abs=0.1 * predicted + DF / 10), f"window {ws:g}"


def test_fm_lowest_and_highest_are_its_extremes(scene_b):
    # A window holding two whole periods of fc ± Δ reaches fc - Δ and fc + Δ. Frames sample
    # the FM every hop, so the sampled extreme may fall short by Δ(1 - cos(π r hop)) = 2.9 Hz;
    # plus half a bin.
    t0, dur, fc, dev, r = FM_MID
    tol = dev * (1 - np.cos(np.pi * r * FM_SETTINGS.frame_hop_s)) + DF / 2
    for ws in _windows_inside(t0, dur):
        row = _row(scene_b, ws)
        assert row["trace_lowest_hz"] == pytest.approx(fc - dev, abs=tol)
        assert row["trace_highest_hz"] == pytest.approx(fc + dev, abs=tol)
        assert row["trace_median_hz"] == pytest.approx(fc, abs=DF / 2)


# --- trace: time ---------------------------------------------------------------------------


def test_burst_cover_fraction_and_duration(scene_a):
    # A rectangular burst of T s: frames (FRAME_S long, every HOP) that overlap it by enough
    # for its 35-dB bin SNR to clear the threshold lie within T + FRAME_S; frames centred on
    # it (half its energy or more) always do. So the time above the floor is between T and
    # T + FRAME_S, ± one hop of counting; the cover fraction is that many frames over the
    # window's N_W frames.
    for t0, dur in BURSTS:
        row = _row(scene_a, np.floor(t0 / 0.5) * 0.5)
        assert dur - HOP <= row["trace_duration_s"] <= dur + FRAME_S + HOP, f"T = {dur}"
        lo, hi = (dur / HOP - 1) / N_W, ((dur + FRAME_S) / HOP + 1) / N_W
        assert lo <= row["trace_cover_fraction"] <= hi, f"T = {dur}"
    # Durations scale with T: 1.6 s and 0.8 s bursts differ by 0.8 s (± two hops).
    d = {dur: _row(scene_a, np.floor(t0 / 0.5) * 0.5)["trace_duration_s"] for t0, dur in BURSTS}
    assert d[1.6] - d[0.8] == pytest.approx(0.8, abs=2 * HOP)


def test_tone_filling_the_window_covers_it(scene_a):
    # A tone through the whole window: every frame stands above the floor (cover 1), and the
    # trace stands there for the whole window, window_s within one frame.
    t0, f, _ = EXCESS_TONES[3]
    row = _row(scene_a, t0 + 0.5)
    assert row["trace_cover_fraction"] == pytest.approx(1.0)
    assert row["trace_duration_s"] == pytest.approx(SETTINGS.window_s, abs=FRAME_S)
    assert row["trace_median_hz"] == pytest.approx(f, abs=DF / 4)


def test_noise_only_windows_have_little_trace(scene_a):
    # The threshold is set so that a frame of pure noise stands above it with probability
    # trace_false_alarm = 5 %; the main run in noise is a frame or two (common practice:
    # false-alarm rate per frame).
    for ws in np.arange(*QUIET, 0.5):
        row = _row(scene_a, ws)
        assert row["trace_cover_fraction"] <= 0.1
        assert row["trace_duration_s"] <= 4 * HOP


def test_excess_core_duration_is_ninety_percent_of_a_burst(scene_a):
    # A rectangular burst of T s carries energy evenly over T; its cumulative energy goes
    # from 5 % to 95 % in 0.9 T (definition). Frame smoothing (FRAME_S) shifts both ends
    # alike where 0.05 T >= FRAME_S/2, and only by milliseconds below; counting on the frame
    # grid errs by up to 1.5 hops.
    got = {}
    for t0, dur in BURSTS:
        got[dur] = _row(scene_a, np.floor(t0 / 0.5) * 0.5)["excess_core_duration_s"]
        assert got[dur] == pytest.approx(0.9 * dur, abs=1.5 * HOP), f"T = {dur}"
    assert got[1.6] - got[0.8] == pytest.approx(0.9 * 0.8, abs=2 * HOP)


# --- trace and band levels -----------------------------------------------------------------


def test_trace_excess_is_the_tone_bins_snr(scene_a):
    # A bin-centred tone whose PSD at its bin is s dB over the noise PSD N0 (Hann ENBW 1.5
    # bins, REFERENCES §5): at its bin the PSD over the floor is (S + N0)/N0, so the median
    # excess is 10 log10(10^(s/10) + 1). The floor of one bin is a percentile of about 120
    # noise frames, uncertain by about ±0.8 dB (order statistics of an exponential variable,
    # from memory): each tone within 2 dB, their mean within 1 dB.
    errors = []
    for t0, _, snr in EXCESS_TONES:
        expected = 10.0 * np.log10(10.0 ** (snr / 10.0) + 1.0)
        got = _row(scene_a, t0 + 0.5)["trace_excess_db"]
        assert got == pytest.approx(expected, abs=2.0), f"{snr} dB"
        errors.append(got - expected)
    assert abs(np.mean(errors)) <= 1.0


# The floor is a percentile estimate: per bin, the 20th percentile of about 120 noise frames
# (±0.8 dB, 1σ); over the band about ±0.1 dB, biased up by about 0.2 dB (the sample
# percentile of 120 values sits above the quantile, and scattered per-bin floors average
# high in power); and 61 bins span 610 Hz, not 600 (+0.07 dB). Tolerance 0.5 dB.
NOISE_TOL_DB = 0.5


def _snr_bounds(p_signal: float, p_noise: float) -> tuple[float, float]:
    """SNR (dB) as (P + N - N̂)/N̂ for a noise estimate N̂ within ±NOISE_TOL_DB of N, ± 0.1 dB."""
    lo_n, hi_n = p_noise * 10 ** (-NOISE_TOL_DB / 10), p_noise * 10 ** (NOISE_TOL_DB / 10)
    total = p_signal + p_noise
    return 10 * np.log10((total - hi_n) / hi_n) - 0.1, 10 * np.log10((total - lo_n) / lo_n) + 0.1


@pytest.mark.parametrize("k", [1, 3])
def test_band_noise_and_snr_of_a_tone_in_white_noise(scene_a, k):
    # White noise of PSD N0 = 50 dB re 1 µPa²/Hz over the 600-Hz band: noise level
    # 50 + 10 log10(600) = 77.78 dB re 1 µPa (REFERENCES §5). A tone of power P_t = A²/2
    # (REFERENCES §3) adds in power: band level 10 log10(P_t + N0·600); the SNR is
    # (band power - noise power)/noise power = P_t/(N0·600): 3.98 and 13.98 dB, within what
    # the floor's tolerance allows (_snr_bounds).
    t0, f, snr = EXCESS_TONES[k]
    p_tone = _amplitude_for_bin_snr(snr) ** 2 / 2
    p_noise = N0 * BAND_HZ
    row = _row(scene_a, t0 + 0.5)
    assert row["noise_level_db"] == pytest.approx(NOISE_BAND_DB, abs=NOISE_TOL_DB)
    assert row["band_level_db"] == pytest.approx(10 * np.log10(p_tone + p_noise), abs=0.3)
    lo, hi = _snr_bounds(p_tone, p_noise)
    assert lo <= row["snr_db"] <= hi
    assert hi - lo < 2.0 and lo < 10 * np.log10(p_tone / p_noise) < hi


def test_noise_only_windows_have_the_noise_level_and_no_snr(scene_a):
    # Noise alone: band level = noise level = 77.78 dB re 1 µPa (REFERENCES §5), and the
    # band power less the noise power is about 0, far below the noise (SNR << 0 dB).
    # Tolerance of the band level 0.45 dB: 39 half-overlapping frames × 61 bins of noise
    # power scatter by about ±0.12 dB (1σ, chi-squared with ~1200 degrees of freedom), and
    # the 61 bins span 610 Hz (+0.07 dB).
    for ws in np.arange(*QUIET, 0.5):
        row = _row(scene_a, ws)
        assert row["band_level_db"] == pytest.approx(NOISE_BAND_DB, abs=0.45)
        assert row["noise_level_db"] == pytest.approx(NOISE_BAND_DB, abs=NOISE_TOL_DB)
        assert row["snr_db"] < -6.0


def test_peak_to_peak_is_of_the_band_passed_waveform(scene_a):
    # Peak-to-peak SPL of a sine of amplitude A is 20 log10(2A) dB re 1 µPa (REFERENCES §3).
    # A tone at 500 Hz (in band) with a 3-times stronger one at 900 Hz (out of band):
    # the band-passed waveform holds the first alone, 20 log10(2e7) = 146.02 dB; unfiltered
    # it would be about 20 log10(2·4e7) = 158 dB. The band level is the in-band tone's rms,
    # 20 log10(A/√2) = 136.99 dB.
    t0, _, a_in, _, _ = P2P
    row = _row(scene_a, t0 + 0.5)
    assert row["peak_to_peak_db"] == pytest.approx(20 * np.log10(2 * a_in), abs=0.2)
    assert row["band_level_db"] == pytest.approx(20 * np.log10(a_in / np.sqrt(2)), abs=0.2)


def test_peak_to_peak_of_a_lopsided_wave_is_max_minus_min(scene_a):
    # ISO 18405 (REFERENCES §3): p_pkpk = max p - min p, not twice the largest |p|. For
    # p = A (cos θ + 0.5 cos 2θ): max 1.5 A at θ = 0; min where cos θ = -1/(4·0.5), i.e.
    # -1/(8·0.5) - 0.5 = -0.75 A (calculus). So p_pkpk = 2.25 A, 2.5 dB below 2·max|p| = 3 A.
    # Both components are in band, where the band filter is flat and of zero phase.
    t0, _, a = LOPSIDED
    theta = np.linspace(0.0, 2 * np.pi, 100001)
    wave = np.cos(theta) + 0.5 * np.cos(2 * theta)
    assert np.ptp(wave) == pytest.approx(2.25, abs=1e-6)
    row = _row(scene_a, t0 + 0.5)
    assert row["peak_to_peak_db"] == pytest.approx(20 * np.log10(2.25 * a), abs=0.2)


def test_subband_level_and_excess_of_a_tone_of_known_snr(scene_a):
    # Sub-band 3 of 4 (equal log widths of 40-640 Hz: 160-320 Hz, 160 Hz wide) holds the
    # 230-Hz tone of power P_t = A²/2 (REFERENCES §3): its level is 10 log10(P_t + N0·160)
    # and its excess, power over noise power, 10 log10((P_t + N0·160)/(N0·160)) = 10.2 dB,
    # within 0.7 dB: the floor over 16 bins scatters by ±0.2 dB and sits about 0.2 dB high
    # (see NOISE_TOL_DB). The other sub-bands hold noise alone: level N0 + 10 log10(width),
    # excess 0 dB (each within 1.5 dB: the narrowest has 4 bins, whose floors scatter more).
    edges = np.geomspace(SETTINGS.low_hz, SETTINGS.high_hz, SETTINGS.n_subbands + 1)
    t0, f, snr = EXCESS_TONES[1]
    assert edges[2] < f - DF and f + DF < edges[3]
    row = _row(scene_a, t0 + 0.5)
    p_tone = _amplitude_for_bin_snr(snr) ** 2 / 2
    width = edges[3] - edges[2]
    assert row["subband3_level_db"] == pytest.approx(10 * np.log10(p_tone + N0 * width), abs=0.3)
    assert row["subband3_excess_db"] == pytest.approx(10 * np.log10((p_tone + N0 * width) / (N0 * width)), abs=0.7)
    for k in (1, 2, 4):
        w = edges[k] - edges[k - 1]
        assert row[f"subband{k}_level_db"] == pytest.approx(N0_DB + 10 * np.log10(w), abs=1.5), k
        assert abs(row[f"subband{k}_excess_db"]) <= 1.5, k


def test_subband_levels_place_two_tones(scene_a):
    # Two tones, 120 Hz (sub-band 2: 80-160) and 480 Hz (sub-band 4: 320-640), of amplitudes
    # A1 and A2: each sub-band's level is its own tone's rms 20 log10(A/√2) (noise 30 dB lower)
    # and the band level their power sum (REFERENCES §3).
    t0, fa, aa, fb, ab = TWO_TONES
    row = _row(scene_a, t0 + 0.5)
    la, lb = 20 * np.log10(aa / np.sqrt(2)), 20 * np.log10(ab / np.sqrt(2))
    assert row["subband2_level_db"] == pytest.approx(la, abs=0.2)
    assert row["subband4_level_db"] == pytest.approx(lb, abs=0.2)
    assert row["band_level_db"] == pytest.approx(10 * np.log10(10 ** (la / 10) + 10 ** (lb / 10)), abs=0.2)


# --- spectral shape ------------------------------------------------------------------------


def test_excess_centroid_of_two_tones_and_of_a_sweep(scene_a):
    # Centroid of the excess = power-weighted mean frequency: tones at 120 and 480 Hz with
    # powers in the ratio 1:4 (amplitudes 1:2) -> (120 + 4·480)/5 = 408 Hz. A constant-
    # amplitude linear sweep spreads its energy evenly over 100-250 Hz -> 175 Hz. Hann
    # leakage is symmetric about each frequency and moves neither; within half a bin.
    t0, fa, aa, fb, ab = TWO_TONES
    expected = (fa * aa**2 + fb * ab**2) / (aa**2 + ab**2)
    assert _row(scene_a, t0 + 0.5)["excess_centroid_hz"] == pytest.approx(expected, abs=DF / 2)
    _, _, f0, f1 = DOWN_SWEEP
    assert _row(scene_a, 20.0)["excess_centroid_hz"] == pytest.approx((f0 + f1) / 2, abs=DF / 2)


def _hann_bins_within_10_db(offset_bins: float) -> int:
    """Bins of a tone ``offset_bins`` from a bin centre within 10 dB of the strongest.

    Transform of the Hann window, in bins ν from the tone: W(ν) ∝ sinc(ν) / (1 - ν²)
    (from memory; W(±1) = 1/2 of W(0), zeros at |ν| = 2, 3, ...).
    """
    nu = np.arange(-4, 5) - offset_bins
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(np.abs(np.abs(nu) - 1) < 1e-12, 0.5, np.sinc(nu) / (1 - nu**2))
    power = w**2
    return int(np.sum(power >= 0.1 * power.max()))


def test_peak_run_width_of_tones_and_of_band_noise(scene_a):
    # Width within 10 dB of the excess peak. Hann main lobe: a bin-centred tone lights its bin
    # and the two neighbours (-6.0 dB), the next are nulls: 3 bins; a tone half-way between
    # bins lights two bins at -1.4 dB, the next at -15.4 dB: 2 bins. (Measured continuously,
    # the -10 dB width of the Hann lobe is 2.57 bins.) Band noise of flat PSD over B Hz is
    # flat within a few tenths of a dB over B and reaches at most one bin further each side
    # (the Hann lobe one bin off is -6 dB): between B and B + 2 bins.
    assert _hann_bins_within_10_db(0.0) == 3 and _hann_bins_within_10_db(0.5) == 2
    centred = _row(scene_a, EXCESS_TONES[1][0] + 0.5)["peak_run_width_hz"]
    half_bin = _row(scene_a, HALF_BIN_TONE[0] + 0.5)["peak_run_width_hz"]
    assert 2.5 * DF <= centred <= 3 * DF
    assert 2 * DF <= half_bin <= 2.6 * DF
    t0, lo, hi, _ = BAND_NOISE
    band = _row(scene_a, t0 + 0.5)["peak_run_width_hz"]
    width = hi - lo  # 110 Hz: bins 250 .. 350, each DF wide
    assert width <= band <= width + 2 * DF


def test_psd_evenness_of_noise_and_of_a_tone(scene_a):
    # Shannon entropy of the mean PSD over its maximum ln(n_bins) (definition). White noise:
    # a flat PSD, evenness 1; averaged over 39 half-overlapping frames it falls short by
    # about var/(2 ln n) ~ 0.006 (second-order expansion of the entropy; common practice).
    for ws in np.arange(*QUIET, 0.5):
        assert 0.98 <= _row(scene_a, ws)["psd_evenness"] <= 1.0
    # A bin-centred tone 30 dB over N0 at its bin: the expected mean PSD is N0 in every bin
    # plus S, S/4, S/4 on the tone's bin and its neighbours (Hann, as above); its entropy is
    # computed here from those values: 0.279. Within 0.02.
    t0, f, snr = EXCESS_TONES[3]
    freqs = SETTINGS.grid.frequency_hz
    psd = np.full(freqs.size, N0)
    s = N0 * 10.0 ** (snr / 10.0)
    psd[np.isclose(freqs, f)] += s
    psd[np.isclose(np.abs(freqs - f), DF)] += s / 4
    prob = psd / psd.sum()
    expected = float(-(prob * np.log(prob)).sum() / np.log(freqs.size))
    assert expected == pytest.approx(0.279, abs=0.005)
    assert _row(scene_a, t0 + 0.5)["psd_evenness"] == pytest.approx(expected, abs=0.02)


# --- peak excess per sub-band and the coarse spectrogram patch ----------------------------


def test_subband_peak_excess_of_a_burst_and_of_a_steady_tone(scene_a):
    # A burst of T s at 300 Hz (sub-band 3, 160-320 Hz, 160 Hz wide) in a 2-s window: in
    # its frames the sub-band holds P_t = A²/2 over the noise N0·160 (REFERENCES §3, §5),
    # so the strongest frame's excess is 10 log10(1 + P_t/(N0·160)) whatever T (within
    # 0.7 dB as the mean excess above); the window mean holds the burst for about T/2 of
    # the window: 10 log10(1 + (T/2) P_t/(N0·160)) (± a frame at each end). A steady tone
    # filling the window has peak and mean excess within the frames' scatter (1.5 dB).
    edges = np.geomspace(SETTINGS.low_hz, SETTINGS.high_hz, SETTINGS.n_subbands + 1)
    width = edges[3] - edges[2]
    snr_lin = (1e5**2 / 2) / (N0 * width)
    for t0, dur in BURSTS[:1] + BURSTS[2:]:  # 1.0 s and 0.8 s: wholly inside one window
        row = _row(scene_a, np.floor(t0 / 0.5) * 0.5)
        assert row["subband3_peak_excess_db"] == pytest.approx(10 * np.log10(1 + snr_lin), abs=0.7), dur
        mean_lo = 10 * np.log10(1 + (dur - FRAME_S) / SETTINGS.window_s * snr_lin)
        mean_hi = 10 * np.log10(1 + (dur + FRAME_S) / SETTINGS.window_s * snr_lin)
        assert mean_lo - 0.3 <= row["subband3_excess_db"] <= mean_hi + 0.3, dur
        assert row["subband3_peak_excess_db"] > row["subband3_excess_db"] + 2.0
    t0, _, _ = EXCESS_TONES[3]
    row = _row(scene_a, t0 + 0.5)  # 430 Hz: sub-band 4
    assert 0.0 <= row["subband4_peak_excess_db"] - row["subband4_excess_db"] <= 1.5


def test_patch_cells_of_a_steady_tone_equal_its_window_mean(scene_a):
    # The patch cell (time slice q, sub-band k) is power over noise power in that slice:
    # for a tone that fills the window every slice holds the same power, so each cell of
    # its sub-band equals the window's mean excess (within the frames' scatter, 1 dB), and
    # the sub-bands without it stay near 0 dB (1.5 dB as for the sub-band excesses).
    t0, _, _ = EXCESS_TONES[1]  # 230 Hz: sub-band 3
    row = _row(scene_a, t0 + 0.5)
    for q in range(1, SETTINGS.n_time_slices + 1):
        assert row[f"patch_t{q}_b3_excess_db"] == pytest.approx(row["subband3_excess_db"], abs=1.0), q
        for k in (1, 2, 4):
            assert abs(row[f"patch_t{q}_b{k}_excess_db"]) <= 1.5, (q, k)


def test_patch_cells_follow_a_down_sweep(scene_a):
    # The down-sweep 250 -> 100 Hz over 20.5-21.5 s, in the window at 20.0 s cut in four
    # 0.5-s slices: it crosses 160 Hz at 0.6 of its second (250 - 150·0.6 = 160), so slice 2
    # (0.5-1.0 s) holds it in sub-band 3 (160-320 Hz) and slice 3 (1.0-1.5 s) in sub-band 2
    # (80-160 Hz): the diagonal of a down-sweep, high-early and low-late (worked by hand).
    # Sub-band 4 never holds it (within 1.5 dB of 0), nor sub-band 1 before the sweep's
    # abrupt end, whose splatter reaches the 4 bins of 40-80 Hz in slice 4.
    row = _row(scene_a, 20.0)
    cell = {(q, k): row[f"patch_t{q}_b{k}_excess_db"] for q in range(1, 5) for k in range(1, 5)}
    assert cell[2, 3] > cell[2, 2] + 10.0
    assert cell[3, 2] > cell[3, 3] + 3.0
    assert cell[2, 3] > cell[4, 3] + 10.0 and cell[3, 2] > cell[1, 2] + 10.0
    for q in range(1, 5):
        assert abs(cell[q, 4]) <= 1.5, q
    assert abs(cell[1, 1]) <= 1.5 and abs(cell[2, 1]) <= 1.5
