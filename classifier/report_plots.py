"""Figures of the monitoring report (matplotlib, Agg): one function per figure, returning it.

Colours print in grey and read for colour-blind people: cividis for levels and
probabilities, black, white and hatched grey for the presence states, line styles that
differ without colour. Times on a date axis are in the zone named on the axis.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from .plots import pyplot, save, verified_precision_figure
from .report import DAY_S, HOUR_S, UTC_ZONE, Zone
from .report_soundscape import LongTermSpectrum, bin_text, third_octave_levels
from .sun import sunrise_sunset_utc_s

__all__ = [
    "detections_per_day_figure",
    "presence_raster_figure",
    "long_term_spectrogram_figure",
    "percentile_spectra_figure",
    "band_levels_figure",
    "distributions_figure",
    "night_hours",
    "draw_report_figures",
]

_STYLES = ["-", "--", ":", "-."]
_NO_EFFORT_GREY = "0.62"


def _dates(seconds: np.ndarray) -> np.ndarray:
    """matplotlib date numbers (days since 1970-01-01) of UNIX seconds (already shifted to a zone)."""
    return np.asarray(seconds, float) / DAY_S


def _date_axis(ax, zone: Zone, span_days: float) -> None:
    import matplotlib.dates as mdates

    ax.xaxis_date()
    locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.set_xlabel(f"date ({zone.name})" if span_days > 2 else f"time ({zone.name})")


def _day_axis(ax, day_numbers: np.ndarray, zone: Zone) -> None:
    """Date labels under day columns (a column per day, ``day_numbers`` its left edge)."""
    import matplotlib.dates as mdates
    from matplotlib.ticker import FixedLocator, FuncFormatter

    n = day_numbers.size
    if n > 20:
        _date_axis(ax, zone, float(n))
        return
    step = max(1, int(np.ceil(n / 8)))
    ax.xaxis.set_major_locator(FixedLocator(day_numbers[::step] + 0.5))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: mdates.num2date(v).strftime("%d\n%b")))
    ax.set_xlabel(f"date ({zone.name}), {mdates.num2date(day_numbers[0]).year}")


def _log_frequency_axis(ax, low_hz: float, high_hz: float, which: str = "y") -> None:
    """A logarithmic frequency axis labelled in plain numbers at 1, 2, 5 × 10^k Hz."""
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullFormatter

    axis = ax.yaxis if which == "y" else ax.xaxis
    (ax.set_yscale if which == "y" else ax.set_xscale)("log")
    (ax.set_ylim if which == "y" else ax.set_xlim)(low_hz, high_hz)
    decades = range(int(np.floor(np.log10(low_hz))), int(np.ceil(np.log10(high_hz))) + 1)
    ticks = [m * 10.0**k for k in decades for m in (1, 2, 5) if low_hz <= m * 10.0**k <= high_hz]
    axis.set_major_locator(FixedLocator(ticks))
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.0f}" if v >= 1 else f"{v:g}"))
    axis.set_minor_formatter(NullFormatter())


def night_hours(days: np.ndarray, zone: Zone, latitude_deg: float, longitude_deg: float) -> np.ndarray:
    """Sunrise and sunset of each local day as hours of that day in ``zone``.

    Parameters
    ----------
    days : np.ndarray [shape=(n_days,)], int, local days since 1970-01-01
    zone : Zone
    latitude_deg, longitude_deg : float, degrees north and east

    Returns
    -------
    np.ndarray [shape=(n_days, 2)], h: sunrise and sunset (local hours, may lie outside
    0..24 where the day's rise or set falls on another date); (-inf, inf) where the sun
    stays up, NaN where it stays down.
    """
    local_midnight = np.asarray(days, float) * DAY_S
    # The UTC day holding each local day's noon.
    rise, _, sset = sunrise_sunset_utc_s(local_midnight + 12 * HOUR_S - zone.offset_s, latitude_deg, longitude_deg)
    to_h = lambda x: (x + zone.offset_s - local_midnight) / HOUR_S  # noqa: E731
    return np.stack([to_h(rise), to_h(sset)], axis=1)


def detections_per_day_figure(daily: list[dict], labels: list[str], zone: Zone, where: str):
    """Detections per day per class, over the recorded hours of each day.

    Parameters
    ----------
    daily : list of dict, rows of ``presence_daily.csv`` (``date``, ``label``,
        ``effort_min``, ``detections``)
    labels : list of str
    zone : Zone of the dates
    where : str, deployment and run, for the title
    """
    from matplotlib.patches import Patch
    from matplotlib.ticker import MaxNLocator

    plt = pyplot()
    n = max(len(labels), 1)
    fig, axes = plt.subplots(n, 1, figsize=(8.0, 2.4 + 1.9 * n), squeeze=False, sharex=True)
    for ax, label in zip(axes[:, 0], labels, strict=False):
        rows = [r for r in daily if r["label"] == label]
        x = np.array([np.datetime64(r["date"]).astype("datetime64[s]").astype(np.int64) for r in rows]) / DAY_S
        hours = np.array([r["effort_min"] / 60.0 for r in rows])
        count = np.array([r["detections"] for r in rows], float)
        back = ax.twinx()
        back.bar(x + 0.5, hours, width=0.95, color="0.85", edgecolor="none", zorder=0)
        none = hours <= 0
        back.bar(
            x[none] + 0.5,
            np.full(none.sum(), 24.0),
            width=0.95,
            color="white",
            edgecolor="0.45",
            hatch="////",
            linewidth=0.0,
            zorder=0,
        )
        back.set_ylim(0, 24 * 1.05)
        back.set_yticks([0, 6, 12, 18, 24])
        back.set_ylabel("recorded hours per day", color="0.35", fontsize=8)
        ax.set_zorder(back.get_zorder() + 1)
        ax.patch.set_visible(False)
        ax.bar(x + 0.5, count, width=0.45, color="black", zorder=3)
        ax.set_ylabel(f"{label}: detections per day")
        ax.set_ylim(0, max(1.0, count.max() if count.size else 1.0) * 1.15)
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
        ax.set_xlim(x[0], x[-1] + 1) if x.size else None
        _day_axis(ax, x, zone)
        if ax is not axes[-1, 0]:
            ax.set_xlabel("")
    handles = [
        Patch(color="black", label="detections at the operating threshold (left axis)"),
        Patch(color="0.85", label="recorded hours (right axis)"),
        Patch(facecolor="white", edgecolor="0.45", hatch="////", label="no recording"),
    ]
    fig.legend(handles=handles, loc="lower center", ncol=3, fontsize=7, frameon=False)
    fig.suptitle(f"Detections per day against recording effort, {where} (dates in {zone.name})", fontsize=10)
    fig.tight_layout(rect=(0, 0.06, 1, 1))
    return fig


def presence_raster_figure(
    grid: dict[str, Any],
    label: str,
    zone: Zone,
    where: str,
    probability: np.ndarray | None = None,
    night: np.ndarray | None = None,
    detected_text: str = "detected (not verified)",
):
    """Hour of day against date: no effort, recorded without detection, detected, estimated.

    Parameters
    ----------
    grid : result of ``report.presence_grid`` (``days``, ``effort_s``, ``per_label``)
    label : str, the class drawn
    zone : Zone of the hours and dates
    where : str, for the title
    probability : np.ndarray [shape=(n_days, 24)], optional, estimated chance that the
        hour holds a true detection; detected hours are then shaded by it
    night : np.ndarray [shape=(n_days, 2)], optional, h, sunrise and sunset (``night_hours``)
    detected_text : str, legend of detected hours drawn without a probability
    """
    from matplotlib.collections import PatchCollection
    from matplotlib.colors import Normalize
    from matplotlib.patches import Patch, Rectangle

    plt = pyplot()
    days = grid["days"]
    effort = grid["effort_s"]
    det = grid["per_label"][label]["detections"]
    n_days = days.size
    fig, ax = plt.subplots(figsize=(min(6.0 + 0.05 * n_days, 13.0), 5.4))
    x0 = days.astype(float)
    # White everywhere recorded, hatched grey where not: no effort never looks like absence.
    ax.set_facecolor("white")
    gaps = [Rectangle((x0[i], h), 1, 1) for i in range(n_days) for h in range(24) if effort[i, h] <= 0]
    ax.add_collection(
        PatchCollection(gaps, facecolor=_NO_EFFORT_GREY, edgecolor="white", hatch="xxx", linewidth=0.0, zorder=1)
    )
    hits = [(i, h) for i in range(n_days) for h in range(24) if det[i, h] > 0 and effort[i, h] > 0]
    rects = [Rectangle((x0[i], h), 1, 1) for i, h in hits]
    cmap = plt.get_cmap("cividis_r")
    norm = Normalize(0.0, 1.0)
    if probability is not None:
        # Estimated: shaded by the chance of a true detection, outlined so that a pale
        # (unlikely) cell still differs from a recorded hour without detection.
        colours = [cmap(norm(probability[i, h])) for i, h in hits]
        ax.add_collection(PatchCollection(rects, facecolor=colours, edgecolor="black", linewidth=0.6, zorder=2))
        sm = plt.cm.ScalarMappable(norm=norm, cmap=cmap)
        bar = fig.colorbar(sm, ax=ax, fraction=0.04, pad=0.02)
        bar.set_label("estimated probability that the hour\nholds a true detection (verified sample)", fontsize=8)
        detected_patch = Patch(facecolor=cmap(0.8), edgecolor="black", label="detected; shade: estimated probability")
    else:
        ax.add_collection(PatchCollection(rects, facecolor="black", edgecolor="black", linewidth=0.3, zorder=2))
        detected_patch = Patch(facecolor="black", label=detected_text)
    if night is not None:
        # Each day's night spans the whole width of its column (left and right edge).
        xs = np.repeat(x0, 2) + np.tile([0.0, 1.0], n_days)
        rise, sset = np.repeat(night[:, 0], 2), np.repeat(night[:, 1], 2)
        down = np.isnan(rise)
        lo = np.where(down, 24.0, np.clip(rise, 0, 24))
        hi = np.where(down, 24.0, np.clip(sset, 0, 24))
        kw = dict(color="#1b2a5a", alpha=0.2, linewidth=0, zorder=3)
        ax.fill_between(xs, 0, lo, **kw)
        ax.fill_between(xs, np.where(down, 0.0, hi), 24, **kw)
        for y in (lo, hi):
            ax.plot(xs, np.where(down, np.nan, y), color="black", linestyle="--", linewidth=0.8, zorder=4)
    ax.set_xlim(x0[0], x0[-1] + 1)
    ax.set_ylim(0, 24)
    ax.set_yticks(range(0, 25, 3))
    ax.set_ylabel(f"hour of day ({zone.name})")
    _day_axis(ax, x0, zone)
    handles = [
        Patch(facecolor="white", edgecolor="0.3", label="recorded, no detection"),
        Patch(facecolor=_NO_EFFORT_GREY, edgecolor="white", hatch="xxx", label="not recorded (no effort)"),
        detected_patch,
    ]
    if night is not None:
        handles.append(Patch(facecolor="#1b2a5a", alpha=0.18, label="night (sun below −0.833°; dashed: rise, set)"))
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=2, fontsize=7, frameon=False)
    ax.set_title(f"{label}: hourly presence, {where}\nhours and dates in {zone.name}", fontsize=9)
    fig.text(0.01, 0.005, f"Clock: {zone.description}", fontsize=6.5, color="0.25", wrap=True)
    fig.tight_layout()
    return fig


def long_term_spectrogram_figure(
    lts: LongTermSpectrum,
    where: str,
    detections: dict[str, np.ndarray] | None = None,
    zone: Zone = UTC_ZONE,
):
    """The long-term spectrogram (PSD per band and time bin), with detections above it.

    Parameters
    ----------
    lts : LongTermSpectrum, dB re 1 µPa²/Hz
    where : str, for the title
    detections : dict, optional, ``time_s`` (UNIX s, UTC) and ``label`` arrays
    zone : Zone of the time axis
    """
    plt = pyplot()
    labels = sorted(set(detections["label"].tolist())) if detections is not None and detections["label"].size else []
    fig = plt.figure(figsize=(9.0, 5.0))
    gs = fig.add_gridspec(
        2, 2, height_ratios=[0.7 + 0.25 * len(labels), 5], width_ratios=[40, 1], hspace=0.05, wspace=0.03
    )
    ax = fig.add_subplot(gs[1, 0])
    top = fig.add_subplot(gs[0, 0], sharex=ax)
    cax = fig.add_subplot(gs[1, 1])
    t_edges = _dates(lts.start_utc_s + zone.offset_s + lts.bin_s * np.arange(lts.psd_db.shape[0] + 1))
    f_edges = lts.band_edges_hz.astype(float)
    psd = np.ma.masked_invalid(lts.psd_db.T)
    finite = lts.psd_db[np.isfinite(lts.psd_db)]
    vmin, vmax = np.percentile(finite, [1, 99.5]) if finite.size else (0.0, 1.0)
    cmap = plt.get_cmap("cividis").with_extremes(bad="white")  # gaps: paper colour, never filled in
    mesh = ax.pcolormesh(t_edges, f_edges, psd, cmap=cmap, vmin=vmin, vmax=vmax, shading="flat")
    _log_frequency_axis(ax, f_edges[0], f_edges[-1], "y")
    ax.set_ylabel("frequency, Hz")
    _date_axis(ax, zone, (t_edges[-1] - t_edges[0]))
    bar = fig.colorbar(mesh, cax=cax)
    bar.set_label("mean PSD, dB re 1 µPa²/Hz")
    markers = ["|", "x", "+", "1"]
    for k, label in enumerate(labels):
        tt = detections["time_s"][detections["label"] == label]
        top.plot(
            _dates(tt + zone.offset_s),
            np.full(tt.size, k),
            linestyle="none",
            marker=markers[k % 4],
            color="black",
            markersize=7,
            markeredgewidth=0.8,
        )
    top.set_ylim(-0.7, max(len(labels), 1) - 0.3)
    top.set_yticks(range(len(labels)), labels, fontsize=7)
    top.tick_params(axis="x", labelbottom=False)
    top.set_title(
        f"Long-term spectrogram, {where}: {bin_text(lts.bin_s)} means of power; white = no data\n"
        "above: detections at the operating threshold",
        fontsize=9,
    )
    if not labels:
        top.text(
            0.5,
            0.5,
            "no detections at the operating threshold",
            transform=top.transAxes,
            ha="center",
            va="center",
            fontsize=7,
        )
    return fig


def percentile_spectra_figure(lts: LongTermSpectrum, where: str):
    """5th, 50th and 95th percentile PSD per band over the stored 60-s bins."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    f = lts.band_edges_hz.astype(float)
    for i, p in enumerate(lts.percentiles):
        y = np.append(lts.percentile_db[i], lts.percentile_db[i][-1])
        ax.step(
            f,
            y,
            where="post",
            color="black",
            linestyle=[":", "-", "--"][i % 3],
            linewidth=1.6 if p == 50 else 1.1,
            label=f"{p:g}th percentile",
        )
    _log_frequency_axis(ax, f[0], f[-1], "x")
    ax.set_xlabel("frequency, Hz")
    ax.set_ylabel("PSD, dB re 1 µPa²/Hz")
    ax.grid(True, which="both", color="0.9", linewidth=0.5)
    ax.legend(fontsize=8, loc="upper right")
    ax.set_title(
        f"Percentile spectra, {where}\n(per band, over the 60-s bins, each weighted by its seconds of audio)",
        fontsize=9,
    )
    fig.tight_layout()
    return fig


def band_levels_figure(lts: LongTermSpectrum, where: str, zone: Zone = UTC_ZONE, max_bands: int = 4):
    """Third-octave band levels over time for a few bands across the range (ISO 266 names)."""
    plt = pyplot()
    third = third_octave_levels(lts.psd_db, lts.band_edges_hz)
    fig, ax = plt.subplots(figsize=(9.0, 3.8))
    measured = np.flatnonzero(np.isfinite(third["level_db"]).any(axis=0))
    if measured.size:
        # 63 Hz and 125 Hz first where measured (the bands common practice watches for
        # shipping noise), then bands spread over the rest of the range.
        names = [third["names"][j] for j in measured]
        pick = [measured[names.index(n)] for n in ("63 Hz", "125 Hz") if n in names]
        rest = [j for j in measured if j not in pick]
        more = max(max_bands - len(pick), 0)
        if rest and more:
            pick += [rest[k] for k in np.unique(np.linspace(0, len(rest) - 1, more).round().astype(int))]
        pick = sorted(pick)
        t = _dates(lts.time_utc_s + zone.offset_s + lts.bin_s / 2)
        shades = ["black", "0.35", "0.55", "0.2"]
        for k, j in enumerate(pick):
            ax.plot(
                t,
                third["level_db"][:, j],
                color=shades[k % 4],
                linestyle=_STYLES[k % 4],
                linewidth=1.0,
                label=f"{third['names'][j]} band",
            )
        ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    _date_axis(ax, zone, float((lts.psd_db.shape[0] * lts.bin_s) / DAY_S))
    ax.set_ylabel("band level, dB re 1 µPa")
    ax.set_title(
        f"One-third-octave band levels over time, {where} ({bin_text(lts.bin_s)} means; gaps left blank)", fontsize=9
    )
    fig.tight_layout()
    return fig


def distributions_figure(ops: dict[str, np.ndarray], labels: list[str], thresholds: dict[str, dict], where: str):
    """Histograms of confidence, received level and SNR of the detections at the operating threshold."""
    plt = pyplot()
    fig, axes = plt.subplots(1, 3, figsize=(10.0, 3.6))
    specs = [
        ("confidence", "model confidence (0..1)", np.linspace(0, 1, 41)),
        ("received_level_db", "received level, dB re 1 µPa", None),
        ("snr_db", "SNR, dB", None),
    ]
    for ax, (key, xlabel, bins) in zip(axes, specs, strict=True):
        values = ops[key][np.isfinite(ops[key])]
        edges = bins
        if edges is None:
            lo, hi = (np.floor(values.min()), np.ceil(values.max()) + 1) if values.size else (0.0, 1.0)
            edges = np.arange(lo, hi + 1, max(1.0, np.ceil((hi - lo) / 40)))
        for k, label in enumerate(labels):
            v = ops[key][(ops["label"] == label) & np.isfinite(ops[key])]
            if v.size:
                ax.hist(
                    v,
                    bins=edges,
                    histtype="step",
                    color=["black", "0.45"][k % 2],
                    linestyle=_STYLES[k % 4],
                    linewidth=1.2,
                    label=f"{label} ({v.size})",
                )
        if key == "confidence":
            for label in labels:
                ax.axvline(thresholds[label]["threshold"], color="0.3", linestyle=":", linewidth=1)
        ax.set_xlabel(xlabel)
        ax.set_ylabel("detections per bin")
        if not values.size:
            ax.text(0.5, 0.5, "no detections", transform=ax.transAxes, ha="center")
    axes[0].legend(fontsize=7, loc="upper left")
    fig.suptitle(f"Detections at the operating threshold, {where} (dotted: threshold)", fontsize=10)
    fig.tight_layout()
    return fig


def draw_report_figures(
    out: Path,
    report: dict,
    grids: dict,
    table_zone: Zone,
    diel_zone: Zone,
    ops: dict[str, np.ndarray],
    lts: LongTermSpectrum | None,
    estimates: dict[str, dict],
    site: dict,
    daily: list[dict],
) -> list[dict]:
    """Draw and save every figure of the report; returns ``path``, ``title``, ``caption`` of each."""
    where = f"{report['deployment']}, run {report['run_id']}"
    labels = report["classes"]
    figs: list[dict] = []

    def keep(fig, name: str, title: str, caption: str) -> None:
        figs.append({"path": save(fig, out / name), "title": title, "caption": caption})

    keep(
        detections_per_day_figure(daily, labels, table_zone, where),
        "detections-per-day.png",
        "Detections per day",
        f"Black bars: detections at each class's operating threshold per day ({table_zone.name}); grey: hours "
        "recorded that day; hatched: no recording.",
    )
    grid, probs = grids[diel_zone]
    night = None
    if site.get("latitude") is not None and site.get("longitude") is not None:
        night = night_hours(grid["days"], diel_zone, site["latitude"], site["longitude"])
    for label in labels:
        # A verified class in a clock whose hours are not whole UTC hours: no estimate per cell.
        text = (
            "detected (estimate shown in whole-hour clocks only)" if label in estimates else "detected (not verified)"
        )
        keep(
            presence_raster_figure(grid, label, diel_zone, where, probs.get(label), night, text),
            f"presence-raster-{_slug(label)}.png",
            f"Hourly presence of {label}",
            "Each cell is one hour. White: recorded, nothing detected; hatched grey: not recorded; "
            + (
                "shaded and outlined: detected, the shade the estimated chance that the hour holds a true detection"
                if probs.get(label) is not None
                else "black: detected (not verified)"
            )
            + (
                ". Night shaded from sunrise and sunset at the site (NOAA solar calculator, after Meeus)."
                if night is not None
                else ". No site position in the manifest: no night shading."
            ),
        )
    if lts is not None:
        keep(
            long_term_spectrogram_figure(lts, where, {"time_s": ops["time_s"], "label": ops["label"]}, table_zone),
            "long-term-spectrogram.png",
            "Long-term spectrogram",
            f"Mean PSD per band and {bin_text(lts.bin_s)} bin (power averaged, weighted by seconds of audio; "
            "a duty-cycled recorder gets bins of at least one cycle); white where nothing was recorded (or, at the "
            "lowest frequencies, where a band is narrower than the analysis resolution). "
            f"Times in {table_zone.name}. Marks above: detections at the operating threshold.",
        )
        keep(
            percentile_spectra_figure(lts, where),
            "percentile-spectra.png",
            "Percentile spectra",
            "5th, 50th and 95th percentile of the PSD per band over the 60-s bins.",
        )
        keep(
            band_levels_figure(lts, where, table_zone),
            "third-octave-levels.png",
            "Third-octave band levels",
            "Band levels over time for a few one-third-octave bands (ISO 266 names); blank where not recorded.",
        )
    keep(
        distributions_figure(ops, labels, report["thresholds"], where),
        "detection-distributions.png",
        "Confidence, received level and SNR",
        "Histograms of the detections at the operating threshold.",
    )
    for label, est in estimates.items():
        fig = verified_precision_figure(est["thresholds"], label, report["target_precision"])
        fig.axes[0].set_title(f"{label}: verified precision above each stratum's edge, {where}", fontsize=9)
        keep(
            fig,
            f"verified-precision-{_slug(label)}.png",
            f"Verified precision of {label}",
            f"Precision of the detections above each threshold with 95 % intervals, from verification sample "
            f"{est['sample_id']} ({sum(est['verdicts'].values())} verdicts).",
        )
    return figs


def _slug(label: str) -> str:
    return "".join(c if c.isalnum() or c in "-_" else "-" for c in label)
