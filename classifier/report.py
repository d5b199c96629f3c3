"""`callsieve report`: presence against effort, the soundscape and the figures of one run.

Reads the store (files and their status in the run, detections, the soundscape rows and,
where a verification sample exists, its estimate) and writes tables, a long-term
spectrogram array, figures and one self-contained HTML page (docs/report.md). The
presence arithmetic is pure functions over arrays of times (s since the epoch, UTC).
"""

from __future__ import annotations

import argparse
import json
import math
import sqlite3
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from .errors import InputError, read_toml
from .export import CAUTION
from .labels import BACKGROUND
from .outputs import write_csv, write_text
from .store import epoch_s, latest_run_id, open_store

__all__ = [
    "DONE",
    "FAILED",
    "UNSCORED",
    "UTC_ZONE",
    "Zone",
    "add_report_verb",
    "build_report",
    "covered_seconds",
    "format_report",
    "presence_grid",
    "presence_tables",
    "probability_grid",
    "resolve_thresholds",
    "union_intervals",
]

DONE, FAILED, UNSCORED = 0, 1, 2
# An hour or day recorded to within this many seconds of its length counts as fully
# recorded (file names give starts to the second at best).
FULL_TOLERANCE_S = 1.0
HOUR_S, DAY_S = 3600, 86400


# --- zones ------------------------------------------------------------------------


@dataclass(frozen=True)
class Zone:
    """The clock in which hours and days are counted: UTC plus a fixed offset.

    Attributes
    ----------
    offset_s : int, s, local time = UTC + offset
    kind : str, ``utc``, ``offset`` (given with --utc-offset) or ``solar`` (local mean
        solar time from the site's longitude: UTC + longitude / 15 h, to the minute)
    longitude_deg : float or None, degrees east, for ``solar``
    """

    offset_s: int = 0
    kind: str = "utc"
    longitude_deg: float | None = None

    @classmethod
    def from_hours(cls, hours: float) -> Zone:
        if not (math.isfinite(hours) and -14.0 <= hours <= 14.0):
            raise InputError(f"--utc-offset must be hours between -14 and +14, got {hours:g}")
        return cls(int(round(hours * 3600.0)), "offset" if hours else "utc")

    @classmethod
    def solar(cls, longitude_deg: float) -> Zone:
        lon = (longitude_deg + 180.0) % 360.0 - 180.0  # the manifest allows 0..360
        # To the whole minute: 4 min per degree, so within 0.125° of the site.
        return cls(int(round(lon / 15.0 * 60.0)) * 60, "solar", lon)

    @property
    def suffix(self) -> str:
        """ISO 8601 offset: ``Z`` or ``+05:30``."""
        if self.offset_s == 0:
            return "Z"
        sign = "+" if self.offset_s > 0 else "-"
        m = abs(self.offset_s) // 60
        return f"{sign}{m // 60:02d}:{m % 60:02d}"

    @property
    def name(self) -> str:
        """Short name for axes: ``UTC``, ``UTC+05:30``, ``UTC+11:39 solar``."""
        base = "UTC" if self.offset_s == 0 else f"UTC{self.suffix}"
        return base + (" solar" if self.kind == "solar" else "")

    @property
    def description(self) -> str:
        """One line saying which clock and why."""
        if self.kind == "solar":
            hemi = "E" if self.longitude_deg >= 0 else "W"
            return (
                f"local mean solar time, UTC{self.suffix} (solar time = UTC + longitude / 15 h, "
                f"longitude {abs(self.longitude_deg):g}° {hemi} from the manifest, to the minute)"
            )
        if self.kind == "offset":
            return f"UTC{self.suffix} (given with --utc-offset)"
        return "UTC"

    @property
    def whole_hours(self) -> bool:
        """True when local hours are whole UTC hours (so per-UTC-hour estimates map onto them)."""
        return self.offset_s % HOUR_S == 0


UTC_ZONE = Zone()


# --- effort: intervals --------------------------------------------------------------


def union_intervals(start_s: np.ndarray, end_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sorted, disjoint union of intervals [start, end) (s); empty intervals dropped.

    Overlapping files record the same time once (their effort is the union).
    """
    a, b = np.asarray(start_s, float), np.asarray(end_s, float)
    keep = b > a
    a, b = a[keep], b[keep]
    if a.size == 0:
        return a, b
    order = np.argsort(a, kind="stable")
    a, b = a[order], b[order]
    reach = np.maximum.accumulate(b)
    # A new run starts where an interval begins after everything before it has ended.
    new = np.concatenate([[True], a[1:] > reach[:-1]])
    starts = a[new]
    ends = np.maximum.reduceat(b, np.flatnonzero(new))
    return starts, ends


def _covered_before(starts: np.ndarray, ends: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Seconds of the disjoint sorted intervals that lie before each time ``t``."""
    t = np.asarray(t, float)
    before = np.concatenate([[0.0], np.cumsum(ends - starts)])  # total of the intervals before j
    k = np.searchsorted(starts, t, side="right")  # intervals that start at or before t
    j = np.maximum(k - 1, 0)
    inside = np.clip(t - starts[j], 0.0, ends[j] - starts[j])
    return np.where(k > 0, before[j] + inside, 0.0)


def covered_seconds(start_s: np.ndarray, end_s: np.ndarray, edges_s: np.ndarray) -> np.ndarray:
    """Seconds of the union of intervals inside each bin between consecutive ``edges_s``.

    Parameters
    ----------
    start_s, end_s : np.ndarray [shape=(n,)], s, the intervals (any order, may overlap)
    edges_s : np.ndarray [shape=(n_bins + 1,)], s, increasing

    Returns
    -------
    np.ndarray [shape=(n_bins,)], s
    """
    a, b = union_intervals(start_s, end_s)
    edges = np.asarray(edges_s, float)
    if a.size == 0:
        return np.zeros(edges.size - 1)
    return np.diff(_covered_before(a, b, edges))


def _count_overlapping(start_s: np.ndarray, end_s: np.ndarray, edges_s: np.ndarray) -> np.ndarray:
    """Number of intervals [start, end] that touch each bin (a zero-length one counts where it lies)."""
    a = np.sort(np.asarray(start_s, float))
    b = np.sort(np.asarray(end_s, float))
    edges = np.asarray(edges_s, float)
    started = np.searchsorted(a, edges[1:], side="left")
    ended = np.searchsorted(b, edges[:-1], side="right")  # ending at a bin's start: not in it
    return started - ended


# --- presence ---------------------------------------------------------------------


def presence_grid(
    span_start_s: np.ndarray,
    span_end_s: np.ndarray,
    span_status: np.ndarray,
    det_time_s: np.ndarray,
    det_label: np.ndarray,
    labels: list[str],
    zone: Zone = UTC_ZONE,
) -> dict[str, Any]:
    """Effort and detections per clock hour of the zone, as day × hour arrays.

    Parameters
    ----------
    span_start_s, span_end_s : np.ndarray [shape=(n_files,)], s since the epoch (UTC)
    span_status : np.ndarray [shape=(n_files,)], ``DONE``, ``FAILED`` or ``UNSCORED``
    det_time_s : np.ndarray [shape=(n_det,)], s since the epoch, start of each
        detection at or above its class's operating threshold
    det_label : np.ndarray [shape=(n_det,)], str, its class
    labels : list of str, the classes (rows of the tables)
    zone : Zone, the clock of hours and days

    Returns
    -------
    dict: ``days`` (np.ndarray [shape=(n_days,)], int, local days since 1970-01-01);
    per day and hour [shape=(n_days, 24)]: ``effort_s``, ``failed_s`` (time of failed
    files not recorded by another file), ``unscored_s``, ``failed_files`` (count),
    ``effort_1min`` and ``effort_10min`` (bins holding any effort); and ``per_label``:
    per class, ``detections``, ``positive_1min``, ``positive_10min`` [shape=(n_days, 24)].
    """
    off = float(zone.offset_s)
    a = np.asarray(span_start_s, float) + off
    b = np.asarray(span_end_s, float) + off
    status = np.asarray(span_status)
    t = np.asarray(det_time_s, float) + off
    det_label = np.asarray(det_label)
    if a.size == 0:
        raise InputError("the run has no files with a start time; nothing to report")
    first_day = int(np.floor(a.min() / DAY_S))
    last_day = int(np.floor((max(b.max(), a.max()) - 1e-6) / DAY_S))
    days = np.arange(first_day, max(last_day, first_day) + 1)
    n_days = days.size
    if n_days > 3700:
        # Ten years: almost surely a file name whose time was read wrongly.
        raise InputError(
            f"the run's files span {n_days} days ({_iso_local(a.min() - off, UTC_ZONE)} to "
            f"{_iso_local(b.max() - off, UTC_ZONE)}); check the manifest's timestamp_format"
        )
    t0 = first_day * DAY_S

    def per(step_s: int) -> np.ndarray:
        return t0 + step_s * np.arange(n_days * DAY_S // step_s + 1, dtype=float)

    hours, minutes, tens = per(HOUR_S), per(60), per(600)
    done = status == DONE
    effort = covered_seconds(a[done], b[done], hours)
    # Failed (and unscored) time counts only where no scored file recorded it: a copy
    # of a recorded span that failed lost nothing.
    ua, ub = union_intervals(a[done], b[done])

    def lost(mask: np.ndarray) -> np.ndarray:
        both = covered_seconds(np.concatenate([a[done], a[mask]]), np.concatenate([b[done], b[mask]]), hours)
        return both - effort

    failed = status == FAILED
    # A failed file's span where it is known; one second at its start otherwise (length 0).
    fa, fb = a[failed], np.maximum(b[failed], a[failed] + 1.0)
    if ua.size:
        recorded = _covered_before(ua, ub, fb) - _covered_before(ua, ub, fa)
        lost_file = recorded < (fb - fa) - 1e-6
    else:
        lost_file = np.ones(fa.size, bool)
    out: dict[str, Any] = {
        "days": days,
        "effort_s": effort.reshape(n_days, 24),
        "failed_s": lost(failed).reshape(n_days, 24),
        "unscored_s": lost(status == UNSCORED).reshape(n_days, 24),
        "failed_files": _count_overlapping(fa[lost_file], fb[lost_file], hours).reshape(n_days, 24),
        "effort_1min": (covered_seconds(a[done], b[done], minutes) > 0).reshape(n_days, 24, 60).sum(axis=2),
        "effort_10min": (covered_seconds(a[done], b[done], tens) > 0).reshape(n_days, 24, 6).sum(axis=2),
        "per_label": {},
    }
    for label in labels:
        tt = t[det_label == label]
        tt = tt[(tt >= t0) & (tt < t0 + n_days * DAY_S)]
        rel = tt - t0
        count = np.bincount((rel // HOUR_S).astype(np.int64), minlength=n_days * 24)
        m1 = np.zeros(n_days * 1440, bool)
        m1[np.unique((rel // 60).astype(np.int64))] = True
        m10 = np.zeros(n_days * 144, bool)
        m10[np.unique((rel // 600).astype(np.int64))] = True
        out["per_label"][label] = {
            "detections": count.reshape(n_days, 24),
            "positive_1min": m1.reshape(n_days, 24, 60).sum(axis=2),
            "positive_10min": m10.reshape(n_days, 24, 6).sum(axis=2),
        }
    return out


def probability_grid(hours_probability: dict[str, float], days: np.ndarray, zone: Zone) -> np.ndarray | None:
    """Per local day and hour, the estimated chance of a true detection (estimate §6).

    ``hours_probability`` is keyed by UTC hour (``%Y-%m-%dT%H``); hours absent from it
    held no detection at the estimate's threshold (0). Returns None where the zone's
    hours are not whole UTC hours (the per-hour estimate cannot be split).
    """
    if not zone.whole_hours:
        return None
    grid = np.zeros((days.size, 24))
    shift_h = zone.offset_s // HOUR_S
    first_h = int(days[0]) * 24
    for key, p in hours_probability.items():
        utc_h = int(datetime.strptime(key, "%Y-%m-%dT%H").replace(tzinfo=UTC).timestamp()) // HOUR_S
        k = utc_h + shift_h - first_h
        if 0 <= k < grid.size:
            grid.flat[k] = p
    return grid


def _iso_local(seconds_local: float, zone: Zone, fmt: str = "%Y-%m-%dT%H:%M") -> str:
    return datetime.fromtimestamp(seconds_local, UTC).strftime(fmt) + zone.suffix


def _rate(count: np.ndarray, effort_s: np.ndarray, per_s: float) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(effort_s > 0, count / (effort_s / per_s), np.nan)


def presence_tables(
    grid: dict[str, Any],
    zone: Zone,
    probabilities: dict[str, np.ndarray | None] | None = None,
) -> tuple[list[dict], list[dict]]:
    """Rows of the hourly and daily presence tables (docs/report.md §2).

    Parameters
    ----------
    grid : the result of ``presence_grid``
    zone : Zone of the grid
    probabilities : per class, day × hour chance of a true detection (``probability_grid``),
        or None where no estimate exists

    Returns
    -------
    (hourly, daily) : lists of dict, one per class and hour (day); missing values None.
    """
    probabilities = probabilities or {}
    days = grid["days"]
    n_days = days.size
    effort, failed, unscored = grid["effort_s"], grid["failed_s"], grid["unscored_s"]
    failed_files = grid["failed_files"]
    hourly: list[dict] = []
    daily: list[dict] = []
    day_effort = effort.sum(axis=1)
    for label, per in grid["per_label"].items():
        det = per["detections"]
        prob = probabilities.get(label)
        rate_h = _rate(det, effort, HOUR_S)
        for i in range(n_days):
            base = int(days[i]) * DAY_S
            for h in range(24):
                e = float(effort[i, h])
                hourly.append(
                    {
                        "label": label,
                        "zone": zone.name,
                        "hour_start": _iso_local(base + h * HOUR_S, zone),
                        "hour_start_utc": _iso_local(base + h * HOUR_S - zone.offset_s, UTC_ZONE),
                        "date": _iso_local(base, zone, "%Y-%m-%d")[:10],
                        "hour_of_day": h,
                        "effort_min": round(e / 60.0, 3),
                        "failed_min": round(float(failed[i, h]) / 60.0, 3),
                        "unscored_min": round(float(unscored[i, h]) / 60.0, 3),
                        "detections": int(det[i, h]),
                        "detection_positive": (int(det[i, h] > 0) if e > 0 else None),
                        "positive_1min_bins": int(per["positive_1min"][i, h]),
                        "effort_1min_bins": int(grid["effort_1min"][i, h]),
                        "positive_10min_bins": int(per["positive_10min"][i, h]),
                        "effort_10min_bins": int(grid["effort_10min"][i, h]),
                        "detections_per_recorded_hour": _none(rate_h[i, h]),
                        "presence_probability": (None if prob is None or e <= 0 else round(float(prob[i, h]), 4)),
                        "flag_no_effort": int(e <= 0),
                        "flag_partial_effort": int(0 < e < HOUR_S - FULL_TOLERANCE_S),
                        "flag_failed_files": int(failed_files[i, h] > 0),
                    }
                )
        for i in range(n_days):
            e = float(day_effort[i])
            n = int(det[i].sum())
            p_day = None
            if prob is not None and e > 0:
                # Hours taken as independent, as the estimate takes detections: the day
                # holds no true detection only if none of its hours does.
                p_day = round(float(1.0 - np.prod(1.0 - prob[i][effort[i] > 0])), 4)
            daily.append(
                {
                    "label": label,
                    "zone": zone.name,
                    "date": _iso_local(int(days[i]) * DAY_S, zone, "%Y-%m-%d")[:10],
                    "effort_min": round(e / 60.0, 3),
                    "failed_min": round(float(failed[i].sum()) / 60.0, 3),
                    "unscored_min": round(float(unscored[i].sum()) / 60.0, 3),
                    "hours_with_effort": int((effort[i] > 0).sum()),
                    "positive_hours": int(((det[i] > 0) & (effort[i] > 0)).sum()),
                    "detections": n,
                    "detection_positive": (int(n > 0) if e > 0 else None),
                    "positive_1min_bins": int(per["positive_1min"][i].sum()),
                    "effort_1min_bins": int(grid["effort_1min"][i].sum()),
                    "positive_10min_bins": int(per["positive_10min"][i].sum()),
                    "effort_10min_bins": int(grid["effort_10min"][i].sum()),
                    "detections_per_recorded_hour": _none(n / (e / HOUR_S)) if e > 0 else None,
                    "detections_per_recorded_day": _none(n / (e / DAY_S)) if e > 0 else None,
                    "presence_probability": p_day,
                    "flag_no_effort": int(e <= 0),
                    "flag_partial_effort": int(0 < e < DAY_S - FULL_TOLERANCE_S),
                    "flag_failed_files": int(failed_files[i].sum() > 0),
                }
            )
    return hourly, daily


def _none(x: float) -> float | None:
    return None if x is None or not np.isfinite(x) else round(float(x), 4)


# --- the operating threshold -------------------------------------------------------


def resolve_thresholds(
    labels: list[str],
    floor: float,
    threshold: float | None = None,
    target_precision: float = 0.9,
    estimates: dict[str, dict] | None = None,
    no_sample_reason: dict[str, str] | None = None,
) -> tuple[dict[str, dict], list[str]]:
    """The operating threshold of each class, which rule gave it and why.

    In order: ``threshold`` (given); else the class's guaranteed threshold for
    ``target_precision`` from its verified sample (docs/estimates.md §3); else the run's
    floor, with a warning.

    Returns
    -------
    (per_label, warnings) : per class ``threshold``, ``source`` (``given``,
    ``guaranteed``, ``floor``) and ``reason``; and warning lines.
    """
    estimates = estimates or {}
    no_sample_reason = no_sample_reason or {}
    out: dict[str, dict] = {}
    warnings: list[str] = []
    for label in labels:
        if threshold is not None:
            out[label] = {"threshold": float(threshold), "source": "given", "reason": "given with --threshold"}
            continue
        est = estimates.get(label)
        guaranteed = None if est is None else est["target"]["threshold_guaranteed"]
        if guaranteed is not None:
            out[label] = {
                "threshold": float(guaranteed),
                "source": "guaranteed",
                "reason": (
                    f"the lowest threshold whose verified precision reaches {target_precision:g} with 95 % "
                    f"confidence (sample {est['sample_id']}, {sum(est['verdicts'].values())} verdicts)"
                ),
            }
            continue
        if est is None:
            why = no_sample_reason.get(label, "no verification sample of this class")
        else:
            why = (
                f"its verification sample (sample {est['sample_id']}) cannot show precision {target_precision:g} "
                "with 95 % confidence at any threshold"
            )
        out[label] = {"threshold": float(floor), "source": "floor", "reason": f"the run's floor: {why}"}
        warnings.append(
            f"{label}: operating at the run's floor {floor:g} because {why}; detections there are mostly "
            "unverified candidates: verify a sample ('callsieve review sample') or give --threshold"
        )
    return out, warnings


# --- reading the store ----------------------------------------------------------------


def _read_run(con: sqlite3.Connection, run_id: int) -> dict[str, Any]:
    run = con.execute(
        "SELECT r.*, d.name AS deployment, d.manifest FROM runs r JOIN deployments d USING (deployment_id) "
        "WHERE r.run_id=?",
        (run_id,),
    ).fetchone()
    files = con.execute(
        "SELECT f.file_id, f.name, f.start_utc, f.duration_s, rf.status FROM files f LEFT JOIN run_files rf "
        "ON rf.file_id=f.file_id AND rf.run_id=? WHERE f.deployment_id=? ORDER BY f.start_utc",
        (run_id, run["deployment_id"]),
    ).fetchall()
    timed = [f for f in files if f["start_utc"]]
    code = {"done": DONE, "failed": FAILED, None: UNSCORED}
    return {
        "run": dict(run),
        "file_id": np.array([f["file_id"] for f in timed], np.int64),
        "name": [f["name"] for f in timed],
        "start_s": np.array([epoch_s(f["start_utc"]) for f in timed], float),
        "duration_s": np.array([float(f["duration_s"] or 0.0) for f in timed], float),
        "status": np.array([code.get(f["status"], UNSCORED) for f in timed], np.int64),
        "untimed_failed": [f["name"] for f in files if not f["start_utc"]],
    }


def _read_detections(con: sqlite3.Connection, run_id: int, minimum: float, starts: dict[int, float]) -> dict:
    """The run's current detections at or above ``minimum``, as arrays (read in chunks)."""
    cur = con.execute(
        "SELECT file_id, start_s, end_s, low_hz, high_hz, confidence, received_level_db, snr_db, label "
        "FROM detections WHERE run_id=? AND superseded=0 AND confidence>=?",
        (run_id, minimum),
    )
    parts: list[np.ndarray] = []
    labels: list[str] = []
    while chunk := cur.fetchmany(100_000):
        parts.append(np.array([r[:8] for r in chunk], dtype=float))
        labels.extend(r[8] for r in chunk)
    a = np.concatenate(parts) if parts else np.zeros((0, 8))
    known = np.array([int(f) in starts for f in a[:, 0]], bool) if a.size else np.zeros(0, bool)
    a = a[known]
    lab = np.array(labels, dtype=object)[known] if labels else np.array([], dtype=object)
    t = a[:, 1] + np.array([starts[int(f)] for f in a[:, 0]]) if a.size else np.zeros(0)
    return {
        "time_s": t,
        "end_s": t + (a[:, 2] - a[:, 1]) if a.size else np.zeros(0),
        "low_hz": a[:, 3],
        "high_hz": a[:, 4],
        "confidence": a[:, 5],
        "received_level_db": a[:, 6],
        "snr_db": a[:, 7],
        "label": lab.astype(str) if lab.size else np.array([], dtype=str),
    }


def _site(manifest: str | Path | None, say: Callable[[str], None]) -> dict[str, float | None]:
    """Latitude and longitude from the manifest's [site], where it can be read."""
    if manifest is None:
        return {"latitude": None, "longitude": None}
    try:
        doc = read_toml(Path(manifest), "manifest")
    except InputError as exc:
        say(f"report: the manifest cannot be read ({exc}); no site position, times in UTC and no night shading")
        return {"latitude": None, "longitude": None}
    site = doc.get("site", {}) if isinstance(doc.get("site", {}), dict) else {}
    out: dict[str, float | None] = {}
    for key, lo, hi in (("latitude", -90.0, 90.0), ("longitude", -180.0, 360.0)):
        v = site.get(key)
        out[key] = float(v) if isinstance(v, int | float) and lo <= float(v) <= hi else None
    return out


def _estimates(db: Path, run_id: int, labels: list[str], target_precision: float) -> tuple[dict, dict[str, str]]:
    """``estimate_run`` of each class with a verification sample; why the others have none."""
    from .estimate import estimate_run

    found: dict[str, dict] = {}
    reasons: dict[str, str] = {}
    for label in labels:
        try:
            found[label] = estimate_run(db, run_id=run_id, label=label, target_precision=target_precision)
        except InputError as exc:
            reasons[label] = str(exc).split(";")[0]
    return found, reasons


# --- the soundscape from the store ---------------------------------------------------


def soundscape_from_store(
    con: sqlite3.Connection,
    run_id: int,
    span_start_s: float,
    span_end_s: float,
    bin_s: float | None = None,
    cycle_s: float | None = None,
):
    """The run's long-term spectrum from its ``soundscape`` rows, one file at a time.

    ``bin_s`` (s) fixes the time bin; by default ``choose_bin_s`` picks it from the span
    and the duty cycle ``cycle_s`` (s). Returns None where the run has no soundscape rows
    (scored before they were kept).
    """
    from .report_soundscape import SoundscapeAccumulator, choose_bin_s, decode_soundscape_row, union_band_edges

    edge_sets = [
        np.frombuffer(r[0], dtype="<f4")
        for r in con.execute("SELECT DISTINCT band_edges_hz FROM soundscape WHERE run_id=?", (run_id,))
    ]
    if not edge_sets:
        return None
    edges = union_band_edges(edge_sets)
    step = bin_s or choose_bin_s(span_end_s - span_start_s, cycle_s)
    start = math.floor(span_start_s / step) * step
    n_time = max(1, math.ceil((span_end_s - start) / step))
    acc = None
    cur = con.execute(
        "SELECT s.start_utc, s.bin_s, s.seconds, s.band_edges_hz, s.psd_db FROM soundscape s "
        "JOIN run_files rf ON rf.run_id=s.run_id AND rf.file_id=s.file_id AND rf.status='done' WHERE s.run_id=?",
        (run_id,),
    )
    for row in cur:
        sec, e, psd = decode_soundscape_row(row[2], row[3], row[4])
        if acc is None:
            acc = SoundscapeAccumulator(start, step, n_time, edges, source_bin_s=float(row[1]))
        acc.add_file(epoch_s(row[0]), float(row[1]), sec, psd, e)
    return None if acc is None else acc.result()


# --- writing ----------------------------------------------------------------------


def _write_table(rows: list[dict], path: Path, parquet: bool = True) -> list[Path]:
    """``path`` as CSV (empty cells for missing values) and, with ``parquet``, beside it as Parquet."""
    written = []
    if rows:
        write_csv(path, list(rows[0]), rows)
    else:
        write_text(path, "")
    written.append(path)
    if parquet and rows:
        import pyarrow as pa
        import pyarrow.parquet as pq

        pq_path = path.with_suffix(".parquet")
        pq.write_table(pa.Table.from_pylist(rows), pq_path)
        written.append(pq_path)
    return written


def _check_out_dir(out: Path) -> None:
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: is a file; give a folder for the report")
    if out.exists() and any(out.iterdir()) and not (out / "report.json").exists():
        raise InputError(f"--out {out}: folder exists and holds files that are not a report's; choose a new folder")
    if not out.parent.is_dir():
        raise InputError(f"--out {out}: the folder {out.parent} does not exist; create it first")


# --- the report -----------------------------------------------------------------


def build_report(
    db: str | Path,
    out: str | Path,
    run_id: int | None = None,
    threshold: float | None = None,
    target_precision: float | None = None,
    utc_offset_h: float | None = None,
    manifest: str | Path | None = None,
    figures: bool = True,
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Write the monitoring report of one scoring run into ``out`` (docs/report.md).

    Parameters
    ----------
    db : detection store
    out : folder for the report (made if missing; an earlier report's is reused)
    run_id : int, optional, the scoring run (default: the latest)
    threshold : float, optional, 0..1, the operating threshold for every class
    target_precision : float, optional, 0..1 (default 0.9), for the guaranteed threshold
    utc_offset_h : float, optional, h, the clock of tables and figures (default UTC for
        tables; for the hour-of-day figure, solar time where the manifest has a longitude)
    manifest : path, optional, the deployment's manifest where it moved since scoring
    figures : bool, draw the figures and the HTML page
    progress : callable, optional, receives progress lines

    Returns
    -------
    dict, the content of ``report.json``.
    """
    say = progress or (lambda line: None)
    if threshold is not None and not (math.isfinite(threshold) and 0.0 <= threshold <= 1.0):
        raise InputError(f"--threshold must be between 0 and 1, got {threshold:g}")
    if target_precision is not None and not 0.0 < target_precision < 1.0:
        raise InputError(f"--target-precision must be between 0 and 1, got {target_precision:g}")
    tp = 0.9 if target_precision is None else float(target_precision)
    table_zone = UTC_ZONE if utc_offset_h is None else Zone.from_hours(utc_offset_h)
    out, db = Path(out), Path(db)
    _check_out_dir(out)
    con = open_store(db, create=False)
    try:
        run_id = latest_run_id(con, run_id)
        data = _read_run(con, run_id)
    finally:
        con.close()
    run = data["run"]
    if threshold is not None and threshold < float(run["threshold"]):
        raise InputError(
            f"--threshold {threshold:g} is below run {run_id}'s floor {float(run['threshold']):g}: nothing under "
            "the floor was stored; give a threshold at or above it"
        )
    labels = [c for c in json.loads(run["classes"]) if c != BACKGROUND]
    if run["target"] and run["target"] in labels:
        labels = [run["target"]]
    site = _site(manifest or run["manifest"], say)
    # The hour-of-day figure follows the sun where no clock was asked for.
    diel_zone = table_zone
    if utc_offset_h is None and site["longitude"] is not None:
        diel_zone = Zone.solar(site["longitude"])
    say(f"report: run {run_id} of {run['deployment']}: {len(data['name'])} files, classes {', '.join(labels)}")

    estimates, thresholds, warnings = _choose_thresholds(db, run_id, labels, float(run["threshold"]), threshold, tp)
    if data["untimed_failed"]:
        warnings.append(
            f"{len(data['untimed_failed'])} failed file(s) have no start time in their names and are not placed "
            f"in the tables: {', '.join(data['untimed_failed'][:5])}"
        )
    ops, lts, cycle = _read_detections_and_soundscape(db, run_id, data, labels, thresholds, say)
    out.mkdir(parents=True, exist_ok=True)
    grids, tables = _presence(data, ops, labels, estimates, table_zone, diel_zone, warnings)
    written = _write_table(tables["hourly"], out / "presence_hourly.csv")
    written += _write_table(tables["daily"], out / "presence_daily.csv")
    summary_rows = _class_summary(tables["daily"], tables["hourly"], thresholds, estimates, labels)
    written += _write_table(summary_rows, out / "summary.csv", parquet=False)
    soundscape = None
    if lts is not None:
        soundscape, files = _write_soundscape_outputs(out, lts, ops, run_id, str(run["deployment"]), cycle)
        written += files
    else:
        warnings.append(
            "the store holds no soundscape rows for this run (scored before they were kept): no long-term "
            "spectrogram; score the deployment again to collect them"
        )

    end_s = data["start_s"] + data["duration_s"]
    report = {
        "run_id": run_id,
        "deployment": run["deployment"],
        "classes": labels,
        "floor": float(run["threshold"]),
        "target_precision": tp,
        "thresholds": thresholds,
        "zones": {"tables": table_zone.description, "hour_of_day_figure": diel_zone.description},
        "site": site,
        "files": {
            "done": int((data["status"] == DONE).sum()),
            "failed": int((data["status"] == FAILED).sum()) + len(data["untimed_failed"]),
            "unscored": int((data["status"] == UNSCORED).sum()),
        },
        "recorded_hours": round(float(grids[table_zone][0]["effort_s"].sum()) / HOUR_S, 3),
        "first_start_utc": _iso_local(float(data["start_s"].min()), UTC_ZONE, "%Y-%m-%dT%H:%M:%S"),
        "last_end_utc": _iso_local(float(end_s.max()), UTC_ZONE, "%Y-%m-%dT%H:%M:%S"),
        "summary": summary_rows,
        "soundscape": soundscape,
        "estimates": {
            label: {
                "sample_id": e["sample_id"],
                "verdicts": e["verdicts"],
                "target": e["target"],
                "presence": {k: v for k, v in e["presence"].items() if not k.endswith("_probability")},
            }
            for label, e in estimates.items()
        },
        "warnings": warnings,
        "caution": CAUTION,
        "outputs": sorted({p.name for p in written} | {"report.json"}),
    }
    if figures:
        from .report_html import write_html
        from .report_plots import draw_report_figures

        say("report: drawing the figures")
        figs = draw_report_figures(
            out, report, grids, table_zone, diel_zone, ops, lts, estimates, site, tables["daily"]
        )
        report["outputs"] = sorted(set(report["outputs"]) | {f["path"].name for f in figs} | {"report.html"})
        write_html(out / "report.html", report, figs)
    write_text(out / "report.json", json.dumps(report, indent=2, ensure_ascii=False) + "\n")
    return report


def _choose_thresholds(
    db: Path, run_id: int, labels: list[str], floor: float, threshold: float | None, tp: float
) -> tuple[dict, dict, list[str]]:
    """Estimates of the verified classes, each class's operating threshold, and warnings."""
    estimates, no_sample = _estimates(db, run_id, labels, tp)
    thresholds, warnings = resolve_thresholds(labels, floor, threshold, tp, estimates, no_sample)
    for label, est in estimates.items():
        p = est["presence"]
        if abs(p["threshold"] - thresholds[label]["threshold"]) > 1e-12:
            warnings.append(
                f"{label}: presence_probability is the estimate's at {p['threshold']:g} ({p['threshold_is']}), "
                f"not at the operating threshold {thresholds[label]['threshold']:g}"
            )
    return estimates, thresholds, warnings


def _read_detections_and_soundscape(db: Path, run_id: int, data: dict, labels, thresholds, say) -> tuple:
    """Detections at each class's operating threshold, the long-term spectrum, the duty cycle (s)."""
    from .report_soundscape import duty_cycle_s

    con = open_store(db, create=False)
    try:
        starts = dict(zip(data["file_id"].tolist(), data["start_s"].tolist(), strict=True))
        lowest = min((t["threshold"] for t in thresholds.values()), default=1.0)
        dets = _read_detections(con, run_id, lowest, starts)
        say("report: building the long-term spectrogram from the store's soundscape rows")
        done = data["status"] == DONE
        cycle = duty_cycle_s(data["start_s"][done], data["duration_s"][done])
        end_s = data["start_s"] + data["duration_s"]
        lts = soundscape_from_store(con, run_id, float(data["start_s"].min()), float(end_s.max()), cycle_s=cycle)
    finally:
        con.close()
    at = np.zeros(dets["label"].size, bool)
    for label in labels:
        at |= (dets["label"] == label) & (dets["confidence"] >= thresholds[label]["threshold"])
    return {k: v[at] for k, v in dets.items()}, lts, cycle


def _presence(data, ops, labels, estimates, table_zone: Zone, diel_zone: Zone, warnings: list[str]):
    """Presence grids in the tables' and the figure's zones, and the tables' rows."""
    end_s = data["start_s"] + data["duration_s"]
    grids, tables = {}, {}
    for zone in dict.fromkeys([table_zone, diel_zone]):
        grid = presence_grid(data["start_s"], end_s, data["status"], ops["time_s"], ops["label"], labels, zone)
        probs = {
            label: probability_grid(est["presence"]["hours_probability"], grid["days"], zone)
            for label, est in estimates.items()
        }
        grids[zone] = (grid, probs)
        if estimates and not zone.whole_hours:
            where = "tables are" if zone == table_zone else "hour-of-day figure is"
            warnings.append(
                f"the {where} in {zone.name}, whose hours are not whole UTC hours: the per-hour estimate "
                "cannot be split into them, so presence_probability is left out there (give --utc-offset in "
                "whole hours to see it)"
            )
        if zone == table_zone:
            tables["hourly"], tables["daily"] = presence_tables(grid, zone, probs)
    return grids, tables


def _write_soundscape_outputs(out: Path, lts, ops, run_id: int, deployment: str, cycle) -> tuple[dict, list[Path]]:
    """soundscape.npz, the third-octave and percentile tables; and their summary for report.json."""
    from .report_soundscape import third_octave_levels, write_soundscape

    extra = {
        "run_id": np.int64(run_id),
        "deployment": np.array(deployment),
        "detection_time_utc_s": ops["time_s"],
        "detection_label": ops["label"].astype(str),
        "detection_low_hz": ops["low_hz"],
        "detection_high_hz": ops["high_hz"],
    }
    written = [write_soundscape(out / "soundscape.npz", lts, extra)]
    third = third_octave_levels(lts.psd_db, lts.band_edges_hz)
    rows = []
    for k, t in enumerate(lts.time_utc_s):
        row = {"time_utc": _iso_local(float(t), UTC_ZONE, "%Y-%m-%dT%H:%M:%S"), "seconds": float(lts.seconds[k])}
        for name, v in zip(third["names"], third["level_db"][k], strict=True):
            row[name] = None if not np.isfinite(v) else round(float(v), 2)
        rows.append(row)
    written += _write_table(rows, out / "third_octave_levels.csv")
    pct_rows = [
        {"band_low_hz": float(lo), "band_high_hz": float(hi)}
        | {f"p{int(p)}_db": _none(lts.percentile_db[i, j]) for i, p in enumerate(lts.percentiles)}
        for j, (lo, hi) in enumerate(zip(lts.band_edges_hz[:-1], lts.band_edges_hz[1:], strict=True))
    ]
    written += _write_table(pct_rows, out / "percentile_spectra.csv", parquet=False)
    summary = {
        "file": "soundscape.npz",
        "bin_s": lts.bin_s,
        "duty_cycle_s": cycle,
        "time_bins": int(lts.psd_db.shape[0]),
        "bins_with_audio": int((lts.seconds > 0).sum()),
        "bands": int(lts.psd_db.shape[1]),
        "band_range_hz": [float(lts.band_edges_hz[0]), float(lts.band_edges_hz[-1])],
        "third_octave_bands": third["names"],
    }
    return summary, written


def _class_summary(daily, hourly, thresholds, estimates, labels) -> list[dict]:
    rows = []
    for label in labels:
        d = [r for r in daily if r["label"] == label]
        h = [r for r in hourly if r["label"] == label]
        effort_h = sum(r["effort_min"] for r in d) / 60.0
        n = sum(r["detections"] for r in d)
        est = estimates.get(label)
        rows.append(
            {
                "label": label,
                "threshold": thresholds[label]["threshold"],
                "threshold_source": thresholds[label]["source"],
                "recorded_hours": round(effort_h, 3),
                "days_with_effort": sum(1 for r in d if r["effort_min"] > 0),
                "hours_with_effort": sum(1 for r in h if r["effort_min"] > 0),
                "detections": n,
                "detection_positive_days": sum(1 for r in d if r["detection_positive"] == 1),
                "detection_positive_hours": sum(1 for r in h if r["detection_positive"] == 1),
                "positive_10min_bins": sum(r["positive_10min_bins"] for r in d),
                "positive_1min_bins": sum(r["positive_1min_bins"] for r in d),
                "detections_per_recorded_hour": _none(n / effort_h) if effort_h > 0 else None,
                "expected_true_positive_hours": None if est is None else est["presence"].get("hours_expected"),
                "hours_with_failed_files": sum(r["flag_failed_files"] for r in h),
            }
        )
    return rows


def format_report(r: dict[str, Any], out: Path) -> str:
    """What the report says, in a few lines for the terminal."""
    lines = [
        f"report of run {r['run_id']} ({r['deployment']}): {r['recorded_hours']:.2f} recorded hours, "
        f"{r['files']['done']} files scored, {r['files']['failed']} failed, {r['files']['unscored']} not scored",
        f"times: tables in {r['zones']['tables']}; hour-of-day figure in {r['zones']['hour_of_day_figure']}",
    ]
    for s in r["summary"]:
        t = r["thresholds"][s["label"]]
        lines.append(
            f"{s['label']}: threshold {t['threshold']:g} ({t['source']}: {t['reason']}); {s['detections']} detections, "
            f"{s['detection_positive_hours']} of {s['hours_with_effort']} hours and {s['detection_positive_days']} "
            f"of {s['days_with_effort']} days detection-positive"
        )
    for w in r["warnings"]:
        lines.append(f"warning: {w}")
    lines.append(f"written to {out}: " + ", ".join(r["outputs"]))
    lines.append(r["caution"])
    return "\n".join(lines)


# --- the command ------------------------------------------------------------------------


def _cmd_report(args: argparse.Namespace) -> int:
    from .cli import progress_printer

    say = progress_printer(args)
    report = build_report(
        args.db,
        args.out,
        run_id=args.run,
        threshold=args.threshold,
        target_precision=args.target_precision,
        utc_offset_h=args.utc_offset,
        manifest=args.deployment,
        progress=say,
    )
    for w in report["warnings"]:
        if say:
            say(f"warning: {w}")
    print(format_report(report, Path(args.out)))
    return 0


def add_report_verb(verbs: argparse._SubParsersAction, common: argparse.ArgumentParser) -> None:
    """Register ``callsieve report`` on the command's sub-parsers."""
    p = verbs.add_parser(
        "report",
        parents=[common],
        help="presence against effort, the soundscape and figures of a run, as tables and one HTML page",
    )
    p.add_argument("db", metavar="DB", help="detection store")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the report (made if missing)")
    p.add_argument("--run", type=int, metavar="ID", help="scoring run (default: the latest)")
    p.add_argument("--threshold", type=float, metavar="P", help="operating threshold for every class (0..1)")
    p.add_argument(
        "--target-precision",
        type=float,
        metavar="P",
        help="precision the guaranteed threshold must reach, from a verified sample (default 0.9)",
    )
    p.add_argument(
        "--utc-offset",
        type=float,
        metavar="H",
        help="hours east of UTC for tables and figures (default: UTC; the hour-of-day figure uses solar time "
        "where the manifest has a longitude)",
    )
    p.add_argument(
        "--deployment",
        metavar="MANIFEST",
        help="the run's manifest, where it has moved since scoring (for the site's position)",
    )
    p.set_defaults(func=_cmd_report)
