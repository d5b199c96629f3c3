"""The detection store: SQLite in WAL mode, one file, written by one process.

Schema (``SCHEMA_VERSION`` 1):

- ``deployments``: one row per manifest name, with its sample rate and channel.
- ``files``: every sound file of a deployment with its effort (UTC start, duration)
  and what it was when last seen (size, modification time).
- ``runs``: one scoring run per (model, deployment, parameters): model hash and path,
  classes, threshold floor, descriptor settings, package versions, host, start and end,
  status (``running`` or ``finished``).
- ``run_files``: per run and file, ``done`` or ``failed`` with the error, the windows
  scored, detections stored and non-finite samples met (scored as zeros); a scoring run
  resumes from here.
- ``detections``: candidate calls, the detection table of docs/formats.md; ``superseded`` marks detections of
  a file that changed and was scored again, kept because someone verified them.
- ``verdicts``: reviewers' verdicts on detections (``yes``, ``no``, ``unsure``).
- ``soundscape``: per run and file, the calibrated long-term spectrum collected while
  scoring: consecutive bins of ``bin_s`` seconds from ``start_utc`` (the file's start),
  ``seconds`` of audio in each (float32), fractional-octave ``band_edges_hz`` (float32,
  n_bands + 1) and the mean PSD per bin and band, dB re 1 µPa²/Hz (float16, row-major
  n_bins × n_bands; NaN where a band holds no frequency bin). All little-endian.
- ``claims``: files a scoring process is working on now (owner, host, pid, last sign
  of life), so that two processes on one store share the work instead of doing it twice.
- ``review_samples``: a verification sample's design (run, label, strata rule,
  allocation, seed, blind or not, its folder); ``review_strata``: per stratum, its
  confidence edges, population N_h and sample size n_h; ``review_items``: each sampled
  detection with its stratum, inclusion probability, draw order and rendered files
  (image, clip, and for low calls ``clip_fast``, time-compressed ``clip_speed`` times;
  ``clip_gain_db`` the listening gain);
  ``audit_segments``: stretches of recording effort drawn for recall, with their
  inclusion probabilities.
"""

from __future__ import annotations

import os
import socket
import sqlite3
from collections.abc import Callable, Iterable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from .errors import InputError

__all__ = ["SCHEMA_VERSION", "open_store", "now_utc", "parse_utc", "epoch_s"]

SCHEMA_VERSION = 1

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS deployments (
    deployment_id INTEGER PRIMARY KEY,
    name TEXT NOT NULL UNIQUE,
    manifest TEXT NOT NULL,
    sample_rate_hz INTEGER NOT NULL,
    channel INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS files (
    file_id INTEGER PRIMARY KEY,
    deployment_id INTEGER NOT NULL REFERENCES deployments(deployment_id),
    name TEXT NOT NULL,
    start_utc TEXT NOT NULL,
    duration_s REAL NOT NULL,
    sample_rate_hz INTEGER,
    size_bytes INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    UNIQUE (deployment_id, name)
);
CREATE TABLE IF NOT EXISTS runs (
    run_id INTEGER PRIMARY KEY,
    run_key TEXT NOT NULL UNIQUE,
    deployment_id INTEGER NOT NULL REFERENCES deployments(deployment_id),
    model_sha256 TEXT NOT NULL,
    model_path TEXT NOT NULL,
    classes TEXT NOT NULL,
    target TEXT,
    threshold REAL NOT NULL,
    parameters TEXT NOT NULL,
    versions TEXT NOT NULL,
    host TEXT NOT NULL,
    started_utc TEXT NOT NULL,
    finished_utc TEXT,
    status TEXT NOT NULL CHECK (status IN ('running', 'finished'))
);
CREATE TABLE IF NOT EXISTS run_files (
    run_id INTEGER NOT NULL REFERENCES runs(run_id),
    file_id INTEGER NOT NULL REFERENCES files(file_id),
    status TEXT NOT NULL CHECK (status IN ('done', 'failed')),
    error TEXT,
    size_bytes INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    windows INTEGER NOT NULL DEFAULT 0,
    detections INTEGER NOT NULL DEFAULT 0,
    scored_utc TEXT NOT NULL,
    nonfinite_samples INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (run_id, file_id)
);
CREATE TABLE IF NOT EXISTS detections (
    detection_id INTEGER PRIMARY KEY AUTOINCREMENT,
    run_id INTEGER NOT NULL REFERENCES runs(run_id),
    file_id INTEGER NOT NULL REFERENCES files(file_id),
    start_s REAL NOT NULL,
    end_s REAL NOT NULL,
    low_hz REAL NOT NULL,
    high_hz REAL NOT NULL,
    label TEXT NOT NULL,
    confidence REAL NOT NULL,
    received_level_db REAL,
    snr_db REAL,
    clipped INTEGER NOT NULL,
    superseded INTEGER NOT NULL DEFAULT 0
);
CREATE INDEX IF NOT EXISTS detections_by_run ON detections (run_id, file_id);
CREATE INDEX IF NOT EXISTS detections_by_confidence ON detections (run_id, label, confidence);
CREATE TABLE IF NOT EXISTS verdicts (
    verdict_id INTEGER PRIMARY KEY,
    detection_id INTEGER NOT NULL REFERENCES detections(detection_id),
    reviewer TEXT NOT NULL,
    verdict TEXT NOT NULL CHECK (verdict IN ('yes', 'no', 'unsure')),
    note TEXT,
    recorded_utc TEXT NOT NULL,
    UNIQUE (detection_id, reviewer)
);
CREATE TABLE IF NOT EXISTS soundscape (
    run_id INTEGER NOT NULL REFERENCES runs(run_id),
    file_id INTEGER NOT NULL REFERENCES files(file_id),
    start_utc TEXT NOT NULL,
    bin_s REAL NOT NULL,
    seconds BLOB NOT NULL,
    band_edges_hz BLOB NOT NULL,
    psd_db BLOB NOT NULL,
    PRIMARY KEY (run_id, file_id)
);
CREATE TABLE IF NOT EXISTS claims (
    run_id INTEGER NOT NULL REFERENCES runs(run_id),
    file_id INTEGER NOT NULL REFERENCES files(file_id),
    owner TEXT NOT NULL,
    host TEXT NOT NULL,
    pid INTEGER NOT NULL,
    heartbeat_utc TEXT NOT NULL,
    PRIMARY KEY (run_id, file_id)
);
CREATE TABLE IF NOT EXISTS review_samples (
    sample_id INTEGER PRIMARY KEY,
    run_id INTEGER NOT NULL REFERENCES runs(run_id),
    label TEXT NOT NULL,
    design TEXT NOT NULL,
    seed INTEGER NOT NULL,
    blind INTEGER NOT NULL DEFAULT 0,
    folder TEXT NOT NULL,
    created_utc TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS review_strata (
    sample_id INTEGER NOT NULL REFERENCES review_samples(sample_id),
    stratum INTEGER NOT NULL,
    low REAL NOT NULL,
    high REAL NOT NULL,
    population INTEGER NOT NULL,
    sampled INTEGER NOT NULL,
    PRIMARY KEY (sample_id, stratum)
);
CREATE TABLE IF NOT EXISTS review_items (
    sample_id INTEGER NOT NULL REFERENCES review_samples(sample_id),
    detection_id INTEGER NOT NULL REFERENCES detections(detection_id),
    stratum INTEGER NOT NULL,
    inclusion_probability REAL NOT NULL,
    draw_order INTEGER NOT NULL,
    image TEXT,
    clip TEXT,
    double_review INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (sample_id, detection_id)
);
CREATE TABLE IF NOT EXISTS audit_segments (
    segment_id INTEGER PRIMARY KEY,
    sample_id INTEGER NOT NULL REFERENCES review_samples(sample_id),
    file_id INTEGER NOT NULL REFERENCES files(file_id),
    start_s REAL NOT NULL,
    end_s REAL NOT NULL,
    stratum TEXT NOT NULL,
    inclusion_probability REAL NOT NULL
);
"""


def parse_utc(text: str) -> datetime:
    """A time as the store writes it (ISO 8601, 'Z' or an offset; naive taken as UTC)."""
    t = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return t if t.tzinfo else t.replace(tzinfo=UTC)


def epoch_s(text: str) -> float:
    """Seconds since 1970-01-01 UTC of a time as the store writes it."""
    return parse_utc(text).timestamp()


def now_utc() -> str:
    """The current time, ISO 8601 UTC with a 'Z'."""
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def open_store(path: str | Path, create: bool = True, any_thread: bool = False) -> sqlite3.Connection:
    """Open (and, with ``create``, make) a detection store.

    ``any_thread`` lets another thread use the connection (one at a time: the caller
    serialises), as joblib's dispatcher does when it asks for the next file to score.

    Raises
    ------
    InputError
        When the file is not a callsieve store, is of a newer schema, or does not exist
        and ``create`` is False.
    """
    path = Path(path)
    if path.exists() and path.is_dir():
        raise InputError(f"{path}: is a folder; give a file name for the store")
    if not path.parent.is_dir():
        raise InputError(f"{path}: the folder {path.parent} does not exist; create it or choose another path")
    if not create and not path.is_file():
        raise InputError(f"{path}: no such detection store; make one with 'callsieve score'")
    if not create and path.stat().st_size == 0:
        # SQLite would take an empty file for an empty database and make a store of it.
        raise InputError(f"{path}: an empty file, not a detection store; make one with 'callsieve score'")
    try:
        con = sqlite3.connect(path, timeout=30.0, isolation_level=None, check_same_thread=not any_thread)
        con.row_factory = sqlite3.Row
        con.execute("PRAGMA journal_mode=WAL")
        con.execute("PRAGMA foreign_keys=ON")
        con.execute("PRAGMA synchronous=NORMAL")
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if tables and "meta" not in tables:
            raise InputError(f"{path}: an SQLite file, but not a callsieve store; choose another file")
        con.executescript(_SCHEMA)
        # Stores made before run_files counted non-finite samples get the column (0).
        columns = {r[1] for r in con.execute("PRAGMA table_info(run_files)")}
        if "nonfinite_samples" not in columns:
            con.execute("ALTER TABLE run_files ADD COLUMN nonfinite_samples INTEGER NOT NULL DEFAULT 0")
        # Review items' listening aids: the time-compressed clip, its speed factor, the clip's gain (dB).
        columns = {r[1] for r in con.execute("PRAGMA table_info(review_items)")}
        for name, kind in (("clip_fast", "TEXT"), ("clip_speed", "REAL"), ("clip_gain_db", "REAL")):
            if name not in columns:
                con.execute(f"ALTER TABLE review_items ADD COLUMN {name} {kind}")
        row = con.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
        if row is None:
            con.execute("INSERT INTO meta (key, value) VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))
        elif int(row[0]) > SCHEMA_VERSION:
            raise InputError(f"{path}: store schema {row[0]} is newer than this callsieve ({SCHEMA_VERSION})")
    except sqlite3.DatabaseError as exc:
        raise InputError(f"{path}: not a readable SQLite store ({exc})") from None
    return con


class Transaction:
    """``with Transaction(con):`` runs the block in one IMMEDIATE transaction."""

    def __init__(self, con: sqlite3.Connection) -> None:
        self.con = con

    def __enter__(self) -> sqlite3.Connection:
        self.con.execute("BEGIN IMMEDIATE")
        return self.con

    def __exit__(self, exc_type: Any, *rest: Any) -> None:
        if exc_type is None:
            self.con.execute("COMMIT")
        elif self.con.in_transaction:
            # SQLite has already rolled back after some errors (a full disk); a second
            # ROLLBACK would hide the first error behind "no transaction is active".
            self.con.execute("ROLLBACK")


def check_deployment_identity(
    con: sqlite3.Connection, name: str, manifest: str, files: Iterable[tuple[str, int]], store: str | Path
) -> None:
    """Refuse a deployment that reuses the name of another one in the store.

    A deployment is its name *and* its files. A manifest at another path whose files
    (name and size) share none with the stored deployment of that name is another
    deployment; scoring it would merge two sites or seasons into one run. A manifest
    that moved with its audio, or a deployment that grew new files, shares files and
    is the same deployment.

    Raises
    ------
    InputError
        Naming both manifests and how to resolve it.
    """
    row = con.execute("SELECT deployment_id, manifest FROM deployments WHERE name=?", (name,)).fetchone()
    if row is None or row["manifest"] == manifest:
        return
    stored = {(r[0], r[1]) for r in con.execute("SELECT name, size_bytes FROM files WHERE deployment_id=?", (row[0],))}
    if not stored or stored & set(files):
        return
    raise InputError(
        f"{manifest}: deployment name {name!r} is already in {store} for another deployment "
        f"({row['manifest']}), and none of its {len(stored)} files is among this manifest's; "
        "give this deployment its own name in [deployment] name, or use another store"
    )


def upsert_deployment(con: sqlite3.Connection, name: str, manifest: str, sample_rate_hz: int, channel: int) -> int:
    """Id of the deployment row, inserted or brought up to date."""
    con.execute(
        "INSERT INTO deployments (name, manifest, sample_rate_hz, channel) VALUES (?, ?, ?, ?) "
        "ON CONFLICT(name) DO UPDATE SET manifest=excluded.manifest, sample_rate_hz=excluded.sample_rate_hz, "
        "channel=excluded.channel",
        (name, manifest, sample_rate_hz, channel),
    )
    return int(con.execute("SELECT deployment_id FROM deployments WHERE name=?", (name,)).fetchone()[0])


def upsert_file(
    con: sqlite3.Connection,
    deployment_id: int,
    name: str,
    start_utc: str,
    duration_s: float,
    sample_rate_hz: int | None,
    size_bytes: int,
    mtime_ns: int,
) -> int:
    """Id of the file row, inserted or brought up to date."""
    con.execute(
        "INSERT INTO files (deployment_id, name, start_utc, duration_s, sample_rate_hz, size_bytes, mtime_ns) "
        "VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT(deployment_id, name) DO UPDATE SET "
        "start_utc=excluded.start_utc, duration_s=excluded.duration_s, sample_rate_hz=excluded.sample_rate_hz, "
        "size_bytes=excluded.size_bytes, mtime_ns=excluded.mtime_ns",
        (deployment_id, name, start_utc, duration_s, sample_rate_hz, size_bytes, mtime_ns),
    )
    return int(
        con.execute("SELECT file_id FROM files WHERE deployment_id=? AND name=?", (deployment_id, name)).fetchone()[0]
    )


def replace_file_result(
    con: sqlite3.Connection,
    run_id: int,
    file_id: int,
    status: str,
    error: str | None,
    size_bytes: int,
    mtime_ns: int,
    windows: int,
    rows: Iterable[tuple],
    before_commit: Callable[[], None] | None = None,
    nonfinite_samples: int = 0,
    soundscape: tuple | None = None,
    file_start_utc: str | None = None,
    bin_s: float = 60.0,
) -> int:
    """Store one file's outcome in one transaction; return the number of detections stored.

    Earlier detections of this run and file go, except those with verdicts, which are
    kept and marked superseded so that no reviewer's work is lost. ``before_commit``
    (a test hook) is called inside the transaction after every write, just before COMMIT.
    ``soundscape`` (seconds per bin, band edges in Hz, mean PSD in µPa²/Hz per bin and
    band) is stored with it, from ``file_start_utc``, in bins of ``bin_s`` seconds.
    """
    rows = list(rows)
    with Transaction(con):
        verified = "SELECT detection_id FROM verdicts"
        con.execute(
            f"UPDATE detections SET superseded=1 WHERE run_id=? AND file_id=? AND superseded=0 "
            f"AND detection_id IN ({verified})",
            (run_id, file_id),
        )
        con.execute(
            f"DELETE FROM detections WHERE run_id=? AND file_id=? AND detection_id NOT IN ({verified})",
            (run_id, file_id),
        )
        con.executemany(
            "INSERT INTO detections (run_id, file_id, start_s, end_s, low_hz, high_hz, label, confidence, "
            "received_level_db, snr_db, clipped) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [(run_id, file_id, *r) for r in rows],
        )
        con.execute(
            "INSERT INTO run_files (run_id, file_id, status, error, size_bytes, mtime_ns, windows, detections, "
            "scored_utc, nonfinite_samples) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT(run_id, file_id) "
            "DO UPDATE SET status=excluded.status, error=excluded.error, size_bytes=excluded.size_bytes, "
            "mtime_ns=excluded.mtime_ns, windows=excluded.windows, detections=excluded.detections, "
            "scored_utc=excluded.scored_utc, nonfinite_samples=excluded.nonfinite_samples",
            (run_id, file_id, status, error, size_bytes, mtime_ns, windows, len(rows), now_utc(), nonfinite_samples),
        )
        con.execute("DELETE FROM soundscape WHERE run_id=? AND file_id=?", (run_id, file_id))
        if soundscape is not None and len(soundscape[0]) and file_start_utc:
            seconds, edges, psd = soundscape
            with np.errstate(divide="ignore"):
                psd_db = 10.0 * np.log10(np.asarray(psd, float))
            con.execute(
                "INSERT INTO soundscape (run_id, file_id, start_utc, bin_s, seconds, band_edges_hz, psd_db) "
                "VALUES (?, ?, ?, ?, ?, ?, ?)",
                (
                    run_id,
                    file_id,
                    file_start_utc,
                    bin_s,
                    np.asarray(seconds, "<f4").tobytes(),
                    np.asarray(edges, "<f4").tobytes(),
                    np.ascontiguousarray(psd_db, "<f2").tobytes(),
                ),
            )
        if before_commit is not None:
            before_commit()
    return len(rows)


# A claim whose owner gave no sign of life for this long is taken over (s). A scoring
# process renews its claims with every file it stores; a claim of a process that died on
# this host is taken over at once.
CLAIM_STALE_S = 1800.0


def _claim_is_live(row: sqlite3.Row, host: str, stale_s: float) -> bool:
    if row["host"] == host:
        try:
            os.kill(int(row["pid"]), 0)
        except ProcessLookupError:
            return False
        except PermissionError:
            pass  # alive, another user's
    age = datetime.now(UTC) - datetime.strptime(row["heartbeat_utc"], "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC)
    return age.total_seconds() < stale_s


def claim_file(
    con: sqlite3.Connection,
    run_id: int,
    file_id: int,
    owner: str,
    not_before_utc: str,
    stale_s: float = CLAIM_STALE_S,
) -> str:
    """Claim one file of a run for this process, in one transaction.

    Returns
    -------
    str
        ``"claimed"``; ``"done"`` when a result was stored since ``not_before_utc`` (by any
        process); ``"taken"`` when a live process holds it.
    """
    host, pid = socket.gethostname(), os.getpid()
    with Transaction(con):
        row = con.execute(
            "SELECT 1 FROM run_files WHERE run_id=? AND file_id=? AND scored_utc>=?", (run_id, file_id, not_before_utc)
        ).fetchone()
        if row is not None:
            return "done"
        held = con.execute("SELECT * FROM claims WHERE run_id=? AND file_id=?", (run_id, file_id)).fetchone()
        if held is not None and held["owner"] != owner and _claim_is_live(held, host, stale_s):
            return "taken"
        con.execute(
            "INSERT INTO claims (run_id, file_id, owner, host, pid, heartbeat_utc) VALUES (?, ?, ?, ?, ?, ?) "
            "ON CONFLICT(run_id, file_id) DO UPDATE SET owner=excluded.owner, host=excluded.host, "
            "pid=excluded.pid, heartbeat_utc=excluded.heartbeat_utc",
            (run_id, file_id, owner, host, pid, now_utc()),
        )
    return "claimed"


def renew_claims(con: sqlite3.Connection, owner: str) -> None:
    """A sign of life on every claim of ``owner``."""
    con.execute("UPDATE claims SET heartbeat_utc=? WHERE owner=?", (now_utc(), owner))


def release_claims(con: sqlite3.Connection, owner: str) -> None:
    """Drop every claim of ``owner`` (its files are stored, or it stops)."""
    con.execute("DELETE FROM claims WHERE owner=?", (owner,))


def claim_holders(con: sqlite3.Connection, run_id: int, owner: str) -> list[str]:
    """Other processes holding live claims in the run, as 'pid N on HOST'."""
    host = socket.gethostname()
    rows = con.execute("SELECT * FROM claims WHERE run_id=? AND owner<>?", (run_id, owner)).fetchall()
    return sorted({f"pid {r['pid']} on {r['host']}" for r in rows if _claim_is_live(r, host, CLAIM_STALE_S)})


def latest_run_id(con: sqlite3.Connection, run_id: int | None = None) -> int:
    """``run_id`` if it exists, else the most recent run; InputError when there is none."""
    if run_id is not None:
        if con.execute("SELECT 1 FROM runs WHERE run_id=?", (run_id,)).fetchone() is None:
            known = [r[0] for r in con.execute("SELECT run_id FROM runs ORDER BY run_id")]
            raise InputError(f"--run {run_id}: no such scoring run in the store (runs: {known or 'none'})")
        return run_id
    row = con.execute("SELECT run_id FROM runs ORDER BY run_id DESC LIMIT 1").fetchone()
    if row is None:
        raise InputError("the store holds no scoring run yet; run 'callsieve score' first")
    return int(row[0])
