"""The vectorised sweep path search against a plain loop over windows, starts, rates and bins.

``_path_cells`` and ``_sweep_path`` add cells rate by rate over whole blocks and picks each window's best
path afterwards; this loop does what its docstring says, one path at a time, on random
excesses (some above the cap, an odd number of bins, windows starting on frames of both
parities), for the short and the long paths. The reference is the definition, written
out; the test fails if the blocks, strides or the window view go out of step with it.
"""

from __future__ import annotations

import numpy as np
import pytest
from callsieve.features import descriptors as d
from callsieve.features.descriptors import DescriptorSettings

SETTINGS = DescriptorSettings(
    low_hz=100.0, high_hz=160.0, resolution_hz=5.0, frame_hop_s=0.05, window_s=1.0, window_hop_s=0.15
)


def _reference(excess_db, frequency_hz, first, n_w, settings, share):
    df = float(frequency_hz[1] - frequency_hz[0])
    stride, points, step = d._path_geometry(settings, n_w, df, share)
    capped = np.clip(excess_db, 0.0, d._PATH_CAP_DB) + d._PATH_SOFT_SHARE * np.clip(excess_db, 0.0, d._PATH_SOFT_DB)
    f = np.asarray(frequency_hz, dtype=float)
    if f.size % 2:
        capped, f = (np.concatenate([x, x[-1:]]) for x in (capped, f))
    capped = np.maximum(capped[0::2], capped[1::2])
    centre = 0.5 * (f[0::2] + f[1::2])
    n_f = centre.size
    n_side = int(min(d._PATH_RATES, np.floor(d._fastest_sweep_hz_per_s(settings) / step + 1e-9)))
    rates = np.arange(-n_side, n_side + 1) * step
    # Slowest rates first, as the search breaks ties.
    rates = rates[np.argsort(np.abs(rates), kind="stable")]
    lag_s = np.arange(points) * stride * settings.frame_hop_s
    duration = lag_s[-1]
    out = []
    for w0 in first:
        best = None
        for start in range(w0, w0 + n_w - (points - 1) * stride, stride):
            for r in rates:
                shift = np.rint(r * lag_s / (2.0 * df)).astype(int)
                for b in range(n_f):
                    rows = b + shift
                    inside = (rows >= 0) & (rows < n_f)
                    frames = start + stride * np.arange(points)
                    total = capped[rows[inside], frames[inside]].sum()
                    if best is None or total > best[0] * (1 + 1e-6) + 1e-6:
                        best = (total, total / points, r, centre[b] + r * duration / 2.0)
        out.append(best[1:])
    return np.array(out)


@pytest.mark.parametrize("share", [d._PATH_SHARE, d._LONG_PATH_SHARE])
def test_vectorised_path_search_matches_the_loop(share):
    rng = np.random.default_rng(5)
    frequency_hz = SETTINGS.grid.frequency_hz
    assert frequency_hz.size % 2 == 1  # 100..160 Hz in 5 Hz steps: 13 bins, a lone top bin
    n_w = SETTINGS.frames_per_window
    n_frames = 8 * n_w
    # Continuous values (no ties between paths), a sixth of them above the cap.
    excess = rng.uniform(-5.0, 24.0, size=(frequency_hz.size, n_frames)).astype(np.float32)
    first = np.arange(0, n_frames - n_w + 1, 3)  # a hop of 3 frames: starts of both parities
    cells, centre_hz = d._path_cells(excess, frequency_hz)
    got = d._sweep_path(cells, centre_hz, float(frequency_hz[1] - frequency_hz[0]), first, n_w, SETTINGS, share)
    want = _reference(excess, frequency_hz, first, n_w, SETTINGS, share)
    np.testing.assert_allclose(got[:, 0], want[:, 0], rtol=1e-5)
    np.testing.assert_array_equal(got[:, 1], want[:, 1])
    np.testing.assert_allclose(got[:, 2], want[:, 2], rtol=1e-9)


def test_path_without_its_midpoint_keeps_excess_and_rate():
    # describe_windows asks the long path for its excess and rate only: skipping the
    # midpoint must leave both exactly as the full search gives them.
    rng = np.random.default_rng(6)
    frequency_hz = SETTINGS.grid.frequency_hz
    n_w = SETTINGS.frames_per_window
    excess = rng.uniform(-5.0, 24.0, size=(frequency_hz.size, 8 * n_w)).astype(np.float32)
    first = np.arange(0, 7 * n_w + 1, 3)
    cells, centre_hz = d._path_cells(excess, frequency_hz)
    df = float(frequency_hz[1] - frequency_hz[0])
    full = d._sweep_path(cells, centre_hz, df, first, n_w, SETTINGS, d._LONG_PATH_SHARE)
    bare = d._sweep_path(cells, centre_hz, df, first, n_w, SETTINGS, d._LONG_PATH_SHARE, centre=False)
    np.testing.assert_array_equal(bare[:, :2], full[:, :2])
    assert np.isnan(bare[:, 2]).all() and np.isfinite(full[:, 2]).all()
