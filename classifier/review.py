"""Verification samples and verdicts: `callsieve review sample`, `review import`, `review export`.

Three parts, in this order:

- the sampling design, as pure functions over arrays: confidence strata, allocation
  (equal, proportional, Neyman), draws without replacement, the share for double review,
  and audit segments of recording effort (W. G. Cochran, *Sampling Techniques*, 3rd ed.,
  1977, ch. 5);
- the edges: reading the run's detections from the store, the sample folder, drawing,
  extending, rendering (``review_render``) and writing ``sample.csv``;
- verdict tables in and out (docs/review.md).

The design, the extension rule and the files are described for users in docs/review.md.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
import sqlite3
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

from .errors import InputError
from .outputs import check_output, csv_header_is, write_csv, write_text
from .store import Transaction, latest_run_id, now_utc, open_store, parse_utc
from .verdicts import VERDICTS

__all__ = [
    "ALLOCATIONS",
    "VERDICTS",
    "MIN_PER_STRATUM",
    "quantile_edges",
    "stratum_index",
    "allocate",
    "neyman_weights",
    "pilot_precision",
    "draw_without_replacement",
    "double_review_mask",
    "segment_slots",
    "day_groups",
    "draw_sample",
    "extend_sample",
    "parse_verdicts",
    "import_verdicts",
    "export_verdicts",
    "format_sample_summary",
    "VERDICT_EXPORT_COLUMNS",
]

ALLOCATIONS = ("equal", "proportional", "neyman")
# Two draws per stratum: the fewest that give a within-stratum variance (Cochran 1977, §5.3).
MIN_PER_STRATUM = 2
MARKER = "sample.json"
_MARKER_KIND = "callsieve review sample"
ITEMS_DIR = "items"

# ---------------------------------------------------------------------------------------
# The design: pure functions
# ---------------------------------------------------------------------------------------


def quantile_edges(
    confidence: np.ndarray, bins: int, finer_top: float = 2.0, low: float = 0.0, high: float = 1.0
) -> np.ndarray:
    """Edges of confidence strata that cut the ranked detections at stretched quantiles.

    Parameters
    ----------
    confidence : np.ndarray [shape=(n,)], 0..1, the population's confidences
    bins : int, >= 1, number of strata asked for
    finer_top : float, >= 1
        Stratum k of K (k = 1 lowest) ends at the quantile ``1 - (1 - k/K)**finer_top``.
        1 gives K strata of equal count; 2 (the default) gives strata whose shares of the
        detections fall linearly toward the top, ``(2(K - k) + 1) / K²``, so the high
        confidences where thresholds are chosen are cut finely.
    low, high : float, the outer edges (the run's threshold floor and 1)

    Returns
    -------
    edges : np.ndarray [shape=(n_strata + 1,)], strictly increasing; stratum h holds
        ``edges[h] <= c < edges[h + 1]`` (the last one includes its upper edge).
        Inner edges sit half-way between neighbouring ranked values; edges that ties make
        coincide are merged, so there may be fewer than ``bins`` strata.
    """
    if bins < 1:
        raise ValueError("bins must be >= 1")
    if not finer_top >= 1.0:
        raise ValueError("finer_top must be >= 1")
    c = np.sort(np.asarray(confidence, dtype=float))
    k = np.arange(1, bins)
    levels = 1.0 - (1.0 - k / bins) ** finer_top
    ranks = np.round(levels * c.size).astype(int)
    # Cuts can only fall between distinct values: each rank moves to the nearest such place.
    cuts = np.flatnonzero(c[1:] > c[:-1]) + 1
    inner: list[float] = []
    if cuts.size:
        for r in ranks:
            j = int(cuts[np.argmin(np.abs(cuts - r))])
            e = 0.5 * (c[j - 1] + c[j])
            if low < e < high and (not inner or e > inner[-1]):
                inner.append(float(e))
    return np.array([low, *inner, high], dtype=float)


def stratum_index(confidence: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """0-based stratum of each confidence under ``edges`` (see :func:`quantile_edges`); -1 outside."""
    c = np.asarray(confidence, dtype=float)
    edges = np.asarray(edges, dtype=float)
    idx = np.searchsorted(edges, c, side="right") - 1
    idx = np.where(c == edges[-1], edges.size - 2, idx)
    return np.where((c < edges[0]) | (c > edges[-1]), -1, idx).astype(np.int64)


def neyman_weights(population: np.ndarray, precision: np.ndarray) -> np.ndarray:
    """Neyman allocation weights ``N_h sqrt(p_h (1 - p_h))`` (Cochran 1977, §5.5)."""
    p = np.asarray(precision, dtype=float)
    return np.asarray(population, dtype=float) * np.sqrt(p * (1.0 - p))


def pilot_precision(yes: np.ndarray, no: np.ndarray) -> np.ndarray:
    """Per-stratum precision from a pilot's verdicts, ``(yes + 1) / (yes + no + 2)``.

    Laplace's rule of succession: never 0 or 1, so no stratum's Neyman weight vanishes
    because a small pilot saw only one kind of verdict; 0.5 (the largest variance) where
    the pilot has no verdict in the stratum.
    """
    yes = np.asarray(yes, dtype=float)
    return (yes + 1.0) / (yes + np.asarray(no, dtype=float) + 2.0)


def allocate(
    weights: np.ndarray,
    n: int,
    population: np.ndarray,
    floor: int = MIN_PER_STRATUM,
    minimum: np.ndarray | None = None,
) -> np.ndarray:
    """Whole sample sizes per stratum, proportional to ``weights`` within bounds.

    Parameters
    ----------
    weights : np.ndarray [shape=(H,)], >= 0: 1 for equal allocation, N_h for
        proportional, :func:`neyman_weights` for Neyman
    n : int, total sample size
    population : np.ndarray [shape=(H,)], int, N_h, the most a stratum can give
    floor : int, the least per stratum (or N_h where smaller)
    minimum : np.ndarray [shape=(H,)], int, optional, sizes already drawn (an extension
        never takes items back)

    Returns
    -------
    n_h : np.ndarray [shape=(H,)], int, summing to ``min(n, Σ N_h)``

    Notes
    -----
    The continuous allocation ``clip(t w_h, lower_h, N_h)`` with ``t`` found so that it
    sums to ``n`` (strata that reach their bound hand their surplus to the others), then
    rounded by largest remainder, ties to the higher stratum.
    """
    w = np.asarray(weights, dtype=float)
    cap = np.asarray(population, dtype=np.int64)
    lower = np.minimum(cap, floor)
    if minimum is not None:
        lower = np.maximum(lower, np.minimum(np.asarray(minimum, dtype=np.int64), cap))
    if n >= cap.sum():
        return cap.copy()
    if lower.sum() > n:
        raise ValueError(f"a sample of {n} cannot give each stratum its least ({int(lower.sum())} in all)")
    w = np.where(cap > 0, np.maximum(w, 0.0), 0.0)
    if not np.any(w > 0):
        w = (cap > 0).astype(float)
    t_lo, t_hi = 0.0, float(np.max(cap[w > 0] / w[w > 0]))
    for _ in range(200):
        t = 0.5 * (t_lo + t_hi)
        if np.clip(t * w, lower, cap).sum() < n:
            t_lo = t
        else:
            t_hi = t
    share = np.clip(t_hi * w, lower, cap)
    out = np.clip(np.floor(share + 1e-9).astype(np.int64), lower, cap)
    rest = int(n - out.sum())
    order = np.lexsort((-np.arange(w.size), -(share - out)))  # largest remainder, then top stratum
    while rest != 0:
        moved = False
        for i in order if rest > 0 else order[::-1]:
            if rest > 0 and out[i] < cap[i]:
                out[i] += 1
                rest -= 1
                moved = True
            elif rest < 0 and out[i] > lower[i]:
                out[i] -= 1
                rest += 1
                moved = True
            if rest == 0:
                break
        if not moved:  # cannot happen within the bounds checked above
            raise ValueError("allocation could not meet its total")
    return out


def draw_without_replacement(frame: np.ndarray, taken: np.ndarray, m: int, rng: np.random.Generator) -> np.ndarray:
    """``m`` ids drawn at random, without replacement, from ``frame`` minus ``taken``.

    Together with the ``taken`` ids (an earlier simple random sample of the same frame)
    the result is again a simple random sample of the frame (Cochran 1977, §2.2).
    The frame is sorted first, so the draw depends on the seed only, not on the order
    the store returned the rows in.

    Returns
    -------
    ids : np.ndarray [shape=(m,)], in the order drawn
    """
    remaining = np.setdiff1d(np.asarray(frame), np.asarray(taken))
    if m > remaining.size:
        raise ValueError(f"cannot draw {m} from the {remaining.size} not yet drawn")
    if m == 0:
        return remaining[:0]
    return rng.choice(remaining, size=m, replace=False)


def double_review_mask(n: int, share: float, rng: np.random.Generator) -> np.ndarray:
    """Boolean mask of ``round(share * n)`` items chosen at random for two reviewers."""
    mask = np.zeros(n, dtype=bool)
    k = int(round(share * n))
    if k:
        mask[rng.choice(n, size=k, replace=False)] = True
    return mask


@dataclass(frozen=True)
class Slots:
    """The frame of audit segments: every whole stretch of ``length_s`` of recording effort.

    Attributes
    ----------
    file_id : np.ndarray [shape=(m,)], int
    start_s : np.ndarray [shape=(m,)], s from the file's start (multiples of the length)
    day : np.ndarray [shape=(m,)], object, the UTC date ('YYYY-MM-DD') the stretch starts on
    """

    file_id: np.ndarray
    start_s: np.ndarray
    day: np.ndarray


def segment_slots(files: Sequence[tuple[int, datetime, float]], length_s: float) -> Slots:
    """Cut each file's effort into consecutive stretches of ``length_s`` from its start.

    Parameters
    ----------
    files : sequence of (file_id, start_utc, duration_s); start_utc timezone-aware UTC
    length_s : float, s, > 0

    Notes
    -----
    A stretch never crosses a file's end: the last ``duration mod length`` seconds of each
    file are outside the frame (the effort covered is reported).
    """
    ids, starts, days = [], [], []
    for file_id, start_utc, duration_s in files:
        k = int(math.floor(duration_s / length_s + 1e-9))
        s = np.arange(k) * length_s
        ids.append(np.full(k, file_id, dtype=np.int64))
        starts.append(s)
        days.extend((start_utc + timedelta(seconds=float(x))).date().isoformat() for x in s)
    return Slots(
        np.concatenate(ids) if ids else np.empty(0, np.int64),
        np.concatenate(starts) if starts else np.empty(0),
        np.array(days, dtype=object),
    )


def day_groups(days: Sequence[str], m: int) -> dict[str, str]:
    """Stratum name of each UTC day: the day itself, or runs of consecutive days.

    With fewer segments ``m`` than days, days are grouped in runs of ``ceil(days / m)``
    so that every stratum gets a segment and every stretch of effort a chance above 0.
    """
    days = sorted(set(days))
    if not days:
        return {}
    size = 1 if m >= len(days) else math.ceil(len(days) / max(m, 1))
    out = {}
    for i in range(0, len(days), size):
        run = days[i : i + size]
        name = run[0] if len(run) == 1 else f"{run[0]}..{run[-1]}"
        out.update(dict.fromkeys(run, name))
    return out


# ---------------------------------------------------------------------------------------
# The store and the folder
# ---------------------------------------------------------------------------------------


def _iso(t: datetime) -> str:
    return t.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"


def _run(con: sqlite3.Connection, run_id: int) -> sqlite3.Row:
    return con.execute(
        "SELECT r.*, d.name AS deployment, d.manifest, d.channel FROM runs r "
        "JOIN deployments d ON d.deployment_id=r.deployment_id WHERE r.run_id=?",
        (run_id,),
    ).fetchone()


def _choose_label(con: sqlite3.Connection, run: sqlite3.Row, label: str | None) -> str:
    known = sorted(
        r[0] for r in con.execute("SELECT DISTINCT label FROM detections WHERE run_id=? AND superseded=0", (run[0],))
    )
    if label is None:
        if run["target"] and run["target"] in known:
            return str(run["target"])
        if len(known) == 1:
            return known[0]
        raise InputError(
            f"run {run['run_id']} has detections of several classes ({', '.join(known) or 'none'}); "
            "choose one with --label"
        )
    if label not in known:
        raise InputError(
            f"--label {label!r}: run {run['run_id']} has no detection of that class "
            f"(its classes: {', '.join(known) or 'none'})"
        )
    return label


def _population(con: sqlite3.Connection, run_id: int, label: str) -> tuple[np.ndarray, np.ndarray]:
    rows = con.execute(
        "SELECT detection_id, confidence FROM detections WHERE run_id=? AND label=? AND superseded=0 "
        "ORDER BY detection_id",
        (run_id, label),
    ).fetchall()
    ids = np.array([r[0] for r in rows], dtype=np.int64)
    conf = np.array([r[1] for r in rows], dtype=float)
    return ids, conf


def _read_marker(folder: Path) -> dict | None:
    try:
        doc = json.loads((folder / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return doc if isinstance(doc, dict) and doc.get("kind") == _MARKER_KIND else None


def _folder_sample(folder: Path, store: Path) -> tuple[bool, int | None]:
    """(is ours, sample id) for the output folder; InputError where it holds anything else.

    Ours: missing, empty, or holding the marker of a sample of this store (the id is
    None for a draw that was interrupted before it was stored).
    """
    if not folder.exists():
        return False, None
    if not folder.is_dir():
        raise InputError(f"{folder}: is a file; --out needs a folder (a new one, or an earlier sample's)")
    if not any(folder.iterdir()):
        return False, None
    doc = _read_marker(folder)
    if doc is None:
        raise InputError(f"{folder}: folder exists and is not a sample folder of callsieve; choose a new --out")
    if doc.get("store") != str(store.resolve()):
        raise InputError(f"{folder}: holds a sample of another store ({doc.get('store')}); choose a new --out")
    sid = doc.get("sample_id")
    return True, int(sid) if isinstance(sid, int) else None


def _write_marker(folder: Path, store: Path, sample_id: int | None, design: dict) -> None:
    doc = {"kind": _MARKER_KIND, "store": str(store.resolve()), "sample_id": sample_id, "design": design}
    write_text(folder / MARKER, json.dumps(doc, indent=2))


def _verdicts_on_sample(con: sqlite3.Connection, sample_id: int) -> int:
    return int(
        con.execute(
            "SELECT COUNT(*) FROM verdicts WHERE detection_id IN (SELECT detection_id FROM review_items "
            "WHERE sample_id=?)",
            (sample_id,),
        ).fetchone()[0]
    )


def _delete_sample(con: sqlite3.Connection, sample_id: int) -> None:
    """Remove a sample's design rows (never verdicts: they belong to the detections)."""
    for table in ("audit_segments", "review_items", "review_strata", "review_samples"):
        con.execute(f"DELETE FROM {table} WHERE sample_id=?", (sample_id,))


def _item_rows(con: sqlite3.Connection, ids: Sequence[int]) -> dict[int, dict]:
    """Detections with their file, by id."""
    out: dict[int, dict] = {}
    ids = [int(i) for i in ids]
    for a in range(0, len(ids), 500):
        part = ids[a : a + 500]
        for r in con.execute(
            "SELECT d.detection_id, d.file_id, d.start_s, d.end_s, d.low_hz, d.high_hz, d.label, d.confidence, "
            "d.received_level_db, d.snr_db, d.clipped, d.superseded, f.name AS file, f.start_utc AS file_start_utc, "
            "f.duration_s AS file_duration_s, dep.name AS deployment FROM detections d "
            "JOIN files f ON f.file_id=d.file_id JOIN deployments dep ON dep.deployment_id=f.deployment_id "
            f"WHERE d.detection_id IN ({','.join('?' * len(part))})",
            part,
        ):
            out[int(r["detection_id"])] = dict(r)
    return out


def _done_files(con: sqlite3.Connection, run_id: int) -> list[tuple[int, datetime, float]]:
    rows = con.execute(
        "SELECT f.file_id, f.start_utc, f.duration_s FROM run_files rf JOIN files f ON f.file_id=rf.file_id "
        "WHERE rf.run_id=? AND rf.status='done' ORDER BY f.start_utc, f.file_id",
        (run_id,),
    ).fetchall()
    return [(int(r[0]), parse_utc(r[1]), float(r[2])) for r in rows]


# ---------------------------------------------------------------------------------------
# Drawing a sample
# ---------------------------------------------------------------------------------------


def _parse_edges(text: str | Sequence[float]) -> np.ndarray:
    if isinstance(text, str):
        try:
            values = [float(x) for x in text.split(",") if x.strip()]
        except ValueError:
            raise InputError(
                f"--edges {text!r}: give numbers separated by commas, e.g. 0.1,0.3,0.5,0.7,0.9,1"
            ) from None
    else:
        values = [float(x) for x in text]
    edges = np.array(values, dtype=float)
    if edges.size < 2 or not np.all(np.isfinite(edges)) or edges[0] < 0 or edges[-1] > 1:
        raise InputError("--edges: give at least two confidences in 0..1, e.g. 0.1,0.3,0.5,0.7,0.9,1")
    if np.any(np.diff(edges) <= 0):
        raise InputError(f"--edges {','.join(f'{e:g}' for e in edges)}: must increase strictly")
    return edges


def _check_common(n: int, allocation: str, double_share: float, segments: int, segment_minutes: float | None):
    if n < 1:
        raise InputError(f"--n must be >= 1, got {n}")
    if allocation not in ALLOCATIONS:
        raise InputError(f"--allocation {allocation!r}: choose one of {', '.join(ALLOCATIONS)}")
    if not 0.0 <= double_share <= 1.0:
        raise InputError(f"--double-share must be in 0..1, got {double_share:g}")
    if segments < 0:
        raise InputError(f"--segments must be >= 0, got {segments}")
    if segments and (segment_minutes is None or not segment_minutes > 0 or not math.isfinite(segment_minutes)):
        raise InputError("--segments needs --segment-minutes L, a length in minutes > 0")


def _pilot_counts(con: sqlite3.Connection, pilot: int, run_id: int, label: str, edges: np.ndarray):
    """Per stratum of ``edges``: the pilot sample's yes and no verdicts (every reviewer's)."""
    row = con.execute("SELECT run_id, label FROM review_samples WHERE sample_id=?", (pilot,)).fetchone()
    if row is None:
        raise InputError(f"--pilot {pilot}: no such sample in the store")
    if int(row[0]) != run_id or row[1] != label:
        raise InputError(
            f"--pilot {pilot}: that sample is of run {row[0]}, label {row[1]!r}; a pilot must be of run {run_id}, "
            f"label {label!r}"
        )
    rows = con.execute(
        "SELECT d.confidence, v.verdict FROM review_items ri JOIN detections d ON d.detection_id=ri.detection_id "
        "JOIN verdicts v ON v.detection_id=ri.detection_id WHERE ri.sample_id=? AND v.verdict IN ('yes', 'no')",
        (pilot,),
    ).fetchall()
    if not rows:
        raise InputError(f"--pilot {pilot}: the sample has no yes/no verdict yet; review it first")
    h = stratum_index(np.array([r[0] for r in rows]), edges)
    yes = np.array([r[1] == "yes" for r in rows])
    n_strata = edges.size - 1
    return (
        np.bincount(h[(h >= 0) & yes], minlength=n_strata),
        np.bincount(h[(h >= 0) & ~yes], minlength=n_strata),
    )


def _weights(allocation: str, population: np.ndarray, precision: np.ndarray | None) -> np.ndarray:
    if allocation == "equal":
        return np.ones(population.size)
    if allocation == "proportional":
        return population.astype(float)
    return neyman_weights(population, precision)


def _rngs(seed: int, extension: int) -> list[np.random.Generator]:
    """Independent streams for items, order, double review and segments of one draw."""
    return [np.random.default_rng(s) for s in np.random.SeedSequence([seed, extension]).spawn(4)]


def _draw_segments(
    con: sqlite3.Connection, run_id: int, m: int, minutes: float, rng: np.random.Generator, existing: dict | None
) -> tuple[list[dict], dict]:
    """Audit segments (new ones) and the segment design after the draw.

    ``existing``: the design's earlier ``segments`` entry (frame per stratum, drawn per
    stratum, minutes); its stretches are never drawn again.
    """
    length_s = minutes * 60.0
    files = _done_files(con, run_id)
    if not files:
        raise InputError(f"run {run_id} has no file scored 'done'; there is no recording effort to draw from")
    slots = segment_slots(files, length_s)
    if slots.file_id.size == 0:
        raise InputError(f"--segment-minutes {minutes:g}: longer than every scored file; choose a shorter length")
    if existing:
        groups = existing["day_strata"]
        if set(slots.day) - set(groups):
            raise InputError(
                "the run has recording effort on days the sample's segment design does not know; draw a new sample"
            )
    else:
        groups = day_groups(list(slots.day), m)
    stratum = np.array([groups[d] for d in slots.day], dtype=object)
    names = sorted(set(groups.values()))
    frame = np.array([int(np.sum(stratum == s)) for s in names])
    taken_keys: set[tuple[int, float]] = set()
    before = np.zeros(len(names), dtype=np.int64)
    if existing:
        if [existing["frame"].get(s) for s in names] != frame.tolist():
            raise InputError(
                "the run's recording effort changed since the sample's segments were drawn; draw a new sample"
            )
        for r in con.execute(
            "SELECT file_id, start_s, stratum FROM audit_segments WHERE sample_id=?", (existing["sample_id"],)
        ):
            taken_keys.add((int(r[0]), round(float(r[1]), 6)))
            before[names.index(r[2])] += 1
    total = int(before.sum()) + m
    try:
        sizes = allocate(frame.astype(float), total, frame, floor=1, minimum=before)
    except ValueError as exc:
        raise InputError(f"--segments {m}: {exc}") from None
    key = np.array([f"{f}:{round(s, 6)}" for f, s in zip(slots.file_id, slots.start_s, strict=True)], dtype=object)
    taken = np.array([f"{f}:{s}" for f, s in taken_keys], dtype=object)
    new: list[dict] = []
    for j, name in enumerate(names):
        idx = np.flatnonzero(stratum == name)
        chosen = draw_without_replacement(key[idx], taken, int(sizes[j] - before[j]), rng)
        pos = {k: i for i, k in zip(idx, key[idx], strict=True)}
        for k in chosen:
            i = pos[k]
            new.append(
                {
                    "file_id": int(slots.file_id[i]),
                    "start_s": float(slots.start_s[i]),
                    "end_s": float(slots.start_s[i] + length_s),
                    "stratum": name,
                }
            )
    effort = sum(d for _, _, d in files)
    design = {
        "minutes": minutes,
        "day_strata": groups,
        "frame": dict(zip(names, frame.tolist(), strict=True)),
        "drawn": dict(zip(names, sizes.tolist(), strict=True)),
        "effort_s": effort,
        "effort_in_frame": round(float(slots.file_id.size * length_s / effort), 6) if effort else 0.0,
    }
    return new, design


@dataclass
class _Plan:
    """What one draw (new or extension) decided, before anything is written."""

    strata: list[dict]  # stratum, low, high, population, sampled (after the draw)
    new_items: list[dict]  # detection_id, stratum, draw_order, double_review
    new_segments: list[dict]
    segment_design: dict | None


def _plan_items(
    ids: np.ndarray,
    conf: np.ndarray,
    strata: list[dict],
    n_total: int,
    allocation: str,
    precision: np.ndarray | None,
    before: dict[int, np.ndarray],
    double_share: float,
    first_order: int,
    rngs: list[np.random.Generator],
) -> list[dict]:
    """Allocate ``n_total`` over ``strata`` (never below what ``before`` holds) and draw the new items."""
    population = np.array([s["population"] for s in strata], dtype=np.int64)
    minimum = np.array([before.get(s["stratum"], np.empty(0)).size for s in strata], dtype=np.int64)
    try:
        sizes = allocate(_weights(allocation, population, precision), n_total, population, minimum=minimum)
    except ValueError as exc:
        raise InputError(
            f"--n: {exc}; give a larger --n or fewer strata (at least {MIN_PER_STRATUM} per stratum)"
        ) from None
    drawn: list[tuple[int, int]] = []
    for j, s in enumerate(strata):
        in_h = (conf >= s["low"]) & ((conf < s["high"]) | ((conf == s["high"]) & s["closed"]))
        frame = ids[in_h]
        taken = before.get(s["stratum"], np.empty(0, np.int64))
        new = draw_without_replacement(frame, taken, int(sizes[j] - minimum[j]), rngs[0])
        drawn += [(int(d), s["stratum"]) for d in new]
        s["sampled"] = int(sizes[j])
    order = rngs[1].permutation(len(drawn))
    double = double_review_mask(len(drawn), double_share, rngs[2])
    return [
        {"detection_id": d, "stratum": h, "draw_order": first_order + int(order[i]), "double_review": int(double[i])}
        for i, (d, h) in enumerate(drawn)
    ]


def _strata_from_edges(edges: np.ndarray, conf: np.ndarray, first_number: int = 1) -> list[dict]:
    h = stratum_index(conf, edges)
    counts = np.bincount(h[h >= 0], minlength=edges.size - 1)
    return [
        {
            "stratum": first_number + j,
            "low": float(edges[j]),
            "high": float(edges[j + 1]),
            "closed": j == edges.size - 2,
            "population": int(counts[j]),
            "sampled": 0,
        }
        for j in range(edges.size - 1)
    ]


def _check_draw(allocation, pilot, context_s, jobs, edges, bins, finer_top) -> None:
    if allocation == "neyman" and pilot is None:
        raise InputError(
            "--allocation neyman needs --pilot SAMPLE_ID, a reviewed sample giving each stratum's precision"
        )
    if not context_s >= 0:
        raise InputError(f"context must be >= 0 s, got {context_s:g}")
    if jobs < 1:
        raise InputError(f"--jobs must be >= 1, got {jobs}")
    if edges is None and (bins < 1 or not finer_top >= 1):
        raise InputError(f"--bins must be >= 1 and --finer-top >= 1, got {bins} and {finer_top:g}")


def _replaceable(con: sqlite3.Connection, folder: Path, old_sample: int | None, replace: bool) -> int | None:
    """The earlier sample of the folder that a new draw replaces (None: none); refuse a reviewed one."""
    if (
        old_sample is None
        or not con.execute("SELECT 1 FROM review_samples WHERE sample_id=?", (old_sample,)).fetchone()
    ):
        return None
    k = _verdicts_on_sample(con, old_sample)
    if k and not replace:
        raise InputError(
            f"{folder}: holds sample {old_sample}, with {k} verdicts; extend it with --extend {old_sample}, "
            "or choose a new --out"
        )
    return old_sample


def _stratify(
    threshold: float, conf: np.ndarray, bins: int, finer_top: float, edges: str | Sequence[float] | None
) -> tuple[np.ndarray, dict]:
    """Stratum edges and the rule's record: quantile strata from the run's floor to 1, or fixed edges."""
    if edges is not None:
        return _parse_edges(edges), {"rule": "edges"}
    low = min(threshold, float(conf.min()))
    cut = quantile_edges(conf, bins, finer_top, low=low, high=max(1.0, float(conf.max())))
    return cut, {"rule": "quantile", "bins": bins, "finer_top": finer_top}


def _commit_sample(
    con: sqlite3.Connection,
    run_id: int,
    label: str,
    seed: int,
    design: dict,
    folder: Path,
    plan: _Plan,
    rendered: dict[int, dict],
    old_sample: int | None,
) -> int:
    """Store a new sample in one transaction (replacing ``old_sample``); return its id.

    Files of the replaced sample that the new one does not reuse are removed afterwards.
    """
    old_files = _item_files(con, old_sample) if old_sample is not None else []
    with Transaction(con):
        if old_sample is not None:
            _delete_sample(con, old_sample)
        cur = con.execute(
            "INSERT INTO review_samples (run_id, label, design, seed, blind, folder, created_utc) "
            "VALUES (?, ?, ?, ?, ?, ?, ?)",
            (run_id, label, json.dumps(design), seed, int(design["blind"]), str(folder.resolve()), now_utc()),
        )
        sample_id = int(cur.lastrowid)
        _store_plan(con, sample_id, plan, rendered)
    keep = {p for r in rendered.values() for p in (r["image"], r["clip"], r.get("clip_fast")) if p}
    for rel in old_files:
        if rel not in keep:
            (folder / rel).unlink(missing_ok=True)
    return sample_id


def draw_sample(
    db: str | Path,
    out_dir: str | Path,
    run_id: int | None = None,
    label: str | None = None,
    n: int = 120,
    bins: int = 6,
    finer_top: float = 2.0,
    edges: str | Sequence[float] | None = None,
    allocation: str = "equal",
    pilot: int | None = None,
    seed: int = 0,
    segments: int = 0,
    segment_minutes: float | None = None,
    blind: bool = False,
    double_share: float = 0.0,
    context_s: float = 3.0,
    jobs: int = 1,
    deployment: str | Path | None = None,
    render: bool = True,
    replace: bool = False,
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Draw a stratified random sample of a run's detections of one class, render it, store it.

    Parameters
    ----------
    db : detection store
    out_dir : folder for sample.csv, segments.csv and the items; new, empty, or an earlier
        sample's of this store (replaced when nobody has given a verdict on it)
    run_id : int, optional, default the latest run
    label : str, optional; default the run's target, or its only class
    n : int, sample size (all detections when the run has fewer)
    bins, finer_top : quantile strata (:func:`quantile_edges`), unless ``edges``
    edges : fixed stratum edges, "0.1,0.3,...,1" or a sequence, 0..1 increasing
    allocation : 'equal', 'proportional' or 'neyman' (needs ``pilot``)
    pilot : int, optional, a sample id of the same run and label whose verdicts give
        each stratum's precision for Neyman allocation
    seed : int, the draw's random seed
    segments, segment_minutes : audit segments of recording effort (count, minutes each)
    blind : hide confidence and label from reviewers, shuffle the order
    double_share : float, 0..1, share of items marked for two reviewers
    context_s : float, s, audio shown and played on each side of a detection
    jobs : int, processes rendering items
    deployment : manifest, where the run's deployment has moved since scoring
    render : False stores the design without images and clips (tests, dry runs)
    replace : replace an earlier sample in ``out_dir`` even when it has verdicts
        (the verdicts stay in the store; only the design rows go)
    progress : callable taking a line, or None

    Returns
    -------
    dict
        The summary printed by :func:`format_sample_summary`.
    """
    say = progress or (lambda line: None)
    _check_common(n, allocation, double_share, segments, segment_minutes)
    _check_draw(allocation, pilot, context_s, jobs, edges, bins, finer_top)
    store, folder = Path(db), Path(out_dir)
    con = open_store(store, create=False)
    try:
        ours, old_sample = _folder_sample(folder, store)
        run_id = latest_run_id(con, run_id)
        run = _run(con, run_id)
        label = _choose_label(con, run, label)
        old_sample = _replaceable(con, folder, old_sample, replace)
        ids, conf = _population(con, run_id, label)
        if ids.size == 0:
            raise InputError(f"run {run_id} has no detection of {label!r}")
        cut, rule = _stratify(float(run["threshold"]), conf, bins, finer_top, edges)
        strata = _strata_from_edges(cut, conf)
        outside = int(np.sum(stratum_index(conf, cut) < 0))
        precision = None
        if allocation == "neyman":
            yes, no = _pilot_counts(con, int(pilot), run_id, label, cut)
            precision = pilot_precision(yes, no)
        rngs = _rngs(seed, 0)
        items = _plan_items(ids, conf, strata, n, allocation, precision, {}, double_share, 1, rngs)
        new_segments, segment_design = [], None
        if segments:
            new_segments, segment_design = _draw_segments(con, run_id, segments, segment_minutes, rngs[3], None)
        design = {
            **rule,
            "edges": [float(e) for e in cut],
            "allocation": allocation,
            "pilot": pilot,
            "pilot_precision": None if precision is None else [round(float(p), 6) for p in precision],
            "n": n,
            "min_per_stratum": MIN_PER_STRATUM,
            "blind": blind,
            "double_share": double_share,
            "context_s": context_s,
            "outside_edges": outside,
            "segments": segment_design,
            "extensions": [],
        }
        folder.mkdir(parents=True, exist_ok=True)
        if not ours:
            # Claimed before rendering, so that a rerun after a crash recognises the folder;
            # a folder that is already ours keeps its marker until the new sample is stored.
            _write_marker(folder, store, None, design)
        plan = _Plan(strata, items, new_segments, segment_design)
        details = _item_rows(con, [it["detection_id"] for it in items])
        rendered = _render(con, run, details, items, folder, design, jobs, deployment, render, say)
        sample_id = _commit_sample(con, run_id, label, seed, design, folder, plan, rendered, old_sample)
        _write_marker(folder, store, sample_id, design)
        return _finish(con, sample_id, folder, store, replaced=old_sample, say=say)
    finally:
        con.close()


def extend_sample(
    db: str | Path,
    sample_id: int,
    out_dir: str | Path,
    n: int = 0,
    edges: str | Sequence[float] | None = None,
    allocation: str | None = None,
    pilot: int | None = None,
    seed: int | None = None,
    segments: int = 0,
    segment_minutes: float | None = None,
    jobs: int = 1,
    deployment: str | Path | None = None,
    render: bool = True,
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Add items (and strata, and audit segments) to an earlier sample, keeping its design.

    Parameters
    ----------
    sample_id : the sample to extend; ``out_dir`` must be its folder
    n : int, items to add, allocated over all strata by ``allocation`` (default the
        sample's) so that each stratum's total follows the rule without falling below what
        it holds
    edges : optional; the sample's strata as fixed edges plus new intervals that overlap
        none of them (new strata, numbered after the existing ones)
    seed : the extension's seed; default the sample's, with the extension's number
    segments, segment_minutes : audit segments to add (the minutes must be the sample's)

    Notes
    -----
    The extension rule (docs/review.md): every stratum's frame must be as it was when the
    sample was drawn (same count, every drawn item still current), else the run changed
    and a new sample is needed. New items are drawn from the stratum's not-yet-drawn
    detections, so each stratum stays a simple random sample of n_h' from N_h, and every
    item of the stratum, old and new, gets inclusion probability n_h'/N_h. Earlier items,
    their draw order and all verdicts stay.
    """
    say = progress or (lambda line: None)
    store, folder = Path(db), Path(out_dir)
    con = open_store(store, create=False)
    try:
        row = con.execute("SELECT * FROM review_samples WHERE sample_id=?", (sample_id,)).fetchone()
        if row is None:
            raise InputError(f"--extend {sample_id}: no such sample in {store}")
        ours, in_folder = _folder_sample(folder, store)
        if in_folder != sample_id:
            raise InputError(
                f"{folder}: is not the folder of sample {sample_id} (that is {row['folder']}); give it as --out"
            )
        design = json.loads(row["design"])
        allocation = allocation or design["allocation"]
        pilot = _check_extend(n, allocation, pilot, design, edges, segments, segment_minutes)
        seg_design = design.get("segments")
        run = _run(con, int(row["run_id"]))
        label = str(row["label"])
        ids, conf = _population(con, int(row["run_id"]), label)
        strata, before = _current_frame(con, sample_id, conf)
        added = []
        if edges is not None:
            added = _new_strata(_parse_edges(edges), strata, conf)
            strata += added
            strata.sort(key=lambda s: s["low"])
        precision = None
        if allocation == "neyman":
            cut = np.array([s["low"] for s in strata] + [strata[-1]["high"]])
            contiguous = all(a["high"] == b["low"] for a, b in zip(strata, strata[1:], strict=False))
            if not contiguous:
                raise InputError("Neyman allocation of an extension needs strata without gaps between them")
            yes, no = _pilot_counts(con, int(pilot), int(row["run_id"]), label, cut)
            precision = pilot_precision(yes, no)
        number = len(design.get("extensions", [])) + 1
        eseed = int(row["seed"]) if seed is None else seed
        rngs = _rngs(eseed, number)
        held = int(sum(v.size for v in before.values()))
        first_order = 1 + int(
            con.execute(
                "SELECT COALESCE(MAX(draw_order), 0) FROM review_items WHERE sample_id=?", (sample_id,)
            ).fetchone()[0]
        )
        items = _plan_items(
            ids,
            conf,
            strata,
            held + n,
            allocation,
            precision,
            before,
            design.get("double_share", 0.0),
            first_order,
            rngs,
        )
        new_segments, new_seg_design = [], seg_design
        if segments:
            existing = None if not seg_design else seg_design | {"sample_id": sample_id}
            new_segments, new_seg_design = _draw_segments(
                con, int(row["run_id"]), segments, segment_minutes, rngs[3], existing
            )
        design["segments"] = new_seg_design
        design["edges"] = sorted({float(s["low"]) for s in strata} | {float(s["high"]) for s in strata})
        design["extensions"] = [
            *design.get("extensions", []),
            {
                "number": number,
                "utc": now_utc(),
                "seed": eseed,
                "allocation": allocation,
                "pilot": pilot,
                "items_added": len(items),
                "strata_added": [s["stratum"] for s in added],
                "segments_added": len(new_segments),
            },
        ]
        plan = _Plan(strata, items, new_segments, new_seg_design)
        details = _item_rows(con, [it["detection_id"] for it in items])
        rendered = _render(con, run, details, items, folder, design, jobs, deployment, render, say)
        with Transaction(con):
            con.execute(
                "UPDATE review_samples SET design=?, folder=? WHERE sample_id=?",
                (json.dumps(design), str(folder.resolve()), sample_id),
            )
            _store_plan(con, sample_id, plan, rendered)
        _write_marker(folder, store, sample_id, design)
        return _finish(con, sample_id, folder, store, replaced=None, say=say, added=len(items))
    finally:
        con.close()


def _check_extend(n, allocation, pilot, design, edges, segments, segment_minutes) -> int | None:
    """Refuse an extension the design cannot take; return the pilot to use."""
    _check_common(max(n, 1), allocation, design.get("double_share", 0.0), segments, segment_minutes)
    if n < 0:
        raise InputError(f"--n must be >= 0 when extending, got {n}")
    if n == 0 and not segments and edges is None:
        raise InputError("--extend needs what to add: --n items, --edges with new strata, or --segments")
    if allocation == "neyman" and pilot is None:
        pilot = design.get("pilot")
        if pilot is None:
            raise InputError("--allocation neyman needs --pilot SAMPLE_ID")
    seg_design = design.get("segments")
    if segments and seg_design and segment_minutes != seg_design["minutes"]:
        raise InputError(
            f"--segment-minutes {segment_minutes:g}: the sample's segments last {seg_design['minutes']:g} "
            "minutes; extend with the same length"
        )
    return pilot


def _current_frame(
    con: sqlite3.Connection, sample_id: int, conf: np.ndarray
) -> tuple[list[dict], dict[int, np.ndarray]]:
    """The sample's strata and drawn ids per stratum, after checking its frame is unchanged.

    Raises
    ------
    InputError
        Where a sampled detection was superseded or a stratum's count changed (the run was
        rescored or grew): the design no longer describes the run.
    """
    strata = [
        dict(r) | {"closed": False}
        for r in con.execute("SELECT * FROM review_strata WHERE sample_id=? ORDER BY low", (sample_id,))
    ]
    strata[-1]["closed"] = strata[-1]["high"] == max(s["high"] for s in strata)
    drawn: dict[int, list[int]] = {}
    for r in con.execute(
        "SELECT ri.stratum, ri.detection_id, d.superseded FROM review_items ri "
        "JOIN detections d ON d.detection_id=ri.detection_id WHERE ri.sample_id=?",
        (sample_id,),
    ):
        if r[2]:
            raise InputError(
                f"sample {sample_id}: detection {r[1]} has been superseded by a rescoring since the draw; "
                "the frame changed, so draw a new sample (its verdicts stay in the store)"
            )
        drawn.setdefault(int(r[0]), []).append(int(r[1]))
    for s in strata:
        in_h = (conf >= s["low"]) & ((conf < s["high"]) | ((conf == s["high"]) & s["closed"]))
        if int(in_h.sum()) != s["population"]:
            raise InputError(
                f"sample {sample_id}: stratum {s['stratum']} ({s['low']:g}..{s['high']:g}) held "
                f"{s['population']} detections when drawn and holds {int(in_h.sum())} now; the run changed, "
                "so draw a new sample (its verdicts stay in the store)"
            )
    return strata, {h: np.array(v, dtype=np.int64) for h, v in drawn.items()}


def _new_strata(edges: np.ndarray, strata: list[dict], conf: np.ndarray) -> list[dict]:
    """Strata of ``edges`` that are not among ``strata``; each must overlap none of them."""
    out = []
    number = max(s["stratum"] for s in strata) + 1
    top = max(s["high"] for s in strata)
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        same = [
            s for s in strata if math.isclose(s["low"], lo, abs_tol=1e-9) and math.isclose(s["high"], hi, abs_tol=1e-9)
        ]
        if same:
            continue
        if any(lo < s["high"] and s["low"] < hi for s in strata):
            raise InputError(
                f"--edges: the interval {lo:g}..{hi:g} overlaps a stratum of the sample; an extension may add "
                "strata only where the sample has none (its strata: "
                + ", ".join(f"{s['low']:g}..{s['high']:g}" for s in strata)
                + ")"
            )
        if math.isclose(lo, top, abs_tol=1e-12):
            # The sample's top stratum holds its upper edge; a stratum above would share it.
            raise InputError(
                f"--edges: a stratum above the sample's top edge {top:g} would share that edge; draw a new sample"
            )
        closed = hi >= top and hi == edges[-1]
        in_h = (conf >= lo) & ((conf < hi) | ((conf == hi) & closed))
        out.append(
            {
                "stratum": number,
                "low": float(lo),
                "high": float(hi),
                "closed": closed,
                "population": int(in_h.sum()),
                "sampled": 0,
            }
        )
        number += 1
    if not out:
        raise InputError("--edges: gives no stratum the sample does not already have")
    return out


def _store_plan(con: sqlite3.Connection, sample_id: int, plan: _Plan, rendered: dict[int, dict]) -> None:
    """Write strata, new items, probabilities of all items, and new segments (inside a transaction)."""
    for s in plan.strata:
        con.execute(
            "INSERT INTO review_strata (sample_id, stratum, low, high, population, sampled) VALUES (?, ?, ?, ?, ?, ?) "
            "ON CONFLICT(sample_id, stratum) DO UPDATE SET sampled=excluded.sampled",
            (sample_id, s["stratum"], s["low"], s["high"], s["population"], s["sampled"]),
        )
    prob = {s["stratum"]: (s["sampled"] / s["population"] if s["population"] else 0.0) for s in plan.strata}
    for it in plan.new_items:
        r = rendered.get(it["detection_id"], {})
        con.execute(
            "INSERT INTO review_items (sample_id, detection_id, stratum, inclusion_probability, draw_order, image, "
            "clip, double_review, clip_fast, clip_speed, clip_gain_db) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (
                sample_id,
                it["detection_id"],
                it["stratum"],
                prob[it["stratum"]],
                it["draw_order"],
                r.get("image"),
                r.get("clip"),
                it["double_review"],
                r.get("clip_fast"),
                r.get("speed"),
                r.get("gain_db"),
            ),
        )
    # An extension raises n_h: every item of the stratum, old and new, has probability n_h'/N_h.
    con.executemany(
        "UPDATE review_items SET inclusion_probability=? WHERE sample_id=? AND stratum=?",
        [(p, sample_id, h) for h, p in prob.items()],
    )
    if plan.segment_design is not None:
        seg_prob = {
            s: plan.segment_design["drawn"][s] / plan.segment_design["frame"][s] for s in plan.segment_design["frame"]
        }
        con.executemany(
            "INSERT INTO audit_segments (sample_id, file_id, start_s, end_s, stratum, inclusion_probability) "
            "VALUES (?, ?, ?, ?, ?, ?)",
            [
                (sample_id, g["file_id"], g["start_s"], g["end_s"], g["stratum"], seg_prob[g["stratum"]])
                for g in plan.new_segments
            ],
        )
        con.executemany(
            "UPDATE audit_segments SET inclusion_probability=? WHERE sample_id=? AND stratum=?",
            [(p, sample_id, s) for s, p in seg_prob.items()],
        )


def _item_files(con: sqlite3.Connection, sample_id: int) -> list[str]:
    return [
        p
        for r in con.execute("SELECT image, clip, clip_fast FROM review_items WHERE sample_id=?", (sample_id,))
        for p in r
        if p
    ]


# ---------------------------------------------------------------------------------------
# Rendering (the work is in review_render; here the specs are built and the jobs run)
# ---------------------------------------------------------------------------------------


def _render(
    con: sqlite3.Connection,
    run: sqlite3.Row,
    details: dict[int, dict],
    items: list[dict],
    folder: Path,
    design: dict,
    jobs: int,
    deployment: str | Path | None,
    render: bool,
    say: Callable[[str], None],
) -> dict[int, dict]:
    """Image and clips of each new item, by detection id (empty dicts when not rendering)."""
    if not render or not items:
        return {}
    from .deployment import load_deployment
    from .review_render import ItemSpec, render_items

    params = json.loads(run["parameters"])
    manifest = Path(deployment) if deployment is not None else Path(run["manifest"] or params.get("manifest", ""))
    if not manifest.is_file():
        raise InputError(
            f"{manifest}: the run's deployment manifest is not there; restore it, or give its new place with "
            "--deployment MANIFEST"
        )
    dep = load_deployment(manifest)
    if dep.name != run["deployment"]:
        raise InputError(
            f"{manifest}: deployment {dep.name!r}, but run {run['run_id']} scored {run['deployment']!r}; "
            "give that deployment's manifest"
        )
    settings = params.get("settings", {})
    (folder / ITEMS_DIR).mkdir(parents=True, exist_ok=True)
    blind = bool(design["blind"])
    specs = []
    for it in items:
        d = details[it["detection_id"]]
        view0 = d["start_s"] - design["context_s"]
        view1 = d["end_s"] + design["context_s"]
        others = [
            (r[0], r[1], r[2], r[3])
            for r in con.execute(
                "SELECT start_s, end_s, low_hz, high_hz FROM detections WHERE run_id=? AND file_id=? AND superseded=0 "
                "AND detection_id<>? AND end_s>? AND start_s<?",
                (run["run_id"], d["file_id"], d["detection_id"], view0, view1),
            )
        ]
        start_utc = parse_utc(d["file_start_utc"]) + timedelta(seconds=d["start_s"])
        title = f"{d['file']}  {_iso(start_utc)}"
        if not blind:
            title += f"  {d['label']} {d['confidence']:.2f}"
        specs.append(
            ItemSpec(
                detection_id=d["detection_id"],
                path=str(dep.audio_dir / d["file"]),
                channel=dep.channel,
                chain=dep.chain,
                start_s=d["start_s"],
                end_s=d["end_s"],
                low_hz=d["low_hz"],
                high_hz=d["high_hz"],
                context_s=design["context_s"],
                resolution_hz=settings.get("resolution_hz"),
                hop_s=settings.get("frame_hop_s"),
                band_low_hz=settings.get("low_hz"),
                band_high_hz=settings.get("high_hz"),
                title=title,
                others=tuple(others),
                folder=str(folder),
                stem=f"{ITEMS_DIR}/d{d['detection_id']}",
            )
        )
    return render_items(specs, jobs=jobs, progress=say)


# ---------------------------------------------------------------------------------------
# sample.csv, segments.csv and the summary
# ---------------------------------------------------------------------------------------

SAMPLE_COLUMNS = [
    "detection_id",
    "stratum",
    "inclusion_probability",
    "image",
    "clip",
    "clip_gain_db",
    "clip_fast",
    "clip_speed",
    "draw_order",
    "double_review",
    "stratum_low",
    "stratum_high",
    "deployment",
    "file",
    "start_s",
    "end_s",
    "start_utc",
    "low_hz",
    "high_hz",
    "label",
    "confidence",
    "received_level_db",
    "snr_db",
]
# What a blind sample keeps from reviewers: the score, the class, and the score range of the stratum.
BLIND_HIDDEN = ("label", "confidence", "stratum_low", "stratum_high")
SEGMENT_COLUMNS = [
    "deployment",
    "file",
    "start_s",
    "end_s",
    "inclusion_probability",
    "start_utc",
    "stratum",
    "segment_id",
]


def _sample_rows(con: sqlite3.Connection, sample_id: int, blind: bool) -> list[dict]:
    rows = con.execute(
        "SELECT ri.*, s.low AS stratum_low, s.high AS stratum_high, d.start_s, d.end_s, d.low_hz, d.high_hz, d.label, "
        "d.confidence, d.received_level_db, d.snr_db, f.name AS file, f.start_utc AS file_start_utc, "
        "dep.name AS deployment FROM review_items ri "
        "JOIN review_strata s ON s.sample_id=ri.sample_id AND s.stratum=ri.stratum "
        "JOIN detections d ON d.detection_id=ri.detection_id JOIN files f ON f.file_id=d.file_id "
        "JOIN deployments dep ON dep.deployment_id=f.deployment_id WHERE ri.sample_id=?",
        (sample_id,),
    ).fetchall()
    out = []
    for r in rows:
        row = dict(r)
        row["start_utc"] = _iso(parse_utc(row["file_start_utc"]) + timedelta(seconds=row["start_s"]))
        if blind:
            for k in BLIND_HIDDEN:
                row.pop(k, None)
        out.append(row)
    if blind:
        out.sort(key=lambda r: r["draw_order"])  # the random order reviewers get
    else:
        out.sort(key=lambda r: (-r["stratum_low"], -r["confidence"], r["detection_id"]))
    return out


def _finish(
    con: sqlite3.Connection,
    sample_id: int,
    folder: Path,
    store: Path,
    replaced: int | None,
    say: Callable[[str], None],
    added: int | None = None,
) -> dict[str, Any]:
    """Write sample.csv and segments.csv from the store; return the summary."""
    row = con.execute("SELECT * FROM review_samples WHERE sample_id=?", (sample_id,)).fetchone()
    design = json.loads(row["design"])
    blind = bool(row["blind"])
    rows = _sample_rows(con, sample_id, blind)
    columns = [c for c in SAMPLE_COLUMNS if not (blind and c in BLIND_HIDDEN)]
    write_csv(folder / "sample.csv", columns, rows)
    seg_rows = [
        dict(r) | {"start_utc": _iso(parse_utc(r["file_start_utc"]) + timedelta(seconds=r["start_s"]))}
        for r in con.execute(
            "SELECT g.segment_id, g.start_s, g.end_s, g.stratum, g.inclusion_probability, f.name AS file, "
            "f.start_utc AS file_start_utc, dep.name AS deployment FROM audit_segments g "
            "JOIN files f ON f.file_id=g.file_id JOIN deployments dep ON dep.deployment_id=f.deployment_id "
            "WHERE g.sample_id=? ORDER BY f.start_utc, g.start_s",
            (sample_id,),
        )
    ]
    if seg_rows or design.get("segments"):
        write_csv(folder / "segments.csv", SEGMENT_COLUMNS, seg_rows)
    strata = [dict(r) for r in con.execute("SELECT * FROM review_strata WHERE sample_id=? ORDER BY low", (sample_id,))]
    say(f"review: sample {sample_id} written to {folder}")
    return {
        "sample_id": sample_id,
        "run_id": int(row["run_id"]),
        "label": row["label"],
        "seed": int(row["seed"]),
        "blind": blind,
        "design": design,
        "strata": strata,
        "items": len(rows),
        "added": added,
        "double_review": sum(int(r["double_review"]) for r in rows),
        "segments": len(seg_rows),
        "folder": str(folder),
        "store": str(store),
        "replaced": replaced,
    }


def format_sample_summary(summary: dict[str, Any]) -> str:
    """A page about a drawn (or extended) sample, for the terminal."""
    d = summary["design"]
    if d["rule"] == "quantile":
        rule = f"{d['bins']} quantile strata (finer toward the top, {d['finer_top']:g})"
    else:
        rule = "fixed edges"
    head = (
        f"sample {summary['sample_id']} of run {summary['run_id']}, label {summary['label']}: "
        f"{summary['items']} detections"
        + (f" ({summary['added']} added)" if summary.get("added") is not None else "")
        + f"; {rule}, {d['allocation']} allocation, seed {summary['seed']}"
        + (", blind" if summary["blind"] else "")
    )
    lines = [head, f"  {'stratum':>7}  {'confidence':<13} {'N_h':>8} {'n_h':>5} {'n_h/N_h':>8}"]
    for s in summary["strata"]:
        p = s["sampled"] / s["population"] if s["population"] else 0.0
        lines.append(
            f"  {s['stratum']:>7}  {s['low']:.3f}-{s['high']:.3f}   {s['population']:>8} {s['sampled']:>5} {p:>8.4f}"
        )
    if d.get("outside_edges"):
        lines.append(f"  {d['outside_edges']} detections lie outside the edges and cannot be drawn")
    if summary["double_review"]:
        lines.append(f"  {summary['double_review']} items marked for two reviewers")
    if d.get("segments"):
        sd = d["segments"]
        lines.append(
            f"  {summary['segments']} audit segments of {sd['minutes']:g} min in {len(sd['frame'])} day strata "
            f"(the frame covers {100 * sd['effort_in_frame']:.1f} % of the effort)"
        )
    if summary.get("replaced"):
        lines.append(f"  replaced sample {summary['replaced']} that this folder held")
    lines.append(f"  index {Path(summary['folder']) / 'sample.csv'}; store {summary['store']}")
    return "\n".join(lines)


# ---------------------------------------------------------------------------------------
# Verdicts in and out
# ---------------------------------------------------------------------------------------

VERDICT_EXPORT_COLUMNS = [
    "detection_id",
    "verdict",
    "reviewer",
    "note",
    "recorded_utc",
    "run_id",
    "label",
    "confidence",
    "superseded",
    "sample_id",
    "stratum",
    "inclusion_probability",
]
_REQUIRED = ("detection_id", "verdict", "reviewer")
_UTC = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d{1,9})?Z$")
MAX_REVIEWER = 100
MAX_NOTE = 2000


@dataclass(frozen=True)
class VerdictRow:
    """One checked row of a verdict table.

    Attributes
    ----------
    line : int, the line of the file where the row ends (the header is line 1)
    detection_id : int
    verdict : str, 'yes', 'no' or 'unsure'
    reviewer : str
    note : str or None
    recorded_utc : str or None, normalised to microseconds ('...T12:00:00.000000Z')
    """

    line: int
    detection_id: int
    verdict: str
    reviewer: str
    note: str | None
    recorded_utc: str | None


def _check_row(cells: dict[str, str]) -> tuple[VerdictRow | None, str | None]:
    raw_id = cells["detection_id"].strip()
    if not raw_id.isascii() or not raw_id.isdigit():
        return None, f"detection_id {raw_id!r} is not a whole number"
    verdict = cells["verdict"].strip().lower()
    if verdict not in VERDICTS:
        return None, f"verdict {cells['verdict']!r} must be one of {', '.join(VERDICTS)}"
    reviewer = cells["reviewer"].strip()
    if not reviewer:
        return None, "reviewer is empty; every verdict needs the name of who gave it"
    if len(reviewer) > MAX_REVIEWER or not reviewer.isprintable():
        return None, f"reviewer {reviewer[:40]!r} must be printable text of at most {MAX_REVIEWER} characters"
    note = (cells.get("note") or "").strip() or None
    if note is not None and len(note) > MAX_NOTE:
        return None, f"note is longer than {MAX_NOTE} characters"
    stamp = (cells.get("recorded_utc") or "").strip() or None
    if stamp is not None:
        try:
            if not _UTC.match(stamp):
                raise ValueError
            t = datetime.fromisoformat(stamp[:-1][:26]).replace(tzinfo=UTC)
        except ValueError:
            return None, f"recorded_utc {stamp[:40]!r} is not a UTC time like 2031-04-11T12:00:00Z"
        stamp = t.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    return VerdictRow(0, int(raw_id), verdict, reviewer, note, stamp), None


def parse_verdicts(data: bytes | str, name: str = "verdicts") -> list[VerdictRow]:
    """Read and check a verdict table (docs/review.md): every row, before anything is written.

    Parameters
    ----------
    data : the file's bytes (UTF-8, a byte-order mark allowed) or text
    name : the file's name, for messages

    Returns
    -------
    list of VerdictRow, in file order (blank lines skipped)

    Raises
    ------
    InputError
        One line naming the file, the first bad line and why, and how many more are bad.
    """
    if isinstance(data, bytes):
        try:
            text = data.decode("utf-8-sig")
        except UnicodeDecodeError as exc:
            raise InputError(f"{name}: not UTF-8 text (byte {exc.start}); save the table as UTF-8 CSV") from None
    else:
        text = data.removeprefix("\ufeff")
    if "\x00" in text:
        raise InputError(f"{name}: holds NUL characters; not a text table")
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    try:
        header = None
        for header_row in reader:
            if any(c.strip() for c in header_row):
                header = [c.strip().lower() for c in header_row]
                break
        if header is None:
            raise InputError(f"{name}: empty; a verdict table needs the header detection_id,verdict,reviewer[,note]")
        header_line = reader.line_num
        missing = [c for c in _REQUIRED if c not in header]
        if missing:
            raise InputError(
                f"{name} line {header_line}: the header lacks {', '.join(missing)}; "
                "it needs detection_id,verdict,reviewer and may have note"
            )
        dup = sorted({c for c in header if c and header.count(c) > 1})
        if dup:
            raise InputError(f"{name} line {header_line}: column {dup[0]!r} appears twice in the header")
        rows: list[VerdictRow] = []
        errors: list[str] = []
        for cells in reader:
            line = reader.line_num
            if not any(c.strip() for c in cells):
                continue
            if len(cells) != len(header):
                errors.append(f"line {line}: {len(cells)} fields where the header has {len(header)}")
                continue
            row, why = _check_row(dict(zip(header, cells, strict=True)))
            if why is not None:
                errors.append(f"line {line}: {why}")
                continue
            rows.append(VerdictRow(line, row.detection_id, row.verdict, row.reviewer, row.note, row.recorded_utc))
    except csv.Error as exc:
        raise InputError(f"{name} line {reader.line_num}: not readable as CSV ({exc})") from None
    if errors:
        more = f" ({len(errors) - 1} more bad rows)" if len(errors) > 1 else ""
        raise InputError(f"{name} {errors[0]}{more}; nothing was imported")
    return rows


def import_verdicts(db: str | Path, verdicts_csv: str | Path) -> dict[str, Any]:
    """Import a verdict table into the store: all rows checked, then one transaction.

    A row replaces the store's verdict of the same reviewer on the same detection when it
    is the later one: rows without ``recorded_utc`` take the import's time; rows carrying
    it (an exported table) replace only an older verdict. An unchanged verdict is left
    as it is, so importing a table twice changes nothing. Within one table, the last row
    of a reviewer on a detection counts.

    Returns
    -------
    dict
        ``rows``, ``inserted``, ``replaced``, ``unchanged``, ``older`` (rows older than
        the store's verdict, not applied), ``duplicates`` (rows overridden by a later row
        of the file), ``superseded`` (rows on detections a rescoring superseded; kept).
    """
    path = Path(verdicts_csv)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise InputError(f"{path}: no such verdict table") from None
    except IsADirectoryError:
        raise InputError(f"{path}: is a folder; give the verdict table (CSV)") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read: {exc.strerror}") from None
    rows = parse_verdicts(data, str(path))
    con = open_store(db, create=False)
    try:
        stamp = now_utc()
        latest: dict[tuple[int, str], VerdictRow] = {}
        for r in rows:
            key = (r.detection_id, r.reviewer)
            old = latest.get(key)
            if old is None or (r.recorded_utc or stamp) >= (old.recorded_utc or stamp):
                latest[key] = r
        duplicates = len(rows) - len(latest)
        ids = sorted({r.detection_id for r in rows})
        with Transaction(con):
            superseded: dict[int, int] = {}
            for a in range(0, len(ids), 500):
                part = ids[a : a + 500]
                for det, sup in con.execute(
                    "SELECT detection_id, superseded FROM detections "
                    f"WHERE detection_id IN ({','.join('?' * len(part))})",
                    part,
                ):
                    superseded[int(det)] = int(sup)
            unknown = [r for r in rows if r.detection_id not in superseded]
            if unknown:
                more = f" ({len(unknown) - 1} more rows name unknown detections)" if len(unknown) > 1 else ""
                raise InputError(
                    f"{path} line {unknown[0].line}: detection_id {unknown[0].detection_id} is not in {db}{more}; "
                    "nothing was imported"
                )
            counts = {"inserted": 0, "replaced": 0, "unchanged": 0, "older": 0}
            for (det, reviewer), r in sorted(latest.items()):
                when = r.recorded_utc or stamp
                old = con.execute(
                    "SELECT verdict, note, recorded_utc FROM verdicts WHERE detection_id=? AND reviewer=?",
                    (det, reviewer),
                ).fetchone()
                if old is None:
                    con.execute(
                        "INSERT INTO verdicts (detection_id, reviewer, verdict, note, recorded_utc) "
                        "VALUES (?, ?, ?, ?, ?)",
                        (det, reviewer, r.verdict, r.note, when),
                    )
                    counts["inserted"] += 1
                elif (old["verdict"], old["note"]) == (r.verdict, r.note):
                    counts["unchanged"] += 1
                elif when < old["recorded_utc"]:
                    counts["older"] += 1
                else:
                    con.execute(
                        "UPDATE verdicts SET verdict=?, note=?, recorded_utc=? WHERE detection_id=? AND reviewer=?",
                        (r.verdict, r.note, when, det, reviewer),
                    )
                    counts["replaced"] += 1
        return {
            "file": str(path),
            "rows": len(rows),
            **counts,
            "duplicates": duplicates,
            "superseded": sum(1 for (det, _) in latest if superseded[det]),
        }
    finally:
        con.close()


def export_verdicts(db: str | Path, out: str | Path, force: bool = False) -> dict[str, Any]:
    """Write every verdict of the store as CSV (docs/review.md), by detection and reviewer.

    ``sample_id``, ``stratum`` and ``inclusion_probability`` come from the latest sample
    holding the detection (empty when none does). The file may replace an earlier verdict
    export, never another file unless ``force``; it is written under a temporary name and
    renamed.

    Returns
    -------
    dict
        ``rows``, ``superseded`` (verdicts on superseded detections), ``out``.
    """
    out = check_output(
        out,
        option="--out",
        suffixes=(".csv",),
        inputs=(db,),
        ours=lambda path: csv_header_is(path, VERDICT_EXPORT_COLUMNS),
        what="a verdict table",
        force=force,
    )
    con = open_store(db, create=False)
    try:
        rows = con.execute(
            "SELECT v.detection_id, v.verdict, v.reviewer, v.note, v.recorded_utc, d.run_id, d.label, d.confidence, "
            "d.superseded, ri.sample_id, ri.stratum, ri.inclusion_probability FROM verdicts v "
            "JOIN detections d ON d.detection_id=v.detection_id "
            "LEFT JOIN (SELECT detection_id, MAX(sample_id) AS sample_id FROM review_items GROUP BY detection_id) last "
            "ON last.detection_id=v.detection_id "
            "LEFT JOIN review_items ri ON ri.detection_id=last.detection_id AND ri.sample_id=last.sample_id "
            "ORDER BY v.detection_id, v.reviewer"
        ).fetchall()
    finally:
        con.close()
    write_csv(out, VERDICT_EXPORT_COLUMNS, (tuple(r) for r in rows))
    return {"rows": len(rows), "superseded": sum(int(r["superseded"]) for r in rows), "out": str(out)}
