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
    no_absorption = transmission_loss_db(r, frequency_hz, water, spreading, transition_range_m) - (
        absorption_db_per_km(frequency_hz, water) * r / 1000.0
    )
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
    transition = None
    if spreading == "spherical-cylindrical":
        if dep.site.depth_m is None:
            raise InputError(f"{manifest}: [site] depth_m is needed for cylindrical spreading beyond the depth")
        transition = float(dep.site.depth_m)
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
            f"the sea sets the floor: its noise at {frequency_hz:g} Hz is {margin:.1f} dB above the converter's"
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
    result = budget_chain(
        args.manifest,
        args.source_level,
        args.frequency,
        peak=args.peak,
        spreading="spherical-cylindrical" if args.cylindrical_beyond_depth else "spherical",
    )
    if args.json:
        json.dump(result, sys.stdout, indent=2, ensure_ascii=False)
        sys.stdout.write("\n")
    else:
        print(format_budget(result))
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
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_budget)
