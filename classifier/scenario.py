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
    shipping_psd_db,
    surface_reflection,
    wind_psd_db,
)

__all__ = ["CallType", "RecorderSite", "CALL_TYPES", "TARGET_LABEL", "demo_sites", "write_scenario"]

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
            rel0 = call.time_s - file_start
            lo_i, hi_i = int(round(rel0 * fs)), int(round((rel0 + call.shape.duration_s) * fs))
            low, high = _band_of(call.shape)
            signal_part = p[lo_i - seg.start : hi_i - seg.start]
            rl = float(band_spl_db(signal_part, fs, low, high))
            nl = float(band_spl_db(noise[lo_i:hi_i], fs, low, high))
            truth.calls.append(
                {
                    "deployment": site.name,
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
            )
    return truth


def _write_csv(path: Path, rows: list[dict], columns: list[str]) -> None:
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=columns, extrasaction="ignore")
        w.writeheader()
        w.writerows(rows)


def write_scenario(out_dir: str | Path, seed: int = 7, hours: float = 12.0) -> dict:
    """Write the invented scenario under ``out_dir``; return a summary.

    Parameters
    ----------
    out_dir : str or Path
    seed : int
        The same seed gives the same files, sample for sample.
    hours : float, h
        Span of the survey deployment; the training deployment spans half of it.

    Returns
    -------
    dict
        ``training_manifest``, ``survey_manifest``, ``training_labels``, ``survey_truth``,
        ``calls_table`` (paths), ``calls`` (count per site and label), ``snr_db``
        (percentiles of the target's SNR at the survey site).
    """
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
