"""Scoring whole deployments: one file at a time, resumable, on one machine or a cluster.

The unit of work is one file: :func:`score_file` is a pure function from (model, file)
to that file's detections and window count. Workers (joblib processes or Dask workers)
compute it; only the process that holds the store writes, one transaction per file, so
a run stopped at any moment and started again carries on and ends with the same
detections as an uninterrupted run.
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import platform
import socket
import sqlite3
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from callsieve.features.calibration import RecordingChain, pressure_from_samples
from callsieve.features.levels import band_spl_db
from callsieve.features.pipeline import CLIP_THRESHOLD, describe_stream
from callsieve.features.soundscape import BIN_S, MinuteSpectra
from callsieve.features.streaming import AudioReader, AudioReadError, SegmentReader

from .calibrate import utc_iso
from .deployment import GAP_TOLERANCE_S, Deployment, RecordedFile, load_deployment, parse_file_start
from .detections import Candidate, pick_detections
from .errors import InputError
from .labels import BACKGROUND
from .model import CallModel, load_model
from .store import (
    Transaction,
    check_deployment_identity,
    claim_file,
    claim_holders,
    now_utc,
    open_store,
    release_claims,
    renew_claims,
    replace_file_result,
    upsert_deployment,
    upsert_file,
)
from .threads import fit_threads, thread_setting, worker_threads

__all__ = ["FileResult", "score_file", "score_deployment", "DEFAULT_THRESHOLD"]

DEFAULT_THRESHOLD = 0.1
# The gate before the model: windows with no frame of trace above the noise floor and an
# in-band SNR below this (dB) are background without asking the model.
GATE_SNR_DB = -3.0


@dataclass
class FileResult:
    """What scoring one file gave: detections as store rows, or the error."""

    name: str
    status: str  # 'done' or 'failed'
    error: str | None = None
    windows: int = 0
    rows: list[tuple] = field(default_factory=list)
    seconds: float = 0.0
    nonfinite: int = 0  # NaN or infinite samples of this file, scored as zeros
    # The long-term spectrum: seconds per 60-s bin, band edges (Hz), mean PSD (µPa²/Hz).
    soundscape: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None


# Detections whose levels share one read of the audio: spans of at most this much recorded
# time (s). Fixed, so the levels do not depend on the block size.
_LEVEL_SPAN_S = 600.0


def measure_levels(
    reader: SegmentReader,
    chain: RecordingChain,
    cands: list[Candidate],
    noise_psd: np.ndarray,
    frequency_hz: np.ndarray,
) -> list[tuple[float, float, int]]:
    """Received level (dB re 1 µPa), SNR (dB) and clip flag of each detection.

    The received level is the in-band rms SPL of the calibrated waveform over the
    detection; the noise is the noise floor's power in the same band at the peak window
    (``noise_psd[c.window]``, µPa²/Hz, on ``frequency_hz``), so SNR = (signal power) /
    (noise power). Detections close in time share one read and one calibration of the
    audio (spans of at most ``_LEVEL_SPAN_S``).
    """
    fs = reader.sample_rate_hz
    taps = chain.fir_length(fs)
    bounds = []
    for c in cands:
        a = int(round(c.start_s * fs))
        bounds.append((a, max(int(round(c.end_s * fs)), a + 2)))
    out: list[tuple[float, float, int]] = [(float("nan"), float("nan"), 0)] * len(cands)
    order = sorted(range(len(cands)), key=lambda i: bounds[i][0])
    df = float(frequency_hz[1] - frequency_hz[0])
    span_samples = int(_LEVEL_SPAN_S * fs)
    k = 0
    while k < len(order):
        first = bounds[order[k]][0]
        group = [order[k]]
        k += 1
        while k < len(order) and bounds[order[k]][1] - first <= span_samples:
            group.append(order[k])
            k += 1
        r0 = max(first - taps, reader.start)
        r1 = min(max(bounds[i][1] for i in group) + taps, reader.stop)
        raw = reader.read(r0, r1)
        p = pressure_from_samples(raw.astype(np.float64), fs, chain)
        for i in group:
            a, b = bounds[i]
            c = cands[i]
            rl = float(band_spl_db(p[a - r0 : b - r0], fs, c.low_hz, c.high_hz))
            clipped = int(np.any(np.abs(raw[a - r0 : b - r0]) >= CLIP_THRESHOLD))
            inside = (frequency_hz >= c.low_hz - df / 2) & (frequency_hz <= c.high_hz + df / 2)
            noise = float(np.sum(noise_psd[c.window][inside]) * df)
            if not noise > 0:
                out[i] = (rl, float("nan"), clipped)
                continue
            excess = 10.0 ** (rl / 10.0) - noise
            out[i] = (rl, float(10.0 * np.log10(max(excess, 1e-3 * noise) / noise)), clipped)
    return out


#: A neighbouring file of a continuous recording: its path and its number of samples.
Neighbour = tuple[str, int]
# Windows beyond the file's own on each side whose probabilities the peak-picking sees,
# so a call across a file boundary is one peak, owned by the file its window starts in.
_CONTEXT_WINDOWS = 8


def score_file(
    model: CallModel,
    path: str | Path,
    name: str,
    chain: RecordingChain,
    channel: int,
    threshold: float,
    block_s: float = 600.0,
    threads: int | None = None,
    gate: bool = True,
    offset: int = 0,
    before: Neighbour | None = None,
    after: Neighbour | None = None,
    frames_listed: int | None = None,
    cascade: bool = True,
) -> FileResult:
    """Detections of one file: describe, predict, pick peaks, measure levels.

    Parameters
    ----------
    model : CallModel
    path : the sound file; ``name`` is how the deployment calls it
    chain : RecordingChain of the deployment
    channel : int
    threshold : float, probability floor below which nothing is kept
    block_s : float, s, recorded time per block (results do not depend on it)
    threads : int, optional, BLAS/OpenMP threads in this process (for parallel workers)
    gate : bool, skip the model for windows that show nothing in band (see GATE_SNR_DB)
    offset : int, samples, where the file starts in its continuous recording
    before, after : (path, samples) of the neighbouring files of a continuous recording,
        read for context so that windows, noise floor and peaks cross file boundaries
        exactly as inside one file; None at a gap
    frames_listed : int, optional, samples the file held when the deployment was listed;
        a file that holds another number now (a copy in progress) fails, to be scored
        again when complete, instead of being scored as a part
    cascade : bool, use the model's first stage (when it has one): windows it rejects
        are background without their full descriptors, the model or levels

    Returns
    -------
    FileResult
        Rows ``(start_s, end_s, low_hz, high_hz, label, confidence, received_level_db,
        snr_db, clipped)`` in seconds from this file's start, or status 'failed' with
        the error of an unreadable file.
    """
    t0 = time.perf_counter()
    from contextlib import nullcontext

    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=threads) if threads is not None else nullcontext():
        try:
            own = AudioReader(path, channel)
            frames = own.frames
            own.close()
            if frames_listed is not None and frames != frames_listed:
                raise AudioReadError(
                    path,
                    f"holds {frames} samples but held {frames_listed} when the deployment was listed "
                    "(still being copied?); run the same command again when it is complete",
                )
            parts = [(str(path), offset, frames)]
            # A neighbour that cannot be opened, or no longer holds the samples it held
            # when the deployment was listed (a copy in progress), is a gap, not a fault
            # of this file.
            if before is not None and _opens(before[0], channel, before[1]):
                parts.insert(0, (before[0], offset - before[1], before[1]))
            if after is not None and _opens(after[0], channel, after[1]):
                parts.append((after[0], offset + frames, after[1]))
            return _score_file(
                model, parts, offset, frames, name, chain, channel, threshold, block_s, t0, gate, cascade
            )
        except AudioReadError as exc:
            return FileResult(name, "failed", exc.reason, 0, [], time.perf_counter() - t0)


def _opens(path: str, channel: int, frames: int) -> bool:
    """Whether a neighbour opens and still holds the ``frames`` samples it was listed with."""
    try:
        reader = AudioReader(path, channel)
    except AudioReadError:
        return False
    reader.close()
    return reader.frames == frames


def _score_file(
    model: CallModel,
    parts: list[tuple[str, int, int]],
    offset: int,
    frames: int,
    name: str,
    chain: RecordingChain,
    channel: int,
    threshold: float,
    block_s: float,
    t0: float,
    gate: bool = True,
    cascade: bool = True,
) -> FileResult:
    settings = model.settings
    names = model.descriptor_names
    i_lo, i_hi = names.index("trace_lowest_hz"), names.index("trace_highest_hz")
    i_act = names.index("trace_cover_fraction")
    i_snr = names.index("snr_db")
    background = model.classes.index(BACKGROUND) if BACKGROUND in model.classes else None
    values, segment, noise_psd, starts, passed = [], [], [], [], []
    # The cascade's first stage decides which windows get full descriptors; it needs a
    # background class to send the others to.
    use = cascade and model.cascade is not None and model.cascade.pays and background is not None
    screen = model.cascade.keep if use else None
    # The peak-to-peak level costs a band filter over all audio; skipped where the model
    # does not read it (an absolute level, kept from the model by default).
    columns = model.estimator.columns
    peak_to_peak = columns is None or names.index("peak_to_peak_db") in columns
    with SegmentReader(parts, channel) as reader:
        fs = reader.sample_rate_hz
        hop = settings.window_hop_s
        k0 = int(np.floor(offset / fs / hop)) - _CONTEXT_WINDOWS
        k1 = int(np.ceil((offset + frames) / fs / hop)) + _CONTEXT_WINDOWS
        frequency_hz = None
        spectra = MinuteSpectra(fs, chain, offset, frames)
        stream = describe_stream(reader, chain, settings, block_s, (k0, k1), spectra.add, screen, peak_to_peak)
        for table in stream:
            values.append(table.values)
            passed.append(table.passed if table.passed is not None else np.ones(table.start_s.size, bool))
            segment.append(table.segment_s)
            noise_psd.append(table.noise_psd)
            starts.append(table.start_s)
            frequency_hz = table.frequency_hz
        if not values:
            return FileResult(name, "done", None, 0, [], time.perf_counter() - t0, 0, _soundscape(spectra))
        # One prediction per file: a boosted model's cost is mostly per call and per tree.
        v = np.concatenate(values)
        proba = _predict(model, v, background if gate else None, i_act, i_snr, np.concatenate(passed), threshold)
        active = v[:, i_act] > 0
        lo = np.where(active, np.maximum(v[:, i_lo] - settings.resolution_hz, settings.low_hz), settings.low_hz)
        hi = np.where(active, np.minimum(v[:, i_hi] + settings.resolution_hz, settings.high_hz), settings.high_hz)
        start_s = np.concatenate(starts)
        # A window is this file's when its first sample is.
        first_sample = np.round(start_s * fs).astype(np.int64)
        owned = (first_sample >= offset) & (first_sample < offset + frames)
        cands = pick_detections(
            proba,
            model.classes,
            np.concatenate(segment),
            np.column_stack([lo, hi]),
            threshold,
            active,
            model.short_call_s,
        )
        cands = [c for c in cands if owned[c.window]]
        levels = measure_levels(reader, chain, cands, np.concatenate(noise_psd), frequency_hz)
        rows = []
        shift = offset / fs
        for c, (rl, snr, clipped) in zip(cands, levels, strict=True):
            rows.append(
                (
                    round(c.start_s - shift, 4),
                    round(c.end_s - shift, 4),
                    round(c.low_hz, 2),
                    round(c.high_hz, 2),
                    c.label,
                    # Not rounded: confidences must keep their order, however close.
                    float(c.confidence),
                    round(rl, 3),
                    None if not np.isfinite(snr) else round(snr, 3),
                    clipped,
                )
            )
        nonfinite = reader.nonfinite_in(offset)
    return FileResult(
        name, "done", None, int(owned.sum()), rows, time.perf_counter() - t0, nonfinite, _soundscape(spectra)
    )


def _soundscape(spectra: MinuteSpectra) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    seconds, psd = spectra.result()
    return seconds, spectra.edges, psd


# Rows per call of the model: bounds the memory of one prediction on a long file.
_PREDICT_ROWS = 65536


def _predict(
    model: CallModel,
    values: np.ndarray,
    background: int | None,
    i_act: int,
    i_snr: int,
    passed: np.ndarray | None = None,
    threshold: float = 0.0,
) -> np.ndarray:
    """Calibrated probabilities of every window; gated windows are background unasked.

    With ``background`` (its column) given, windows with no trace above the floor and no
    in-band excess (see GATE_SNR_DB) skip the model. Windows the cascade rejected
    (``passed`` False, NaN descriptors) are background too. A model that averages its
    fold estimators (``CallClassifier.average_folds``) asks them only about windows its
    final estimator gives a call class at least half the storage floor ``threshold``;
    the others keep the final estimator's probabilities. That is an approximation: the
    mean could lift a few of them over the floor (on the hard benchmark, asking every
    window gave a mean AP of 0.883 against 0.882, at 25 % more scoring time).
    """
    proba = np.zeros((values.shape[0], len(model.classes)))
    keep = np.ones(values.shape[0], dtype=bool) if passed is None else passed.copy()
    if background is not None:
        keep &= (values[:, i_act] > 0) | (values[:, i_snr] > GATE_SNR_DB)
    if background is not None or not keep.all():
        proba[:, model.classes.index(BACKGROUND) if background is None else background] = 1.0
    rows = np.flatnonzero(keep)
    calls = [j for j, c in enumerate(model.classes) if c != BACKGROUND]
    for a in range(0, rows.size, _PREDICT_ROWS):
        part = rows[a : a + _PREDICT_ROWS]
        proba[part] = model.estimator.predict_proba_screened(values[part], calls, 0.5 * threshold)
    return proba


def _versions() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    out = {"python": platform.python_version()}
    for pkg in ("callsieve", "numpy", "scipy", "scikit-learn", "soundfile", "skops"):
        try:
            out[pkg] = version(pkg)
        except PackageNotFoundError:
            out[pkg] = "unknown"
    return out


def _run_key(model: CallModel, deployment: str, threshold: float) -> str:
    doc = {"model": model.content_sha256, "deployment": deployment, "threshold": threshold}
    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()


def _open_run(con, model: CallModel, model_path: Path, dep: Deployment, dep_id: int, threshold: float) -> int:
    key = _run_key(model, dep.name, threshold)
    row = con.execute("SELECT run_id FROM runs WHERE run_key=?", (key,)).fetchone()
    if row is not None:
        con.execute("UPDATE runs SET status='running', finished_utc=NULL WHERE run_id=?", (row[0],))
        return int(row[0])
    # Resolved paths: the store must work from any folder, not only where score ran.
    params = {
        "threshold": threshold,
        "settings": model.settings.to_dict(),
        "manifest": str(dep.manifest_path.resolve()),
        # Stretches of audio whose verdicts trained the model (`estimate` sets them aside).
        "verified_spans": model.summary.get("verified", {}).get("spans", []),
        # The cascade's operating point and its out-of-fold cost, for `evaluate`.
        "cascade": model.summary.get("cascade"),
    }
    cur = con.execute(
        "INSERT INTO runs (run_key, deployment_id, model_sha256, model_path, classes, target, threshold, "
        "parameters, versions, host, started_utc, status) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 'running')",
        (
            key,
            dep_id,
            model.content_sha256,
            str(Path(model_path).resolve()),
            json.dumps(model.classes),
            model.target,
            threshold,
            json.dumps(params),
            json.dumps(_versions()),
            socket.gethostname(),
            now_utc(),
        ),
    )
    return int(cur.lastrowid)


class Progress:
    """Progress lines over files: files and recorded hours done, rate, count, time left.

    At most one line a second (and the last), through ``say``; none when it is None.
    """

    def __init__(
        self, total_files: int, total_s: float, say: Callable[[str], None] | None, counted: str = "detections"
    ) -> None:
        self.total_files, self.total_s, self.say, self.counted = total_files, total_s, say, counted
        self.files, self.done_s, self.detections, self.t0 = 0, 0.0, 0, time.perf_counter()
        self.last = 0.0

    def add(self, seconds: float, detections: int) -> None:
        self.files += 1
        self.done_s += seconds
        self.detections += detections
        now = time.perf_counter()
        if self.say is None or (now - self.last < 1.0 and self.files < self.total_files):
            return
        self.last = now
        elapsed = max(now - self.t0, 1e-9)
        rate = self.done_s / 3600.0 / elapsed
        left = (self.total_s - self.done_s) / 3600.0 / rate if rate > 0 else float("nan")
        self.say(
            f"{self.files}/{self.total_files} files, {self.done_s / 3600:.2f}/{self.total_s / 3600:.2f} h, "
            f"{rate:.2f} h/s, {self.detections} {self.counted}, about {left:.0f} s left"
        )


# Test hooks (fault injection) for the resume tests; read once per run, and when unset
# they cost one comparison per file. With CALLSIEVE_FAULT_AFTER_FILES=k the process dies
# (os._exit(137), the exit status of SIGKILL: no cleanup, no rollback, no atexit) right
# after the k-th file that this run scores has committed; with CALLSIEVE_FAULT_INSIDE_FILE=k
# it dies inside that file's transaction, after all its rows are written and before
# COMMIT, which must leave nothing of the file. k counts files scored by this run (not
# those skipped as done) from 1.
FAULT_AFTER_FILES = "CALLSIEVE_FAULT_AFTER_FILES"
FAULT_INSIDE_FILE = "CALLSIEVE_FAULT_INSIDE_FILE"
FAULT_EXIT_STATUS = 137
# Test hook: seconds to pause after storing each file, so that two processes overlap.
FAULT_SLOW_STORE = "CALLSIEVE_FAULT_SLOW_STORE_S"
# How often a process that has nothing left to claim looks whether the files another
# process holds are done, s.
_CLAIM_POLL_S = 1.0


def _fault_point(variable: str) -> int | None:
    value = os.environ.get(variable)
    if not value:
        return None
    try:
        k = int(value)
    except ValueError:
        k = 0
    if k < 1:
        raise InputError(f"{variable}={value}: a test hook, must be a whole number >= 1 (or unset)")
    return k


def _die(variable: str, k: int) -> Callable[[], None]:
    def crash() -> None:
        os.write(2, f"callsieve: {variable}={k}: dying on purpose (test hook)\n".encode())
        os._exit(FAULT_EXIT_STATUS)

    return crash


def score_deployment(
    model_path: str | Path,
    manifest: str | Path,
    db: str | Path,
    threshold: float = DEFAULT_THRESHOLD,
    jobs: int = 1,
    scheduler: str | None = None,
    block_s: float = 600.0,
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Score every file of a deployment into the store, carrying on an earlier run.

    Parameters
    ----------
    model_path : model file from ``train``
    manifest : deployment manifest
    db : detection store (SQLite; made if missing)
    threshold : float, probability floor below which nothing is stored (0..1)
    jobs : int, worker processes on this machine (joblib)
    scheduler : str, optional, address of a running Dask scheduler; workers compute,
        this process writes
    block_s : float, s, recorded time per block
    progress : callable, optional

    Returns
    -------
    dict
        ``run_id``, ``files`` (scored now by this process; another process on the same
        store takes its share), ``skipped`` (already done), ``failed``
        (list of {file, error}), ``detections`` (stored in the run), ``recorded_hours``,
        ``seconds``, ``hours_per_second``.
    """
    if not 0.0 <= threshold < 1.0:
        raise InputError(f"--threshold must be in 0..1, got {threshold:g}")
    if jobs < 1:
        raise InputError(f"--jobs must be >= 1, got {jobs}")
    thread_setting()  # a bad CALLSIEVE_THREADS is exit 2 before any work
    with _worker_pool(jobs, scheduler) as pool:
        return _score_deployment(model_path, manifest, db, threshold, jobs, scheduler, block_s, progress, pool)


@contextmanager
def _worker_pool(jobs: int, scheduler: str | None) -> Iterator[Any]:
    """joblib workers started at once, so their imports overlap with this process's set-up."""
    if jobs == 1 or scheduler:
        yield None
        return
    from joblib import Parallel, delayed

    with Parallel(n_jobs=jobs, return_as="generator_unordered") as parallel:
        warm = parallel(delayed(_warm_up)() for _ in range(jobs))
        try:
            yield parallel, warm
        finally:
            for _ in warm:  # a run with nothing left to score never waited for them
                pass


def _warm_up() -> int:
    """A task whose only work is loading this module (and its imports) into a worker."""
    return os.getpid()


def _score_deployment(
    model_path: str | Path,
    manifest: str | Path,
    db: str | Path,
    threshold: float,
    jobs: int,
    scheduler: str | None,
    block_s: float,
    progress: Callable[[str], None] | None,
    pool: Any,
) -> dict[str, Any]:
    die_after, die_inside = _fault_point(FAULT_AFTER_FILES), _fault_point(FAULT_INSIDE_FILE)
    model_path = Path(model_path)
    model = load_model(model_path)
    dep = load_deployment(manifest)
    if dep.files:
        model.check_fits(dep.sample_rate_hz, str(manifest))
    con = open_store(db)
    say = progress or (lambda line: None)
    with Transaction(con):
        check_deployment_identity(
            con, dep.name, str(Path(manifest).resolve()), [(f.name, f.size_bytes) for f in dep.files], db
        )
        dep_id = upsert_deployment(con, dep.name, str(Path(manifest).resolve()), dep.sample_rate_hz, dep.channel)
        file_ids = {
            f.name: upsert_file(
                con, dep_id, f.name, utc_iso(f.start_utc), f.duration_s, f.info.sample_rate_hz, f.size_bytes, f.mtime_ns
            )
            for f in dep.files
        }
        run_id = _open_run(con, model, model_path, dep, dep_id, threshold)
    # Results stored from now on, by this process or another on the same store, count as
    # this invocation's: the files are claimed one by one (store.claim_file).
    started = now_utc()
    done = {r["file_id"]: r for r in con.execute("SELECT * FROM run_files WHERE run_id=?", (run_id,))}
    todo = []
    skipped = 0
    for f in dep.files:
        prev = done.get(file_ids[f.name])
        if prev is not None and prev["status"] == "done":
            if (prev["size_bytes"], prev["mtime_ns"]) == (f.size_bytes, f.mtime_ns):
                skipped += 1
                continue
            say(f"{f.name} changed since it was scored (size or modification time); scoring it again")
        todo.append(f)
    # Files the manifest could not use are recorded as failed in this run.
    failed: list[dict] = []
    set_aside: list[dict] = []  # copies and spans already recorded by another file
    nonfinite: list[dict] = []  # files with NaN or infinite samples, scored as zeros
    for fault in dep.faults:
        start = parse_file_start(fault.name, dep.timestamp_format)
        path = dep.audio_dir / fault.name
        st = path.stat() if path.exists() else None
        with Transaction(con):
            fid = upsert_file(
                con,
                dep_id,
                fault.name,
                utc_iso(start) or "",
                0.0,
                None,
                st.st_size if st else 0,
                st.st_mtime_ns if st else 0,
            )
        replace_file_result(
            con, run_id, fid, "failed", fault.error, st.st_size if st else 0, st.st_mtime_ns if st else 0, 0, []
        )
        (set_aside if fault.repeat else failed).append({"file": fault.name, "error": fault.error})
    records = {f.name: f for f in todo}
    meter = Progress(len(todo), sum(f.duration_s for f in todo), progress)
    t0 = time.perf_counter()
    stored = 0
    owner = f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:12]}"
    claims = open_store(db, any_thread=True)
    slow = float(os.environ.get(FAULT_SLOW_STORE, "0") or 0)
    scored_here: list[RecordedFile] = []

    def claimed(files: list[RecordedFile]) -> Iterator[RecordedFile]:
        # Asked lazily, as workers free up, so two processes interleave file by file.
        for f in files:
            if claim_file(claims, run_id, file_ids[f.name], owner, started) == "claimed":
                scored_here.append(f)
                yield f

    n = 0
    pending = todo
    waiting = ""
    try:
        while pending:
            for result in _results(model, dep, claimed(pending), threshold, jobs, scheduler, block_s, pool):
                n += 1
                stored += _store_result(
                    con, run_id, file_ids, records[result.name], result, failed, nonfinite, meter, die_inside, n
                )
                renew_claims(con, owner)
                if n == die_after:
                    _die(FAULT_AFTER_FILES, n)()
                if slow:
                    time.sleep(slow)
            fresh = {
                r[0]
                for r in con.execute(
                    "SELECT file_id FROM run_files WHERE run_id=? AND scored_utc>=?", (run_id, started)
                )
            }
            pending = [f for f in todo if file_ids[f.name] not in fresh]
            if pending:
                holders = claim_holders(con, run_id, owner)
                line = (
                    f"waiting for {len(pending)} file(s) that {', '.join(holders) or 'another process'} "
                    "is scoring in this store"
                )
                if line != waiting:  # once per change, not once per poll
                    say(line)
                    waiting = line
                time.sleep(_CLAIM_POLL_S)
    finally:
        try:
            release_claims(claims, owner)
        except sqlite3.Error:
            pass  # a full or read-only store: the error that brought us here is the one to report
        claims.close()
    seconds = time.perf_counter() - t0
    scored = {r[0] for r in con.execute("SELECT file_id FROM run_files WHERE run_id=?", (run_id,))}
    pending = len(set(file_ids.values()) - scored)
    if pending == 0:
        con.execute("UPDATE runs SET status='finished', finished_utc=? WHERE run_id=?", (now_utc(), run_id))
    total = con.execute("SELECT COUNT(*) FROM detections WHERE run_id=? AND superseded=0", (run_id,)).fetchone()[0]
    con.close()
    hours = sum(f.duration_s for f in scored_here) / 3600.0
    return {
        "run_id": run_id,
        "deployment": dep.name,
        "files": len(scored_here),
        "skipped": skipped,
        "failed": failed,
        "set_aside": set_aside,
        "warnings": list(dep.warnings),
        "nonfinite": nonfinite,
        "detections": int(total),
        "detections_now": stored,
        "recorded_hours": round(hours, 4),
        "seconds": round(seconds, 2),
        "hours_per_second": round(hours / seconds, 3) if seconds > 0 else None,
    }


def _store_result(
    con: Any,
    run_id: int,
    file_ids: dict[str, int],
    rec: RecordedFile,
    result: FileResult,
    failed: list[dict],
    nonfinite: list[dict],
    meter: Progress,
    die_inside: int | None,
    n: int,
) -> int:
    """Store one file's result in one transaction; return the detections stored."""
    stored = replace_file_result(
        con,
        run_id,
        file_ids[rec.name],
        result.status,
        result.error,
        rec.size_bytes,
        rec.mtime_ns,
        result.windows,
        # Time an earlier file already recorded (set_aside_repeats) is not scored twice.
        [r for r in result.rows if r[0] >= rec.head_overlap_s],
        before_commit=_die(FAULT_INSIDE_FILE, n) if n == die_inside else None,
        nonfinite_samples=result.nonfinite,
        soundscape=result.soundscape,
        file_start_utc=utc_iso(rec.start_utc),
        bin_s=BIN_S,
    )
    if result.nonfinite:
        nonfinite.append({"file": rec.name, "samples": result.nonfinite})
    if result.status == "failed":
        failed.append({"file": rec.name, "error": result.error})
    meter.add(rec.duration_s, len(result.rows))
    return stored


def _results(
    model: CallModel,
    dep: Deployment,
    todo: list,
    threshold: float,
    jobs: int,
    scheduler: str | None,
    block_s: float,
    pool: Any = None,
) -> Iterator[FileResult]:
    context = _continuity(dep)
    # Lazy: files are claimed in the store as they are taken (see _score_deployment).
    args = ((f.path, f.name, context[f.name]) for f in todo)
    if scheduler:
        try:
            from dask.distributed import Client, as_completed
        except ImportError:
            raise InputError("--scheduler needs dask.distributed: pip install 'dask[distributed]'") from None
        try:
            client = Client(scheduler, timeout="10s")
        except OSError as exc:
            raise InputError(f"--scheduler {scheduler}: cannot reach a Dask scheduler there ({exc})") from None
        with client:
            shared = client.scatter(model, broadcast=True)
            futures = [
                client.submit(
                    score_file,
                    shared,
                    p,
                    n,
                    dep.chain,
                    dep.channel,
                    threshold,
                    block_s,
                    thread_setting() or 1,
                    True,
                    *ctx,
                    pure=False,
                )
                for p, n, ctx in args
            ]
            for fut in as_completed(futures):
                yield fut.result()
        return
    if jobs == 1:
        for p, n, ctx in args:
            # The free cores, judged per file (docs/threads.md).
            yield score_file(model, p, n, dep.chain, dep.channel, threshold, block_s, fit_threads(), True, *ctx)
        return
    from joblib import delayed

    # One thread per worker: the parallelism is in the processes (docs/threads.md).
    threads = worker_threads(jobs)
    parallel, warm = pool
    for _ in warm:  # the workers' start-up, begun before the model and manifest were read
        pass
    # The model travels with each task as bytes this process pickled once (a few MB);
    # each worker unpickles it once, in milliseconds, and never reads the model file.
    blob = pickle.dumps(model, protocol=pickle.HIGHEST_PROTOCOL)
    yield from parallel(
        delayed(_score_file_with_model_bytes)(
            blob, model.content_sha256, p, n, dep.chain, dep.channel, threshold, block_s, threads, True, *ctx
        )
        for p, n, ctx in args
    )


def _continuity(dep: Deployment) -> dict[str, tuple[int, Neighbour | None, Neighbour | None, int]]:
    """Per file: its offset in its continuous recording (samples), its neighbours there,
    and the samples it held when listed.

    Consecutive files whose join is within the deployment's gap tolerance form one
    continuous recording; offsets add up sample counts from its first file.
    """
    out: dict[str, tuple[int, Neighbour | None, Neighbour | None, int]] = {}
    files = dep.files
    offset = 0
    for i, f in enumerate(files):
        prev = files[i - 1] if i > 0 else None
        nxt = files[i + 1] if i + 1 < len(files) else None
        joined_prev = prev is not None and abs((f.start_utc - prev.end_utc).total_seconds()) <= GAP_TOLERANCE_S
        joined_next = nxt is not None and abs((nxt.start_utc - f.end_utc).total_seconds()) <= GAP_TOLERANCE_S
        offset = offset + prev.info.frames if joined_prev else 0
        out[f.name] = (
            offset,
            (str(prev.path), prev.info.frames) if joined_prev else None,
            (str(nxt.path), nxt.info.frames) if joined_next else None,
            f.info.frames,
        )
    return out


_worker_model: tuple[str, CallModel] | None = None


def _score_file_with_model_bytes(blob: bytes, content_sha256: str, *args: Any) -> FileResult:
    """score_file in a worker process, with the model unpickled once per worker.

    The bytes come from the parent process that loaded and checked the model file, so
    unpickling them trusts nothing the parent did not already trust.
    """
    global _worker_model
    if _worker_model is None or _worker_model[0] != content_sha256:
        _worker_model = (content_sha256, pickle.loads(blob))
    return score_file(_worker_model[1], *args)
