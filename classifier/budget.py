"""`callsieve budget`: what a source does to this recorder, range by range (the level chain).

Source level → transmission loss → received level → volts at the converter → sample value
and counts → headroom to clipping; the range inside which the source clips the recorder;
and whether the converter's quantisation or the sea sets the recording's noise floor.
The arithmetic is in ``features/propagation.py`` and ``features/calibration.py``.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

import numpy as np
from callsieve.features.propagation import (
    Seawater,
    absorption_db_per_km,
    received_level_db,
    sample_value,
    spreading_loss_db,
    transmission_loss_db,
    voltage_rms,
)

from .deployment import Deployment, load_deployment
from .errors import InputError

__all__ = [
    "level_chain",
    "clip_range_m",
    "quantisation_floor_db",
    "converter_bits",
    "budget_chain",
    "format_budget",
    "add_budget_verb",
]

# Ranges of the table, m: one to a hundred kilometres, three per decade.
DEFAULT_RANGES_M = (1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0, 200.0, 500.0, 1e3, 2e3, 5e3, 1e4, 2e4, 5e4, 1e5)
_BITS = {"PCM_S8": 8, "PCM_U8": 8, "PCM_16": 16, "PCM_24": 24, "PCM_32": 32}
CAUTION = (
    "Modelled propagation is a simplification: bathymetry, the sound-speed profile and the sediment are "
    "ignored. Where results feed mitigation or permit decisions, local regulations and qualified practice decide."
)


def converter_bits(subtype: str) -> int | None:
    """Bits of an integer PCM converter from libsndfile's subtype name; None for float files."""
    return _BITS.get(subtype.upper())


def level_chain(
    source_level_db: float,
    frequency_hz: float,
    range_m: np.ndarray,
    system_sensitivity_db: float,
    full_scale_volts: float,
    bits: int | None,
    water: Seawater,
    spreading: str = "spherical",
    transition_range_m: float | None = None,
    peak: bool = False,
) -> dict[str, np.ndarray]:
    """The level chain at each range.

    Parameters
    ----------
    source_level_db : float, dB re 1 µPa·m (rms, or zero-to-peak with ``peak``)
    frequency_hz : float, Hz, for absorption and the recorder's response
    range_m : array, m
    system_sensitivity_db : float, dB re 1 V/µPa, hydrophone plus gain at the frequency
    full_scale_volts : float, V, zero-to-peak volts of digital full scale
    bits : int or None, converter bits (None: a float file, no counts)
    water : Seawater
    spreading, transition_range_m : as :func:`transmission_loss_db`
    peak : bool, the source level is zero-to-peak (else rms; a sine's peak is 3.01 dB above)

    Returns
    -------
    dict of arrays: ``range_m``, ``spreading_db``, ``absorption_fg_db``, ``absorption_am_db``,
    ``tl_db`` (spreading + Francois–Garrison absorption), ``rl_db`` (dB re 1 µPa, same kind as
    the source level), ``volts`` (V, rms or 0-pk), ``sample_value`` (full scale 1.0), ``counts``
    (NaN for float files), ``headroom_db`` (clip level 0-pk minus the received peak level,
    a sine's crest factor assumed for an rms source; negative: clipped).
    """
    r = np.asarray(range_m, dtype=float)
    no_absorption = spreading_loss_db(r, spreading, transition_range_m)
    fg = absorption_db_per_km(frequency_hz, water, "francois-garrison") * r / 1000.0
    am = absorption_db_per_km(frequency_hz, water, "ainslie-mccolm") * r / 1000.0
    tl = no_absorption + fg
    rl = received_level_db(source_level_db, tl)
    volts = voltage_rms(rl, system_sensitivity_db)
    x = sample_value(volts, full_scale_volts)
    counts = x * 2.0 ** (bits - 1) if bits else np.full_like(x, np.nan)
    clip_db = 20.0 * math.log10(full_scale_volts) - system_sensitivity_db  # 0-pk, dB re 1 µPa
    crest = 0.0 if peak else 20.0 * math.log10(math.sqrt(2.0))
    return {
        "range_m": r,
        "spreading_db": no_absorption,
        "absorption_fg_db": fg,
        "absorption_am_db": am,
        "tl_db": tl,
        "rl_db": rl,
        "volts": volts,
        "sample_value": x,
        "counts": counts,
        "headroom_db": clip_db - (rl + crest),
    }


def clip_range_m(
    source_level_db: float,
    frequency_hz: float,
    system_sensitivity_db: float,
    full_scale_volts: float,
    water: Seawater,
    spreading: str = "spherical",
    transition_range_m: float | None = None,
    peak: bool = False,
) -> float:
    """Range, m, inside which the source clips the recorder (0: never; inf: clips everywhere
    out to 1,000 km). Found by bisection on the monotone loss, to 0.01 %."""

    def headroom(r: float) -> float:
        return float(
            level_chain(
                source_level_db,
                frequency_hz,
                np.array([r]),
                system_sensitivity_db,
                full_scale_volts,
                None,
                water,
                spreading,
                transition_range_m,
                peak,
            )["headroom_db"][0]
        )

    lo, hi = 1.0, 1e6
    if headroom(lo) >= 0:
        return 0.0
    if headroom(hi) < 0:
        return float("inf")
    while hi / lo > 1.0001:
        mid = math.sqrt(lo * hi)
        lo, hi = (mid, hi) if headroom(mid) < 0 else (lo, mid)
    return math.sqrt(lo * hi)


def quantisation_floor_db(
    full_scale_volts: float, bits: int, system_sensitivity_db: float, sample_rate_hz: float
) -> dict[str, float]:
    """The converter's own noise floor in pressure units.

    Uniform quantisation noise of LSB/√12 rms, spread flat from 0 to fs/2 (REFERENCES §4:
    LSB = V_fs / 2^(N−1)).

    Returns
    -------
    dict: ``lsb_db`` (one LSB as pressure, dB re 1 µPa), ``noise_db`` (broadband rms,
    dB re 1 µPa), ``psd_db`` (dB re 1 µPa²/Hz)
    """
    lsb_volts = full_scale_volts / 2.0 ** (bits - 1)
    lsb_db = 20.0 * math.log10(lsb_volts) - system_sensitivity_db
    noise_db = lsb_db - 10.0 * math.log10(12.0)
    return {"lsb_db": lsb_db, "noise_db": noise_db, "psd_db": noise_db - 10.0 * math.log10(sample_rate_hz / 2.0)}


def _site_noise_db(dep: Deployment, frequency_hz: float, minutes: float = 10.0) -> dict[str, Any] | None:
    """Median one-minute PSD at the frequency's one-twelfth-octave band over the first
    ``minutes`` of recording, dB re 1 µPa²/Hz; None without a usable file."""
    from callsieve.features.soundscape import MinuteSpectra
    from callsieve.features.streaming import AudioReader, AudioReadError

    values: list[np.ndarray] = []
    band = None
    left = int(minutes * 60 * dep.sample_rate_hz)
    for f in dep.files:
        if left <= 0:
            break
        try:
            with AudioReader(f.path, dep.channel) as reader:
                n = min(reader.frames, left)
                spectra = MinuteSpectra(dep.sample_rate_hz, dep.chain, 0, n)
                spectra.add(0, reader.read(0, n))
        except AudioReadError:
            continue
        left -= n
        seconds, psd = spectra.result()
        if band is None:
            e = spectra.edges
            if not e[0] <= frequency_hz <= e[-1]:
                return None
            band = int(min(np.searchsorted(e, frequency_hz, side="right") - 1, e.size - 2))
        values.append(psd[seconds >= 30.0, band])
    if not values or band is None:
        return None
    v = np.concatenate(values)
    v = v[np.isfinite(v) & (v > 0)]
    if v.size == 0:
        return None
    return {"psd_db": float(10.0 * np.log10(np.median(v))), "minutes": int(v.size)}


def _transition_range_m(dep: Deployment, spreading: str) -> float | None:
    """Where cylindrical spreading takes over: the site's depth (m), for 'spherical-cylindrical'."""
    if spreading != "spherical-cylindrical":
        return None
    if dep.site.depth_m is None:
        raise InputError(f"{dep.manifest_path}: [site] depth_m is needed for cylindrical spreading beyond the depth")
    return float(dep.site.depth_m)


def budget_chain(
    manifest: str | Path,
    source_level_db: float,
    frequency_hz: float,
    peak: bool = False,
    spreading: str | None = None,
    ranges_m: tuple[float, ...] = DEFAULT_RANGES_M,
) -> dict[str, Any]:
    """The level chain of a source through a deployment's recorder, at its site.

    Spreading is spherical, or, with ``spreading='spherical-cylindrical'``, cylindrical
    beyond the site's depth (the manifest's ``[site] depth_m``).
    """
    if not math.isfinite(source_level_db):
        raise InputError(f"--source-level must be a number of dB re 1 µPa·m, got {source_level_db!r}")
    dep = load_deployment(manifest)
    if not dep.files:
        raise InputError(f"{manifest}: no usable sound file; the recorder's rate and bits come from the files")
    fs = dep.sample_rate_hz
    if not 0.0 < frequency_hz <= fs / 2.0:
        raise InputError(f"--frequency must be above 0 and at most {fs / 2:g} Hz (half the {fs} Hz rate)")
    spreading = spreading or "spherical"
    transition = _transition_range_m(dep, spreading)
    sensitivity = float(dep.chain.system_sensitivity_db(np.array([frequency_hz]))[0])
    bits = converter_bits(dep.files[0].info.subtype)
    water = dep.site.water
    chain = level_chain(
        source_level_db,
        frequency_hz,
        np.array(ranges_m),
        sensitivity,
        dep.chain.full_scale_volts,
        bits,
        water,
        spreading,
        transition,
        peak,
    )
    clip_r = clip_range_m(
        source_level_db, frequency_hz, sensitivity, dep.chain.full_scale_volts, water, spreading, transition, peak
    )
    quant = quantisation_floor_db(dep.chain.full_scale_volts, bits, sensitivity, fs) if bits else None
    site = _site_noise_db(dep, frequency_hz)
    if quant and site:
        margin = site["psd_db"] - quant["psd_db"]
        floor = (
            f"the sea sets the floor: its noise at {frequency_hz:.0f} Hz is {margin:.1f} dB above the converter's"
            if margin > 6.0
            else f"the recorder sets the floor: the converter's noise is within {margin:.1f} dB of the sea's"
        )
    else:
        floor = "unknown (no integer converter, or no audio at that frequency)"
    return {
        "deployment": dep.name,
        "source_level_db": source_level_db,
        "level_kind": "zero-to-peak" if peak else "rms",
        "frequency_hz": frequency_hz,
        "spreading": spreading,
        "transition_range_m": transition,
        "water": {"temperature_c": water.temperature_c, "salinity_psu": water.salinity_psu, "ph": water.ph},
        "system_sensitivity_db": sensitivity,
        "full_scale_volts": dep.chain.full_scale_volts,
        "bits": bits,
        "sample_rate_hz": fs,
        "clip_level_db": 20.0 * math.log10(dep.chain.full_scale_volts) - sensitivity,
        # inf (clips out to 1,000 km) is not JSON: None with the flag beside it.
        "clip_range_m": clip_r if math.isfinite(clip_r) else None,
        "clips_beyond_1000_km": not math.isfinite(clip_r),
        "quantisation": quant,
        "site_noise": site,
        "noise_floor": floor,
        "table": [
            {k: (None if not np.isfinite(v[i]) else float(v[i])) for k, v in chain.items()}
            for i in range(len(ranges_m))
        ],
        "caution": CAUTION,
    }


def format_budget(b: dict[str, Any]) -> str:
    """The level chain as a page of text."""
    kind = b["level_kind"]
    lines = [
        f"{b['deployment']}: a source of {b['source_level_db']:g} dB re 1 µPa·m ({kind}) at {b['frequency_hz']:g} Hz; "
        f"{b['spreading']} spreading"
        + (f" (cylindrical beyond {b['transition_range_m']:g} m)" if b["transition_range_m"] else "")
        + "; absorption after Francois & Garrison (Ainslie & McColm beside it)",
        f"recorder: {b['system_sensitivity_db']:.1f} dB re 1 V/µPa at that frequency, ±{b['full_scale_volts']:g} V, "
        + (f"{b['bits']} bits" if b["bits"] else "float samples")
        + f", {b['sample_rate_hz']} Hz; clips at {b['clip_level_db']:.2f} dB re 1 µPa (0-pk)",
        "",
        f"{'range m':>9} {'TL dB':>7} {'abs FG':>7} {'abs AM':>7} {'RL dB':>7} {'volts':>10} {'sample':>9} "
        f"{'counts':>10} {'headroom dB':>11}",
    ]
    for r in b["table"]:
        counts = "—" if r["counts"] is None else f"{r['counts']:.3g}"
        lines.append(
            f"{r['range_m']:>9g} {r['tl_db']:>7.1f} {r['absorption_fg_db']:>7.2f} {r['absorption_am_db']:>7.2f} "
            f"{r['rl_db']:>7.1f} {r['volts']:>10.3g} {r['sample_value']:>9.3g} {counts:>10} {r['headroom_db']:>11.1f}"
        )
    c = b["clip_range_m"]
    lines.append("")
    if b["clips_beyond_1000_km"]:
        lines.append("clipping: at every range out to 1,000 km")
    elif c == 0:
        lines.append("clipping: never beyond 1 m")
    else:
        lines.append(f"clipping: inside {c:,.0f} m")
    q, s = b["quantisation"], b["site_noise"]
    if q:
        lines.append(
            f"converter noise: one LSB is {q['lsb_db']:.2f} dB re 1 µPa; quantisation noise {q['noise_db']:.2f} dB "
            f"re 1 µPa, {q['psd_db']:.2f} dB re 1 µPa²/Hz"
        )
    if s:
        lines.append(
            f"site noise at {b['frequency_hz']:g} Hz: {s['psd_db']:.1f} dB re 1 µPa²/Hz "
            f"(median of {s['minutes']} one-minute spectra)"
        )
    lines.append(f"noise floor: {b['noise_floor']}")
    lines.append(b["caution"])
    return "\n".join(lines)


def _cmd_budget(args: argparse.Namespace) -> int:
    spreading = "spherical-cylindrical" if args.cylindrical_beyond_depth else "spherical"
    result = budget_chain(args.manifest, args.source_level, args.frequency, peak=args.peak, spreading=spreading)
    if args.db is not None:
        if args.evaluation is None:
            raise InputError("--db needs --evaluation DIR, the folder 'callsieve evaluate' wrote for the run")
        band = None
        if args.band:
            try:
                band = tuple(float(x) for x in args.band.split(","))
            except ValueError:
                band = ()
            if len(band) != 2 or not 0 <= band[0] < band[1]:
                raise InputError(f"--band must be LOW,HIGH in Hz with LOW < HIGH, got {args.band!r}")
        result["detection"] = budget_detection(
            args.manifest,
            args.db,
            args.run,
            args.evaluation,
            args.source_level,
            args.source_level_sd,
            args.frequency,
            label=args.label,
            band=band,
            spreading=spreading,
        )
        if args.figure:
            from .plots import save

            save(detection_figure(result["detection"]), Path(args.figure))
    if args.json:
        json.dump(result, sys.stdout, indent=2, ensure_ascii=False)
        sys.stdout.write("\n")
    else:
        print(format_budget(result))
        if "detection" in result:
            print()
            print(format_detection(result["detection"]))
    return 0


def add_budget_verb(verbs: argparse._SubParsersAction, common: argparse.ArgumentParser) -> None:
    """Add ``budget`` to the verb parsers."""
    p = verbs.add_parser("budget", parents=[common], help="the level chain of a source through the recorder, by range")
    p.add_argument("manifest", metavar="MANIFEST", help="deployment manifest (site and recorder)")
    p.add_argument("--source-level", type=float, required=True, metavar="DB", help="source level, dB re 1 µPa·m")
    p.add_argument("--frequency", type=float, required=True, metavar="HZ", help="frequency, Hz")
    p.add_argument("--peak", action="store_true", help="the source level is zero-to-peak (default: rms)")
    p.add_argument(
        "--cylindrical-beyond-depth",
        action="store_true",
        help="cylindrical spreading beyond the site's depth (default: spherical at every range)",
    )
    p.add_argument("--db", metavar="DB", help="detection store of a scored run: adds the detection function")
    p.add_argument("--run", type=int, metavar="ID", help="scoring run (default: the latest)")
    p.add_argument("--evaluation", metavar="DIR", help="the folder 'callsieve evaluate' wrote for that run")
    p.add_argument("--label", metavar="L", help="class (default: the run's target)")
    p.add_argument("--band", metavar="LOW,HIGH", help="the call's band, Hz (default: its detections' median band)")
    p.add_argument(
        "--source-level-sd", type=float, default=5.0, metavar="DB", help="spread of source levels, dB (default 5)"
    )
    p.add_argument("--figure", metavar="PNG", help="write the detection function's figure here")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_budget)


# --- the detection function (from a scored and evaluated run) ---------------------------


def effective_area_m2(range_m: np.ndarray, probability: np.ndarray) -> float:
    """∫ 2π r P(r) dr over the grid, m² (trapezoid rule; give a fine grid).

    The effective area of distance sampling (Buckland et al. 2001): the area a detector
    covers as if it found everything inside it and nothing outside.
    """
    r = np.asarray(range_m, dtype=float)
    f = 2.0 * np.pi * r * np.asarray(probability, dtype=float)
    return float(np.sum((f[1:] + f[:-1]) * np.diff(r)) / 2.0)


def recall_curve(snr_bins: list[dict], min_calls: int = 5) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Recall against SNR from evaluate's bins: centres (dB), recall, and its 95 % bounds.

    Bins of fewer than ``min_calls`` truth calls are dropped (their Wilson bounds span most
    of 0..1). Between centres recall is interpolated; above the highest it holds; one bin
    width below the lowest it reaches 0 (conservative: a call far below the noise is taken
    as never found, since nothing was measured there).
    """
    rows = [b for b in snr_bins if b["calls"] >= min_calls]
    if len(rows) < 2:
        raise InputError(
            f"the evaluation holds recall for fewer than two SNR bins of {min_calls}+ calls of this class; "
            "evaluate more calls"
        )
    centre = np.array([(b["low"] + b["high"]) / 2.0 for b in rows])
    width = rows[0]["high"] - rows[0]["low"]
    return (
        np.concatenate([[centre[0] - width], centre]),
        np.concatenate([[0.0], [b["recall"] for b in rows]]),
        np.concatenate([[0.0], [b["recall_low"] for b in rows]]),
        np.concatenate([[0.0], [b["recall_high"] for b in rows]]),
    )


def detection_function(
    range_m: np.ndarray,
    source_level_db: float,
    source_level_sd_db: float,
    band_loss_db: np.ndarray,
    noise_band_db: np.ndarray,
    snr_centres_db: np.ndarray,
    recall: np.ndarray,
) -> np.ndarray:
    """P(detect | range): recall at the call's in-band SNR, averaged over source levels
    (normal, mean and spread in dB) and over the site's noise (its measured band levels,
    one per minute, equally weighted).

    The sonar-equation simulation of cue counting with fixed sensors (Marques et al. 2009;
    Küsel et al. 2011): SNR = SL − TL(r) − NL.

    Parameters
    ----------
    range_m : array [n_r], m
    source_level_db, source_level_sd_db : float, dB re 1 µPa·m, rms in the call's band
    band_loss_db : array [n_r], dB, transmission loss at each range
    noise_band_db : array [n_noise], dB re 1 µPa, the noise's band level per minute
    snr_centres_db, recall : arrays, the detector's recall against SNR

    Returns
    -------
    array [n_r], 0..1
    """
    # Source levels on a fine grid over ±5σ with normal weights (a quadrature rule would
    # turn a steep recall curve into a staircase), noise as a 0.25 dB histogram of minutes.
    if source_level_sd_db > 0:
        z = np.linspace(-5.0, 5.0, 401)
        w_sl = np.exp(-0.5 * z**2)
        sl = source_level_db + source_level_sd_db * z
    else:
        w_sl, sl = np.ones(1), np.array([float(source_level_db)])
    w_sl = w_sl / w_sl.sum()
    noise = np.asarray(noise_band_db, dtype=float)
    levels, counts = np.unique(np.round(noise * 4.0) / 4.0, return_counts=True)
    w_nl = counts / counts.sum()
    rl = sl[None, :] - np.asarray(band_loss_db)[:, None]  # [n_r, n_sl]
    out = np.empty(rl.shape[0])
    for i in range(rl.shape[0]):  # one range at a time: n_sl × n_levels values each
        snr = rl[i][:, None] - levels[None, :]
        out[i] = float(w_sl @ np.interp(snr, snr_centres_db, recall) @ w_nl)
    return out


def noise_band_levels_db(db: str | Path, run_id: int, low_hz: float, high_hz: float) -> np.ndarray:
    """The site's noise band level over [low, high] Hz per one-minute bin of a run, dB re 1 µPa.

    From the long-term spectrum scoring stored (mean PSD per one-twelfth-octave band):
    Σ PSD × the part of each band inside [low, high]. Minutes with less than 30 s of audio
    or an empty band are left out.
    """
    from .report_soundscape import decode_soundscape_row
    from .store import open_store

    con = open_store(db, create=False)
    try:
        rows = con.execute("SELECT seconds, band_edges_hz, psd_db FROM soundscape WHERE run_id=?", (run_id,)).fetchall()
    finally:
        con.close()
    if not rows:
        raise InputError(f"run {run_id} holds no long-term spectrum (scored before it was kept); score it again")
    out = []
    for row in rows:
        seconds, edges, psd_db = decode_soundscape_row(*row)
        width = np.clip(np.minimum(edges[1:], high_hz) - np.maximum(edges[:-1], low_hz), 0.0, None)
        inside = width > 0
        if not inside.any():
            raise InputError(
                f"--band {low_hz:g},{high_hz:g}: outside the stored spectrum ({edges[0]:.0f}-{edges[-1]:.0f} Hz)"
            )
        power = np.sum(10.0 ** (psd_db[:, inside].astype(float) / 10.0) * width[inside], axis=1)
        ok = (seconds >= 30.0) & np.all(np.isfinite(psd_db[:, inside]), axis=1)
        out.append(10.0 * np.log10(power[ok]))
    return np.concatenate(out)


def _recall_bins(evaluation: Path, label: str) -> list[dict]:
    import csv

    path = evaluation / "recall_by_level.csv"
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = [r for r in csv.DictReader(fh) if r["label"] == label and r["measure"] == "snr_db"]
    except OSError:
        raise InputError(
            f"--evaluation {evaluation}: no recall_by_level.csv; give the folder 'callsieve evaluate' wrote"
        ) from None
    if not rows:
        raise InputError(f"--evaluation {evaluation}: no recall against SNR for {label!r}")

    def num(x: str) -> float:
        return float(x) if x else float("nan")

    return [
        {
            "low": num(r["low"]),
            "high": num(r["high"]),
            "calls": int(r["calls"]),
            "recall": num(r["recall"]),
            "recall_low": num(r["recall_low"]),
            "recall_high": num(r["recall_high"]),
        }
        for r in rows
    ]


def budget_detection(
    manifest: str | Path,
    db: str | Path,
    run_id: int | None,
    evaluation: str | Path,
    source_level_db: float,
    source_level_sd_db: float,
    frequency_hz: float,
    label: str | None = None,
    band: tuple[float, float] | None = None,
    spreading: str = "spherical",
) -> dict[str, Any]:
    """P(detect | range), the effective detection area and radius of a run's class.

    Returns
    -------
    dict: ``label``, ``band_hz``, ``noise_band_db`` (5th, 50th, 95th percentiles),
    ``ranges`` [{range_m, p, p_low, p_high}], ``effective_area_km2`` and
    ``effective_radius_m`` (each with ``_low``, ``_high`` from the recall bounds), ``method``
    """
    from .store import latest_run_id, open_store

    if not source_level_sd_db >= 0:
        raise InputError(f"--source-level-sd must be >= 0 dB, got {source_level_sd_db:g}")
    dep = load_deployment(manifest)
    con = open_store(db, create=False)
    try:
        run_id = latest_run_id(con, run_id)
        run = con.execute("SELECT target, classes FROM runs WHERE run_id=?", (run_id,)).fetchone()
        label = label or run["target"]
        if label is None:
            raise InputError(f"run {run_id} has no target class; name one with --label")
        if band is None:
            lo_hi = con.execute(
                "SELECT low_hz, high_hz FROM detections WHERE run_id=? AND label=? AND superseded=0", (run_id, label)
            ).fetchall()
            if not lo_hi:
                raise InputError(f"run {run_id} has no detection of {label!r}; give its band with --band LOW,HIGH")
            band = (float(np.median([r[0] for r in lo_hi])), float(np.median([r[1] for r in lo_hi])))
    finally:
        con.close()
    centre, recall, recall_lo, recall_hi = recall_curve(_recall_bins(Path(evaluation), label))
    noise = noise_band_levels_db(db, run_id, *band)
    transition = _transition_range_m(dep, spreading)
    r = np.geomspace(1.0, 2e5, 600)
    loss = transmission_loss_db(r, frequency_hz, dep.site.water, spreading, transition)
    curves = {
        key: detection_function(r, source_level_db, source_level_sd_db, loss, noise, centre, rec)
        for key, rec in (("p", recall), ("p_low", recall_lo), ("p_high", recall_hi))
    }
    areas = {key: effective_area_m2(r, p) for key, p in curves.items()}
    shown = np.array(DEFAULT_RANGES_M)
    return {
        "deployment": dep.name,
        "run_id": run_id,
        "label": label,
        "band_hz": list(band),
        "source_level_db": source_level_db,
        "source_level_sd_db": source_level_sd_db,
        "frequency_hz": frequency_hz,
        "spreading": spreading,
        "noise_band_db": {f"p{q}": float(np.percentile(noise, q)) for q in (5, 50, 95)},
        "noise_minutes": int(noise.size),
        "ranges": [{"range_m": float(x), **{k: float(np.interp(x, r, v)) for k, v in curves.items()}} for x in shown],
        "curve": {"range_m": r.tolist(), **{k: v.tolist() for k, v in curves.items()}},
        "effective_area_km2": areas["p"] / 1e6,
        "effective_area_km2_low": areas["p_low"] / 1e6,
        "effective_area_km2_high": areas["p_high"] / 1e6,
        "effective_radius_m": math.sqrt(areas["p"] / math.pi),
        "effective_radius_m_low": math.sqrt(areas["p_low"] / math.pi),
        "effective_radius_m_high": math.sqrt(areas["p_high"] / math.pi),
        "far_probability": float(curves["p"][-1]),
        "method": (
            "SNR = SL - TL(r) - NL in the call's band; recall against SNR from evaluate; source levels normal; "
            "noise from the run's one-minute spectra (Marques et al. 2009, Küsel et al. 2011; effective area "
            "as in distance sampling, Buckland et al. 2001)"
        ),
        "caution": CAUTION
        + " The range estimate inherits the recall curve's uncertainty; a density estimate also needs a cue "
        "rate and a false-positive correction, which this command does not supply.",
    }


def format_detection(d: dict[str, Any]) -> str:
    """The detection function as a page of text."""
    n = d["noise_band_db"]
    lines = [
        f"detection function of {d['label']} in run {d['run_id']} ({d['deployment']}): band "
        f"{d['band_hz'][0]:.0f}-{d['band_hz'][1]:.0f} Hz, source level {d['source_level_db']:g} ± "
        f"{d['source_level_sd_db']:g} dB re 1 µPa·m, noise band level {n['p5']:.1f} / {n['p50']:.1f} / "
        f"{n['p95']:.1f} dB re 1 µPa (5th/50th/95th, {d['noise_minutes']} minutes)",
        f"{'range m':>9} {'P(detect)':>10} {'(95 % band)':>16}",
    ]
    for row in d["ranges"]:
        lines.append(f"{row['range_m']:>9g} {row['p']:>10.3f}   ({row['p_low']:.3f}-{row['p_high']:.3f})")
    lines.append(
        f"effective detection area {d['effective_area_km2']:.3g} km² ({d['effective_area_km2_low']:.3g}-"
        f"{d['effective_area_km2_high']:.3g}), radius {d['effective_radius_m']:,.0f} m "
        f"({d['effective_radius_m_low']:,.0f}-{d['effective_radius_m_high']:,.0f})"
    )
    if d["far_probability"] > 0.01:
        lines.append(f"warning: P(detect) is still {d['far_probability']:.2f} at 200 km; the area is a lower bound")
    lines.append(d["method"])
    lines.append(d["caution"])
    return "\n".join(lines)


def detection_figure(d: dict[str, Any]):
    """P(detect | range) with its band from the recall intervals."""
    from .plots import pyplot

    plt = pyplot()
    c = d["curve"]
    fig, ax = plt.subplots(figsize=(6.2, 3.8))
    ax.fill_between(c["range_m"], c["p_low"], c["p_high"], color="0.8", label="from recall's 95 % bounds")
    ax.plot(c["range_m"], c["p"], color="black", label="P(detect | range)")
    ax.axvline(d["effective_radius_m"], color="0.3", linestyle="--", linewidth=1, label="effective radius")
    ax.set_xscale("log")
    ax.set_xlim(10, 2e5)
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("range from the recorder, m")
    ax.set_ylabel("probability of detection")
    ax.legend(loc="lower left", fontsize=8)
    ax.set_title(
        f"{d['label']} at {d['deployment']}: source {d['source_level_db']:g} ± {d['source_level_sd_db']:g} "
        "dB re 1 µPa·m",
        fontsize=10,
    )
    fig.tight_layout()
    return fig
