"""Time and peak memory of `callsieve report`'s long-term spectrogram, and of the whole report.

Two deployments, simulated as the store rows scoring writes (no audio is made): the
``soundscape`` table at 60-s bins in scoring's 1/12-octave base-10 bands (the lowest at
least 1 Hz wide, the top cut at Nyquist), one row per one-hour file.

- a month of 2 kHz audio: 720 files, 43,200 bins × 70 bands;
- a day of 96 kHz audio: 24 files, 1,440 bins × 138 bands.

Each case runs in its own process (peak RSS is per process, VmHWM), first building the
long-term spectrogram alone (``soundscape_from_store``: read, decode, re-bin, percentile
histograms), then the whole report with its tables, figures and HTML page (about 2,000
detections, no verification sample).

    python benchmarks/report_scale.py            # both cases
    python benchmarks/report_scale.py --case month-2khz
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import peak_rss_mb  # noqa: E402

CASES = {
    "month-2khz": {"days": 30, "rate_hz": 2000, "file_s": 3600},
    "day-96khz": {"days": 1, "rate_hz": 96000, "file_s": 3600},
}


def _edges(rate_hz: int) -> np.ndarray:
    """The band edges scoring writes at this rate (Hz): 1/12-octave base-10 bands, the
    lowest at least 1 Hz wide, the top cut at Nyquist; where that module is absent, the
    same series from 10 Hz."""
    try:
        from callsieve.features.soundscape import soundscape_band_edges

        return soundscape_band_edges(rate_hz).astype(np.float32)
    except ImportError:
        pass
    k = np.arange(math.floor(40 * math.log10(10 / 1000)), math.floor(40 * math.log10(rate_hz / 2 / 1000)) + 1)
    return (1000.0 * 10.0 ** (k / 40.0)).astype(np.float32)


def make_store(path: Path, days: int, rate_hz: int, file_s: int, seed: int = 0) -> dict:
    from callsieve.classifier.report_soundscape import encode_soundscape_row
    from callsieve.classifier.store import Transaction, open_store

    rng = np.random.default_rng(seed)
    edges = _edges(rate_hz)
    centre = np.sqrt(edges[:-1].astype(float) * edges[1:])
    n_files = days * 86400 // file_s
    n_bins = file_s // 60
    t0 = datetime(2031, 1, 1, tzinfo=UTC)
    con = open_store(path)
    with Transaction(con):
        con.execute(
            "INSERT INTO deployments (name, manifest, sample_rate_hz, channel) VALUES ('bench', '-', ?, 0)", (rate_hz,)
        )
        con.execute(
            "INSERT INTO runs (run_key, deployment_id, model_sha256, model_path, classes, target, threshold, "
            "parameters, versions, host, started_utc, status) VALUES ('k', 1, 'x', '-', '[\"moan\", \"background\"]', "
            "NULL, 0.1, '{}', '{}', 'bench', '2031-01-01T00:00:00Z', 'finished')"
        )
        for i in range(n_files):
            start = (t0 + timedelta(seconds=i * file_s)).strftime("%Y-%m-%dT%H:%M:%SZ")
            fid = con.execute(
                "INSERT INTO files (deployment_id, name, start_utc, duration_s, sample_rate_hz, size_bytes, mtime_ns) "
                "VALUES (1, ?, ?, ?, ?, 1, 1)",
                (f"f{i:05d}.wav", start, float(file_s), rate_hz),
            ).lastrowid
            con.execute(
                "INSERT INTO run_files (run_id, file_id, status, size_bytes, mtime_ns, scored_utc) "
                "VALUES (1, ?, 'done', 1, 1, '2031-02-01T00:00:00Z')",
                (fid,),
            )
            psd = 90 - 15 * np.log10(centre / 10) + rng.normal(0, 2, (n_bins, centre.size))
            con.execute(
                "INSERT INTO soundscape (run_id, file_id, start_utc, bin_s, seconds, band_edges_hz, psd_db) "
                "VALUES (1, ?, ?, 60.0, ?, ?, ?)",
                (fid, start, *encode_soundscape_row(np.full(n_bins, 60.0), edges, psd)),
            )
            for s in rng.uniform(0, file_s - 2, 3):
                con.execute(
                    "INSERT INTO detections (run_id, file_id, start_s, end_s, low_hz, high_hz, label, confidence, "
                    "received_level_db, snr_db, clipped) VALUES (1, ?, ?, ?, 50, 200, 'moan', ?, 110, 8, 0)",
                    (fid, float(s), float(s) + 1.5, float(rng.uniform(0.1, 1.0))),
                )
    con.close()
    return {"files": n_files, "bins": n_files * n_bins, "bands": int(edges.size - 1)}


def run_case(name: str) -> dict:
    from callsieve.classifier.report import build_report, soundscape_from_store
    from callsieve.classifier.store import open_store

    c = CASES[name]
    with tempfile.TemporaryDirectory() as tmp:
        db = Path(tmp) / "store.db"
        shape = make_store(db, c["days"], c["rate_hz"], c["file_s"])
        base_mb = peak_rss_mb()  # after the store is written: what follows is the report's
        con = open_store(db, create=False)
        t = time.perf_counter()
        first = datetime(2031, 1, 1, tzinfo=UTC).timestamp()
        lts = soundscape_from_store(con, 1, first, first + c["days"] * 86400.0)
        lts_s = time.perf_counter() - t
        con.close()
        lts_mb = peak_rss_mb()
        t = time.perf_counter()
        build_report(db, Path(tmp) / "report")
        report_s = time.perf_counter() - t
        npz_kb = (Path(tmp) / "report" / "soundscape.npz").stat().st_size / 1024
        return {
            "case": name,
            **shape,
            "ltsa_bin_s": lts.bin_s,
            "ltsa_shape": list(lts.psd_db.shape),
            "ltsa_s": round(lts_s, 2),
            "report_s": round(report_s, 2),
            "peak_rss_before_mb": round(base_mb, 1),
            "peak_rss_ltsa_mb": round(lts_mb, 1),
            "peak_rss_report_mb": round(peak_rss_mb(), 1),
            "soundscape_npz_kb": round(npz_kb, 1),
        }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--case", choices=sorted(CASES))
    args = ap.parse_args()
    if args.case:
        print(json.dumps(run_case(args.case)))
        return
    for name in CASES:
        # A fresh process per case, so that each peak is its own.
        out = subprocess.run([sys.executable, __file__, "--case", name], capture_output=True, text=True, check=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        print(
            f"{r['case']}: {r['files']} files, {r['bins']} bins × {r['bands']} bands -> long-term spectrogram "
            f"{r['ltsa_shape'][0]} × {r['ltsa_shape'][1]} at {r['ltsa_bin_s']:g} s in {r['ltsa_s']:.2f} s; whole "
            f"report {r['report_s']:.2f} s; peak RSS {r['peak_rss_before_mb']:.0f} MB before, "
            f"{r['peak_rss_ltsa_mb']:.0f} MB after the spectrogram, {r['peak_rss_report_mb']:.0f} MB after the "
            f"report; soundscape.npz {r['soundscape_npz_kb']:.0f} kB"
        )


if __name__ == "__main__":
    main()
