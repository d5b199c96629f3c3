"""Agreement between two reviewers: Cohen's kappa with a large-sample 95 % interval.

Pure functions over two equal-length sequences of category labels; nothing here reads
the store. The interval uses the large-sample (non-null) standard error of Fleiss, Cohen
& Everitt (1969), "Large sample standard errors of kappa and weighted kappa",
Psychological Bulletin 72(5), 323-327.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass

import numpy as np

__all__ = ["KappaResult", "cohen_kappa", "confusion_proportions"]

_Z95 = 1.959963984540054  # the standard normal's 97.5 % quantile


@dataclass(frozen=True)
class KappaResult:
    """Cohen's kappa of two raters over the same items.

    Attributes
    ----------
    n : int
        Items rated by both.
    observed : float or None
        Share of items on which the two agree, p_o.
    expected : float or None
        Agreement expected by chance from the two raters' margins, p_e.
    kappa : float or None
        (p_o - p_e) / (1 - p_e); None where it is undefined (no items, or p_e = 1:
        both raters used one and the same category throughout).
    se : float or None
        Large-sample standard error (Fleiss, Cohen & Everitt 1969).
    low, high : float or None
        The 95 % interval kappa ± 1.96 se, clipped to [-1, 1].
    """

    n: int
    observed: float | None
    expected: float | None
    kappa: float | None
    se: float | None
    low: float | None
    high: float | None

    def as_dict(self) -> dict:
        """The result as a plain dict (JSON-ready)."""
        return asdict(self)


def confusion_proportions(a: Sequence, b: Sequence, labels: Sequence | None = None) -> tuple[np.ndarray, list]:
    """The joint proportions of two raters' categories.

    Parameters
    ----------
    a, b : sequence of hashable [length n]
        The first and the second rater's category for each item.
    labels : sequence, optional
        Categories, in the order of the table's rows and columns; by default the sorted
        union of what was used.

    Returns
    -------
    p : np.ndarray [shape=(k, k)]
        p[i, j] is the share of items rated labels[i] by ``a`` and labels[j] by ``b``.
    labels : list
        The categories of the rows and columns.
    """
    if len(a) != len(b):
        raise ValueError(f"the two raters' sequences differ in length ({len(a)} and {len(b)})")
    labels = sorted(set(a) | set(b)) if labels is None else list(labels)
    index = {c: i for i, c in enumerate(labels)}
    unknown = (set(a) | set(b)) - set(index)
    if unknown:
        raise ValueError(f"categories {sorted(map(str, unknown))} are not among labels {labels}")
    counts = np.zeros((len(labels), len(labels)))
    np.add.at(counts, ([index[x] for x in a], [index[y] for y in b]), 1.0)
    n = len(a)
    return (counts / n if n else counts), labels


def cohen_kappa(a: Sequence, b: Sequence, labels: Sequence | None = None) -> KappaResult:
    """Cohen's kappa of two raters with its large-sample standard error and 95 % interval.

    Parameters
    ----------
    a, b : sequence of hashable [length n]
        The two raters' categories for the same n items, item by item.
    labels : sequence, optional
        All categories (by default the ones used).

    Returns
    -------
    KappaResult
        With ``kappa`` None when it is undefined (n = 0, or chance agreement 1).

    Notes
    -----
    The variance is equation (13) of Fleiss, Cohen & Everitt (1969)::

        var = [ sum_i p_ii ((1 - p_e) - (p_i. + p_.i)(1 - p_o))^2
                + (1 - p_o)^2 sum_{i != j} p_ij (p_.i + p_j.)^2
                - (p_o p_e - 2 p_e + p_o)^2 ] / (n (1 - p_e)^4)

    It holds for large n; for a few dozen items a bootstrap over items is the safer
    interval (the two agree closely from about 100 items on, see the tests).
    """
    n = len(a)
    p, _ = confusion_proportions(a, b, labels)
    if n == 0:
        return KappaResult(0, None, None, None, None, None, None)
    rows = p.sum(axis=1)  # p_i., rater a's margin
    cols = p.sum(axis=0)  # p_.i, rater b's margin
    po = float(np.trace(p))
    pe = float(rows @ cols)
    if math.isclose(pe, 1.0):
        return KappaResult(n, po, pe, None, None, None, None)
    kappa = (po - pe) / (1.0 - pe)
    diag = np.diag(p)
    term_diag = float(np.sum(diag * ((1.0 - pe) - (rows + cols) * (1.0 - po)) ** 2))
    # p_ij weighted by (p_.i + p_j.)^2: the column margin of the row's category and the
    # row margin of the column's category.
    weights = (cols[:, None] + rows[None, :]) ** 2
    off = p * weights
    term_off = (1.0 - po) ** 2 * float(off.sum() - np.trace(off))
    term_last = (po * pe - 2.0 * pe + po) ** 2
    var = (term_diag + term_off - term_last) / (n * (1.0 - pe) ** 4)
    se = math.sqrt(max(var, 0.0))
    low = max(-1.0, kappa - _Z95 * se)
    high = min(1.0, kappa + _Z95 * se)
    return KappaResult(n, po, pe, kappa, se, low, high)
