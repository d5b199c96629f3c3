"""Estimates from a verified stratified sample: precision, expected true detections, recall,
call density, thresholds with a guarantee, a confidence calibration and presence.

Pure functions over arrays; the store and the command live in ``estimate.py``. Strata are
always given lowest confidence first. Formulas and check values: the survey-sampling
references of the developer notes (Cochran 1977 ch. 5; Korn & Graubard 1998; Wilson 1927;
Angelopoulos et al. 2021; Navine et al. 2024; Wood & Kahl 2024; Royle & Link 2006).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .evaluation import wilson_interval

__all__ = [
    "StratifiedProportion",
    "stratified_proportion",
    "clopper_pearson",
    "korn_graubard_interval",
    "precision_above",
    "guaranteed_threshold_index",
    "point_threshold_index",
    "ratio_estimate",
    "rate_estimate",
    "call_density",
    "fit_confidence_calibration",
    "score_for_probability",
    "presence_probability",
    "occupancy_likelihood",
    "wilson_interval",
]


@dataclass(frozen=True)
class StratifiedProportion:
    """A stratified estimate of a proportion.

    Attributes
    ----------
    estimate : float, the proportion (0..1), NaN with no verified item
    variance : float, its estimated variance
    population : int, units in the strata it covers
    sampled : int, verified units (yes or no) in those strata
    design_size : float, 1 / Σ W_h² (1 − f_h) / n_h: the sample size a simple random
        sample would need for the same variance when every stratum has the same
        proportion; infinite when every stratum was verified whole
    """

    estimate: float
    variance: float
    population: int
    sampled: int
    design_size: float = float("nan")

    @property
    def standard_error(self) -> float:
        """Standard error of the estimate."""
        return float(np.sqrt(self.variance)) if np.isfinite(self.variance) else float("nan")

    @property
    def effective_sample_size(self) -> float:
        """Korn & Graubard's n* = p̂q̂ / v(p̂).

        Where the estimated variance is 0 (every verdict alike, p̂ = 0 or 1), the design's
        own size stands in (``design_size``): the verified count, less what verifying a
        stratum whole makes certain. Infinite when every stratum was verified whole.
        """
        pq = self.estimate * (1.0 - self.estimate)
        if not np.isfinite(pq):
            return float("nan")
        if self.variance > 0 and pq > 0:
            return pq / self.variance
        return self.design_size


def stratified_proportion(
    population: np.ndarray, sampled: np.ndarray, correct: np.ndarray, finite_population: bool = True
) -> StratifiedProportion:
    """Stratified estimate of a proportion and its variance (Cochran 1977, ch. 5).

    Parameters
    ----------
    population : array of int, N_h, units (detections) in each stratum
    sampled : array of int, n_h, units verified (yes or no) in each stratum
    correct : array of int, k_h, verified units found correct
    finite_population : bool, apply (1 − n_h/N_h)

    Returns
    -------
    StratifiedProportion
        p̂_st = Σ W_h p̂_h, v = Σ W_h² (1 − f_h) p̂_h q̂_h / (n_h − 1). A stratum with units
        but no verified one makes the estimate NaN (nothing can stand in for it); a stratum
        with one verified unit adds no variance term (there is no spread to estimate from).
    """
    N = np.asarray(population, float)
    n = np.asarray(sampled, float)
    k = np.asarray(correct, float)
    total = N.sum()
    if total <= 0:
        return StratifiedProportion(float("nan"), float("nan"), 0, int(n.sum()))
    live = N > 0
    if np.any(live & (n <= 0)):
        return StratifiedProportion(float("nan"), float("nan"), int(total), int(n.sum()))
    W = np.where(live, N / total, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        p = np.where(live, k / np.where(n > 0, n, 1.0), 0.0)
        fpc = 1.0 - n / np.where(N > 0, N, 1.0) if finite_population else np.ones_like(N)
        term = np.where(live & (n > 1), W**2 * fpc * p * (1 - p) / (n - 1), 0.0)
        spread = float(np.sum(np.where(live, W**2 * np.maximum(fpc, 0.0) / np.where(n > 0, n, 1.0), 0.0)))
    design = 1.0 / spread if spread > 0 else float("inf")
    return StratifiedProportion(float(np.sum(W * p)), float(np.sum(term)), int(total), int(n.sum()), design)


def clopper_pearson(x: float, n: float, confidence_level: float = 0.95, one_sided: bool = False) -> tuple[float, float]:
    """Clopper–Pearson interval for x successes of n, x and n possibly fractional.

    One-sided: the lower bound at ``confidence_level`` and an upper bound of 1.
    """
    alpha = 1.0 - confidence_level
    tail = alpha if one_sided else alpha / 2.0
    if not (np.isfinite(x) and np.isfinite(n)) or n <= 0:
        return float("nan"), float("nan")
    low = 0.0 if x <= 0 else float(stats.beta.ppf(tail, x, n - x + 1.0))
    if one_sided:
        return low, 1.0
    high = 1.0 if x >= n else float(stats.beta.ppf(1.0 - tail, x + 1.0, n - x))
    return low, high


def korn_graubard_interval(
    est: StratifiedProportion, confidence_level: float = 0.95, one_sided: bool = False
) -> tuple[float, float]:
    """Korn & Graubard (1998): Clopper–Pearson on the effective sample n* = p̂q̂/v, x* = n*p̂."""
    n_star = est.effective_sample_size
    if n_star == float("inf"):
        return est.estimate, est.estimate  # every detection verified: nothing left to estimate
    if not np.isfinite(n_star) or n_star <= 0:
        return float("nan"), float("nan")
    return clopper_pearson(n_star * est.estimate, n_star, confidence_level, one_sided)


def precision_above(
    population: np.ndarray, sampled: np.ndarray, correct: np.ndarray, first: int
) -> StratifiedProportion:
    """Precision of every detection in strata ``first`` and above (strata lowest first)."""
    return stratified_proportion(
        np.asarray(population)[first:], np.asarray(sampled)[first:], np.asarray(correct)[first:]
    )


def point_threshold_index(
    population: np.ndarray, sampled: np.ndarray, correct: np.ndarray, target: float
) -> int | None:
    """The lowest stratum whose precision-above point estimate reaches ``target``, or None."""
    for h in range(len(population)):
        est = precision_above(population, sampled, correct, h)
        if np.isfinite(est.estimate) and est.estimate >= target:
            return h
    return None


def guaranteed_threshold_index(
    population: np.ndarray, sampled: np.ndarray, correct: np.ndarray, target: float, confidence_level: float = 0.95
) -> int | None:
    """Fixed-sequence testing from the top stratum down (Angelopoulos et al. 2021).

    At each threshold, "precision < target" is rejected when the one-sided Korn–Graubard
    lower bound reaches ``target``; the first failure stops the sequence. Returns the
    lowest stratum reached, or None when even the top one fails. The family-wise error is
    at most 1 − ``confidence_level`` without a multiplicity correction, because the
    hypotheses are tested in a fixed order.
    """
    chosen = None
    for h in range(len(population) - 1, -1, -1):
        est = precision_above(population, sampled, correct, h)
        low, _ = korn_graubard_interval(est, confidence_level, one_sided=True)
        if not (np.isfinite(low) and low >= target):
            break
        chosen = h
    return chosen


def _ratio_and_variance(
    y: np.ndarray, x: np.ndarray, sampling_fraction: float, weights: np.ndarray | None
) -> tuple[float, float]:
    """R = Σ w y / Σ w x and its linearised variance (with-replacement form, times 1 − f).

    With equal weights this is Cochran's (1977) §6.3 v(R) = (1 − f)/(n x̄²) Σ (y − R x)²/(n − 1).
    NaN for both where Σ x = 0; NaN variance from one cluster (no spread to estimate from).
    """
    n = y.size
    if n == 0 or x.sum() <= 0:
        return float("nan"), float("nan")
    w = np.ones(n) if weights is None else np.asarray(weights, float)
    r = np.sum(w * y) / np.sum(w * x)
    if n < 2:
        return float(r), float("nan")
    v = (1.0 - sampling_fraction) * n / (n - 1) * np.sum((w * (y - r * x)) ** 2) / np.sum(w * x) ** 2
    return float(r), float(v)


def ratio_estimate(
    numerator: np.ndarray,
    denominator: np.ndarray,
    sampling_fraction: float = 0.0,
    confidence_level: float = 0.95,
    weights: np.ndarray | None = None,
) -> tuple[float, float, float, float]:
    """A proportion R = Σ y_i / Σ x_i over sampled clusters, with its linearised variance.

    Cochran (1977) §6.3: v(R) = (1 − f) / (n x̄²) · Σ (y_i − R x_i)² / (n − 1). Used for
    recall over audit segments (y: annotated calls matched, x: annotated calls). The
    interval is Korn & Graubard's (1998) with their degrees-of-freedom adjustment: a
    Clopper–Pearson interval on the effective sample n* (z / t_{n−1})², n* = R(1 − R)/v.
    Calls cluster in time, so few segments hold most of them; in simulation a normal
    interval covered 90–93 % where this one covers 94–95 % (tests/test_estimates.py).

    ``weights`` (1 / inclusion probability of each cluster) give the weighted ratio of an
    unequal-probability design, segments stratified by day for instance.

    Returns
    -------
    ratio, standard_error, low, high : float
        NaN where Σ x = 0, and no interval from one cluster.
    """
    y, x = np.asarray(numerator, float), np.asarray(denominator, float)
    r, v = _ratio_and_variance(y, x, sampling_fraction, weights)
    if not np.isfinite(v):
        return r, float("nan"), float("nan"), float("nan")
    n = y.size
    tail = 1.0 - (1.0 - confidence_level) / 2.0
    n_star = r * (1 - r) / v if v > 0 and 0 < r < 1 else float(x.sum())
    n_star *= (stats.norm.ppf(tail) / stats.t.ppf(tail, n - 1)) ** 2
    low, high = clopper_pearson(n_star * r, n_star, confidence_level)
    return float(r), float(np.sqrt(v)), low, high


def rate_estimate(
    counts: np.ndarray,
    hours: np.ndarray,
    sampling_fraction: float = 0.0,
    confidence_level: float = 0.95,
    weights: np.ndarray | None = None,
) -> tuple[float, float, float, float]:
    """Calls per hour over sampled stretches of effort: a ratio with a t interval (n − 1 df).

    Returns
    -------
    rate, standard_error, low, high : float, calls per hour; NaN without effort, no
        interval from one stretch.
    """
    y, x = np.asarray(counts, float), np.asarray(hours, float)
    r, v = _ratio_and_variance(y, x, sampling_fraction, weights)
    if not np.isfinite(v):
        return r, float("nan"), float("nan"), float("nan")
    half = float(stats.t.ppf(1.0 - (1.0 - confidence_level) / 2.0, y.size - 1)) * np.sqrt(v)
    return r, float(np.sqrt(v)), max(r - half, 0.0), r + half


def call_density(weights: np.ndarray, positive_rate: np.ndarray) -> float:
    """Share of windows holding a call, Σ_b w_b P(+ | b) (Navine et al. 2024)."""
    w, p = np.asarray(weights, float), np.asarray(positive_rate, float)
    return float(np.sum(w * p))


def _logit(p: np.ndarray) -> np.ndarray:
    p = np.clip(np.asarray(p, float), 1e-6, 1 - 1e-6)
    return np.log(p / (1 - p))


def fit_confidence_calibration(confidence: np.ndarray, correct: np.ndarray, weight: np.ndarray | None = None):
    """Logistic fit logit P(correct) = β₀ + β₁ logit(confidence) (Wood & Kahl 2024).

    Parameters
    ----------
    confidence : array, the model's confidences of the verified detections (0..1)
    correct : array of bool, the verdicts (yes → True, no → False)
    weight : array, optional, 1/inclusion probability, so the fit describes the run

    Returns
    -------
    (beta0, beta1) : tuple of float, or None with fewer than two of each verdict
    """
    y = np.asarray(correct, bool)
    if y.sum() < 2 or (~y).sum() < 2:
        return None
    from sklearn.linear_model import LogisticRegression

    x = _logit(confidence).reshape(-1, 1)
    # Unpenalised: the coefficients are the estimate, not a regularised prediction rule.
    fit = LogisticRegression(C=np.inf, max_iter=1000).fit(x, y, sample_weight=weight)
    return float(fit.intercept_[0]), float(fit.coef_[0, 0])


def score_for_probability(p: float, beta0: float, beta1: float) -> float:
    """The confidence at which the calibrated probability of being correct is ``p``."""
    z = (np.log(p / (1 - p)) - beta0) / beta1
    return float(1.0 / (1.0 + np.exp(-z)))


def presence_probability(counts: np.ndarray, precision: np.ndarray, certain: np.ndarray | None = None) -> np.ndarray:
    """Per unit of time (hour, day), the chance it holds at least one true detection.

    Parameters
    ----------
    counts : array [n_units, n_strata], detections of each unit in each stratum
    precision : array [n_strata] or [n_strata, n_draws], each stratum's precision (a
        detection's chance of being true), detections taken as independent
    certain : array of bool [n_units], optional, units known to hold a true detection

    Returns
    -------
    array [n_units] or [n_units, n_draws], 1 − Π (1 − p_h)^(n_uh) per unit (0 for a unit
    without detections)
    """
    log_miss = np.log1p(-np.clip(np.asarray(precision, float), 0.0, 1.0 - 1e-12))
    p = 1.0 - np.exp(np.asarray(counts, float) @ log_miss)
    if certain is not None:
        shape = (-1,) + (1,) * (p.ndim - 1)
        p = np.where(np.asarray(certain, bool).reshape(shape), 1.0, p)
    return p


def occupancy_likelihood(y: int, surveys: int, psi: float, p11: float, p10: float) -> float:
    """Royle & Link (2006): L(y) = ψ Bin(y; K, p₁₁) + (1 − ψ) Bin(y; K, p₁₀)."""
    return float(psi * stats.binom.pmf(y, surveys, p11) + (1 - psi) * stats.binom.pmf(y, surveys, p10))
