"""`callsieve review serve`: a local web page where reviewers give verdicts on a sample.

The server is the standard library's ``ThreadingHTTPServer``: one thread per request and
one SQLite connection per request, so no connection is ever shared between threads.
Every verdict is written at once in a short IMMEDIATE transaction; the store's
UNIQUE(detection_id, reviewer) makes a reviewer's later verdict replace the earlier one,
while other reviewers' verdicts are kept.

The page (``review_page``) talks to a small JSON API, documented in docs/review-serve.md:

- ``GET /api/session?reviewer=R``: the sample, its classes and strata.
- ``GET /api/queue?reviewer=R``: the reviewer's order of items (theirs to judge first).
- ``GET /api/items/<detection_id>?reviewer=R``: an item's facts, image and clips.
- ``POST /api/verdicts``: save a verdict.
- ``GET /api/progress?reviewer=R``: progress overall, per stratum and of this reviewer.
- ``GET /api/agreement``: Cohen's kappa on items judged by two reviewers.
- ``GET /files/<path>``: an image or clip of the sample folder, nothing outside it.
"""

from __future__ import annotations

import argparse
import hashlib
import ipaddress
import json
import math
import re
import signal
import socket
import sqlite3
import sys
import threading
import time
from collections.abc import Callable
from datetime import timedelta
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any
from urllib.parse import parse_qs, quote, unquote, urlsplit

from . import review_page
from .agreement import cohen_kappa
from .errors import InputError
from .store import Transaction, now_utc, open_store, parse_utc
from .verdicts import VERDICTS, compose_note, parse_note

__all__ = [
    "VERDICTS",
    "ApiError",
    "ReviewApp",
    "ReviewServer",
    "add_serve_verb",
    "compose_note",
    "make_server",
    "parse_note",
    "serve",
    "validate_reviewer",
]

DEFAULT_PORT = 8765
LEASE_S = 300.0  # an item opened by a reviewer is held for them this long (or until judged)
MAX_NOTE_CHARS = 2000
MAX_BODY_BYTES = 16 * 1024
# Reviewer names travel in URLs, CSV files and SQL parameters: keep them plain.
_REVIEWER = re.compile(r"[^\W_][\w.@-]{0,63}")
# What the sample folder may serve, by suffix.
_CONTENT_TYPES = {
    ".png": "image/png",
    ".jpg": "image/jpeg",
    ".jpeg": "image/jpeg",
    ".webp": "image/webp",
    ".wav": "audio/wav",
    ".flac": "audio/flac",
    ".ogg": "audio/ogg",
    ".mp3": "audio/mpeg",
}
# A time-compressed clip sits beside the normal one, named <clip stem><sep>x<factor>.<ext>.
_FAST_CLIP = re.compile(r"^(?P<stem>.+?)[._-]x(?P<factor>\d+(?:\.\d+)?)$")


class ApiError(Exception):
    """A request that cannot be served: an HTTP status and a message for the JSON reply."""

    def __init__(self, status: int, message: str) -> None:
        super().__init__(message)
        self.status = int(status)
        self.message = message


def validate_reviewer(name: Any) -> str:
    """The reviewer name, or ApiError 400.

    A name is 1 to 64 characters: letters, digits, '_', '.', '-', '@', starting with a
    letter or digit (so it needs no quoting in a URL or a CSV file).
    """
    if not isinstance(name, str) or not name:
        raise ApiError(400, "a reviewer name is required (letters, digits, '_', '.', '-', '@'; up to 64)")
    if not _REVIEWER.fullmatch(name):
        raise ApiError(
            400,
            f"reviewer name {name[:80]!r} is not allowed: use 1-64 letters, digits, '_', '.', '-', '@', "
            "starting with a letter or digit",
        )
    return name


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _finite(x: Any) -> Any:
    """JSON has no NaN: non-finite floats become null."""
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def _utc_at(start_utc: str, offset_s: float) -> str:
    """ISO 8601 UTC ('Z', milliseconds) of a time ``offset_s`` after a file's UTC start."""
    t = parse_utc(start_utc) + timedelta(seconds=float(offset_s))
    return t.strftime("%Y-%m-%dT%H:%M:%S.") + f"{t.microsecond // 1000:03d}Z"


class ReviewApp:
    """What the review server knows and does, apart from HTTP.

    Parameters
    ----------
    db : str or Path
        The detection store holding a verification sample.
    sample_id : int, optional
        The sample to serve (default: the latest).
    reviewer : str, optional
        The reviewer name the page starts with.
    log : callable, optional
        Where one-line messages go (default: stderr).

    Notes
    -----
    Every method opens its own SQLite connection and closes it before returning, so one
    ``ReviewApp`` serves any number of threads. Leases (which reviewer has an item open)
    live in memory only: they steer who gets which item next, never what is stored.
    """

    def __init__(
        self,
        db: str | Path,
        sample_id: int | None = None,
        reviewer: str | None = None,
        log: Callable[[str], None] | None = None,
    ) -> None:
        self.db = Path(db)
        self.log = log or (lambda line: print(line, file=sys.stderr, flush=True))
        if reviewer is not None:
            try:
                validate_reviewer(reviewer)
            except ApiError as exc:
                raise InputError(f"--reviewer: {exc.message}") from None
        self.default_reviewer = reviewer
        con = open_store(self.db, create=False)
        try:
            self._load_sample(con, sample_id)
        finally:
            con.close()
        self._leases: dict[int, dict[str, float]] = {}
        self._lock = threading.Lock()

    # -- set-up ---------------------------------------------------------------------------

    def _load_sample(self, con: sqlite3.Connection, sample_id: int | None) -> None:
        if sample_id is None:
            row = con.execute("SELECT * FROM review_samples ORDER BY sample_id DESC LIMIT 1").fetchone()
            if row is None:
                raise InputError(
                    f"{self.db}: the store holds no verification sample; draw one with 'callsieve review sample'"
                )
        else:
            row = con.execute("SELECT * FROM review_samples WHERE sample_id=?", (sample_id,)).fetchone()
            if row is None:
                known = [r[0] for r in con.execute("SELECT sample_id FROM review_samples ORDER BY sample_id")]
                raise InputError(
                    f"--sample {sample_id}: no such verification sample in {self.db} (samples: {known or 'none'})"
                )
        self.sample_id = int(row["sample_id"])
        self.run_id = int(row["run_id"])
        self.label = row["label"]
        self.blind = bool(row["blind"])
        self.seed = row["seed"]
        try:
            self.design = json.loads(row["design"]) if row["design"] else {}
        except json.JSONDecodeError:
            self.design = {}
        folder = Path(row["folder"])
        if not folder.is_absolute():
            # A relative folder is taken from the store's own folder, else the working one.
            folder = self.db.parent / folder if (self.db.parent / folder).is_dir() else Path.cwd() / folder
        self.folder = folder.resolve()
        run = con.execute("SELECT classes FROM runs WHERE run_id=?", (self.run_id,)).fetchone()
        try:
            self.classes = [str(c) for c in json.loads(run["classes"])] if run else []
        except (json.JSONDecodeError, TypeError):
            self.classes = []
        self.items_total = int(
            con.execute("SELECT COUNT(*) FROM review_items WHERE sample_id=?", (self.sample_id,)).fetchone()[0]
        )

    def connect(self) -> sqlite3.Connection:
        """A fresh connection for one request: autocommit, a busy timeout, rows by name."""
        con = sqlite3.connect(self.db, timeout=30.0, isolation_level=None, check_same_thread=True)
        con.row_factory = sqlite3.Row
        con.execute("PRAGMA busy_timeout=30000")
        con.execute("PRAGMA foreign_keys=ON")
        return con

    def _with_con(self, fn: Callable[[sqlite3.Connection], Any]) -> Any:
        con = self.connect()
        try:
            return fn(con)
        finally:
            con.close()

    # -- leases ---------------------------------------------------------------------------

    def _lease(self, detection_id: int, reviewer: str) -> None:
        with self._lock:
            self._leases.setdefault(detection_id, {})[reviewer] = time.monotonic()

    def _release(self, detection_id: int, reviewer: str) -> None:
        with self._lock:
            self._leases.get(detection_id, {}).pop(reviewer, None)

    def _holders(self) -> dict[int, set[str]]:
        """Who has which item open now (expired leases dropped)."""
        now = time.monotonic()
        with self._lock:
            out = {}
            for det, held in list(self._leases.items()):
                for who, t in list(held.items()):
                    if now - t > LEASE_S:
                        del held[who]
                if held:
                    out[det] = set(held)
                else:
                    del self._leases[det]
            return out

    # -- reads ----------------------------------------------------------------------------

    def session(self, reviewer: str | None) -> dict:
        """The sample as the page needs it: design, classes, strata, keys of the verdicts."""
        if reviewer is not None:
            validate_reviewer(reviewer)

        def read(con: sqlite3.Connection) -> dict:
            strata = [
                {
                    "stratum": r["stratum"],
                    "low": r["low"],
                    "high": r["high"],
                    "population": r["population"],
                    "sampled": r["sampled"],
                }
                for r in con.execute(
                    "SELECT * FROM review_strata WHERE sample_id=? ORDER BY stratum", (self.sample_id,)
                )
            ]
            # Counted now, not at start: `review sample --extend` may add items while serving.
            items, double = con.execute(
                "SELECT COUNT(*), COALESCE(SUM(double_review), 0) FROM review_items WHERE sample_id=?",
                (self.sample_id,),
            ).fetchone()
            return {
                "sample_id": self.sample_id,
                "run_id": self.run_id,
                "label": self.label,
                "blind": self.blind,
                "design": self.design,
                "classes": self.classes,
                "verdicts": list(VERDICTS),
                "items": int(items),
                "double_review_items": int(double),
                "strata": strata,
                "reviewer": reviewer,
                "default_reviewer": self.default_reviewer,
            }

        return self._with_con(read)

    def _items_and_verdicts(self, con: sqlite3.Connection) -> tuple[list[sqlite3.Row], dict[int, dict[str, str]]]:
        items = con.execute(
            "SELECT detection_id, stratum, draw_order, double_review FROM review_items WHERE sample_id=?",
            (self.sample_id,),
        ).fetchall()
        verdicts: dict[int, dict[str, str]] = {}
        for r in con.execute(
            "SELECT v.detection_id, v.reviewer, v.verdict FROM verdicts v JOIN review_items ri "
            "ON ri.detection_id = v.detection_id AND ri.sample_id = ?",
            (self.sample_id,),
        ):
            verdicts.setdefault(int(r["detection_id"]), {})[r["reviewer"]] = r["verdict"]
        return items, verdicts

    def _base_order(self, items: list[sqlite3.Row]) -> list[sqlite3.Row]:
        if self.blind:
            # A blind sample hides the strata's order too: a fixed shuffle, the same for
            # every reviewer and every visit.
            def key(r: sqlite3.Row) -> str:
                return hashlib.sha256(f"{self.sample_id}:{r['detection_id']}".encode()).hexdigest()

            return sorted(items, key=key)
        return sorted(items, key=lambda r: (r["draw_order"], r["detection_id"]))

    def queue(self, reviewer: str) -> dict:
        """The order in which ``reviewer`` sees the items: theirs to judge first.

        An item needs one reviewer, or two when it is marked for double review. It is
        ``open`` to this reviewer when they have not judged it and fewer reviewers than it
        needs have judged it or hold it open now; ``done`` when they judged it;
        ``others`` when other reviewers have it covered. The order is open items, then
        done ones, then the others, each in the sample's order.
        """
        validate_reviewer(reviewer)
        items, verdicts = self._with_con(self._items_and_verdicts)
        holders = self._holders()
        groups: dict[str, list[dict]] = {"open": [], "done": [], "others": []}
        for r in self._base_order(items):
            det = int(r["detection_id"])
            given = verdicts.get(det, {})
            required = 2 if r["double_review"] else 1
            mine = given.get(reviewer)
            taken = set(given) | (holders.get(det, set()) - {reviewer})
            taken.discard(reviewer)
            if mine is not None:
                status = "done"
            elif len(taken) < required:
                status = "open"
            else:
                status = "others"
            groups[status].append(
                {
                    "detection_id": det,
                    "status": status,
                    "verdict": mine,
                    "reviewers": len(given),
                    "required": required,
                }
            )
        order = groups["open"] + groups["done"] + groups["others"]
        return {
            "reviewer": reviewer,
            "items": order,
            "open": len(groups["open"]),
            "done": len(groups["done"]),
            "others": len(groups["others"]),
        }

    def item(self, detection_id: int, reviewer: str) -> dict:
        """One item's facts, files and this reviewer's verdict; the item is leased to them."""
        validate_reviewer(reviewer)

        def read(con: sqlite3.Connection) -> tuple[Any, Any, Any, int]:
            entry = con.execute(
                "SELECT * FROM review_items WHERE sample_id=? AND detection_id=?", (self.sample_id, detection_id)
            ).fetchone()
            row = con.execute(
                "SELECT d.*, f.name AS file, f.start_utc AS file_start_utc, dep.name AS deployment "
                "FROM detections d JOIN files f ON f.file_id = d.file_id "
                "JOIN deployments dep ON dep.deployment_id = f.deployment_id WHERE d.detection_id=?",
                (detection_id,),
            ).fetchone()
            mine = con.execute(
                "SELECT verdict, note, recorded_utc FROM verdicts WHERE detection_id=? AND reviewer=?",
                (detection_id, reviewer),
            ).fetchone()
            n = con.execute("SELECT COUNT(*) FROM verdicts WHERE detection_id=?", (detection_id,)).fetchone()[0]
            return entry, row, mine, int(n)

        entry, row, mine, n_verdicts = self._with_con(read)
        if entry is None or row is None:
            raise ApiError(404, f"detection {detection_id} is not in sample {self.sample_id}")
        self._lease(detection_id, reviewer)
        facts = {
            "detection_id": detection_id,
            "deployment": row["deployment"],
            "file": row["file"],
            "start_s": row["start_s"],
            "end_s": row["end_s"],
            "duration_s": round(row["end_s"] - row["start_s"], 6),
            "start_utc": _utc_at(row["file_start_utc"], row["start_s"]),
            "end_utc": _utc_at(row["file_start_utc"], row["end_s"]),
            "low_hz": row["low_hz"],
            "high_hz": row["high_hz"],
            "received_level_db": row["received_level_db"],
            "snr_db": row["snr_db"],
            "clipped": bool(row["clipped"]),
            "superseded": bool(row["superseded"]),
        }
        if not self.blind:
            # Blind review hides what would anchor the reviewer: score, class and stratum.
            facts.update(
                label=row["label"],
                confidence=row["confidence"],
                stratum=entry["stratum"],
                inclusion_probability=entry["inclusion_probability"],
            )
        note, call_type = parse_note(mine["note"] if mine else None)
        return {
            "detection_id": detection_id,
            "facts": {k: _finite(v) for k, v in facts.items()},
            "image": self._file_url(entry["image"]),
            "clips": self._clips(entry),
            "clip_gain_db": _finite(entry["clip_gain_db"]) if "clip_gain_db" in entry.keys() else None,
            "double_review": bool(entry["double_review"]),
            "required": 2 if entry["double_review"] else 1,
            "reviewers": n_verdicts,
            "mine": None
            if mine is None
            else {
                "verdict": mine["verdict"],
                "note": note,
                "call_type": call_type,
                "recorded_utc": mine["recorded_utc"],
            },
        }

    def _file_url(self, rel: str | None) -> str | None:
        if not rel:
            return None
        return "/files/" + quote(str(rel).replace("\\", "/"), safe="/")

    def _clips(self, entry: sqlite3.Row) -> list[dict]:
        """The item's clip at normal speed and its time-compressed version(s).

        The compressed clip is the item's ``clip_fast`` (with ``clip_speed``) where the
        store has those columns; otherwise files beside the clip named
        ``<clip stem>-x<factor>.<ext>`` (or with '_' or '.' before the x).
        """
        clip = entry["clip"]
        if not clip:
            return []
        clips = [{"speed": 1.0, "url": self._file_url(clip), "label": "×1"}]
        keys = entry.keys()
        if "clip_fast" in keys and entry["clip_fast"]:
            m = _FAST_CLIP.match(Path(entry["clip_fast"]).stem)
            speed = entry["clip_speed"] if "clip_speed" in keys and entry["clip_speed"] else None
            factor = float(speed or (m.group("factor") if m else 0) or 0) or None
            label = f"×{factor:g}" if factor else "fast"
            return clips + [{"speed": factor, "url": self._file_url(entry["clip_fast"]), "label": label}]
        rel = Path(str(clip).replace("\\", "/"))
        here = self.folder / rel.parent
        try:
            siblings = sorted(here.iterdir()) if here.is_dir() else []
        except OSError:
            siblings = []
        for p in siblings:
            m = _FAST_CLIP.match(p.stem)
            if m and m.group("stem") == rel.stem and p.suffix.lower() in _CONTENT_TYPES and p.is_file():
                factor = float(m.group("factor"))
                url = self._file_url((rel.parent / p.name).as_posix())
                clips.append({"speed": factor, "url": url, "label": f"×{factor:g}"})
        return clips

    def progress(self, reviewer: str | None = None) -> dict:
        """Progress overall, per stratum, and of ``reviewer`` (when given)."""
        if reviewer is not None:
            validate_reviewer(reviewer)

        def read(con: sqlite3.Connection) -> tuple[list, dict, list]:
            items, verdicts = self._items_and_verdicts(con)
            strata = con.execute(
                "SELECT * FROM review_strata WHERE sample_id=? ORDER BY stratum", (self.sample_id,)
            ).fetchall()
            return items, verdicts, strata

        items, verdicts, strata_rows = self._with_con(read)
        per = {
            int(r["stratum"]): {
                "stratum": int(r["stratum"]),
                "low": r["low"],
                "high": r["high"],
                "population": r["population"],
                "sampled": r["sampled"],
            }
            for r in strata_rows
        }
        counts = {"yes": 0, "no": 0, "unsure": 0}
        overall = {"items": 0, "complete": 0, "started": 0, "verdicts": dict(counts)}
        mine = {"judged": 0, "open": 0, "verdicts": dict(counts)}
        reviewers: dict[str, int] = {}
        for r in items:
            det, required = int(r["detection_id"]), 2 if r["double_review"] else 1
            given = verdicts.get(det, {})
            s = per.setdefault(int(r["stratum"]), {"stratum": int(r["stratum"]), "low": None, "high": None})
            s.setdefault("items", 0)
            s.setdefault("complete", 0)
            s.setdefault("verdicts", dict(counts))
            s["items"] += 1
            overall["items"] += 1
            overall["started"] += bool(given)
            done = len(given) >= required
            overall["complete"] += done
            s["complete"] += done
            for who, v in given.items():
                overall["verdicts"][v] += 1
                s["verdicts"][v] += 1
                reviewers[who] = reviewers.get(who, 0) + 1
            if reviewer is not None:
                if reviewer in given:
                    mine["judged"] += 1
                    mine["verdicts"][given[reviewer]] += 1
                elif len(given) < required:
                    mine["open"] += 1
        for s in per.values():
            s.setdefault("items", 0)
            s.setdefault("complete", 0)
            s.setdefault("verdicts", dict(counts))
        return {
            "sample_id": self.sample_id,
            "overall": overall,
            "strata": [per[k] for k in sorted(per)],
            "reviewers": [{"reviewer": k, "verdicts": v} for k, v in sorted(reviewers.items())],
            "mine": mine if reviewer is not None else None,
        }

    def agreement(self) -> dict:
        """Cohen's kappa between reviewers on items that two or more of them judged.

        ``overall`` pairs, on every such item, its first two verdicts (by time): the
        first and second reviewer need not be the same people from item to item, as in
        double review by a team. ``pairs`` gives kappa for each pair of reviewers over the
        items both judged.
        """

        def read(con: sqlite3.Connection) -> list[sqlite3.Row]:
            return con.execute(
                "SELECT v.detection_id, v.reviewer, v.verdict, ri.double_review FROM verdicts v "
                "JOIN review_items ri ON ri.detection_id = v.detection_id AND ri.sample_id = ? "
                "ORDER BY v.detection_id, v.recorded_utc, v.verdict_id",
                (self.sample_id,),
            ).fetchall()

        rows = self._with_con(read)
        by_item: dict[int, list[tuple[str, str]]] = {}
        for r in rows:
            by_item.setdefault(int(r["detection_id"]), []).append((r["reviewer"], r["verdict"]))
        first, second = [], []
        pairs: dict[tuple[str, str], tuple[list[str], list[str]]] = {}
        for given in by_item.values():
            if len(given) < 2:
                continue
            first.append(given[0][1])
            second.append(given[1][1])
            named = dict(given)
            names = sorted(named)
            for i, a in enumerate(names):
                for b in names[i + 1 :]:
                    pa, pb = pairs.setdefault((a, b), ([], []))
                    pa.append(named[a])
                    pb.append(named[b])
        overall = cohen_kappa(first, second, labels=VERDICTS).as_dict()
        return {
            "sample_id": self.sample_id,
            "categories": list(VERDICTS),
            "method": "Cohen's kappa; 95 % interval from the large-sample standard error of "
            "Fleiss, Cohen & Everitt (1969)",
            "overall": overall,
            "pairs": [
                {"reviewers": [a, b], **cohen_kappa(va, vb, labels=VERDICTS).as_dict()}
                for (a, b), (va, vb) in sorted(pairs.items())
            ],
        }

    # -- the one write --------------------------------------------------------------------

    def save_verdict(
        self,
        reviewer: str,
        detection_id: int,
        verdict: str,
        note: str | None = None,
        call_type: str | None = None,
    ) -> dict:
        """Store one verdict at once; a later one by the same reviewer replaces it.

        Parameters
        ----------
        reviewer : str
            Who judged (see ``validate_reviewer``).
        detection_id : int
            An item of the served sample.
        verdict : {'yes', 'no', 'unsure'}
        note : str, optional
            Free text, up to 2000 characters.
        call_type : str, optional
            Another of the run's classes heard instead; stored at the head of the note as
            ``[type: CLASS]`` so that the verdict stays one of yes / no / unsure.

        Returns
        -------
        dict
            The stored row (``verdict``, ``note``, ``call_type``, ``recorded_utc``) and
            ``replaced``: whether it replaced an earlier verdict of this reviewer.
        """
        validate_reviewer(reviewer)
        if isinstance(detection_id, bool) or not isinstance(detection_id, int):
            raise ApiError(400, "detection_id must be an integer")
        if verdict not in VERDICTS:
            raise ApiError(400, f"verdict must be one of yes, no, unsure; got {str(verdict)[:40]!r}")
        if note is not None and not isinstance(note, str):
            raise ApiError(400, "note must be text")
        if note and len(note) > MAX_NOTE_CHARS:
            raise ApiError(400, f"note is {len(note)} characters; at most {MAX_NOTE_CHARS}")
        if note and any(ord(c) < 32 and c not in "\t\n\r" for c in note):
            raise ApiError(400, "note holds control characters")
        if call_type is not None and call_type != "":
            if not isinstance(call_type, str) or call_type not in self.classes:
                raise ApiError(400, f"call_type must be one of the run's classes {self.classes}")
        else:
            call_type = None
        if note:
            # One line per note keeps the verdict CSV one row per verdict in every reader.
            note = " ".join(note.split())
        stored_note = compose_note(note, call_type)
        recorded = now_utc()

        def write(con: sqlite3.Connection) -> bool:
            with Transaction(con):
                known = con.execute(
                    "SELECT 1 FROM review_items WHERE sample_id=? AND detection_id=?", (self.sample_id, detection_id)
                ).fetchone()
                if known is None:
                    raise ApiError(404, f"detection {detection_id} is not in sample {self.sample_id}")
                before = con.execute(
                    "SELECT 1 FROM verdicts WHERE detection_id=? AND reviewer=?", (detection_id, reviewer)
                ).fetchone()
                con.execute(
                    "INSERT INTO verdicts (detection_id, reviewer, verdict, note, recorded_utc) VALUES (?, ?, ?, ?, ?) "
                    "ON CONFLICT(detection_id, reviewer) DO UPDATE SET verdict=excluded.verdict, note=excluded.note, "
                    "recorded_utc=excluded.recorded_utc",
                    (detection_id, reviewer, verdict, stored_note, recorded),
                )
            return before is not None

        replaced = self._with_con(write)
        self._release(detection_id, reviewer)
        return {
            "detection_id": detection_id,
            "reviewer": reviewer,
            "verdict": verdict,
            "note": note or "",
            "call_type": call_type,
            "stored_note": stored_note,
            "recorded_utc": recorded,
            "replaced": replaced,
        }

    # -- files ----------------------------------------------------------------------------

    def resolve_file(self, raw: str) -> Path:
        """The file of the sample folder named by ``raw`` (the URL path after /files/, still encoded).

        Refused: encoded twice, backslashes, NUL, absolute paths, empty, '.' or '..'
        segments (400); anything that resolves outside the folder, symbolic links
        included (403); suffixes other than images and audio (403); missing files (404).
        """
        if not raw or "\\" in raw or "\x00" in raw:
            raise ApiError(400, "bad file path")
        try:
            rel = unquote(raw, errors="strict")
        except UnicodeDecodeError:
            raise ApiError(400, "bad file path (not UTF-8)") from None
        if "%" in rel:
            raise ApiError(400, "bad file path (encoded twice)")
        if "\\" in rel or "\x00" in rel or rel.startswith("/") or re.match(r"^[A-Za-z]:", rel):
            raise ApiError(400, "bad file path (absolute or with a backslash)")
        parts = rel.split("/")
        if any(p in ("", ".", "..") for p in parts):
            raise ApiError(400, "bad file path (empty, '.' or '..' segment)")
        suffix = Path(parts[-1]).suffix.lower()
        if suffix not in _CONTENT_TYPES:
            raise ApiError(403, "only the sample's images and sound clips are served")
        try:
            resolved = (self.folder / rel).resolve(strict=True)
        except (OSError, RuntimeError):
            raise ApiError(404, "no such file in the sample folder") from None
        if not resolved.is_relative_to(self.folder):
            raise ApiError(403, "the path leads outside the sample folder")
        if not resolved.is_file():
            raise ApiError(404, "no such file in the sample folder")
        return resolved


# -- HTTP ---------------------------------------------------------------------------------


class _Handler(BaseHTTPRequestHandler):
    """Routes requests to the ``ReviewApp``; every failure is a JSON reply, never a traceback."""

    server: ReviewServer
    server_version = "callsieve-review"
    protocol_version = "HTTP/1.0"
    # A garbled request line would otherwise get an HTTP/0.9 reply: a body with no status.
    default_request_version = "HTTP/1.0"
    timeout = 30  # a client that stops talking frees its thread

    # -- plumbing -------------------------------------------------------------------------

    def version_string(self) -> str:
        return self.server_version  # no Python version in the Server header

    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 - the base class's name
        # Quiet by default: only failures are logged, one line each (see _fail).
        pass

    def send_error(self, code: int, message: str | None = None, explain: str | None = None) -> None:
        """Errors found by http.server itself (bad request line, unknown method) as JSON too."""
        try:
            self._send_json({"error": message or HTTPStatus(code).phrase}, status=code)
        except OSError:
            pass

    def _send_bytes(self, body: bytes, content_type: str, status: int = 200, extra: dict | None = None) -> None:
        self.send_response(status)
        self.send_header("Content-Type", content_type)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "no-store")
        self.send_header("X-Content-Type-Options", "nosniff")
        self.send_header("Referrer-Policy", "no-referrer")
        for k, v in (extra or {}).items():
            self.send_header(k, v)
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def _send_json(self, obj: Any, status: int = 200) -> None:
        body = json.dumps(obj, ensure_ascii=False, allow_nan=False).encode()
        self._send_bytes(body, "application/json; charset=utf-8", status)

    def _fail(self, status: int, message: str) -> None:
        self.server.app.log(f"callsieve: review serve: {status} {self.command} {self.path[:200]}: {message}")
        self._send_json({"error": message, "status": status}, status=status)

    def _dispatch(self, fn: Callable[[], None]) -> None:
        try:
            self._check_host()
            fn()
        except ApiError as exc:
            self._fail(exc.status, exc.message)
        except (BrokenPipeError, ConnectionResetError):
            pass  # the browser went away mid-reply: nothing to tell it
        except sqlite3.OperationalError as exc:
            self._fail(503, f"the store is busy or unreadable ({exc}); try again")
        except Exception as exc:  # a bug of ours: a line in the log, a JSON 500 to the page
            self._fail(500, f"internal error: {type(exc).__name__}")

    def _check_host(self) -> None:
        # A page on another site cannot reach a loopback server through DNS rebinding:
        # only the names this server was started under are answered.
        allowed = self.server.allowed_hosts
        host = (self.headers.get("Host") or "").lower()
        if allowed is not None and host not in allowed:
            raise ApiError(403, f"unexpected Host header {host[:80]!r}")

    def _query(self) -> dict[str, str]:
        q = parse_qs(urlsplit(self.path).query, keep_blank_values=True)
        return {k: v[-1] for k, v in q.items()}

    def _reviewer(self) -> str:
        return validate_reviewer(self._query().get("reviewer", ""))

    # -- methods --------------------------------------------------------------------------

    def do_GET(self) -> None:  # noqa: N802 - http.server's naming
        self._dispatch(self._get)

    def do_HEAD(self) -> None:  # noqa: N802
        self._dispatch(self._get)

    def do_POST(self) -> None:  # noqa: N802
        self._dispatch(self._post)

    def _not_allowed(self) -> None:
        def refuse() -> None:
            raise ApiError(405, f"method {self.command} is not allowed; the API takes GET and POST")

        self._dispatch(refuse)

    do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _not_allowed  # noqa: N815

    def _get(self) -> None:
        raw_path = self.path.split("?", 1)[0].split("#", 1)[0]
        app = self.server.app
        if raw_path in ("/", "/index.html"):
            self._send_bytes(
                review_page.PAGE_HTML.encode(), "text/html; charset=utf-8", extra={"Content-Security-Policy": _CSP}
            )
        elif raw_path == "/static/review.css":
            self._send_bytes(review_page.PAGE_CSS.encode(), "text/css; charset=utf-8")
        elif raw_path == "/static/review.js":
            self._send_bytes(review_page.PAGE_JS.encode(), "text/javascript; charset=utf-8")
        elif raw_path == "/favicon.ico":
            self._send_bytes(b"", "image/x-icon", status=204)
        elif raw_path == "/api/session":
            q = self._query()
            self._send_json(app.session(validate_reviewer(q["reviewer"]) if q.get("reviewer") else None))
        elif raw_path == "/api/queue":
            self._send_json(app.queue(self._reviewer()))
        elif raw_path.startswith("/api/items/"):
            tail = raw_path[len("/api/items/") :]
            if not tail.isdigit() or len(tail) > 18:
                raise ApiError(400, "an item is named by its detection_id, an integer")
            self._send_json(app.item(int(tail), self._reviewer()))
        elif raw_path == "/api/progress":
            q = self._query()
            self._send_json(app.progress(validate_reviewer(q["reviewer"]) if q.get("reviewer") else None))
        elif raw_path == "/api/agreement":
            self._send_json(app.agreement())
        elif raw_path.startswith("/files/"):
            self._send_file(app.resolve_file(raw_path[len("/files/") :]))
        else:
            raise ApiError(404, "no such page or endpoint; the API is under /api/ (see docs/review-serve.md)")

    def _read_json(self) -> dict:
        ctype = (self.headers.get("Content-Type") or "").split(";")[0].strip().lower()
        if ctype != "application/json":
            # Also keeps plain HTML forms of other sites from posting here.
            raise ApiError(415, "send the request body as application/json")
        origin = self.headers.get("Origin")
        if origin and origin != "null" and urlsplit(origin).netloc.lower() != (self.headers.get("Host") or "").lower():
            raise ApiError(403, "requests from other sites are refused")
        length = self.headers.get("Content-Length")
        if length is None or not length.isdigit():
            raise ApiError(411, "a Content-Length is required")
        if int(length) > MAX_BODY_BYTES:
            raise ApiError(413, f"request body over {MAX_BODY_BYTES} bytes")
        raw = self.rfile.read(int(length))
        try:
            body = json.loads(raw.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError):
            raise ApiError(400, "the request body is not valid JSON") from None
        if not isinstance(body, dict):
            raise ApiError(400, "the request body must be a JSON object")
        return body

    def _post(self) -> None:
        raw_path = self.path.split("?", 1)[0]
        if raw_path != "/api/verdicts":
            raise ApiError(404, "POST goes to /api/verdicts only")
        body = self._read_json()
        allowed = {"reviewer", "detection_id", "verdict", "note", "call_type"}
        unknown = sorted(set(body) - allowed)
        if unknown:
            raise ApiError(400, f"unknown keys {unknown}; allowed: {sorted(allowed)}")
        for key in ("reviewer", "detection_id", "verdict"):
            if key not in body:
                raise ApiError(400, f"'{key}' is required")
        saved = self.server.app.save_verdict(
            body["reviewer"], body["detection_id"], body["verdict"], body.get("note"), body.get("call_type")
        )
        self._send_json(saved)

    def _send_file(self, path: Path) -> None:
        ctype = _CONTENT_TYPES[path.suffix.lower()]
        size = path.stat().st_size
        rng = self.headers.get("Range")
        start, end, status = 0, size - 1, 200
        if rng:
            # Audio players ask for byte ranges to seek and loop; one range is enough.
            m = re.fullmatch(r"bytes=(\d*)-(\d*)", rng.strip())
            if m is None or (not m.group(1) and not m.group(2)):
                raise ApiError(416, "only one byte range of the form bytes=a-b is served")
            if m.group(1):
                start = int(m.group(1))
                end = min(int(m.group(2)), size - 1) if m.group(2) else size - 1
            else:
                start = max(0, size - int(m.group(2)))
            if start > end or start >= size:
                raise ApiError(416, f"range outside the file's {size} bytes")
            status = 206
        with open(path, "rb") as fh:
            fh.seek(start)
            body = fh.read(end - start + 1)
        extra = {"Accept-Ranges": "bytes"}
        if status == 206:
            extra["Content-Range"] = f"bytes {start}-{end}/{size}"
        self._send_bytes(body, ctype, status=status, extra=extra)


# The page loads nothing from elsewhere, and the browser is told to refuse it if it tried.
_CSP = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; media-src 'self'; "
    "connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
)


class ReviewServer(ThreadingHTTPServer):
    """A ThreadingHTTPServer that carries the ``ReviewApp`` and knows its own URL."""

    daemon_threads = True  # Ctrl-C never waits for a browser's idle connection
    allow_reuse_address = True

    def __init__(self, address: tuple[str, int], app: ReviewApp) -> None:
        host = address[0]
        family = socket.AF_INET6 if ":" in host else socket.AF_INET
        self.address_family = family
        self.app = app
        super().__init__(address, _Handler)
        port = self.server_address[1]
        self.host = host
        self.port = port
        url_host = f"[{host}]" if ":" in host else host
        self.url = f"http://{url_host}:{port}/"
        if _is_loopback(host):
            names = {"localhost", "127.0.0.1", "[::1]", url_host.lower()}
            self.allowed_hosts: set[str] | None = {f"{n}:{port}" for n in names}
        else:
            self.allowed_hosts = None  # reachable under names we cannot know

    def handle_error(self, request: Any, client_address: Any) -> None:
        # socketserver would print a traceback; one line is enough for a dropped client.
        exc = sys.exc_info()[1]
        if not isinstance(exc, ConnectionError | TimeoutError):
            self.app.log(f"callsieve: review serve: {type(exc).__name__} with {client_address[0]}: {exc}")


def make_server(
    db: str | Path,
    host: str = "127.0.0.1",
    port: int = DEFAULT_PORT,
    reviewer: str | None = None,
    sample_id: int | None = None,
    log: Callable[[str], None] | None = None,
) -> ReviewServer:
    """Bind a review server (not yet serving); ``port=0`` takes a free port.

    Raises
    ------
    InputError
        When the store holds no such sample, the reviewer name is not allowed, or the
        address cannot be bound.
    """
    app = ReviewApp(db, sample_id=sample_id, reviewer=reviewer, log=log)
    try:
        return ReviewServer((host, port), app)
    except OSError as exc:
        raise InputError(f"cannot listen on {host}:{port} ({exc.strerror or exc}); choose another --port") from None


def serve(
    db: str | Path,
    host: str = "127.0.0.1",
    port: int = DEFAULT_PORT,
    reviewer: str | None = None,
    sample_id: int | None = None,
    out: Callable[[str], None] | None = None,
) -> int:
    """Serve the review page until Ctrl-C; returns 0.

    Parameters
    ----------
    db : str or Path
        The detection store with a verification sample.
    host, port : str, int
        Where to listen (127.0.0.1 by default: this machine only).
    reviewer : str, optional
        The name the page starts with.
    sample_id : int, optional
        The sample (default: the latest).
    out : callable, optional
        Where the URL and messages go (default: print).
    """
    say = out or (lambda line: print(line, flush=True))
    if not 0 <= int(port) <= 65535:
        raise InputError(f"--port {port}: a port is 0 to 65535 (0: any free port)")
    server = make_server(db, host, port, reviewer=reviewer, sample_id=sample_id)
    app = server.app
    if not _is_loopback(host):
        print(
            f"callsieve: warning: listening on {host}, not on this machine only: anyone who can reach port "
            f"{server.port} can read the sample and save verdicts under any name (there is no login)",
            file=sys.stderr,
            flush=True,
        )
    if not app.folder.is_dir():
        print(
            f"callsieve: warning: the sample folder {app.folder} does not exist; images and clips cannot be shown",
            file=sys.stderr,
            flush=True,
        )
    shown = "127.0.0.1" if host in ("0.0.0.0", "") else host
    url = server.url.replace(f"//{host}:", f"//{shown}:") if shown != host else server.url
    if reviewer:
        url += f"?reviewer={quote(reviewer)}"
    kind = "blind, " if app.blind else ""
    say(f"sample {app.sample_id} of run {app.run_id} ({kind}{app.items_total} items, label {app.label}) from {app.db}")
    say(f"review page: {url}   (Ctrl-C to stop)")
    previous = None
    if threading.current_thread() is threading.main_thread():
        # A service manager's SIGTERM stops the server as cleanly as Ctrl-C does.
        previous = signal.signal(signal.SIGTERM, _interrupt)
    try:
        server.serve_forever(poll_interval=0.25)
    except KeyboardInterrupt:
        say("stopped; every verdict given is in the store")
    finally:
        server.server_close()
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)
    return 0


def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def _cmd_serve(args: argparse.Namespace) -> int:
    return serve(args.db, host=args.host, port=args.port, reviewer=args.reviewer, sample_id=args.sample)


def add_serve_verb(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> None:
    """Add ``review serve`` to the review sub-verbs."""
    p = sub.add_parser("serve", parents=[common], help="serve the review page on this machine")
    p.add_argument("db", metavar="DB", help="detection store holding a verification sample")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1: this machine only)")
    p.add_argument(
        "--port", type=int, default=DEFAULT_PORT, metavar="P", help=f"port (default {DEFAULT_PORT}; 0 for any free)"
    )
    p.add_argument("--reviewer", metavar="NAME", help="reviewer name the page starts with")
    p.add_argument("--sample", type=int, metavar="ID", help="verification sample (default: the latest)")
    p.set_defaults(func=_cmd_serve)
