"""A year-long archive: listing and planning a manifest of many files, exporting a store of
many detections.

Run: python benchmarks/store_scale.py [--files 35000] [--detections 10000000] [--folder DIR]

1. Writes ``--files`` WAV files of one second of noise (2 kHz, 16 bit) named by their start,
   every 15 minutes, and a manifest; times the listing (``load_deployment``: every header,
   the check for copies and overlaps) and the planning of a scoring run (every file into
   the store, what is left to do), as ``score`` does before its first file.
2. Fills a store with ``--detections`` random detections spread over those files, then
   times ``callsieve export`` to CSV and to Parquet in a child process each and reports
   that process's peak memory, so the store's size cannot hide in it.

Small files stand in for the recorder's long ones: listing reads a file's header and 16 KiB
of its head, whatever its length.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import soundfile as sf

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import peak_rss_mb  # noqa: E402

MANIFEST = """[deployment]
name = "scale-site"
audio_dir = "audio"
glob = "*.wav"
timestamp_format = "%Y%m%dT%H%M%SZ"

[calibration]
full_scale_volts = 2.5
preamp_gain_db = 20.0
hydrophone_sensitivity_db = -170.0
"""


def write_files(folder: Path, n: int) -> Path:
    (folder / "audio").mkdir(parents=True)
    rng = np.random.default_rng(1)
    t0 = datetime(2031, 1, 1)
    noise = rng.normal(0, 0.05, (64, 2000)).astype(np.float32)
    for k in range(n):
        name = f"scale_{t0 + timedelta(minutes=15 * k):%Y%m%dT%H%M%SZ}.wav"
        # 64 different noises, each file's number written into its first samples: no two alike.
        x = noise[k % 64].copy()
        x[:6] = [int(d) / 10 for d in f"{k:06d}"]
        sf.write(folder / "audio" / name, x, 2000, subtype="PCM_16")
    (folder / "manifest.toml").write_text(MANIFEST)
    return folder / "manifest.toml"


def plan(manifest: Path, db: Path) -> dict:
    from callsieve.classifier.calibrate import utc_iso
    from callsieve.classifier.deployment import load_deployment
    from callsieve.classifier.store import Transaction, open_store, upsert_deployment, upsert_file

    t = time.perf_counter()
    dep = load_deployment(manifest)
    listed = time.perf_counter() - t
    con = open_store(db)
    t = time.perf_counter()
    with Transaction(con):
        dep_id = upsert_deployment(con, dep.name, str(manifest.resolve()), dep.sample_rate_hz, dep.channel)
        ids = [
            upsert_file(con, dep_id, f.name, utc_iso(f.start_utc), f.duration_s, 2000, f.size_bytes, f.mtime_ns)
            for f in dep.files
        ]
    planned = time.perf_counter() - t
    con.close()
    return {"files": len(dep.files), "set_aside": len(dep.faults), "list_s": listed, "plan_s": planned, "ids": ids}


def fill(db: Path, file_ids: list[int], n: int) -> float:
    from callsieve.classifier.store import Transaction, now_utc, open_store

    t = time.perf_counter()
    con = open_store(db)
    with Transaction(con):
        run_id = con.execute(
            "INSERT INTO runs (run_key, deployment_id, model_sha256, model_path, classes, target, threshold, "
            "parameters, versions, host, started_utc, status) VALUES ('bench', 1, '0', 'm', '[\"call\"]', 'call', "
            "0.1, '{}', '{}', 'bench', ?, 'finished')",
            (now_utc(),),
        ).lastrowid
    rng = np.random.default_rng(2)
    chunk = 500_000
    for k in range(0, n, chunk):
        m = min(chunk, n - k)
        fid = rng.choice(file_ids, m)
        start = rng.uniform(0, 0.9, m)
        conf = rng.uniform(0.1, 1.0, m)
        rows = [
            (run_id, int(f), float(s), float(s) + 0.1, 60.0, 200.0, "call", float(c), 110.0, 6.0, 0)
            for f, s, c in zip(fid, start, conf, strict=True)
        ]
        with Transaction(con):
            con.executemany(
                "INSERT INTO detections (run_id, file_id, start_s, end_s, low_hz, high_hz, label, confidence, "
                "received_level_db, snr_db, clipped) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                rows,
            )
    con.close()
    return time.perf_counter() - t


CHILD = """
import sys, time
sys.path.insert(0, {bench!r})
from _common import peak_rss_mb
from callsieve.classifier.export import export_detections
t = time.perf_counter()
r = export_detections({db!r}, {out!r})
print(r["rows"], time.perf_counter() - t, peak_rss_mb())
"""


def export(db: Path, out: Path) -> dict:
    code = CHILD.format(bench=str(Path(__file__).resolve().parent), db=str(db), out=str(out))
    rows, seconds, rss = subprocess.run(
        [sys.executable, "-c", code], check=True, capture_output=True, text=True
    ).stdout.split()
    return {"rows": int(rows), "seconds": float(seconds), "peak_rss_mb": float(rss), "bytes": out.stat().st_size}


def estimate(db: Path, file_ids: list[int]) -> float:
    """A stratified sample of 120 with verdicts written into the store, then `estimate` timed."""
    from callsieve.classifier.estimate import estimate_run
    from callsieve.classifier.store import Transaction, now_utc, open_store

    con = open_store(db)
    rng = np.random.default_rng(3)
    edges = [0.1, 0.4, 0.6, 0.8, 0.9, 1.0]
    with Transaction(con):
        sid = con.execute(
            "INSERT INTO review_samples (run_id, label, design, seed, blind, folder, created_utc) "
            "VALUES (1, 'call', '{}', 0, 0, '.', ?)",
            (now_utc(),),
        ).lastrowid
        for h in range(5):
            lo, hi = edges[h], edges[h + 1]
            population = con.execute(
                "SELECT COUNT(*) FROM detections WHERE confidence>=? AND confidence<?", (lo, hi)
            ).fetchone()[0]
            ids = [
                r[0]
                for r in con.execute(
                    "SELECT detection_id FROM detections WHERE confidence>=? AND confidence<? "
                    "ORDER BY random() LIMIT 24",
                    (lo, hi),
                )
            ]
            con.execute("INSERT INTO review_strata VALUES (?, ?, ?, ?, ?, ?)", (sid, h + 1, lo, hi, population, 24))
            for k, d in enumerate(ids):
                con.execute(
                    "INSERT INTO review_items (sample_id, detection_id, stratum, inclusion_probability, draw_order) "
                    "VALUES (?, ?, ?, ?, ?)",
                    (sid, d, h + 1, 24 / population, 24 * h + k),
                )
                verdict = "yes" if rng.random() < 0.2 + 0.15 * h else "no"
                con.execute(
                    "INSERT INTO verdicts (detection_id, reviewer, verdict, recorded_utc) VALUES (?, 'bench', ?, ?)",
                    (d, verdict, now_utc()),
                )
    con.close()
    t = time.perf_counter()
    estimate_run(db)
    return time.perf_counter() - t


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--files", type=int, default=35_000)
    parser.add_argument("--detections", type=int, default=10_000_000)
    parser.add_argument("--folder", type=Path, help="work folder (default: a temporary one, removed)")
    parser.add_argument("--json", type=Path, help="also write the figures here")
    args = parser.parse_args()
    folder = args.folder or Path(tempfile.mkdtemp(prefix="callsieve-scale-"))
    try:
        t = time.perf_counter()
        manifest = write_files(folder / "site", args.files)
        print(f"wrote {args.files} files in {time.perf_counter() - t:.1f} s", flush=True)
        db = folder / "store.db"
        p = plan(manifest, db)
        print(
            f"listing {p['files']} files: {p['list_s']:.1f} s ({p['set_aside']} set aside); "
            f"planning them into the store: {p['plan_s']:.1f} s",
            flush=True,
        )
        filled = fill(db, p["ids"], args.detections)
        print(f"stored {args.detections:,} detections in {filled:.0f} s ({db.stat().st_size / 1e9:.2f} GB)", flush=True)
        figures = {"files": p["files"], "list_s": p["list_s"], "plan_s": p["plan_s"], "detections": args.detections}
        for suffix in ("csv", "parquet"):
            e = export(db, folder / f"detections.{suffix}")
            print(
                f"export {suffix}: {e['rows']:,} rows in {e['seconds']:.0f} s "
                f"({e['rows'] / e['seconds']:,.0f} rows/s), peak {e['peak_rss_mb']:.0f} MB, "
                f"{e['bytes'] / 1e9:.2f} GB",
                flush=True,
            )
            figures[f"export_{suffix}"] = e
            (folder / f"detections.{suffix}").unlink()
        e = estimate(db, p["ids"])
        print(f"estimate over {args.detections:,} detections (a sample of 120 judged): {e:.1f} s", flush=True)
        figures["estimate_s"] = e
        figures["bench_peak_rss_mb"] = peak_rss_mb()
        if args.json:
            args.json.write_text(json.dumps(figures, indent=2))
    finally:
        if args.folder is None:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
