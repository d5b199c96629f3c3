"""An invented monitoring scenario with known truth: two recorders, calls, noise, ships.

Everything here is made up. An invented survey watches one invented call type, the
``tarsel-upsweep``, at two invented sites with two different recorders:

- ``north-shelf``: the training site. Continuous 30-minute FLAC files, 4 kHz, 24-bit,
  hydrophone and preamplifier responses from CSV tables. Every call is labelled.
- ``south-slope``: the survey site. Duty-cycled 10-minute WAV files every 30 minutes,
  2 kHz, 16-bit, flat response, an electronic tone from the recorder itself. Its truth
  sits in a separate file, for evaluation only.

Pressure is generated in µPa and passed through each recorder's own chain. Calls are
emitted at a source level, propagated with the project's spreading and absorption
functions from a random range, with a surface-reflected copy, and come in bouts.

``write_scenario(..., preset="hard")`` writes another invented scenario instead, a
benchmark of generalisation (``write_hard_scenario``; ``benchmarks/generalisation.py``):
in-band transients, an ambient level that swings 10 dB within an hour, an in-band
sweeping animal four times as common at the test site, target calls with harmonics,
fades and jitter, incomplete and jittered labels on a small training set, and a test
site with other noise and another recorder.
"""

from __future__ import annotations

import csv
import json
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import soundfile as sf
from callsieve.features.calibration import RecordingChain, ResponseCurve, samples_from_pressure
from callsieve.features.levels import band_spl_db
from callsieve.features.propagation import Seawater, transmission_loss_db
from callsieve.features.synthesis import (
    CallShape,
    call_frequency_hz,
    call_waveform,
    coloured_noise,
    flow_surge,
    harmonic_call_waveform,
    level_track_db,
    shipping_psd_db,
    snap_waveform,
    strum_waveform,
    surface_reflection,
    tonal_burst,
    wind_psd_db,
)

__all__ = [
    "CallType",
    "RecorderSite",
    "CALL_TYPES",
    "TARGET_LABEL",
    "demo_sites",
    "write_scenario",
    "PRESETS",
    "HardCallType",
    "HardSite",
    "HARD_CALL_TYPES",
    "hard_sites",
    "write_hard_scenario",
]

TARGET_LABEL = "tarsel-upsweep"
SIMULATED_NOTE = "invented scenario: synthetic audio, invented sites, animals and recorders"


@dataclass(frozen=True)
class CallType:
    """How one invented call type sounds and how often it is heard.

    Frequencies in Hz, durations in s, source level in dB re 1 µPa·m (rms of the
    untapered fundamental), rates per hour.
    """

    label: str
    kind: str
    f0_hz: tuple[float, float]
    f1_hz: tuple[float, float]
    duration_s: tuple[float, float]
    curvature: tuple[float, float] = (1.0, 1.0)
    wobble_hz: tuple[float, float] = (0.0, 0.0)
    harmonic_db: float = -100.0
    source_level_db: float = 178.0
    source_level_sd_db: float = 3.0
    bouts_per_hour: float = 0.4
    bout_minutes: tuple[float, float] = (8.0, 25.0)
    call_interval_s: float = 40.0


CALL_TYPES = (
    # The target: an upsweep with a faint harmonic.
    CallType(
        TARGET_LABEL,
        "sweep",
        (70.0, 90.0),
        (150.0, 175.0),
        (0.9, 1.5),
        (0.8, 1.6),
        harmonic_db=-14.0,
        bouts_per_hour=1.2,
        call_interval_s=25.0,
    ),
    # Confusers in the same band: the opposite sweep, and a near-flat drone.
    CallType(
        "tarsel-downsweep",
        "sweep",
        (150.0, 175.0),
        (70.0, 90.0),
        (0.9, 1.5),
        (0.8, 1.6),
        harmonic_db=-14.0,
        bouts_per_hour=0.6,
        call_interval_s=45.0,
    ),
    CallType(
        "tarsel-drone",
        "drone",
        (100.0, 110.0),
        (115.0, 130.0),
        (1.2, 2.2),
        wobble_hz=(1.0, 4.0),
        source_level_db=174.0,
        bouts_per_hour=0.5,
        call_interval_s=50.0,
    ),
    # A similar upsweep of another animal in the neighbouring band.
    CallType(
        "pelk-chirp",
        "sweep",
        (300.0, 340.0),
        (430.0, 480.0),
        (0.6, 1.0),
        (0.9, 1.3),
        source_level_db=172.0,
        bouts_per_hour=0.5,
        call_interval_s=30.0,
    ),
)


@dataclass(frozen=True)
class RecorderSite:
    """One invented deployment: a recorder, its schedule, its site."""

    name: str
    role: str  # 'training' or 'survey'
    start_utc: datetime
    sample_rate_hz: int
    extension: str
    subtype: str
    full_scale_volts: float
    hydrophone: ResponseCurve
    preamp: ResponseCurve
    tables: bool  # write the responses as CSV tables (else flat values)
    file_s: float
    cycle_s: float
    span_fraction: float  # deployment span as a fraction of --hours
    depth_m: float
    temperature_c: float
    shipping: float  # distant shipping, 0..1 (REFERENCES §8 model)
    ships_per_hour: float
    transients_per_hour: float
    electronic_tone_hz: float = 0.0
    electronic_tone_dbfs: float = -120.0  # rms, dB re full scale
    max_range_m: float = 12000.0
    prefix: str = "rec"


def demo_sites() -> tuple[RecorderSite, RecorderSite]:
    """The two invented recorders of the demo scenario."""
    north = RecorderSite(
        name="north-shelf",
        role="training",
        start_utc=datetime(2031, 3, 2, 0, 0, 0, tzinfo=UTC),
        sample_rate_hz=4000,
        extension="flac",
        subtype="PCM_24",
        full_scale_volts=1.0,
        hydrophone=ResponseCurve(
            np.array([5.0, 20.0, 100.0, 500.0, 2000.0]),
            np.array([-182.0, -176.5, -173.0, -171.5, -172.0]),
        ),
        preamp=ResponseCurve(np.array([2.0, 10.0, 50.0, 1000.0]), np.array([6.0, 16.0, 20.0, 20.0])),
        tables=True,
        file_s=1800.0,
        cycle_s=1800.0,
        span_fraction=0.5,
        depth_m=120.0,
        temperature_c=9.0,
        shipping=0.45,
        ships_per_hour=0.15,
        transients_per_hour=20.0,
        prefix="NS",
    )
    south = RecorderSite(
        name="south-slope",
        role="survey",
        start_utc=datetime(2031, 4, 11, 0, 0, 0, tzinfo=UTC),
        sample_rate_hz=2000,
        extension="wav",
        subtype="PCM_16",
        full_scale_volts=2.5,
        hydrophone=ResponseCurve.flat(-170.0),
        preamp=ResponseCurve.flat(40.0),
        tables=False,
        file_s=600.0,
        cycle_s=1800.0,
        span_fraction=1.0,
        depth_m=300.0,
        temperature_c=6.0,
        shipping=0.55,
        ships_per_hour=0.2,
        transients_per_hour=30.0,
        electronic_tone_hz=137.5,
        electronic_tone_dbfs=-72.0,
        prefix="SS",
    )
    return north, south


@dataclass
class _Call:
    label: str
    time_s: float  # from the deployment's start
    shape: CallShape
    source_level_db: float
    range_m: float
    source_depth_m: float
    bout: int


@dataclass
class _Ship:
    closest_s: float
    tau_s: float
    boost_db: float
    blade_hz: float
    line_db: float


@dataclass
class SiteTruth:
    """What was written for one site (returned to the caller and the demo summary)."""

    site: RecorderSite
    manifest: Path
    calls: list[dict] = field(default_factory=list)
    files: list[dict] = field(default_factory=list)


def _uniform(rng: np.random.Generator, bounds: tuple[float, float]) -> float:
    return float(rng.uniform(bounds[0], bounds[1])) if bounds[1] > bounds[0] else float(bounds[0])


def _plan_calls(site: RecorderSite, span_s: float, rng: np.random.Generator) -> list[_Call]:
    calls: list[_Call] = []
    bout_id = 0
    for ctype in CALL_TYPES:
        n_bouts = rng.poisson(ctype.bouts_per_hour * span_s / 3600.0)
        for _ in range(n_bouts):
            bout_id += 1
            start = rng.uniform(0.0, span_s)
            length = 60.0 * _uniform(rng, ctype.bout_minutes)
            # Callers are uniform in area out to the maximum range.
            bout_range = site.max_range_m * np.sqrt(rng.uniform(0.003, 1.0))
            depth = rng.uniform(10.0, 40.0)
            t = start
            while t < min(start + length, span_s):
                f0, f1 = _uniform(rng, ctype.f0_hz), _uniform(rng, ctype.f1_hz)
                shape = CallShape(
                    ctype.kind,
                    f0,
                    f1,
                    _uniform(rng, ctype.duration_s),
                    curvature=_uniform(rng, ctype.curvature),
                    wobble_hz=_uniform(rng, ctype.wobble_hz),
                    wobble_rate_hz=rng.uniform(0.5, 1.5),
                    harmonic_db=ctype.harmonic_db,
                )
                calls.append(
                    _Call(
                        ctype.label,
                        t,
                        shape,
                        float(rng.normal(ctype.source_level_db, ctype.source_level_sd_db)),
                        float(bout_range),
                        depth,
                        bout_id,
                    )
                )
                step = shape.duration_s + 2.0 + rng.exponential(ctype.call_interval_s)
                t += step
                # The caller swims (about 1.5 m/s, in no fixed direction) between calls.
                bout_range = max(200.0, bout_range + rng.normal(0.0, 1.5 * step))
    calls.sort(key=lambda c: c.time_s)
    return calls


def _plan_ships(site: RecorderSite, span_s: float, rng: np.random.Generator) -> list[_Ship]:
    n = rng.poisson(site.ships_per_hour * span_s / 3600.0)
    return [
        _Ship(
            float(rng.uniform(-1800.0, span_s + 1800.0)),
            float(rng.uniform(480.0, 1200.0)),
            float(rng.uniform(8.0, 20.0)),
            float(rng.uniform(5.0, 12.0)),
            float(rng.uniform(105.0, 120.0)),
        )
        for _ in range(n)
    ]


def _wind_track(span_s: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Wind speed (m/s) every 30 minutes: a slow random walk of the weather."""
    knots = np.arange(0.0, span_s + 3600.0, 1800.0)
    walk = np.cumsum(rng.normal(0.0, 0.25, knots.size)) + rng.uniform(1.4, 2.6)
    return knots, np.clip(walk, 1.1, 3.6) ** 2


def _band_of(shape: CallShape) -> tuple[float, float]:
    t = np.linspace(0.0, shape.duration_s, 64)
    f = call_frequency_hz(shape, t)
    return float(np.floor(f.min() * 0.9)), float(np.ceil(f.max() * 1.1))


def _call_pressure(call: _Call, t_rel: np.ndarray, site: RecorderSite, water: Seawater) -> np.ndarray:
    """Direct plus surface-reflected arrival of one call at the recorder, µPa."""
    r1, r2, delay = surface_reflection(call.range_m, call.source_depth_m, site.depth_m)
    mean_hz = float(np.mean(call_frequency_hz(call.shape, np.linspace(0, call.shape.duration_s, 16))))
    tl1 = float(transmission_loss_db(r1, mean_hz, water))
    tl2 = float(transmission_loss_db(r2, mean_hz, water))
    a1 = np.sqrt(2.0) * 10.0 ** ((call.source_level_db - tl1) / 20.0)
    # A rough sea surface reflects with slightly less than unit amplitude, sign inverted.
    a2 = -0.9 * np.sqrt(2.0) * 10.0 ** ((call.source_level_db - tl2) / 20.0)
    return call_waveform(call.shape, t_rel, a1) + call_waveform(call.shape, t_rel - delay, a2)


def _ambient_noise(
    site: RecorderSite,
    file_start_s: float,
    n: int,
    ships: list[_Ship],
    wind: tuple[np.ndarray, np.ndarray],
    rng: np.random.Generator,
) -> np.ndarray:
    """Distant shipping, wind that follows the weather, and passing ships, µPa.

    Stationary 60-s segments whose PSD is set at their centre time, overlapped by half
    with sine windows (sin² + cos² = 1 keeps the variance), so the spectrum drifts smoothly.
    """
    fs = site.sample_rate_hz
    seg = int(60 * fs)
    hop = seg // 2
    f = np.fft.rfftfreq(seg, 1.0 / fs)
    distant = 10.0 ** (shipping_psd_db(f, site.shipping) / 10.0)
    wind_unit = 10.0 ** (wind_psd_db(f, 1.0) / 10.0)
    passing = 10.0 ** (shipping_psd_db(f, 0.5) / 10.0)
    window = np.sin(np.pi * (np.arange(seg) + 0.5) / seg)
    out = np.zeros(n + 2 * seg)
    for i0 in range(-hop, n, hop):
        t_mid = file_start_s + (i0 + seg / 2) / fs
        w = float(np.interp(t_mid, wind[0], wind[1]))
        power = distant + wind_unit * 10.0 ** (0.75 * (np.sqrt(w) - 1.0))
        for ship in ships:
            g = 1.0 / (1.0 + ((t_mid - ship.closest_s) / ship.tau_s) ** 2)
            if g > 1e-3:
                power = power + g * 10.0 ** (ship.boost_db / 10.0) * passing
                # Blade-rate lines: the power of each line (µPa²) in its one bin.
                k = np.arange(2, 14)
                k = k[k * ship.blade_hz < min(0.45 * fs, 450.0)]
                bins = np.round(k * ship.blade_hz * seg / fs).astype(int)
                power[bins] += g * 10.0 ** ((ship.line_db - 1.2 * k) / 10.0) * seg / fs
        piece = coloured_noise(seg, fs, 10.0 * np.log10(power), rng) * window
        out[i0 + seg : i0 + 2 * seg] += piece
    return out[seg : seg + n]


def _file_pressure(
    site: RecorderSite,
    file_start_s: float,
    n: int,
    calls: list[_Call],
    ships: list[_Ship],
    wind: tuple[np.ndarray, np.ndarray],
    rng: np.random.Generator,
    water: Seawater,
) -> tuple[np.ndarray, list[tuple[_Call, np.ndarray, slice]], np.ndarray]:
    fs = site.sample_rate_hz
    noise = _ambient_noise(site, file_start_s, n, ships, wind, rng)
    # Impulsive transients: short decaying broadband knocks.
    for _ in range(rng.poisson(site.transients_per_hour * n / fs / 3600.0)):
        i0 = int(rng.integers(0, max(n - fs, 1)))
        tau = rng.uniform(0.003, 0.015)
        m = min(int(8 * tau * fs) + 1, n - i0)
        peak = 10.0 ** (rng.uniform(112.0, 140.0) / 20.0)
        noise[i0 : i0 + m] += peak * rng.standard_normal(m) * np.exp(-np.arange(m) / (tau * fs))
    placed = []
    total = noise.copy()
    for call in calls:
        rel0 = call.time_s - file_start_s
        i0 = max(int(np.floor((rel0 - 0.1) * fs)), 0)
        i1 = min(int(np.ceil((rel0 + call.shape.duration_s + 0.2) * fs)), n)
        seg = slice(i0, i1)
        p = _call_pressure(call, np.arange(i0, i1) / fs - rel0, site, water)
        total[seg] += p
        placed.append((call, p, seg))
    return total, placed, noise


def _chain(site: RecorderSite) -> RecordingChain:
    return RecordingChain(site.full_scale_volts, site.hydrophone, site.preamp)


def _write_manifest(site: RecorderSite, folder: Path) -> Path:
    if site.tables:
        for fname, col, curve in (
            ("hydrophone.csv", "sensitivity_db", site.hydrophone),
            ("preamp.csv", "gain_db", site.preamp),
        ):
            with open(folder / fname, "w", newline="") as fh:
                w = csv.writer(fh)
                w.writerow(["frequency_hz", col])
                w.writerows([[f"{f:g}", f"{v:g}"] for f, v in zip(curve.frequency_hz, curve.level_db, strict=True)])
        cal = 'preamp_gain_csv = "preamp.csv"\nhydrophone_sensitivity_csv = "hydrophone.csv"\n'
    else:
        cal = (
            f"preamp_gain_db = {site.preamp.level_db[0]:.1f}\n"
            f"hydrophone_sensitivity_db = {site.hydrophone.level_db[0]:.1f}\n"
        )
    schedule = (
        "continuous"
        if site.file_s >= site.cycle_s
        else f"{site.file_s / 60:g}-minute files every {site.cycle_s / 60:g} minutes"
    )
    text = f"""# {SIMULATED_NOTE}
# {site.role} site, {schedule}
[deployment]
name = "{site.name}"
audio_dir = "audio"
glob = "*.{site.extension}"
timestamp_format = "%Y%m%dT%H%M%SZ"
channel = 0

[site]
depth_m = {site.depth_m:.1f}
temperature_c = {site.temperature_c:.1f}
salinity_psu = 35.0
ph = 8.0

[calibration]
full_scale_volts = {site.full_scale_volts:g}
{cal}"""
    path = folder / "manifest.toml"
    path.write_text(text)
    return path


LABEL_COLUMNS = ["file", "start_s", "end_s", "label", "low_hz", "high_hz"]
CALL_COLUMNS = [
    "deployment",
    "file",
    "start_s",
    "end_s",
    "start_utc",
    "label",
    "low_hz",
    "high_hz",
    "source_level_db",
    "range_m",
    "source_depth_m",
    "received_level_db",
    "noise_level_db",
    "snr_db",
    "clipped",
    "bout",
]


def _write_site(site: RecorderSite, out: Path, hours: float, rng: np.random.Generator) -> SiteTruth:
    folder = out / site.name
    audio = folder / "audio"
    audio.mkdir(parents=True, exist_ok=True)
    span_s = hours * site.span_fraction * 3600.0
    water = Seawater(site.temperature_c, 35.0, 8.0, site.depth_m)
    calls = _plan_calls(site, span_s, rng)
    ships = _plan_ships(site, span_s, rng)
    wind = _wind_track(span_s, rng)
    chain = _chain(site)
    fs = site.sample_rate_hz
    truth = SiteTruth(site, _write_manifest(site, folder))
    full_scale = 1.0 - 2.0 ** -(15 if site.subtype == "PCM_16" else 23)
    tone_amp = np.sqrt(2.0) * 10.0 ** (site.electronic_tone_dbfs / 20.0)
    for file_start in np.arange(0.0, span_s, site.cycle_s):
        n = int(round(min(site.file_s, span_s - file_start) * fs))
        if n < fs * 10:
            break
        start_utc = site.start_utc + timedelta(seconds=float(file_start))
        name = f"{site.prefix}_{start_utc:%Y%m%dT%H%M%SZ}.{site.extension}"
        inside = [
            c
            for c in calls
            if c.time_s >= file_start + 0.5 and c.time_s + c.shape.duration_s + 0.5 <= file_start + n / fs
        ]
        pressure, placed, noise = _file_pressure(site, file_start, n, inside, ships, wind, rng, water)
        x = samples_from_pressure(pressure, fs, chain)
        if tone_amp > 0 and site.electronic_tone_hz > 0:
            # The recorder's own electronics: a tone added after the hydrophone.
            x += tone_amp * np.sin(2 * np.pi * site.electronic_tone_hz * (file_start + np.arange(n) / fs))
        clipped = np.abs(x) >= full_scale
        np.clip(x, -1.0, full_scale, out=x)
        sf.write(audio / name, x.astype(np.float32), fs, subtype=site.subtype)
        truth.files.append({"file": name, "start_utc": start_utc, "duration_s": n / fs})
        for call, p, seg in placed:
            truth.calls.append(_call_record(site.name, name, start_utc, file_start, call, p, seg, noise, clipped, fs))
    return truth


def _write_csv(path: Path, rows: list[dict], columns: list[str]) -> None:
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=columns, extrasaction="ignore")
        w.writeheader()
        w.writerows(rows)


def write_scenario(out_dir: str | Path, seed: int = 7, hours: float | None = None, preset: str = "demo") -> dict:
    """Write the invented scenario under ``out_dir``; return a summary.

    Parameters
    ----------
    out_dir : str or Path
    seed : int
        The same seed gives the same files, sample for sample.
    hours : float, h
        Span of the survey deployment; the training deployment spans half of it.
        Default 12 (``preset="hard"``: see :func:`write_hard_scenario`, default 5).
    preset : {'demo', 'hard'}
        'hard' writes the hard benchmark scenario instead (:func:`write_hard_scenario`).

    Returns
    -------
    dict
        ``training_manifest``, ``survey_manifest``, ``training_labels``, ``survey_truth``,
        ``calls_table`` (paths), ``calls`` (count per site and label), ``snr_db``
        (percentiles of the target's SNR at the survey site).
    """
    if preset not in PRESETS:
        raise ValueError(f"preset must be one of {', '.join(PRESETS)}, got {preset!r}")
    if preset == "hard":
        return write_hard_scenario(out_dir, seed, HARD_DEFAULT_HOURS if hours is None else hours)
    if hours is None:
        hours = 12.0
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    if hours <= 0:
        raise ValueError("hours must be > 0")
    root = np.random.default_rng(seed)
    site_rngs = root.spawn(2)
    truths = [_write_site(site, out, hours, r) for site, r in zip(demo_sites(), site_rngs, strict=True)]
    train, survey = truths
    train_labels = train.manifest.parent / "labels.csv"
    _write_csv(train_labels, train.calls, LABEL_COLUMNS)
    survey_truth = survey.manifest.parent / "truth.csv"
    _write_csv(survey_truth, survey.calls, LABEL_COLUMNS)
    calls_table = out / "calls.csv"
    _write_csv(calls_table, train.calls + survey.calls, CALL_COLUMNS)
    counts = {
        t.site.name: {c.label: sum(1 for r in t.calls if r["label"] == c.label) for c in CALL_TYPES} for t in truths
    }
    snr = np.array([r["snr_db"] for r in survey.calls if r["label"] == TARGET_LABEL])
    summary = {
        "note": SIMULATED_NOTE,
        "seed": seed,
        "hours": hours,
        "target_label": TARGET_LABEL,
        "training_manifest": str(train.manifest),
        "survey_manifest": str(survey.manifest),
        "training_labels": str(train_labels),
        "survey_truth": str(survey_truth),
        "calls_table": str(calls_table),
        "calls": counts,
        "files": {t.site.name: len(t.files) for t in truths},
        "survey_target_snr_db": {f"p{q}": round(float(np.percentile(snr, q)), 1) for q in (10, 25, 50, 75, 90)}
        if snr.size
        else {},
        "sites": [
            {
                k: (v.isoformat() if isinstance(v, datetime) else v)
                for k, v in asdict(t.site).items()
                if k not in ("hydrophone", "preamp")
            }
            for t in truths
        ],
    }
    (out / "scenario.json").write_text(json.dumps(summary, indent=2))
    return summary


# ---------------------------------------------------------------------------------------
# The hard preset: what real seafloor recordings have and the demo lacks.
#
# ``write_scenario(out, seed, preset="hard")`` writes a training site and a test site
# with transients in the band (grunts, strums, flow-noise surges, snaps), an ambient
# level that swings 10 dB from trough to peak within an hour, an animal that sweeps in
# the target's band four times as often at the test site, target calls with harmonics,
# fades and jitter, incomplete and time-jittered labels at the training site, a small
# training set, and a test site with other noise and another recorder. Everything is
# invented, as in the demo.
# ---------------------------------------------------------------------------------------

PRESETS = ("demo", "hard")
HARD_TRAINING_FRACTION = 0.3  # the training site spans this fraction of the test site's hours
HARD_DEFAULT_HOURS = 5.0


@dataclass(frozen=True)
class HardCallType:
    """A call type of the hard preset: a :class:`CallType` plus harmonics and fades.

    ``call``'s ranges are the per-call jitter (start and end frequency, duration); its
    ``harmonic_db`` is not used. ``harmonics_db`` gives, for harmonics 2, 3, ..., the
    range (dB re the fundamental) each call's level is drawn from; ``fade_db`` is the
    standard deviation (dB) of the four knots of each call's amplitude envelope, to which
    a random linear fade of up to ±1.5 ``fade_db`` from start to end is added.
    """

    call: CallType
    harmonics_db: tuple[tuple[float, float], ...] = ()
    fade_db: float = 0.0

    @property
    def label(self) -> str:
        return self.call.label


HARD_CALL_TYPES = (
    # The target, a baleen-whale-like upsweep: 60 -> 200 Hz in 1.3 s, start and end
    # frequency ±10 %, duration ±20 %, a second and a third harmonic, fading.
    HardCallType(
        CallType(
            TARGET_LABEL,
            "sweep",
            (54.0, 66.0),
            (180.0, 220.0),
            (1.04, 1.56),
            (0.7, 1.4),
            source_level_db=189.0,
            source_level_sd_db=5.0,
            bouts_per_hour=2.0,
            bout_minutes=(4.0, 12.0),
            call_interval_s=30.0,
        ),
        harmonics_db=((-12.0, -6.0), (-20.0, -12.0)),
        fade_db=4.0,
    ),
    # Another animal sweeping in the target's band: a slow long upsweep and a short one.
    HardCallType(
        CallType(
            "vesk-rise",
            "sweep",
            (63.0, 77.0),
            (126.0, 154.0),
            (2.0, 3.0),
            (0.9, 1.1),
            source_level_db=182.0,
            bouts_per_hour=0.6,
            bout_minutes=(3.0, 8.0),
            call_interval_s=30.0,
        ),
        harmonics_db=((-16.0, -10.0),),
        fade_db=2.0,
    ),
    HardCallType(
        CallType(
            "vesk-yip",
            "sweep",
            (85.0, 105.0),
            (150.0, 190.0),
            (0.32, 0.48),
            (0.8, 1.2),
            source_level_db=180.0,
            bouts_per_hour=0.6,
            bout_minutes=(3.0, 8.0),
            call_interval_s=30.0,
        ),
        fade_db=2.0,
    ),
    # The demo's other call types, unchanged but for a little fading.
    *(HardCallType(c, ((c.harmonic_db, c.harmonic_db),) if c.harmonic_db > -60 else (), 2.0) for c in CALL_TYPES[1:]),
)

CONFUSER_LABELS = ("vesk-rise", "vesk-yip")


@dataclass(frozen=True)
class HardSite:
    """One site of the hard preset: a recorder and what its recordings hold besides calls.

    Levels in dB re 1 µPa (rms unless stated), rates per hour, times in s.

    ``level_swing_db`` is the peak-to-trough swing of a sinusoid of the ambient level
    with period ``level_period_s`` (random phase), to which a random walk of standard
    deviation ``level_walk_db`` per 30 minutes is added. ``rate_factors`` multiply the
    bout rates of the call types they name. ``target_calls`` (training) fixes the number
    of target calls written to a random count in that range. At the training site,
    ``faint_missed`` of the calls below ``faint_snr_db`` SNR (of each label) go
    unlabelled, and every label's start and end move by up to ±``label_jitter_s``.
    ``min_bouts`` gives call types at least that many bouts, where the Poisson draw of
    their bout count falls short: at the training site the other animal is rarer than at
    the test site, not absent (with 0.9 bouts expected, a draw of none, which happened in
    every seed of the first benchmark, turned it into another question: can a model tell
    apart calls it was never shown?).
    """

    recorder: RecorderSite
    wind_mps: tuple[float, float]
    level_swing_db: float = 10.0
    level_period_s: float = 7200.0
    level_walk_db: float = 1.0
    grunt_trains_per_hour: float = 0.0
    strums_per_hour: float = 0.0
    surges_per_hour: float = 0.0
    snaps_per_hour: float = 0.0
    rate_factors: tuple[tuple[str, float], ...] = ()
    target_calls: tuple[int, int] | None = None
    faint_snr_db: float = 0.0
    faint_missed: float = 0.0
    label_jitter_s: float = 0.0
    min_bouts: tuple[tuple[str, int], ...] = ()

    def rate_factor(self, label: str) -> float:
        return dict(self.rate_factors).get(label, 1.0)


def hard_sites() -> tuple[HardSite, HardSite]:
    """The two invented sites of the hard preset: training, then test."""
    reed = RecorderSite(
        name="reed-bank",
        role="training",
        start_utc=datetime(2032, 5, 6, 5, 15, 0, tzinfo=UTC),  # 1.5 h: two clock hours of 45 min
        sample_rate_hz=2000,
        extension="wav",
        subtype="PCM_16",
        full_scale_volts=2.5,
        hydrophone=ResponseCurve.flat(-170.0),
        preamp=ResponseCurve.flat(40.0),
        tables=False,
        file_s=1800.0,
        cycle_s=1800.0,
        span_fraction=HARD_TRAINING_FRACTION,
        depth_m=80.0,
        temperature_c=10.0,
        shipping=0.35,
        ships_per_hour=0.0,  # away from the lanes: distant shipping only
        transients_per_hour=20.0,
        electronic_tone_hz=50.0,
        electronic_tone_dbfs=-70.0,
        max_range_m=20000.0,
        prefix="RB",
    )
    ash = RecorderSite(
        name="ash-trench",
        role="survey",
        start_utc=datetime(2032, 6, 20, 21, 0, 0, tzinfo=UTC),
        sample_rate_hz=3000,
        extension="flac",
        subtype="PCM_24",
        full_scale_volts=1.0,
        hydrophone=ResponseCurve(
            np.array([5.0, 50.0, 500.0, 1500.0]),
            np.array([-168.0, -166.5, -165.5, -166.0]),
        ),
        # A preamplifier whose gain climbs 20 dB from 10 to 100 Hz and rolls off near Nyquist.
        preamp=ResponseCurve(
            np.array([2.0, 10.0, 30.0, 100.0, 300.0, 1000.0, 1500.0]),
            np.array([2.0, 6.0, 17.0, 26.0, 27.0, 26.0, 22.0]),
        ),
        tables=True,
        file_s=1800.0,
        cycle_s=1800.0,
        span_fraction=1.0,
        depth_m=250.0,
        temperature_c=5.0,
        shipping=0.75,
        ships_per_hour=0.2,
        transients_per_hour=40.0,
        electronic_tone_hz=118.75,
        electronic_tone_dbfs=-62.0,
        max_range_m=15000.0,
        prefix="AT",
    )
    training = HardSite(
        reed,
        wind_mps=(6.0, 12.0),
        grunt_trains_per_hour=15.0,
        strums_per_hour=10.0,
        surges_per_hour=6.0,
        snaps_per_hour=600.0,
        target_calls=(30, 50),
        faint_snr_db=0.0,
        faint_missed=0.3,
        label_jitter_s=0.2,
        min_bouts=tuple((label, 1) for label in CONFUSER_LABELS),
    )
    test = HardSite(
        ash,
        wind_mps=(2.0, 6.0),
        grunt_trains_per_hour=40.0,
        strums_per_hour=25.0,
        surges_per_hour=15.0,
        snaps_per_hour=1800.0,
        rate_factors=tuple((label, 4.0) for label in CONFUSER_LABELS),
    )
    return training, test


@dataclass
class _HardCall(_Call):
    harmonics_db: tuple[float, ...]
    envelope_db: tuple[float, ...]


def _fits_in_a_file(site: RecorderSite, span_s: float, time_s: float, duration_s: float) -> bool:
    """Whether a call lies inside one file with 0.5 s to spare (as the demo writes calls)."""
    k = np.floor(time_s / site.cycle_s)
    file_start = k * site.cycle_s
    file_end = min(file_start + site.file_s, span_s)
    if file_end - file_start < 10.0:  # too short a file to be written
        return False
    return bool(time_s >= file_start + 0.5 and time_s + duration_s + 0.5 <= file_end)


def _plan_hard_bout(
    htype: HardCallType, site: RecorderSite, span_s: float, bout_id: int, rng: np.random.Generator
) -> list[_HardCall]:
    ctype = htype.call
    start = rng.uniform(0.0, span_s)
    length = 60.0 * _uniform(rng, ctype.bout_minutes)
    bout_range = site.max_range_m * np.sqrt(rng.uniform(0.003, 1.0))
    depth = rng.uniform(10.0, 40.0)
    calls = []
    t = start
    while t < min(start + length, span_s):
        shape = CallShape(
            ctype.kind,
            _uniform(rng, ctype.f0_hz),
            _uniform(rng, ctype.f1_hz),
            _uniform(rng, ctype.duration_s),
            curvature=_uniform(rng, ctype.curvature),
            wobble_hz=_uniform(rng, ctype.wobble_hz),
            wobble_rate_hz=rng.uniform(0.5, 1.5),
        )
        harmonics = tuple(round(_uniform(rng, b), 2) for b in htype.harmonics_db)
        knots = rng.normal(0.0, htype.fade_db, 4) + np.linspace(0.0, 1.0, 4) * rng.uniform(-1.5, 1.5) * htype.fade_db
        envelope = tuple(np.round(knots - knots.mean(), 2).tolist()) if htype.fade_db > 0 else ()
        calls.append(
            _HardCall(
                ctype.label,
                t,
                shape,
                float(rng.normal(ctype.source_level_db, ctype.source_level_sd_db)),
                float(bout_range),
                depth,
                bout_id,
                harmonics,
                envelope,
            )
        )
        step = shape.duration_s + 2.0 + rng.exponential(ctype.call_interval_s)
        t += step
        bout_range = max(200.0, bout_range + rng.normal(0.0, 1.5 * step))
    return [c for c in calls if _fits_in_a_file(site, span_s, c.time_s, c.shape.duration_s)]


def _plan_hard_calls(hsite: HardSite, span_s: float, rng: np.random.Generator) -> list[_HardCall]:
    """Calls of every hard call type at one site, in bouts, each inside one file.

    Where ``hsite.target_calls`` is set, target bouts are drawn until a count drawn from
    that range is reached, and the last bout is cut there.
    """
    site = hsite.recorder
    calls: list[_HardCall] = []
    bout_id = 0
    for htype in HARD_CALL_TYPES:
        if htype.label == TARGET_LABEL and hsite.target_calls is not None:
            want = int(rng.integers(hsite.target_calls[0], hsite.target_calls[1] + 1))
            planned: list[_HardCall] = []
            for _ in range(1000):
                if len(planned) >= want:
                    break
                bout_id += 1
                planned += _plan_hard_bout(htype, site, span_s, bout_id, rng)
            calls += planned[:want]
            continue
        rate = htype.call.bouts_per_hour * hsite.rate_factor(htype.label)
        at_least = dict(hsite.min_bouts).get(htype.label, 0)
        for _ in range(max(int(rng.poisson(rate * span_s / 3600.0)), at_least)):
            bout_id += 1
            calls += _plan_hard_bout(htype, site, span_s, bout_id, rng)
    calls.sort(key=lambda c: c.time_s)
    return calls


def _hard_level_track(hsite: HardSite, span_s: float, rng: np.random.Generator):
    """The ambient level's offset (dB) as a function of time from the deployment's start."""
    knots = np.arange(0.0, span_s + 3600.0, 1800.0)
    walk = np.concatenate([[0.0], np.cumsum(rng.normal(0.0, hsite.level_walk_db, knots.size - 1))])
    phase = float(rng.uniform(0.0, 2 * np.pi))

    def track(t_s: np.ndarray) -> np.ndarray:
        return level_track_db(t_s, hsite.level_swing_db, hsite.level_period_s, phase, knots, walk)

    return track


def _hard_wind_track(hsite: HardSite, span_s: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Wind speed (m/s) every 30 minutes within the site's range: a slow walk of the weather."""
    lo, hi = np.sqrt(hsite.wind_mps[0]), np.sqrt(hsite.wind_mps[1])
    knots = np.arange(0.0, span_s + 3600.0, 1800.0)
    walk = np.cumsum(rng.normal(0.0, 0.2, knots.size)) + rng.uniform(lo, hi)
    return knots, np.clip(walk, lo, hi) ** 2


def _hard_transients(hsite: HardSite, n: int, rng: np.random.Generator) -> np.ndarray:
    """Knocks, snaps, grunt trains, strums and flow-noise surges over one file, µPa."""
    site = hsite.recorder
    fs = site.sample_rate_hz
    hours = n / fs / 3600.0
    out = np.zeros(n)

    def add(i0: int, piece: np.ndarray) -> None:
        m = min(piece.size, n - i0)
        if m > 0:
            out[i0 : i0 + m] += piece[:m]

    # Knocks (as in the demo) and snaps: short broadband clicks, peak levels.
    for _ in range(rng.poisson(site.transients_per_hour * hours)):
        tau = rng.uniform(0.003, 0.015)
        m = int(8 * tau * fs) + 1
        peak = 10.0 ** (rng.uniform(112.0, 136.0) / 20.0)
        add(int(rng.integers(0, n)), peak * rng.standard_normal(m) * np.exp(-np.arange(m) / (tau * fs)))
    for _ in range(rng.poisson(hsite.snaps_per_hour * hours)):
        peak = 10.0 ** (rng.uniform(110.0, 134.0) / 20.0)
        ring = rng.uniform(150.0, 0.4 * fs)
        add(int(rng.integers(0, n)), snap_waveform(fs, peak, ring, rng.uniform(2e-4, 1.5e-3), rng))
    # Grunts: trains of 1-6 short low tonal bursts.
    for _ in range(rng.poisson(hsite.grunt_trains_per_hour * hours)):
        i = int(rng.integers(0, n))
        for _ in range(int(rng.integers(1, 7))):
            d = rng.uniform(0.1, 0.3)
            f0 = rng.uniform(60.0, 160.0)
            amp = np.sqrt(2.0) * 10.0 ** (rng.uniform(100.0, 125.0) / 20.0)
            t = np.arange(int(d * fs) + 1) / fs
            add(i, tonal_burst(t, f0, f0 * rng.uniform(0.8, 1.05), d, amp, harmonic_db=-10.0))
            i += int((d + rng.uniform(0.25, 0.8)) * fs)
    # Strums: a few harmonics buzzing for about half a second.
    for _ in range(rng.poisson(hsite.strums_per_hour * hours)):
        d = rng.uniform(0.4, 0.7)
        t = np.arange(int(d * fs) + 1) / fs
        amp = np.sqrt(2.0) * 10.0 ** (rng.uniform(100.0, 122.0) / 20.0)
        wave = strum_waveform(t, rng.uniform(35.0, 75.0), d, amp, int(rng.integers(3, 6)), rng.uniform(8.0, 25.0))
        add(int(rng.integers(0, n)), wave)
    # Flow noise: low-frequency broadband surges of 2-20 s.
    for _ in range(rng.poisson(hsite.surges_per_hour * hours)):
        m = int(rng.uniform(2.0, 20.0) * fs)
        add(int(rng.integers(0, n)), flow_surge(m, fs, rng.uniform(105.0, 130.0), rng.uniform(10.0, 40.0), rng))
    return out


def _hard_call_pressure(call: _HardCall, t_rel: np.ndarray, site: RecorderSite, water: Seawater) -> np.ndarray:
    """Direct plus surface-reflected arrival of one call with its harmonics and fades, µPa."""
    r1, r2, delay = surface_reflection(call.range_m, call.source_depth_m, site.depth_m)
    mean_hz = float(np.mean(call_frequency_hz(call.shape, np.linspace(0, call.shape.duration_s, 16))))
    tl1 = float(transmission_loss_db(r1, mean_hz, water))
    tl2 = float(transmission_loss_db(r2, mean_hz, water))
    a1 = np.sqrt(2.0) * 10.0 ** ((call.source_level_db - tl1) / 20.0)
    a2 = -0.9 * np.sqrt(2.0) * 10.0 ** ((call.source_level_db - tl2) / 20.0)
    h, e = call.harmonics_db, call.envelope_db
    return harmonic_call_waveform(call.shape, t_rel, a1, h, e) + harmonic_call_waveform(
        call.shape, t_rel - delay, a2, h, e
    )


def _write_hard_site(hsite: HardSite, out: Path, hours: float, rng: np.random.Generator) -> SiteTruth:
    site = hsite.recorder
    folder = out / site.name
    audio = folder / "audio"
    audio.mkdir(parents=True, exist_ok=True)
    span_s = hours * site.span_fraction * 3600.0
    water = Seawater(site.temperature_c, 35.0, 8.0, site.depth_m)
    calls = _plan_hard_calls(hsite, span_s, rng)
    ships = _plan_ships(site, span_s, rng)
    wind = _hard_wind_track(hsite, span_s, rng)
    level = _hard_level_track(hsite, span_s, rng)
    chain = _chain(site)
    fs = site.sample_rate_hz
    truth = SiteTruth(site, _write_manifest(site, folder))
    full_scale = 1.0 - 2.0 ** -(15 if site.subtype == "PCM_16" else 23)
    tone_amp = np.sqrt(2.0) * 10.0 ** (site.electronic_tone_dbfs / 20.0)
    for file_start in np.arange(0.0, span_s, site.cycle_s):
        n = int(round(min(site.file_s, span_s - file_start) * fs))
        if n < fs * 10:
            break
        start_utc = site.start_utc + timedelta(seconds=float(file_start))
        name = f"{site.prefix}_{start_utc:%Y%m%dT%H%M%SZ}.{site.extension}"
        inside = [c for c in calls if file_start <= c.time_s < file_start + n / fs]
        t_abs = file_start + np.arange(n) / fs
        noise = _ambient_noise(site, file_start, n, ships, wind, rng) * 10.0 ** (level(t_abs) / 20.0)
        noise += _hard_transients(hsite, n, rng)
        pressure = noise.copy()
        placed = []
        for call in inside:
            rel0 = call.time_s - file_start
            i0 = max(int(np.floor((rel0 - 0.1) * fs)), 0)
            i1 = min(int(np.ceil((rel0 + call.shape.duration_s + 0.2) * fs)), n)
            p = _hard_call_pressure(call, np.arange(i0, i1) / fs - rel0, site, water)
            pressure[i0:i1] += p
            placed.append((call, p, slice(i0, i1)))
        x = samples_from_pressure(pressure, fs, chain)
        x += tone_amp * np.sin(2 * np.pi * site.electronic_tone_hz * t_abs)
        clipped = np.abs(x) >= full_scale
        np.clip(x, -1.0, full_scale, out=x)
        sf.write(audio / name, x.astype(np.float32), fs, subtype=site.subtype)
        truth.files.append({"file": name, "start_utc": start_utc, "duration_s": n / fs})
        for call, p, seg in placed:
            record = _call_record(site.name, name, start_utc, file_start, call, p, seg, noise, clipped, fs)
            truth.calls.append(
                record
                | {
                    "harmonics_db": " ".join(f"{h:g}" for h in call.harmonics_db),
                    "envelope_db": " ".join(f"{e:g}" for e in call.envelope_db),
                    "labelled": 1,
                }
            )
    return truth


def _analyst_labels(hsite: HardSite, truth: SiteTruth, rng: np.random.Generator) -> list[dict]:
    """The analysts' label table of a site: faint calls partly missed, boxes jittered in time.

    Marks each row of ``truth.calls`` with ``labelled`` 0 or 1 and returns the label rows.
    """
    rows = truth.calls
    missed: set[int] = set()
    for label in sorted({r["label"] for r in rows}):
        faint = [i for i, r in enumerate(rows) if r["label"] == label and r["snr_db"] < hsite.faint_snr_db]
        k = int(round(hsite.faint_missed * len(faint)))
        if k:
            missed |= {faint[int(i)] for i in rng.choice(len(faint), size=k, replace=False)}
    durations = {f["file"]: f["duration_s"] for f in truth.files}
    labels = []
    for i, r in enumerate(rows):
        r["labelled"] = int(i not in missed)
        if i in missed:
            continue
        j = hsite.label_jitter_s
        start = max(0.0, r["start_s"] + rng.uniform(-j, j)) if j > 0 else r["start_s"]
        end = min(durations[r["file"]], r["end_s"] + rng.uniform(-j, j)) if j > 0 else r["end_s"]
        end = max(end, start + 0.1)
        labels.append(r | {"start_s": round(start, 4), "end_s": round(end, 4)})
    return labels


HARD_CALL_COLUMNS = [*CALL_COLUMNS, "harmonics_db", "envelope_db", "labelled"]


def write_hard_scenario(out_dir: str | Path, seed: int = 7, hours: float = HARD_DEFAULT_HOURS) -> dict:
    """Write the hard preset under ``out_dir``; return a summary (the demo's keys and more).

    Parameters
    ----------
    out_dir : str or Path
    seed : int
        The same seed gives the same files, sample for sample.
    hours : float, h
        Span of the test site (``ash-trench``); the training site (``reed-bank``) spans
        ``HARD_TRAINING_FRACTION`` of it (1.5 h of 5 h by default).

    Returns
    -------
    dict
        As :func:`write_scenario`'s, plus ``preset``, ``training_truth`` (every call of
        the training site, exact), ``labels`` (faint calls and how many went unlabelled)
        and ``training_target_snr_db``. ``survey_*`` keys name the test site.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    if hours <= 0:
        raise ValueError("hours must be > 0")
    root = np.random.default_rng([seed, 1])  # not the demo's stream: another scenario
    site_rngs = root.spawn(3)
    sites = hard_sites()
    truths = [_write_hard_site(s, out, hours, r) for s, r in zip(sites, site_rngs[:2], strict=True)]
    train, test = truths
    labels = _analyst_labels(sites[0], train, site_rngs[2])
    train_labels = train.manifest.parent / "labels.csv"
    _write_csv(train_labels, labels, LABEL_COLUMNS)
    train_truth = train.manifest.parent / "truth.csv"
    _write_csv(train_truth, train.calls, LABEL_COLUMNS)
    test_truth = test.manifest.parent / "truth.csv"
    _write_csv(test_truth, test.calls, LABEL_COLUMNS)
    calls_table = out / "calls.csv"
    _write_csv(calls_table, train.calls + test.calls, HARD_CALL_COLUMNS)
    counts = {
        t.site.name: {h.label: sum(1 for r in t.calls if r["label"] == h.label) for h in HARD_CALL_TYPES}
        for t in truths
    }

    def snr_percentiles(rows: list[dict]) -> dict:
        snr = np.array([r["snr_db"] for r in rows if r["label"] == TARGET_LABEL])
        return {f"p{q}": round(float(np.percentile(snr, q)), 1) for q in (10, 25, 50, 75, 90)} if snr.size else {}

    faint = [r for r in train.calls if r["snr_db"] < sites[0].faint_snr_db]
    summary = {
        "note": SIMULATED_NOTE,
        "preset": "hard",
        "seed": seed,
        "hours": hours,
        "target_label": TARGET_LABEL,
        "training_manifest": str(train.manifest),
        "survey_manifest": str(test.manifest),
        "training_labels": str(train_labels),
        "training_truth": str(train_truth),
        "survey_truth": str(test_truth),
        "calls_table": str(calls_table),
        "calls": counts,
        "labelled": {h.label: sum(r["label"] == h.label for r in labels) for h in HARD_CALL_TYPES},
        "labels": {
            "faint_snr_db": sites[0].faint_snr_db,
            "faint_calls": len(faint),
            "faint_unlabelled": sum(1 for r in faint if not r["labelled"]),
            "label_jitter_s": sites[0].label_jitter_s,
        },
        "files": {t.site.name: len(t.files) for t in truths},
        "survey_target_snr_db": snr_percentiles(test.calls),
        "training_target_snr_db": snr_percentiles(train.calls),
        "sites": [
            {
                k: (v.isoformat() if isinstance(v, datetime) else v)
                for k, v in asdict(h.recorder).items()
                if k not in ("hydrophone", "preamp")
            }
            | {k: v for k, v in asdict(h).items() if k != "recorder"}
            for h in sites
        ],
    }
    (out / "scenario.json").write_text(json.dumps(summary, indent=2))
    return summary


def _call_record(site_name, name, start_utc, file_start, call, p, seg, noise, clipped, fs) -> dict:
    """One call's row of calls.csv: where it is, what it is, and its levels at the recorder.

    The received level is the band rms of the call's own pressure ``p`` (a segment
    starting at sample ``seg.start`` of the file), the noise level that of the noise alone
    over the same samples, both in the call's band, dB re 1 µPa.
    """
    rel0 = call.time_s - file_start
    lo_i, hi_i = int(round(rel0 * fs)), int(round((rel0 + call.shape.duration_s) * fs))
    low, high = _band_of(call.shape)
    rl = float(band_spl_db(p[lo_i - seg.start : hi_i - seg.start], fs, low, high))
    nl = float(band_spl_db(noise[lo_i:hi_i], fs, low, high))
    return {
        "deployment": site_name,
        "file": name,
        "start_s": round(rel0, 4),
        "end_s": round(rel0 + call.shape.duration_s, 4),
        "start_utc": (start_utc + timedelta(seconds=rel0)).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z",
        "label": call.label,
        "low_hz": low,
        "high_hz": high,
        "source_level_db": round(call.source_level_db, 2),
        "range_m": round(call.range_m, 1),
        "source_depth_m": round(call.source_depth_m, 1),
        "received_level_db": round(rl, 2),
        "noise_level_db": round(nl, 2),
        "snr_db": round(rl - nl, 2),
        "clipped": int(bool(clipped[lo_i:hi_i].any())),
        "bout": call.bout,
    }
