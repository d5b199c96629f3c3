"""Drawing and rendering a verification sample from a large run (`callsieve review sample`).

Run: python benchmarks/review_sample.py [--detections 12000] [--files 12] [--file-minutes 30]
                                        [--n 200] [--jobs 2] [--keep DIR]

Writes a synthetic deployment (2 kHz 16-bit WAV files of noise with an upsweep at every
detection) and a store holding one finished run with ``--detections`` detections, spread
evenly over the files, confidences from a Beta(0.7, 1.6) distribution on 0.1..1 (many low
scores, few high ones, as a detector's tail). Then times, with a new folder each time:

- the design alone (strata, allocation, draw, 20 audit segments; no rendering);
- the whole command as a user runs it: design, store, 200 items rendered (spectrogram
  PNG, clip and time-compressed clip each) over ``--jobs`` processes, sample.csv.

Setup (writing audio and store) is not timed.
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import soundfile as sf
from _common import peak_rss_mb
from callsieve.classifier.review import draw_sample
from callsieve.classifier.store import open_store, replace_file_result, upsert_deployment, upsert_file
from scipy import signal

FS = 2000
MANIFEST = """
[deployment]
name = "bench-site"
audio_dir = "audio"
glob = "*.wav"
timestamp_format = "%Y%m%dT%H%M%SZ"

[calibration]
full_scale_volts = 2.5
preamp_gain_db = 40.0
hydrophone_sensitivity_db = -170.0
"""


def build(root: Path, detections: int, files: int, file_s: float, seed: int = 0) -> Path:
    """Audio, manifest and a store with one run; returns the store's path."""
    rng = np.random.default_rng(seed)
    audio = root / "audio"
    audio.mkdir(parents=True)
    (root / "manifest.toml").write_text(MANIFEST)
    db = root / "detections.db"
    con = open_store(db)
    dep = upsert_deployment(con, "bench-site", str((root / "manifest.toml").resolve()), FS, 0)
    settings = {"low_hz": 50.0, "high_hz": 400.0, "resolution_hz": 5.0, "frame_hop_s": 0.05}
    con.execute(
        "INSERT INTO runs (run_key, deployment_id, model_sha256, model_path, classes, target, threshold, parameters, "
        "versions, host, started_utc, status) VALUES ('bench', ?, 'sha', 'm', ?, 'bench-call', 0.1, ?, '{}', 'h', "
        "'2031-01-01T00:00:00Z', 'finished')",
        (dep, json.dumps(["background", "bench-call"]), json.dumps({"settings": settings, "manifest": ""})),
    )
    t0 = datetime(2031, 7, 1, 20, 0, 0)
    per_file = np.diff(np.linspace(0, detections, files + 1).round().astype(int))
    call_t = np.arange(int(1.2 * FS)) / FS
    call = signal.chirp(call_t, 80.0, call_t[-1], 160.0) * np.hanning(call_t.size)
    for i in range(files):
        start = t0 + timedelta(seconds=i * file_s)
        path = audio / f"bench_{start:%Y%m%dT%H%M%SZ}.wav"
        x = rng.normal(0.0, 0.02, int(file_s * FS))
        starts = np.sort(rng.uniform(1.0, file_s - 3.0, per_file[i]))
        for s in starts:
            a = int(s * FS)
            x[a : a + call.size] += 0.05 * call
        sf.write(path, x, FS, subtype="PCM_16")
        st = path.stat()
        fid = upsert_file(con, dep, path.name, f"{start:%Y-%m-%dT%H:%M:%S}Z", file_s, FS, st.st_size, st.st_mtime_ns)
        conf = 0.1 + 0.9 * rng.beta(0.7, 1.6, starts.size)
        rows = [
            (float(s), float(s) + 1.2, 75.0, 170.0, "bench-call", float(c), 100.0, 6.0, 0)
            for s, c in zip(starts, conf, strict=True)
        ]
        replace_file_result(con, 1, fid, "done", None, st.st_size, st.st_mtime_ns, 100, rows)
    con.close()
    return db


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--detections", type=int, default=12000)
    parser.add_argument("--files", type=int, default=12)
    parser.add_argument("--file-minutes", type=float, default=30.0)
    parser.add_argument("--n", type=int, default=200)
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--keep", type=Path, help="build here and keep it (default: a temporary folder)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = args.keep or Path(tmp)
        t = time.perf_counter()
        db = build(root, args.detections, args.files, args.file_minutes * 60.0)
        print(
            f"setup: {args.detections} detections over {args.files} files of {args.file_minutes:g} min "
            f"({args.files * args.file_minutes / 60:.1f} h at {FS} Hz) in {time.perf_counter() - t:.1f} s"
        )
        t = time.perf_counter()
        s = draw_sample(db, root / "design-only", n=args.n, bins=8, segments=20, segment_minutes=5, render=False)
        design_s = time.perf_counter() - t
        t = time.perf_counter()
        s = draw_sample(db, root / "sample", n=args.n, bins=8, segments=20, segment_minutes=5, jobs=args.jobs)
        total_s = time.perf_counter() - t
        images = len(list((root / "sample" / "items").glob("*.png")))
        clips = len(list((root / "sample" / "items").glob("*.wav")))
        print(f"design only (strata, allocation, draw, 20 segments, store): {design_s:.2f} s")
        print(
            f"sample of {s['items']} from {sum(x['population'] for x in s['strata'])} in {len(s['strata'])} strata, "
            f"drawn and rendered ({images} images, {clips} clips) with {args.jobs} jobs: {total_s:.1f} s "
            f"({s['items'] / total_s:.1f} items/s); parent peak RSS {peak_rss_mb():.0f} MB"
        )


if __name__ == "__main__":
    main()
