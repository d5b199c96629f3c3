"""Cost of the sweep path descriptors per hour of audio, on their own.

Run: python benchmarks/sweep_path_cost.py [--repeat 5]

Times ``features.descriptors._path_cells`` and ``_sweep_path``, the short paths (0.3 windows) and the long
ones (0.6 windows) apart, on one 10-minute block of the demo's grid
(51-584 Hz, 5 Hz bins, 0.05-s hop, 2-s windows every 0.5 s: 106 bins, 12,037 frames, 1,201
windows) filled with the excess over the floor of pure noise (exponential periodogram
bins, in dB over their 20th percentile), one thread; the fastest of ``--repeat`` runs,
scaled to an hour. The path's work does not depend on the values, only on the grid.
"""

from __future__ import annotations

import argparse
import os
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from callsieve.features.descriptors import (  # noqa: E402
    _LONG_PATH_SHARE,
    _PATH_SHARE,
    DescriptorSettings,
    _path_cells,
    _sweep_path,
)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    s = DescriptorSettings(
        low_hz=51.0, high_hz=584.0, resolution_hz=5.0, frame_hop_s=0.05, window_s=2.0, window_hop_s=0.5
    )
    f = s.grid.frequency_hz
    n_w, block_s = s.frames_per_window, 600.0
    n_frames = int(round(block_s / s.frame_hop_s)) + n_w
    # 10 log10 of exponential powers over their 20th percentile (-ln 0.8 of the mean).
    rng = np.random.default_rng(0)
    excess = (10.0 * np.log10(rng.exponential(size=(f.size, n_frames)) / -np.log(0.8))).astype(np.float32)
    first = np.arange(0, n_frames - n_w + 1, s.frames_per_window_hop)
    # As describe_windows calls them: the long path without its midpoint, which is not kept.
    for name, share, centre in (("short paths", _PATH_SHARE, True), ("long paths", _LONG_PATH_SHARE, False)):
        best = np.inf
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            # The cells are shared by both lengths in describe_windows; each timing counts them.
            cells, centre_hz = _path_cells(excess, f)
            _sweep_path(cells, centre_hz, float(f[1] - f[0]), first, n_w, s, share, centre)
            best = min(best, time.perf_counter() - t0)
        print(
            f"{name}: {f.size} bins, {n_frames} frames, {first.size} windows: {best * 1e3:.1f} ms per "
            f"{block_s / 60:.0f}-min block, {best * 3600.0 / block_s:.3f} s per hour of audio "
            f"(fastest of {args.repeat})"
        )


if __name__ == "__main__":
    main()
