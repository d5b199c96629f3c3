"""What a reviewer sees and hears of one sampled detection: a spectrogram image and audio clips.

Each item is rendered from the few seconds of its own file around the detection, read
with the streaming reader, so a long file is never loaded whole. The image is a
calibrated PSD (dB re 1 µPa²/Hz, through the deployment's recording chain) with the
detection's box and the other detections in view; the clip is the same stretch,
normalised for listening, and, for calls below about 300 Hz, a time-compressed copy that
moves them up into the range of hearing. Items are independent: joblib maps
:func:`render_item` over them.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import numpy as np
import soundfile as sf
from callsieve.features.calibration import RecordingChain
from callsieve.features.spectrogram import Spectrogram, SpectrogramGrid, psd_spectrogram
from callsieve.features.streaming import AudioReader
from scipy import signal

__all__ = [
    "ItemSpec",
    "view_spectrogram",
    "colour_limits",
    "item_figure",
    "speed_factor",
    "playable_rate",
    "time_compress",
    "listening_clip",
    "render_item",
    "render_items",
    "PSD_LABEL",
    "AUDIBLE_HZ",
]

PSD_LABEL = "PSD, dB re 1 µPa²/Hz"
# Below a few hundred hertz most headphones and ears lose calls; compress time until the
# call's lowest frequency reaches this (common practice for low-frequency whale calls).
AUDIBLE_HZ = 300.0
MAX_SPEED = 10
CLIP_PEAK = 10 ** (-1.0 / 20.0)  # normalise to -1 dB re full scale: loud, never clipped
DYNAMIC_RANGE_DB = 50.0  # colour range of an image
FADE_S = 0.01  # ramps at the clip's ends, so playback starts and stops without a click
MIN_RATE_HZ, MAX_RATE_HZ = 8000, 48000  # sample rates every browser and player takes


@dataclass(frozen=True)
class ItemSpec:
    """Everything needed to render one item (picklable, for worker processes).

    Attributes
    ----------
    detection_id : int
    path : str, the sound file
    channel : int, 0-based
    chain : RecordingChain, the deployment's recorder
    start_s, end_s : float, s from the file's start, the detection
    low_hz, high_hz : float, Hz, the detection's band
    context_s : float, s, shown and played on each side
    resolution_hz, hop_s : float or None, the run's spectrogram grid (Hz, s); None: chosen
        from the view
    band_low_hz, band_high_hz : float or None, Hz, the run's analysis band
    title : str, the image's title (no label or confidence for a blind sample)
    others : tuple of (start_s, end_s, low_hz, high_hz), other detections in view
    folder : str, the sample folder
    stem : str, path of the item's files relative to ``folder``, without suffix
    """

    detection_id: int
    path: str
    channel: int
    chain: RecordingChain
    start_s: float
    end_s: float
    low_hz: float
    high_hz: float
    context_s: float
    resolution_hz: float | None
    hop_s: float | None
    band_low_hz: float | None
    band_high_hz: float | None
    title: str
    others: tuple = ()
    folder: str = "."
    stem: str = "item"


def view_band(spec: ItemSpec, sample_rate_hz: float) -> tuple[float, float]:
    """Frequency range of the image, Hz: the run's band and the detection's, with a margin."""
    lo = min(v for v in (spec.band_low_hz, spec.low_hz) if v is not None)
    hi = max(v for v in (spec.band_high_hz, spec.high_hz) if v is not None)
    margin = 0.15 * (hi - lo)
    return max(0.0, lo - margin), min(sample_rate_hz / 2.0, hi + margin)


def view_grid(spec: ItemSpec, sample_rate_hz: float, view_s: float) -> SpectrogramGrid:
    """The image's grid: the run's resolution (else ~1/40 of the band), frames overlapping 4 times."""
    low, high = view_band(spec, sample_rate_hz)
    resolution = spec.resolution_hz or max((high - low) / 40.0, sample_rate_hz / 8192.0)
    window_s = 1.0 / resolution
    hop = min(spec.hop_s or window_s / 4.0, window_s / 4.0)
    hop = max(hop, view_s / 800.0)  # at most ~800 columns: enough for the eye, cheap to draw
    return SpectrogramGrid(resolution, hop, low, high)


def view_spectrogram(
    samples: np.ndarray, sample_rate_hz: float, chain: RecordingChain, first_sample: int, grid: SpectrogramGrid
) -> Spectrogram:
    """The image's array: calibrated PSD of ``samples`` on ``grid``.

    Parameters
    ----------
    samples : np.ndarray [shape=(n,)], sample values (full scale ±1.0)
    sample_rate_hz : float, Hz
    chain : RecordingChain, turns sample values into µPa bin by bin
    first_sample : int, index of ``samples[0]`` in its file (frame times are from the file's start)
    grid : SpectrogramGrid

    Returns
    -------
    Spectrogram
        ``psd_db`` [shape=(n_freq, n_frames)], dB re 1 µPa²/Hz; ``start_s`` from the file's start.
    """
    return psd_spectrogram(samples, sample_rate_hz, grid, chain=chain, first_sample=first_sample)


def colour_limits(psd_db: np.ndarray) -> tuple[float, float]:
    """Colour range (dB re 1 µPa²/Hz): the 99.5th percentile rounded up to 5 dB, and 50 dB below.

    A fixed dynamic range keeps the noise floor visible and the call's contrast readable,
    and the labelled colour bar gives the absolute levels.
    """
    finite = psd_db[np.isfinite(psd_db)]
    top = float(np.percentile(finite, 99.5)) if finite.size else 0.0
    vmax = 5.0 * math.ceil(top / 5.0)
    return vmax - DYNAMIC_RANGE_DB, vmax


# One figure per process, redrawn for each item: building axes, colour bar and ticks anew
# cost about a third of an item's time.
_FIGURE: dict = {}


def _figure() -> dict:
    if not _FIGURE:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        fig = Figure(figsize=(7.0, 3.4), dpi=100)
        FigureCanvasAgg(fig)
        # Fixed places, not a layout engine: the engine drew every figure twice.
        ax = fig.add_axes((0.085, 0.14, 0.76, 0.77))
        cax = fig.add_axes((0.86, 0.14, 0.022, 0.77))
        im = ax.imshow(np.zeros((2, 2)), origin="lower", aspect="auto", cmap="viridis", interpolation="nearest")
        bar = fig.colorbar(im, cax=cax)
        bar.set_label(PSD_LABEL)
        ax.set_xlabel("time from the file's start, s")
        ax.set_ylabel("frequency, Hz")
        _FIGURE.update(fig=fig, ax=ax, im=im)
    return _FIGURE


def item_figure(spec: ItemSpec, spec_psd: Spectrogram):
    """The item's image: PSD with a labelled colour bar, the detection boxed, others dashed.

    Returns
    -------
    matplotlib.figure.Figure (not attached to pyplot; draw with its Agg canvas). The
    figure is this process's one figure, redrawn by the next call.
    """
    from matplotlib.patches import Rectangle

    parts = _figure()
    fig, ax, im = parts["fig"], parts["ax"], parts["im"]
    for patch in list(ax.patches):
        patch.remove()
    psd = spec_psd.psd_db
    f = spec_psd.frequency_hz
    hop = spec_psd.grid.hop_s
    t_centre = spec_psd.start_s + spec_psd.grid.window_s / 2.0
    vmin, vmax = colour_limits(psd)
    df = f[1] - f[0] if f.size > 1 else spec_psd.grid.resolution_hz
    extent = (
        float(t_centre[0] - hop / 2) if t_centre.size else spec.start_s,
        float(t_centre[-1] + hop / 2) if t_centre.size else spec.end_s,
        float(f[0] - df / 2),
        float(f[-1] + df / 2),
    )
    im.set_data(psd)
    im.set_extent(extent)
    im.set_clim(vmin, vmax)
    # Other detections dashed and thin, this one solid and thick (white over black): the
    # two differ in greyscale too, and stand out on any colour of the map.
    for s0, s1, lo, hi in spec.others:
        ax.add_patch(Rectangle((s0, lo), s1 - s0, hi - lo, fill=False, ec="white", lw=1.0, ls="--"))
    box = ((spec.start_s, spec.low_hz), spec.end_s - spec.start_s, spec.high_hz - spec.low_hz)
    ax.add_patch(Rectangle(*box, fill=False, ec="black", lw=3.2))
    ax.add_patch(Rectangle(*box, fill=False, ec="white", lw=1.6))
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_title(spec.title, fontsize=9)
    return fig


def speed_factor(low_hz: float, audible_hz: float = AUDIBLE_HZ, max_speed: int = MAX_SPEED) -> int:
    """Time compression for listening: the whole factor (2..10) lifting ``low_hz`` to ``audible_hz``.

    1 when the call already starts at or above ``audible_hz``; capped at ``max_speed``.
    """
    if low_hz >= audible_hz:
        return 1
    return int(min(max(math.ceil(audible_hz / max(low_hz, 1e-3)), 2), max_speed))


def playable_rate(rate_hz: float) -> int:
    """The nearest sample rate in 8–48 kHz, which every player and browser takes, Hz."""
    return int(min(max(round(rate_hz), MIN_RATE_HZ), MAX_RATE_HZ))


def _resample(x: np.ndarray, from_hz: float, to_hz: float) -> np.ndarray:
    """``x`` at ``from_hz`` resampled to ``to_hz`` (polyphase, scipy's anti-alias filter)."""
    ratio = Fraction(int(round(to_hz)), int(round(from_hz))).limit_denominator(1000)
    if ratio == 1:
        return np.asarray(x, dtype=np.float64)
    return signal.resample_poly(np.asarray(x, dtype=np.float64), ratio.numerator, ratio.denominator)


def time_compress(x: np.ndarray, sample_rate_hz: float, factor: int) -> tuple[np.ndarray, int]:
    """Play ``x`` ``factor`` times faster: every frequency × factor, the duration ÷ factor.

    The samples taken at ``sample_rate_hz`` are treated as if taken at ``factor`` times
    that rate, then resampled to a playable rate.

    Returns
    -------
    y : np.ndarray [shape=(m,)], float64
    rate_hz : int, Hz, the rate to play ``y`` at
    """
    fast = sample_rate_hz * factor
    rate = playable_rate(fast)
    return _resample(x, fast, rate), rate


def listening_clip(x: np.ndarray) -> tuple[np.ndarray, float]:
    """``x`` without its mean, with short fades, scaled so its peak is -1 dB re full scale.

    Returns
    -------
    y : np.ndarray [shape=(n,)], float64
    gain_db : float, dB, the gain applied (0 for silence)
    """
    y = np.asarray(x, dtype=np.float64) - (float(np.mean(x)) if len(x) else 0.0)
    peak = float(np.max(np.abs(y))) if y.size else 0.0
    if peak <= 0:
        return y, 0.0
    gain = CLIP_PEAK / peak
    return y * gain, 20.0 * math.log10(gain)


def _fade(y: np.ndarray, rate_hz: float) -> np.ndarray:
    k = min(int(FADE_S * rate_hz), y.size // 2)
    if k > 0:
        ramp = np.linspace(0.0, 1.0, k)
        y = y.copy()
        y[:k] *= ramp
        y[-k:] *= ramp[::-1]
    return y


def read_view(spec: ItemSpec) -> tuple[np.ndarray, int, int, int]:
    """The detection with its context, read alone from the file.

    Returns
    -------
    samples : np.ndarray [shape=(n,)], float32, full scale ±1.0
    first_sample : int, index of ``samples[0]`` in the file
    sample_rate_hz : int, Hz
    pad_before : int, samples of silence a clip needs in front so the detection always
        starts ``context_s`` into it (where the file begins less than that before it)
    """
    with AudioReader(spec.path, spec.channel) as reader:
        fs = reader.sample_rate_hz
        want0 = int(math.floor((spec.start_s - spec.context_s) * fs))
        want1 = int(math.ceil((spec.end_s + spec.context_s) * fs))
        first = max(want0, 0)
        x = reader.read(first, want1)
    return x, first, fs, first - want0


def render_item(spec: ItemSpec) -> dict:
    """Write the item's image (PNG), clip (WAV) and, for low calls, its time-compressed clip.

    Returns
    -------
    dict
        ``detection_id``, ``image``, ``clip``, ``clip_fast`` (None when not needed),
        ``speed`` (1 when no compressed clip), ``gain_db`` (the clip's gain, dB); paths
        relative to the sample folder.
    """
    folder = Path(spec.folder)
    x, first, fs, pad = read_view(spec)
    grid = view_grid(spec, fs, x.size / fs)
    fig = item_figure(spec, view_spectrogram(x, fs, spec.chain, first, grid))
    image = spec.stem + ".png"
    fig.savefig(folder / image)
    # Padded with silence where the file starts or ends inside the context, so the
    # detection sits at the same place in every clip.
    want = int(round((spec.end_s - spec.start_s + 2 * spec.context_s) * fs))
    padded = np.zeros(max(want, x.size + pad))
    padded[pad : pad + x.size] = x
    y, gain_db = listening_clip(padded)
    rate = playable_rate(fs)
    clip = spec.stem + ".wav"
    sf.write(folder / clip, _fade(np.clip(_resample(y, fs, rate), -1.0, 1.0), rate), rate, subtype="PCM_16")
    speed = speed_factor(spec.low_hz)
    fast = None
    if speed > 1:
        z, rate_fast = time_compress(y, fs, speed)
        fast = f"{spec.stem}-x{speed}.wav"
        sf.write(folder / fast, _fade(np.clip(z, -1.0, 1.0), rate_fast), rate_fast, subtype="PCM_16")
    return {
        "detection_id": spec.detection_id,
        "image": image,
        "clip": clip,
        "clip_fast": fast,
        "speed": speed,
        "gain_db": round(gain_db, 2),
    }


def render_items(
    specs: Sequence[ItemSpec], jobs: int = 1, progress: Callable[[str], None] | None = None
) -> dict[int, dict]:
    """Render every item, over ``jobs`` processes; progress at most once a second.

    Returns
    -------
    dict, detection id -> what :func:`render_item` returned
    """
    say = progress or (lambda line: None)
    out: dict[int, dict] = {}
    t0 = last = time.perf_counter()
    if jobs == 1 or len(specs) < 2:
        results = map(render_item, specs)
    else:
        from joblib import Parallel, delayed

        results = Parallel(n_jobs=jobs, return_as="generator_unordered")(delayed(render_item)(s) for s in specs)
    for r in results:
        out[r["detection_id"]] = r
        now = time.perf_counter()
        if now - last >= 1.0 or len(out) == len(specs):
            last = now
            rate = len(out) / max(now - t0, 1e-9)
            left = (len(specs) - len(out)) / rate
            say(f"review: rendered {len(out)} of {len(specs)} items, {rate:.1f} items/s, about {left:.0f} s left")
    return out
