"""What `callsieve calibrate` reports: the deployment's files, effort, gaps and response."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
from callsieve.features.levels import fractional_octave_bands

from .deployment import Deployment, load_deployment, shown
from .errors import InputError

__all__ = ["calibration_summary", "format_calibration_summary", "utc_iso"]

# Lowest one-third-octave band reported (10 Hz); below it recorders rarely have a response.
_LOWEST_BAND_HZ = 10.0


def utc_iso(t: datetime | None) -> str | None:
    """ISO 8601 UTC with a 'Z', to the millisecond where needed."""
    if t is None:
        return None
    text = t.strftime("%Y-%m-%dT%H:%M:%S")
    if t.microsecond:
        text += f".{t.microsecond // 1000:03d}"
    return text + "Z"


def calibration_summary(deployment: Deployment | str | Path) -> dict[str, Any]:
    """Files, effort, gaps and the response on the third-octave grid up to Nyquist.

    Parameters
    ----------
    deployment : Deployment, or the path of its manifest

    Returns
    -------
    dict
        ``deployment``, ``files`` (count of usable files), ``failed_files`` (list of
        {file, error}), ``recorded_hours`` (h), ``sample_rate_hz`` (Hz),
        ``first_start_utc``, ``last_end_utc``, ``gaps`` (list of {after_file,
        start_utc, seconds}), ``overlaps`` (same form, seconds > 0), ``flat_response``,
        ``response``: one {frequency_hz, nominal_hz, system_db (dB re 1 V/µPa),
        clip_level_db (dB re 1 µPa, zero-to-peak)} per one-third-octave band, and
        ``warnings``: values that are possible but unusual, one line each.

    Raises
    ------
    InputError
        When no file of the deployment can be used: there is nothing to calibrate, and
        the fix (the files, or the manifest's glob) is the user's.
    """
    dep = deployment if isinstance(deployment, Deployment) else load_deployment(deployment)
    if not dep.files:
        first = dep.faults[0] if dep.faults else None
        raise InputError(
            f"{dep.manifest_path}: none of the {len(dep.faults)} file(s) matching {dep.glob!r} in "
            f"{shown(dep.audio_dir)} can be used"
            + (f" (first: {shown(first.name)}: {shown(first.error)})" if first else "")
            + "; replace the damaged files or point glob at the recordings"
        )
    response = []
    if dep.sample_rate_hz:
        bands = fractional_octave_bands(_LOWEST_BAND_HZ, dep.sample_rate_hz / 2.0, fraction=3)
        system = dep.chain.system_sensitivity_db(bands.centre_hz)
        clip = dep.chain.clip_level_db(bands.centre_hz)
        response = [
            {
                "frequency_hz": round(float(f), 4),
                "nominal_hz": float(n),
                "system_db": round(float(s), 3),
                "clip_level_db": round(float(c), 3),
            }
            for f, n, s, c in zip(bands.centre_hz, bands.nominal_hz, system, clip, strict=True)
        ]
    return {
        "deployment": dep.name,
        "manifest": str(dep.manifest_path),
        "files": len(dep.files),
        "failed_files": [{"file": f.name, "error": f.error} for f in dep.faults],
        "recorded_hours": round(dep.recorded_s / 3600.0, 6),
        "sample_rate_hz": dep.sample_rate_hz,
        "channel": dep.channel,
        "first_start_utc": utc_iso(dep.first_start_utc),
        "last_end_utc": utc_iso(dep.last_end_utc),
        "gaps": [
            {
                "after_file": g.after_file,
                "start_utc": utc_iso(g.start_utc),
                "seconds": round(g.seconds, 3),
            }
            for g in dep.gaps()
        ],
        "overlaps": [
            {
                "after_file": g.after_file,
                "start_utc": utc_iso(g.start_utc),
                "seconds": round(-g.seconds, 3),
            }
            for g in dep.overlaps()
        ],
        "flat_response": dep.chain.is_flat,
        "full_scale_volts": dep.chain.full_scale_volts,
        "response": response,
        "warnings": list(dep.warnings),
    }


def format_calibration_summary(summary: dict[str, Any], max_gaps: int = 10) -> str:
    """A plain-text page of :func:`calibration_summary` for the terminal."""
    s = summary
    lines = [
        f"deployment       {s['deployment']}",
        f"files            {s['files']} usable, {len(s['failed_files'])} failed",
        f"recorded         {s['recorded_hours']:.3f} h",
        f"sample rate      {s['sample_rate_hz']} Hz (channel {s['channel']})",
        f"first start      {s['first_start_utc']}",
        f"last end         {s['last_end_utc']}",
        f"gaps             {len(s['gaps'])}"
        + (f", {sum(g['seconds'] for g in s['gaps']) / 3600:.3f} h in all" if s["gaps"] else ""),
    ]
    for g in s["gaps"][:max_gaps]:
        lines.append(f"  {g['start_utc']}  {g['seconds']:>10.1f} s  after {g['after_file']}")
    if len(s["gaps"]) > max_gaps:
        lines.append(f"  ... {len(s['gaps']) - max_gaps} more (see --json)")
    if s["overlaps"]:
        lines.append(f"overlaps         {len(s['overlaps'])}")
        for g in s["overlaps"][:max_gaps]:
            lines.append(f"  {g['start_utc']}  {g['seconds']:>10.1f} s  after {g['after_file']}")
    for f in s["failed_files"]:
        lines.append(f"failed           {f['file']}: {f['error']}")
    for w in s.get("warnings", []):
        lines.append(f"warning          {w}")
    lines.append(
        f"response         {'flat' if s['flat_response'] else 'from tables'}, full scale {s['full_scale_volts']:g} V"
    )
    lines.append("  band (Hz)   system (dB re 1 V/µPa)   clip level (dB re 1 µPa, 0-pk)")
    for r in s["response"]:
        lines.append(f"  {r['nominal_hz']:>9g}   {r['system_db']:>22.2f}   {r['clip_level_db']:>30.2f}")
    if s["response"]:
        clip = np.array([r["clip_level_db"] for r in s["response"]])
        lines.append(
            f"  lowest clip level {clip.min():.2f} dB re 1 µPa (0-pk); largest unclipped "
            f"sine {clip.min() - 3.01:.2f} dB re 1 µPa rms"
        )
    return "\n".join(lines)
