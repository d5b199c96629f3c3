"""Peak memory of streaming a long file: a 1-hour and a 6-hour file, read and turned into PSD.

Run: python benchmarks/stream_memory.py [--rate 8000] [--folder /tmp/cs-bench]
Each measurement runs in a fresh process so that peak RSS belongs to that file alone.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import soundfile as sf
from _common import peak_rss_mb


def write_long_file(path: Path, hours: float, rate: int) -> None:
    """Write noise to ``path`` chunk by chunk (constant memory)."""
    rng = np.random.default_rng(0)
    with sf.SoundFile(path, "w", samplerate=rate, channels=1, subtype="PCM_16") as fh:
        remaining = int(hours * 3600 * rate)
        while remaining:
            n = min(remaining, rate * 600)
            fh.write(rng.normal(0, 0.05, n).astype(np.float32))
            remaining -= n


def measure(path: str) -> None:
    from callsieve.features import RecordingChain, SpectrogramGrid, psd_spectrogram, read_blocks

    chain = RecordingChain.flat(2.5, -170.0, 40.0)
    info = sf.info(path)
    grid = SpectrogramGrid(2.0, 0.25, 10.0, info.samplerate / 2 - 10)
    context = grid.window_samples(info.samplerate)
    t0 = time.perf_counter()
    n_frames = 0
    for block in read_blocks(path, block_frames=info.samplerate * 300, context_frames=context):
        # Frames that start in the core and whose window the block holds: each once.
        frames = grid.frames_starting_in(block.core_start, block.core_stop, info.samplerate)
        frames = frames[
            grid.frame_start_samples(frames, info.samplerate) + context <= block.first_sample + block.samples.size
        ]
        spec = psd_spectrogram(block.samples, info.samplerate, grid, chain, block.first_sample, frames)
        n_frames += spec.psd_db.shape[1]
    elapsed = time.perf_counter() - t0
    peak_mb = peak_rss_mb()
    print(f"{info.duration / 3600:.1f} h  peak RSS {peak_mb:.0f} MB  {elapsed:.1f} s  frames {n_frames}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rate", type=int, default=8000)
    parser.add_argument("--folder", type=Path, default=Path("/tmp/cs-bench"))
    parser.add_argument("--measure", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.measure:
        measure(args.measure)
        return
    args.folder.mkdir(parents=True, exist_ok=True)
    for hours in (1, 6):
        path = args.folder / f"long_{hours}h_{args.rate}.wav"
        if not path.exists():
            write_long_file(path, hours, args.rate)
        subprocess.run([sys.executable, __file__, "--measure", str(path)], check=True)


if __name__ == "__main__":
    main()
