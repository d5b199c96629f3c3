"""Figures shared by the training record and the evaluation report (matplotlib, Agg)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

__all__ = ["pyplot", "confusion_figure"]


def pyplot():
    """matplotlib.pyplot on the file-only Agg backend (no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def confusion_figure(
    counts: np.ndarray, rows: list[str], columns: list[str], xlabel: str, ylabel: str, title: str, path: Path
) -> Path:
    """A count matrix as a grey-scale image (log of 1 + count) with each count written in it."""
    plt = pyplot()
    counts = np.asarray(counts)
    fig, ax = plt.subplots(figsize=(1.6 + 0.9 * len(columns), 1.4 + 0.6 * len(rows)))
    ax.imshow(np.log1p(counts), cmap="Greys")
    ax.set_xticks(range(len(columns)), columns, rotation=40, ha="right")
    ax.set_yticks(range(len(rows)), rows)
    for i in range(counts.shape[0]):
        for j in range(counts.shape[1]):
            ax.text(j, i, str(counts[i, j]), ha="center", va="center", fontsize=8, color="tab:red")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(title, fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
