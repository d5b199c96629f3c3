"""Figures of the training record and the evaluation report (matplotlib, Agg).

One function per figure; each returns the figure and leaves saving to the caller, so a
notebook can show it and a command can write it. Colours: cividis for counts (readable
in grey and by colour-blind readers), and line styles that differ in grey as well.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

__all__ = [
    "pyplot",
    "save",
    "confusion_figure",
    "precision_recall_figure",
    "threshold_figure",
    "recall_by_level_figure",
    "verified_precision_figure",
    "confidence_calibration_figure",
]

_DPI = 110


def pyplot():
    """matplotlib.pyplot on the file-only Agg backend (no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def save(fig, path: Path) -> Path:
    """Write a figure as PNG and release it."""
    fig.savefig(path, dpi=_DPI)
    pyplot().close(fig)
    return Path(path)


def confusion_figure(counts: np.ndarray, rows: list[str], columns: list[str], xlabel: str, ylabel: str, title: str):
    """A count matrix on a logarithmic colour scale, each count written in its cell.

    Parameters
    ----------
    counts : np.ndarray [shape=(n_rows, n_columns)], counts
    rows, columns : list of str, labels of the rows and columns
    xlabel, ylabel, title : str
    """
    from matplotlib.colors import LogNorm

    plt = pyplot()
    counts = np.asarray(counts)
    fig, ax = plt.subplots(figsize=(2.8 + 0.9 * len(columns), 1.6 + 0.6 * len(rows)))
    # Log scale so a diagonal of hundreds does not hide off-diagonal counts of a few;
    # 1 + count so that empty cells have a colour too.
    norm = LogNorm(vmin=1, vmax=max(float(counts.max()) + 1, 2.0))
    cmap = plt.get_cmap("cividis")
    im = ax.imshow(counts + 1, cmap=cmap, norm=norm)
    ax.set_xticks(range(len(columns)), columns, rotation=40, ha="right")
    ax.set_yticks(range(len(rows)), rows)
    for i in range(counts.shape[0]):
        for j in range(counts.shape[1]):
            r, g, b, _ = cmap(norm(counts[i, j] + 1))
            # Relative luminance (ITU-R BT.709 weights): dark text on light cells.
            light = 0.2126 * r + 0.7152 * g + 0.0722 * b > 0.5
            ax.text(j, i, str(counts[i, j]), ha="center", va="center", fontsize=8, color="black" if light else "white")
    bar = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
    bar.set_label("count + 1 (logarithmic scale)")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(title, fontsize=9)
    fig.tight_layout()
    return fig


def precision_recall_figure(panels: list[dict], where: str):
    """Precision against recall of the model and the baseline, one panel per class.

    Parameters
    ----------
    panels : list of dict
        Per class: ``label``; ``model`` and ``baseline``, each with arrays ``recall`` and
        ``precision`` (0..1) and ``ap`` (float or None); ``operating`` with
        ``threshold``, ``recall`` and ``precision`` of the operating point (or None).
    where : str, what was judged (deployment, run), for the title
    """
    plt = pyplot()
    n = max(len(panels), 1)
    fig, axes = plt.subplots(1, n, figsize=(3.6 * n, 4.2), squeeze=False)
    for ax, p in zip(axes[0], panels, strict=False):
        m, b = p["model"], p["baseline"]
        ax.step(m["recall"], m["precision"], where="post", color="C0", label=f"model, AP {m['ap'] or 0:.2f}")
        ax.step(
            b["recall"],
            b["precision"],
            where="post",
            color="C1",
            linestyle="--",
            label=f"floor-excess baseline, AP {b['ap'] or 0:.2f}",
        )
        op = p.get("operating")
        if op and op.get("recall") is not None and op.get("precision") is not None:
            ax.plot(
                op["recall"],
                op["precision"],
                marker="o",
                markersize=7,
                markerfacecolor="none",
                markeredgecolor="black",
                linestyle="none",
                label=f"operating point (confidence ≥ {op['threshold']:.2f})",
            )
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1.02)
        ax.set_xlabel("recall (fraction of truth calls found)")
        ax.set_ylabel("precision (fraction of detections true)")
        ax.set_title(p["label"], fontsize=9)
        # Below the axes, so the legend never covers a curve.
        ax.legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.2), frameon=False)
    fig.suptitle(f"Precision against recall, {where}", fontsize=10)
    fig.tight_layout()
    return fig


def threshold_figure(panels: list[dict], where: str):
    """Precision and recall against the confidence threshold, one panel per class.

    Parameters
    ----------
    panels : list of dict
        Per class: ``label``; arrays ``threshold`` (confidence, 0..1), ``precision`` and
        ``recall`` (0..1); ``operating_threshold`` (float or None).
    where : str, what was judged, for the title
    """
    plt = pyplot()
    n = max(len(panels), 1)
    fig, axes = plt.subplots(1, n, figsize=(3.6 * n, 4.0), squeeze=False)
    for ax, p in zip(axes[0], panels, strict=False):
        ax.plot(p["threshold"], p["precision"], color="C0", label="precision")
        ax.plot(p["threshold"], p["recall"], color="C1", linestyle="--", label="recall")
        if p.get("operating_threshold") is not None:
            ax.axvline(
                p["operating_threshold"],
                color="0.3",
                linestyle=":",
                linewidth=1.2,
                label=f"operating threshold {p['operating_threshold']:.2f}",
            )
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1.02)
        ax.set_xlabel("confidence threshold")
        ax.set_ylabel("precision or recall (fraction)")
        ax.set_title(p["label"], fontsize=9)
        ax.legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.2), frameon=False)
    fig.suptitle(f"Precision and recall against threshold, {where}", fontsize=10)
    fig.tight_layout()
    return fig


def recall_by_level_figure(rows: list[dict], classes: list[str], where: str):
    """Recall with its interval per bin of SNR and of received level, calls per bin written.

    Parameters
    ----------
    rows : list of dict
        One per class, measure and bin: ``label``, ``measure`` (``snr_db`` or
        ``received_level_db``), ``low`` and ``high`` (bin edges, dB), ``calls``,
        ``recall``, ``recall_low``, ``recall_high``.
    classes : list of str
    where : str, for the title
    """
    plt = pyplot()
    n = max(len(classes), 1)
    fig, axes = plt.subplots(2, n, figsize=(3.3 * n, 6.4), squeeze=False)
    for i, (measure, unit) in enumerate(
        (("snr_db", "SNR of the call, dB"), ("received_level_db", "received level, dB re 1 µPa"))
    ):
        for ax, c in zip(axes[i], classes, strict=False):
            sel = sorted(
                (r for r in rows if r["label"] == c and r["measure"] == measure), key=lambda r: float(r["low"])
            )
            if any(r["calls"] for r in sel):
                x = np.array([(float(r["low"]) + float(r["high"])) / 2 for r in sel])
                # An empty bin is a gap in the line (NaN), never a line drawn across it.
                y = np.array([float(r["recall"]) if r["calls"] else np.nan for r in sel])
                lo = np.array([float(r["recall_low"]) if r["calls"] else np.nan for r in sel])
                hi = np.array([float(r["recall_high"]) if r["calls"] else np.nan for r in sel])
                err = np.maximum([y - lo, hi - y], 0.0)  # rounded bounds may pass the point by a hair
                ax.errorbar(x, y, yerr=err, marker="o", markersize=4, capsize=2, color="C0")
                full = [r for r in sel if r["calls"]]
                ax.set_xlim(float(full[0]["low"]), float(full[-1]["high"]))
                for xi, r in zip(x, sel, strict=True):
                    if r["calls"]:
                        # Calls per bin along the top, so a point's weight is read beside it.
                        ax.text(xi, 1.1, str(r["calls"]), ha="center", va="center", fontsize=7, color="0.35")
            ax.set_ylim(0, 1.18)
            ax.set_yticks([0, 0.2, 0.4, 0.6, 0.8, 1.0])
            ax.set_xlabel(unit)
            if ax is axes[i][0]:
                ax.set_ylabel("recall at the operating threshold")
            ax.set_title(c if i == 0 else "", fontsize=9)
    fig.suptitle(
        f"Recall against SNR and received level, {where}\n(95 % Wilson intervals; grey numbers: truth calls per bin)",
        fontsize=10,
    )
    fig.tight_layout()
    return fig


def verified_precision_figure(thresholds: list[dict], label: str, target: float | None):
    """Precision (and recall, where audits exist) above each threshold, with 95 % intervals.

    Parameters
    ----------
    thresholds : list of dict, the ``thresholds`` of ``estimate_run``
    label : str, the class verified
    target : float, optional, the target precision, drawn as a line
    """
    plt = pyplot()
    t = np.array([r["threshold"] for r in thresholds], float)
    fig, ax = plt.subplots(figsize=(6.0, 3.8))
    for key, style, name in (("precision", "-o", "precision above"), ("recall", "--s", "recall (audits)")):
        value = np.array([np.nan if r[key] is None else r[key] for r in thresholds], float)
        if np.all(np.isnan(value)):
            continue
        low = np.array([np.nan if r[f"{key}_low"] is None else r[f"{key}_low"] for r in thresholds], float)
        high = np.array([np.nan if r[f"{key}_high"] is None else r[f"{key}_high"] for r in thresholds], float)
        line = ax.plot(t, value, style, color="black" if key == "precision" else "0.45", label=name)[0]
        ax.fill_between(t, low, high, color=line.get_color(), alpha=0.15, step=None)
    if target is not None:
        ax.axhline(target, color="0.3", linestyle=":", linewidth=1, label=f"target {target:g}")
    ax.set_xlabel("threshold (confidence)")
    ax.set_ylabel("estimate, 95 % interval")
    ax.set_ylim(0, 1.02)
    ax.set_title(f"{label}: verified precision above each stratum's edge")
    ax.legend(loc="lower right", fontsize=8)
    fig.tight_layout()
    return fig


def confidence_calibration_figure(strata: list[dict], logistic: dict | None, label: str):
    """The model's mean confidence per stratum against verified precision, with a logistic fit.

    Parameters
    ----------
    strata : list of dict, the ``strata`` of ``estimate_run``
    logistic : dict, optional, ``beta0`` and ``beta1`` of logit P(yes) = β₀ + β₁ logit(confidence)
    label : str
    """
    from scipy.special import expit

    plt = pyplot()
    fig, ax = plt.subplots(figsize=(4.6, 4.2))
    ax.plot([0, 1], [0, 1], color="0.7", linewidth=1, label="confidence = precision")
    rows = [s for s in strata if s["precision"] is not None and s["mean_confidence"] is not None]
    if rows:
        x = np.array([s["mean_confidence"] for s in rows])
        y = np.array([s["precision"] for s in rows])
        err = np.array([[s["precision"] - s["precision_low"], s["precision_high"] - s["precision"]] for s in rows]).T
        # Bounds are rounded for the JSON; at a precision of 0 or 1 the rounding can put a
        # bound a hair beyond the point, which matplotlib refuses as a negative error bar.
        err = np.maximum(err, 0.0)
        ax.errorbar(x, y, yerr=err, fmt="o", color="black", capsize=3, label="strata (Wilson 95 %)")
    if logistic is not None:
        c = np.linspace(0.01, 0.999, 200)
        z = logistic["beta0"] + logistic["beta1"] * np.log(c / (1 - c))
        ax.plot(c, expit(z), "--", color="0.35", label="logistic fit")
    ax.set_xlim(0, 1.0)
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("model confidence (mean in stratum)")
    ax.set_ylabel("verified precision")
    ax.set_title(f"{label}: confidence against verdicts", fontsize=10)
    ax.legend(loc="upper left", fontsize=8)
    fig.tight_layout()
    return fig
