"""Contour and band-energy descriptors of analysis windows, in physical units.

One row per analysis window, computed for all windows of a block at once.
The table :func:`descriptor_table` gives each descriptor's name, unit and meaning; the README prints it.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from ._validation import ParameterError, check_positive
from .spectrogram import SpectrogramGrid

__all__ = [
    "DESCRIPTOR_VERSION",
    "DescriptorSettings",
    "descriptor_table",
    "descriptor_names",
    "model_descriptor_names",
    "is_absolute_level",
    "describe_windows",
    "subband_edges_hz",
    "subband_bin_masks",
    "active_threshold_db",
]

# Bump when any descriptor changes meaning, so old models are refused on new data.
DESCRIPTOR_VERSION = "6"
_TINY = 1e-30


@dataclass(frozen=True)
class DescriptorSettings:
    """How windows are cut and described. All in physical units.

    Parameters
    ----------
    low_hz, high_hz : float, Hz, the analysis band
    resolution_hz : float, Hz, spectrogram bin spacing (frame length 1/resolution s)
    frame_hop_s : float, s, time between spectrogram frames
    window_s : float, s, length of an analysis window
    window_hop_s : float, s, time between window starts (a multiple of frame_hop_s)
    noise_span_s : float, s, span of the running percentile of the noise floor
    noise_step_s : float, s, time between noise-floor estimates (interpolated between)
    noise_percentile : float, %, percentile of the PSD taken as the noise floor
    n_subbands : int, equal log-width sub-bands of the band
    n_time_slices : int, equal slices of the window in time for the patch descriptors
    trace_false_alarm : float, probability that a frame of pure noise has its
        strongest bin stand above the threshold; the threshold on the excess over the
        noise floor follows from it and the number of bins (see :func:`active_threshold_db`)
    """

    low_hz: float
    high_hz: float
    resolution_hz: float
    frame_hop_s: float
    window_s: float
    window_hop_s: float
    noise_span_s: float = 60.0
    noise_step_s: float = 5.0
    noise_percentile: float = 20.0
    n_subbands: int = 4
    n_time_slices: int = 4
    trace_false_alarm: float = 0.05

    def __post_init__(self) -> None:
        for name in (
            "resolution_hz",
            "frame_hop_s",
            "window_s",
            "window_hop_s",
            "noise_span_s",
            "noise_step_s",
        ):
            check_positive(name, getattr(self, name))
        if not 0.0 <= self.low_hz < self.high_hz:
            raise ParameterError(f"band needs 0 <= low_hz < high_hz, got {self.low_hz:g} .. {self.high_hz:g}")
        if self.high_hz - self.low_hz < 4 * self.resolution_hz:
            raise ParameterError("the band must span at least 4 bins of resolution_hz")
        for name in ("window_hop_s", "noise_step_s"):
            ratio = getattr(self, name) / self.frame_hop_s
            if abs(ratio - round(ratio)) > 1e-6 or round(ratio) < 1:
                raise ParameterError(f"{name} must be a whole multiple of frame_hop_s ({self.frame_hop_s:g} s)")
        if self.window_s < 1.0 / self.resolution_hz + 2 * self.frame_hop_s:
            raise ParameterError("window_s must hold at least three spectrogram frames")
        if not 0 < self.trace_false_alarm < 1:
            raise ParameterError("trace_false_alarm must be in (0, 1)")
        if not 0 < self.noise_percentile < 100 or self.n_subbands < 1:
            raise ParameterError("noise_percentile must be in (0, 100) and n_subbands >= 1")
        if not 1 <= self.n_time_slices <= self.frames_per_window:
            raise ParameterError("n_time_slices must be between 1 and the frames in a window")

    @property
    def grid(self) -> SpectrogramGrid:
        """The spectrogram grid these settings describe."""
        return SpectrogramGrid(self.resolution_hz, self.frame_hop_s, self.low_hz, self.high_hz)

    @property
    def frames_per_window(self) -> int:
        """Spectrogram frames whose window lies inside one analysis window."""
        return int(round((self.window_s - 1.0 / self.resolution_hz) / self.frame_hop_s)) + 1

    @property
    def frames_per_window_hop(self) -> int:
        """Frames between the first frames of consecutive windows."""
        return int(round(self.window_hop_s / self.frame_hop_s))

    @property
    def frames_per_noise_step(self) -> int:
        """Frames between noise-floor steps."""
        return int(round(self.noise_step_s / self.frame_hop_s))

    @property
    def noise_span_frames(self) -> int:
        """Frames in the noise percentile's span."""
        return max(int(round(self.noise_span_s / self.frame_hop_s)), 1)

    @property
    def noise_stride(self) -> int:
        """Subsampling of frames inside the noise span (about 2 frames per second)."""
        return max(int(round(0.5 / self.frame_hop_s)), 1)

    def to_dict(self) -> dict:
        """Plain values, for model files and experiment records."""
        return asdict(self) | {"version": DESCRIPTOR_VERSION}


def active_threshold_db(settings: DescriptorSettings, n_bins: int) -> float:
    """Excess (dB over the mean noise PSD) the strongest of ``n_bins`` bins must reach.

    The power of noise in one bin of one frame is exponentially distributed about its
    mean, so the largest of n bins exceeds ``ln(n / P_fa)`` times the mean with
    probability about P_fa (``trace_false_alarm``).
    """
    return float(10.0 * np.log10(np.log(n_bins / settings.trace_false_alarm)))


def subband_edges_hz(settings: DescriptorSettings) -> np.ndarray:
    """Edges (Hz) of the equal log-width sub-bands; ``n_subbands + 1`` values."""
    low = max(settings.low_hz, settings.resolution_hz)
    return np.geomspace(low, settings.high_hz, settings.n_subbands + 1)


def subband_bin_masks(frequency_hz: np.ndarray, settings: DescriptorSettings) -> np.ndarray:
    """Bins of each sub-band [shape=(n_subbands, n_freq)], bool.

    A bin belongs to the sub-band its centre falls in (the top edge closes the last
    sub-band); a sub-band narrower than a bin takes the bin nearest its centre.
    """
    f = np.asarray(frequency_hz, dtype=np.float64)
    df = float(f[1] - f[0])
    edges = subband_edges_hz(settings)
    masks = []
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        sel = (f >= lo - df / 2) & (f < hi + (df / 2 if hi == edges[-1] else -df / 2))
        if not np.any(sel):
            sel = np.abs(f - np.sqrt(lo * hi)) == np.min(np.abs(f - np.sqrt(lo * hi)))
        masks.append(sel)
    return np.array(masks)


# name, unit, meaning
_CONTOUR = [
    ("trace_first_hz", "Hz", "frequency of the dominant trace at its first frame above the noise floor"),
    ("trace_last_hz", "Hz", "frequency of the dominant trace at its last frame above the noise floor"),
    ("trace_lowest_hz", "Hz", "lowest frequency of the trace above the noise floor"),
    ("trace_highest_hz", "Hz", "highest frequency of the trace above the noise floor"),
    ("trace_median_hz", "Hz", "median frequency of the trace above the noise floor"),
    (
        "trace_sweep_rate_hz_per_s",
        "Hz/s",
        "slope of a weighted quadratic fit to the trace, at the window centre",
    ),
    ("trace_sweep_change_hz_per_s2", "Hz/s²", "second derivative of that fit"),
    ("trace_turns", "count", "sign changes of the trace's second difference (over 1 bin)"),
    ("trace_cover_fraction", "1", "fraction of the window's frames whose trace stands above the floor"),
    ("trace_duration_s", "s", "time the trace stands above the noise floor"),
    ("trace_fit_rms_hz", "Hz", "rms deviation of the trace from its quadratic fit"),
    ("trace_excess_db", "dB", "median excess of the trace over the noise floor, frames above it"),
    (
        "sweep_path_excess_db",
        "dB",
        "mean excess over the noise floor (each cell clipped to 0..20 dB, plus 1 % of it clipped to "
        "0..60 dB) along the best straight sweep of 0.3 window lengths through the window's spectrogram",
    ),
    ("sweep_path_rate_hz_per_s", "Hz/s", "frequency change per second of that best straight sweep"),
    ("sweep_path_centre_hz", "Hz", "frequency of that sweep at its midpoint"),
    (
        "sweep_path_long_excess_db",
        "dB",
        "the same mean excess along the best straight sweep of 0.6 window lengths",
    ),
    ("sweep_path_long_rate_hz_per_s", "Hz/s", "frequency change per second of that long sweep"),
]
_ENERGY = [
    ("band_level_db", "dB re 1 µPa", "rms SPL in the analysis band over the window"),
    ("noise_level_db", "dB re 1 µPa", "band level of the noise floor over the window"),
    ("snr_db", "dB", "in-band signal-to-noise ratio: (band power − noise power) / noise power"),
    ("peak_to_peak_db", "dB re 1 µPa", "peak-to-peak SPL of the band-passed waveform"),
    ("psd_evenness", "1", "Shannon entropy of the window's mean in-band PSD, over its maximum"),
    ("excess_centroid_hz", "Hz", "centroid of the PSD excess over the noise floor"),
    ("peak_run_width_hz", "Hz", "width of the run around the excess peak within 10 dB of it"),
    (
        "excess_core_duration_s",
        "s",
        "time over which the window's in-band excess energy grows from 5 % to 95 % of its total",
    ),
]


def descriptor_names(settings: DescriptorSettings) -> list[str]:
    """Names of the descriptors, in column order."""
    return [n for n, _, _ in descriptor_table(settings)]


#: Descriptors that are absolute levels (dB re 1 µPa): they say how loud the site is as
#: much as how loud the call is, so the model does not see them (see model_descriptor_names).
def is_absolute_level(name: str) -> bool:
    """True for a descriptor that is an absolute level, dB re 1 µPa."""
    return name in ("band_level_db", "noise_level_db", "peak_to_peak_db") or (
        name.startswith("subband") and name.endswith("_level_db")
    )


def model_descriptor_names(settings: DescriptorSettings) -> list[str]:
    """The descriptors a model learns from: all but the absolute levels.

    Levels relative to the noise floor (excesses, SNR), frequencies, times and shapes
    travel from one site to another; absolute levels carry the site's noise and the
    callers' ranges, and stay in the outputs (received level) instead.
    """
    return [n for n in descriptor_names(settings) if not is_absolute_level(n)]


def descriptor_table(settings: DescriptorSettings | None = None) -> list[tuple[str, str, str]]:
    """(name, unit, meaning) of every descriptor; sub-bands and slices follow ``settings``."""
    n_sub = settings.n_subbands if settings is not None else DescriptorSettings.n_subbands
    n_t = settings.n_time_slices if settings is not None else DescriptorSettings.n_time_slices
    rows = list(_CONTOUR) + list(_ENERGY)
    for i in range(n_sub):
        k = i + 1
        rows.append(
            (
                f"subband{k}_level_db",
                "dB re 1 µPa",
                f"rms SPL in sub-band {k} of {n_sub} (equal widths in log frequency)",
            )
        )
        rows.append((f"subband{k}_excess_db", "dB", f"sub-band {k} power over its noise-floor power, window mean"))
        rows.append(
            (
                f"subband{k}_peak_excess_db",
                "dB",
                f"sub-band {k} power over its noise-floor power in its strongest frame",
            )
        )
    for q in range(n_t):
        for i in range(n_sub):
            rows.append(
                (
                    f"patch_t{q + 1}_b{i + 1}_excess_db",
                    "dB",
                    f"power over the noise floor in time slice {q + 1} of {n_t} of the window and sub-band {i + 1}",
                )
            )
    return rows


def _window_view(x: np.ndarray, first: np.ndarray, width: int) -> np.ndarray:
    """x[..., first[k] : first[k] + width] for every k, as (..., n_windows, width)."""
    return sliding_window_view(x, width, axis=-1)[..., first, :]


def describe_windows(
    psd_db: np.ndarray,
    noise_db: np.ndarray,
    frequency_hz: np.ndarray,
    window_first_frame: np.ndarray,
    settings: DescriptorSettings,
    peak_to_peak_db: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Descriptors of analysis windows from PSD frames and the noise floor.

    Parameters
    ----------
    psd_db : np.ndarray [shape=(n_freq, n_frames)], dB re 1 µPa²/Hz
    noise_db : np.ndarray [shape=(n_freq, n_frames)], dB re 1 µPa²/Hz, floor at each frame
    frequency_hz : np.ndarray [shape=(n_freq,)], Hz, evenly spaced
    window_first_frame : np.ndarray [shape=(n_windows,)], column of each window's first frame
    settings : DescriptorSettings
    peak_to_peak_db : np.ndarray [shape=(n_windows,)], dB re 1 µPa, from the waveform

    Returns
    -------
    values : np.ndarray [shape=(n_windows, n_descriptors)], float32, columns as
        :func:`descriptor_names`
    segment_s : np.ndarray [shape=(n_windows, 2)], s from each window's start: where its
        main trace starts and ends (the whole window where there is none)
    noise_psd : np.ndarray [shape=(n_windows, n_freq)], float32, µPa²/Hz, the mean noise
        floor over each window
    """
    n_w = settings.frames_per_window
    first = np.asarray(window_first_frame, dtype=np.int64)
    n_win = first.size
    names = descriptor_names(settings)
    if n_win == 0:
        return np.empty((0, len(names)), dtype=np.float32), np.empty((0, 2)), np.empty((0, len(frequency_hz)))
    f = np.asarray(frequency_hz, dtype=np.float64)
    df = float(f[1] - f[0])
    hop = settings.frame_hop_s
    psd = psd_db.astype(np.float32, copy=False)
    noise = noise_db.astype(np.float32, copy=False)
    p_lin = 10.0 ** (psd / 10.0)
    n_lin = 10.0 ** (noise / 10.0)

    # --- contour: the strongest excess over the floor in each frame -----------------
    excess_db = psd - noise
    peak_bin = np.argmax(excess_db, axis=0)
    cols = np.arange(excess_db.shape[1])
    peak_db = excess_db[peak_bin, cols]
    # Parabolic interpolation between bins for a sub-bin frequency.
    left = excess_db[np.maximum(peak_bin - 1, 0), cols]
    right = excess_db[np.minimum(peak_bin + 1, f.size - 1), cols]
    denom = left - 2.0 * peak_db + right
    with np.errstate(divide="ignore", invalid="ignore"):
        delta = np.where(denom < 0, 0.5 * (left - right) / denom, 0.0)
    delta = np.clip(np.nan_to_num(delta), -0.5, 0.5)
    trace_hz = f[peak_bin] + delta * df
    active = peak_db >= active_threshold_db(settings, f.size)

    tr = _window_view(trace_hz, first, n_w)  # (n_win, n_w)
    exc = _window_view(peak_db, first, n_w)
    act = _main_segment(tr, _window_view(active, first, n_w), exc, _max_jump_hz(settings, df))
    count = act.sum(axis=1)
    # Frames weigh by their excess power: frames that only graze the call's ends, and
    # see its first or last frequency for longer than it lasts, weigh little.
    w = np.where(act, 10.0 ** (np.minimum(exc, 60.0) / 10.0), 0.0)
    w = w / np.maximum(w.max(axis=1, keepdims=True), _TINY)
    tau = (np.arange(n_w) - (n_w - 1) / 2.0) * hop
    # Weighted least squares f = b0 + b1 tau + b2 tau², batched 3x3 normal equations.
    powers = np.stack([w * tau**k for k in range(5)], axis=-1).sum(axis=1)  # (n_win, 5)
    rhs = np.stack([(w * tr * tau**k).sum(axis=1) for k in range(3)], axis=-1)
    normal = np.stack([powers[:, i : i + 3] for i in range(3)], axis=1)
    enough = count >= 3
    coef = np.zeros((n_win, 3))
    if np.any(enough):
        reg = np.eye(3) * 1e-9
        coef[enough] = np.linalg.solve(normal[enough] + reg, rhs[enough][..., None])[..., 0]
    safe = np.maximum(count, 1)
    mean_f = (w * tr).sum(axis=1) / np.maximum(w.sum(axis=1), _TINY)
    coef[~enough, 0] = mean_f[~enough]
    fit = coef[:, :1] + coef[:, 1:2] * tau + coef[:, 2:3] * tau**2
    first_act = np.argmax(act, axis=1)
    last_act = n_w - 1 - np.argmax(act[:, ::-1], axis=1)
    rows = np.arange(n_win)
    start_hz = np.where(enough, fit[rows, first_act], tr[rows, first_act])
    end_hz = np.where(enough, fit[rows, last_act], tr[rows, last_act])
    masked_lo = np.where(act, tr, np.inf).min(axis=1)
    masked_hi = np.where(act, tr, -np.inf).max(axis=1)
    sorted_tr = np.sort(np.where(act, tr, np.inf), axis=1)
    median_hz = 0.5 * (sorted_tr[rows, (safe - 1) // 2] + sorted_tr[rows, safe // 2])
    spread = np.sqrt((w * (tr - fit) ** 2).sum(axis=1) / np.maximum(w.sum(axis=1), _TINY))
    # Inflections: second differences over three consecutive active frames, above one bin.
    d2 = tr[:, 2:] - 2.0 * tr[:, 1:-1] + tr[:, :-2]
    ok = act[:, 2:] & act[:, 1:-1] & act[:, :-2] & (np.abs(d2) > df)
    inflections = _sign_changes(np.where(ok, np.sign(d2), 0.0))
    excess_med = np.sort(np.where(act, exc, np.inf), axis=1)[rows, (safe - 1) // 2]
    none = count == 0
    contour = np.stack(
        [
            start_hz,
            end_hz,
            masked_lo,
            masked_hi,
            median_hz,
            coef[:, 1],
            2.0 * coef[:, 2],
            inflections,
            count / n_w,
            count * hop,
            spread,
            excess_med,
        ],
        axis=1,
    )
    contour[none] = 0.0
    contour[none, 11] = np.max(exc[none], axis=1) if np.any(none) else 0.0
    cells, centre_hz = _path_cells(excess_db, f)  # once for both path lengths
    short = _sweep_path(cells, centre_hz, df, first, n_w, settings, _PATH_SHARE)
    # The long path's midpoint is not a descriptor: only its excess and rate are kept.
    long = _sweep_path(cells, centre_hz, df, first, n_w, settings, _LONG_PATH_SHARE, centre=False)
    contour = np.concatenate([contour, short, long[:, :2]], axis=1)

    # --- band energy --------------------------------------------------------------
    band_p = p_lin.sum(axis=0) * df  # µPa² per frame
    band_n = n_lin.sum(axis=0) * df
    win_p = _window_view(band_p, first, n_w).mean(axis=1)
    win_n = _window_view(band_n, first, n_w).mean(axis=1)
    band_level = 10.0 * np.log10(np.maximum(win_p, _TINY))
    noise_level = 10.0 * np.log10(np.maximum(win_n, _TINY))
    snr = 10.0 * np.log10(np.maximum(win_p - win_n, 1e-3 * win_n) / np.maximum(win_n, _TINY))

    mean_psd = _window_view(p_lin, first, n_w).mean(axis=2)  # (n_freq, n_win)
    mean_noise = _window_view(n_lin, first, n_w).mean(axis=2)
    prob = mean_psd / np.maximum(mean_psd.sum(axis=0, keepdims=True), _TINY)
    entropy = -(prob * np.log(np.maximum(prob, _TINY))).sum(axis=0) / np.log(f.size)
    excess_spec = np.maximum(mean_psd - mean_noise, 0.0)
    total_excess = excess_spec.sum(axis=0)
    centroid = np.where(
        total_excess > 0,
        (f[:, None] * excess_spec).sum(axis=0) / np.maximum(total_excess, _TINY),
        0.5 * (f[0] + f[-1]),
    )
    bandwidth = _peak_run_width(excess_spec.T, df)
    frame_excess = np.maximum(band_p - band_n, 0.0)
    duration90 = _excess_core_duration(_window_view(frame_excess, first, n_w), hop)

    sub, frame_sub_p, frame_sub_n = [], [], []
    for sel in subband_bin_masks(f, settings):
        sp = mean_psd[sel].sum(axis=0) * df
        sn = mean_noise[sel].sum(axis=0) * df
        fp = p_lin[sel].sum(axis=0)  # per frame; the bin width cancels in the ratios
        fn = n_lin[sel].sum(axis=0)
        frame_sub_p.append(fp)
        frame_sub_n.append(fn)
        peak = _window_view(fp / np.maximum(fn, _TINY), first, n_w).max(axis=1)
        sub += [
            10.0 * np.log10(np.maximum(sp, _TINY)),
            10.0 * np.log10(np.maximum(sp, _TINY) / np.maximum(sn, _TINY)),
            10.0 * np.log10(np.maximum(peak, _TINY)),
        ]
    sub += _patch_excess_db(np.array(frame_sub_p), np.array(frame_sub_n), first, n_w, settings.n_time_slices)
    energy = np.stack(
        [
            band_level,
            noise_level,
            snr,
            np.asarray(peak_to_peak_db, dtype=np.float64),
            entropy,
            centroid,
            bandwidth,
            duration90,
        ]
        + sub,
        axis=1,
    )
    # Where in the window the main trace lies: first frame's start to last frame's end.
    frame_s = 1.0 / settings.resolution_hz
    segment = np.where(
        none[:, None],
        np.array([0.0, settings.window_s]),
        np.column_stack([first_act * hop, last_act * hop + frame_s]),
    )
    return np.concatenate([contour, energy], axis=1).astype(np.float32), segment, mean_noise.T.astype(np.float32)


def _patch_excess_db(
    sub_p: np.ndarray, sub_n: np.ndarray, first: np.ndarray, n_w: int, n_slices: int
) -> list[np.ndarray]:
    """Excess over the floor of each (time slice, sub-band) cell of every window, dB.

    The window's spectrogram on a coarse fixed grid: sub-bands in frequency, equal
    slices in time. An upsweep lights the cells from low-early to high-late, a downsweep
    the other diagonal, a tone one row; tree models read such cells well. Sums over
    slices come from cumulative sums over frames, so the cost does not grow with n_w.

    Parameters
    ----------
    sub_p, sub_n : np.ndarray [shape=(n_sub, n_frames)], power and noise power per sub-band
    first : np.ndarray [shape=(n_windows,)], first frame of each window
    n_w : int, frames per window
    n_slices : int, time slices per window

    Returns
    -------
    list of np.ndarray [shape=(n_windows,)], slice-major: slice 1 sub-bands 1..n, ...
    """
    zero = np.zeros((sub_p.shape[0], 1))
    cp = np.concatenate([zero, np.cumsum(sub_p, axis=1, dtype=np.float64)], axis=1)
    cn = np.concatenate([zero, np.cumsum(sub_n, axis=1, dtype=np.float64)], axis=1)
    bounds = np.round(np.linspace(0, n_w, n_slices + 1)).astype(np.int64)
    out = []
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        p = cp[:, first + b] - cp[:, first + a]
        n = cn[:, first + b] - cn[:, first + a]
        out.extend(10.0 * np.log10(np.maximum(p, _TINY) / np.maximum(n, _TINY)))
    return out


#: Length of the straight sweep paths, as a share of the window, and the cap on each
#: cell's excess (dB): a transient of one frame cannot outweigh a whole faint sweep.
_PATH_SHARE = 0.3
_PATH_CAP_DB = 20.0
#: The long paths, twice as long: a call at least as long fills them as it fills the short
#: ones, a sweep or transient shorter than the long path fills only part of it and stands
#: lower along it, so the two paths together tell a call's length.
_LONG_PATH_SHARE = 0.6
#: Largest number of sweep rates on each side of zero.
_PATH_RATES = 10
#: Each cell also counts this share of its excess up to _PATH_SOFT_DB (a soft cap): paths
#: through a loud call all reach the cap, and without it the slowest of them won, so a
#: loud call crossed by a louder slow one took the slow one's rate.
_PATH_SOFT_SHARE = 0.01
_PATH_SOFT_DB = 60.0


def _path_cells(excess_db: np.ndarray, frequency_hz: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The cells the sweep paths add up: each bin's excess clipped to 0..``_PATH_CAP_DB``
    plus ``_PATH_SOFT_SHARE`` of it clipped to 0..``_PATH_SOFT_DB``, the larger of each
    pair of bins (a tolerance for curvature and jitter).

    Parameters
    ----------
    excess_db : np.ndarray [shape=(n_bins, n_frames)], dB, PSD over the noise floor
    frequency_hz : np.ndarray [shape=(n_bins,)], Hz, the bins' centres (evenly spaced)

    Returns
    -------
    cells : np.ndarray [shape=(ceil(n_bins / 2), n_frames)], float32, dB
    centre_hz : np.ndarray [shape=(ceil(n_bins / 2),)], Hz, each pair's centre
    """
    e = (np.clip(excess_db, 0.0, _PATH_CAP_DB) + _PATH_SOFT_SHARE * np.clip(excess_db, 0.0, _PATH_SOFT_DB)).astype(
        np.float32
    )
    f = np.asarray(frequency_hz, dtype=np.float64)
    if e.shape[0] % 2:
        # An odd last bin stands alone: it is its own pair, centred on itself.
        e = np.concatenate([e, e[-1:]])
        f = np.concatenate([f, f[-1:]])
    return np.maximum(e[0::2], e[1::2]), 0.5 * (f[0::2] + f[1::2])


def _sweep_path(
    cells: np.ndarray,
    centre_hz: np.ndarray,
    df: float,
    first: np.ndarray,
    n_w: int,
    settings: DescriptorSettings,
    share: float = _PATH_SHARE,
    centre: bool = True,
) -> np.ndarray:
    """Best mean excess along a straight sweep in each window, its rate and centre.

    A faint sweep stands little above the floor in any one cell, but adding the cells
    along its path gains what a matched filter gains (Mellinger & Clark 2000, J. Acoust.
    Soc. Am. 107(6), spectrogram correlation): the path's mean excess over J cells has a
    noise spread about sqrt(J) times smaller than one cell's. Straight paths of a fixed
    length (a share of the window) at a set of rates, on a grid of two bins in frequency
    (the larger of each pair, a tolerance for curvature and jitter) and every other frame
    in time (every frame for windows of fewer than 9 frames); each window takes the best
    path starting on one of every other frame from its first and ending inside it. The loops
    run over rates and path points (a few hundred per block), never over frames.

    Each cell counts its excess clipped to 0..``_PATH_CAP_DB`` plus ``_PATH_SOFT_SHARE`` of
    it clipped to 0..``_PATH_SOFT_DB`` (:func:`_path_cells`), so that of the paths a loud
    call fills to the cap the loudest wins.

    Parameters
    ----------
    cells : np.ndarray [shape=(n_pairs, n_frames)], float32, dB, from :func:`_path_cells`
    centre_hz : np.ndarray [shape=(n_pairs,)], Hz, the pairs' centres
    df : float, Hz, the spacing of the grid's bins (half a pair's)
    first : np.ndarray [shape=(n_windows,)], int, each window's first frame
    n_w : int, frames per window
    settings : DescriptorSettings, the grid (frame hop and window in s, band in Hz)
    share : float, window lengths; the path's length (0.3: the short paths, 0.6: the long)
    centre : bool, find the chosen path's midpoint frequency (a gather of its cells, about
        a fifth of the search's time); NaN where False

    Returns
    -------
    np.ndarray [shape=(n_windows, 3)]: mean excess (dB), rate (Hz/s), midpoint frequency (Hz)
    """
    hop = settings.frame_hop_s
    stride, points, step = _path_geometry(settings, n_w, df, share)
    span = stride * (points - 1)  # frames from a path's first point to its last
    duration = span * hop
    df2 = 2.0 * df
    # Rates reach the fastest sweep of a call (as the trace's jumps do), at most
    # _PATH_RATES on each side. The 1e-9 keeps a limit that is a whole number of steps from rounding one step short.
    n_side = int(min(_PATH_RATES, np.floor(_fastest_sweep_hz_per_s(settings) / step + 1e-9)))
    rates = np.arange(-n_side, n_side + 1) * step
    lag_s = np.arange(points) * stride * hop
    shifts = np.rint(rates[:, None] * lag_s[None, :] / df2).astype(np.int64)  # (n_rates, points)
    pad = int(np.abs(shifts).max())
    n_f, n_t = cells.shape
    ep = np.concatenate([np.zeros((pad, n_t), np.float32), cells, np.zeros((pad, n_t), np.float32)])
    order = np.argsort(np.abs(rates), kind="stable")
    out = np.empty((first.size, 3))
    # A path's points lie `stride` frames apart, so they all fall on frames of one parity;
    # paths start on every other frame from each window's first, which halves the work.
    for parity in np.unique(first % stride):
        sub = np.ascontiguousarray(ep[:, parity::stride])
        n_start = sub.shape[1] - (points - 1)
        # Slowest rates first, so that where paths from one start still tie (the soft share
        # settles most ties at the cap) the rate nearest zero is kept (argmax takes the
        # first maximum); between starts, the earliest best start is taken.
        tops = np.empty((order.size, n_start), np.float32)
        acc = np.empty((n_f, n_start), np.float32)
        for i, r in enumerate(order):
            row = shifts[r]
            np.add(
                sub[pad + row[0] : pad + row[0] + n_f, :n_start],
                sub[pad + row[1] : pad + row[1] + n_f, 1 : 1 + n_start],
                out=acc,
            )
            for j in range(2, points):
                acc += sub[pad + row[j] : pad + row[j] + n_f, j : j + n_start]
            np.max(acc, axis=0, out=tops[i])
        # Windows: the best over the starts whose paths lie inside them, then that path's
        # rate and, from its cells alone, its frequency.
        mine = first % stride == parity
        start = (first[mine] - parity) // stride
        best = tops.max(axis=0)
        view = _window_view(best, start, (n_w - 1 - span) // stride + 1)
        k = start + np.argmax(view, axis=1)
        r_k = order[np.argmax(tops[:, k], axis=0)]
        mid_hz = np.full(k.size, np.nan)
        if centre:
            # Point by point, in the order acc adds them: the same sums, n_win × n_f at a
            # time, taken from the flat array (half the time of a two-index gather).
            flat, n_col = sub.ravel(), sub.shape[1]
            cell0 = (pad + np.arange(n_f)[None, :]) * n_col + k[:, None]
            along = flat[cell0 + (shifts[r_k, 0] * n_col)[:, None]]
            for j in range(1, points):
                along += flat[cell0 + (shifts[r_k, j] * n_col + j)[:, None]]
            mid_hz = centre_hz[np.argmax(along, axis=1)] + rates[r_k] * duration / 2.0
        out[mine] = np.column_stack([best[k] / points, rates[r_k], mid_hz])
    return out


def _path_geometry(
    settings: DescriptorSettings, n_w: int, df: float, share: float = _PATH_SHARE
) -> tuple[int, int, float]:
    """Frames between a sweep path's points, its number of points, and its rate step (Hz/s).

    Neighbouring rates' ends lie two coarse bins (of two grid bins each) apart, so any
    straight sweep ends within one coarse bin of the nearest rate's path.
    """
    hop = settings.frame_hop_s
    stride = 2 if n_w >= 9 else 1
    points = int(round(share * settings.window_s / (stride * hop))) + 1
    points = int(min(max(points, 2), (n_w - 1) // stride + 1))
    duration = stride * (points - 1) * hop  # from a path's first point to its last, s
    return stride, points, 2.0 * (2.0 * df) / max(duration, hop)


def sweep_path_rate_step_hz_per_s(settings: DescriptorSettings) -> float:
    """Step between the rates of the sweep paths (``sweep_path_rate_hz_per_s``), Hz/s.

    Parameters
    ----------
    settings : DescriptorSettings, the grid (resolution in Hz, frame hop and window in s)

    Returns
    -------
    float, Hz/s; the path's rate is a whole multiple of it
    """
    f = settings.grid.frequency_hz
    return _path_geometry(settings, settings.frames_per_window, float(f[1] - f[0]))[2]


def _fastest_sweep_hz_per_s(settings: DescriptorSettings) -> float:
    """Fastest frequency change of one call that the trace and the sweep paths follow, Hz/s.

    A sweep across the whole band in one second or, in windows shorter than a second
    (short calls on high bands, such as whistles), across the whole band within one window.
    """
    return (settings.high_hz - settings.low_hz) / min(1.0, settings.window_s)


def _max_jump_hz(settings: DescriptorSettings, df: float) -> float:
    """Largest change of the trace between consecutive frames of one call, Hz.

    Three bins, or the fastest sweep of a call over one hop, whichever is more.
    """
    return max(3.0 * df, _fastest_sweep_hz_per_s(settings) * settings.frame_hop_s)


def _main_segment(trace: np.ndarray, active: np.ndarray, excess: np.ndarray, max_jump_hz: float) -> np.ndarray:
    """Frames of the run that holds each window's strongest frame.

    A run is a stretch of consecutive active frames whose trace moves by at most
    ``max_jump_hz`` per frame; isolated noise peaks elsewhere in the window drop out.
    """
    linked = active[:, 1:] & active[:, :-1] & (np.abs(np.diff(trace, axis=1)) <= max_jump_hz)
    run = np.concatenate([np.zeros((trace.shape[0], 1), dtype=np.int64), np.cumsum(~linked, axis=1)], axis=1)
    peak = np.argmax(np.where(active, excess, -np.inf), axis=1)
    chosen = run[np.arange(trace.shape[0]), peak]
    return active & (run == chosen[:, None])


def _sign_changes(sign: np.ndarray) -> np.ndarray:
    """Row-wise count of changes between successive non-zero values of ``sign``."""
    idx = np.where(sign != 0, np.arange(sign.shape[1]), -1)
    last = np.maximum.accumulate(idx, axis=1)
    filled = np.where(last >= 0, np.take_along_axis(sign, np.maximum(last, 0), axis=1), 0.0)
    prev = np.zeros_like(filled)
    prev[:, 1:] = filled[:, :-1]
    return ((sign != 0) & (prev != 0) & (sign != prev)).sum(axis=1)


def _peak_run_width(spec: np.ndarray, df: float) -> np.ndarray:
    """Width (Hz) of the contiguous run around each row's peak within 10 dB of it."""
    n_rows, n = spec.shape
    peak = np.argmax(spec, axis=1)
    top = spec[np.arange(n_rows), peak]
    inside = spec >= 0.1 * top[:, None]
    idx = np.arange(n)
    left_out = np.maximum.accumulate(np.where(~inside, idx, -1), axis=1)
    right_out = np.minimum.accumulate(np.where(~inside, idx, n)[:, ::-1], axis=1)[:, ::-1]
    rows = np.arange(n_rows)
    width = (right_out[rows, peak] - left_out[rows, peak] - 1) * df
    return np.where(top > 0, width, 0.0)


def _excess_core_duration(frame_energy: np.ndarray, hop_s: float) -> np.ndarray:
    """Time (s) between 5 % and 95 % of each row's cumulative energy."""
    cum = np.cumsum(frame_energy, axis=1)
    total = cum[:, -1:]
    i5 = np.argmax(cum >= 0.05 * total, axis=1)
    i95 = np.argmax(cum >= 0.95 * total, axis=1)
    return np.where(total[:, 0] > 0, (i95 - i5 + 1) * hop_s, 0.0)
