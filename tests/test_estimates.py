"""Estimates from a verified sample, against published formulas and worked examples.

Check values: W. G. Cochran, Sampling Techniques, 3rd ed. (1977), ch. 5 and §6.3; E. L. Korn &
B. I. Graubard, Survey Methodology 24(2) (1998); E. B. Wilson, JASA 22 (1927) and R. G.
Newcombe, Stat. Med. 17 (1998); Angelopoulos et al., arXiv:2110.01052 (2021); Navine et al.,
Frontiers in Bird Science 3 (2024); Wood & Kahl, J. Ornithology 165 (2024); Royle & Link,
Ecology 87 (2006). Each worked value below was computed from those formulas, as the test says.
"""

from __future__ import annotations

import numpy as np
import pytest
from callsieve.classifier.estimates import (
    call_density,
    clopper_pearson,
    fit_confidence_calibration,
    guaranteed_threshold_index,
    korn_graubard_interval,
    occupancy_likelihood,
    point_threshold_index,
    precision_above,
    presence_probability,
    ratio_estimate,
    score_for_probability,
    stratified_proportion,
    wilson_interval,
)
from scipy import stats

# Cochran (1977) ch. 5, worked example: N_h = 600, 300, 100; n_h = 20 each; k_h = 6, 14, 19.
N3, n3, k3 = [600, 300, 100], [20, 20, 20], [6, 14, 19]
# Korn & Graubard / fixed-sequence example: strata lowest confidence first.
N4, n4, k4 = [10000, 2000, 500, 100], [50, 50, 50, 50], [5, 20, 40, 49]


def test_stratified_proportion_equals_cochrans_worked_example():
    # Cochran (1977) ch. 5: p_st = 0.485, SE 0.069244 with the finite-population factor,
    # 0.070701 without; estimated number correct of 1000: 485, SE 69.24.
    est = stratified_proportion(N3, n3, k3)
    assert est.estimate == pytest.approx(0.485, abs=1e-12)
    assert est.standard_error == pytest.approx(0.069244, abs=5e-7)
    assert est.variance == pytest.approx(4.79474e-3, rel=1e-5)
    assert stratified_proportion(N3, n3, k3, finite_population=False).standard_error == pytest.approx(
        0.070701, abs=5e-7
    )
    assert est.population * est.estimate == pytest.approx(485)
    assert est.population * est.standard_error == pytest.approx(69.24, abs=5e-3)


def test_precision_of_the_top_strata_and_korn_graubard_interval():
    # Korn & Graubard (1998) on Cochran's estimator: top two strata precision 0.8300, SE
    # 0.04524; n* 68.95, x* 57.23; two-sided 95 % 0.7204-0.9098; one-sided lower 0.7379;
    # the top stratum alone: n* = 98, one-sided lower 0.9377.
    top2 = precision_above(N4, n4, k4, 2)
    assert top2.estimate == pytest.approx(0.83, abs=1e-12)
    assert top2.standard_error == pytest.approx(0.04524, abs=5e-6)
    assert top2.effective_sample_size == pytest.approx(68.95, abs=5e-3)
    assert top2.effective_sample_size * top2.estimate == pytest.approx(57.23, abs=5e-3)
    low, high = korn_graubard_interval(top2)
    assert (low, high) == pytest.approx((0.7204, 0.9098), abs=5e-5)
    assert korn_graubard_interval(top2, one_sided=True)[0] == pytest.approx(0.7379, abs=5e-5)
    top1 = precision_above(N4, n4, k4, 3)
    assert top1.estimate == pytest.approx(0.98)
    assert top1.effective_sample_size == pytest.approx(98.0, abs=1e-9)
    assert korn_graubard_interval(top1, one_sided=True)[0] == pytest.approx(0.9377, abs=5e-5)


def test_clopper_pearson_50_of_50_and_against_scipy():
    # Korn & Graubard example: 50 of 50 correct, one-sided 95 % lower bound 0.9418.
    assert clopper_pearson(50, 50, one_sided=True)[0] == pytest.approx(0.9418, abs=5e-5)
    # scipy's exact (Clopper-Pearson) interval for whole counts.
    for k, n in [(45, 50), (9, 10), (0, 10), (10, 10), (81, 263)]:
        ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")
        assert clopper_pearson(k, n) == pytest.approx((ref.low, ref.high), abs=1e-10)


def test_wilson_interval_on_newcombes_cases():
    # Newcombe (1998) Table II, as computed in the references: 15/148 and 1/29.
    low, high = wilson_interval(np.array([15, 1]), np.array([148, 29]))
    assert low == pytest.approx([0.062386, 0.006113], abs=5e-7)
    assert high == pytest.approx([0.160487, 0.171755], abs=5e-7)


def test_fixed_sequence_stops_at_the_first_failure_although_the_point_estimate_passes():
    # Angelopoulos et al. (2021), on the example above with target 0.8: the top stratum
    # passes (0.9377), the top two fail (0.7379), so the guaranteed threshold is the top
    # stratum's edge although the top two's point estimate (0.83) exceeds the target.
    assert guaranteed_threshold_index(N4, n4, k4, 0.8) == 3
    assert point_threshold_index(N4, n4, k4, 0.8) == 2
    assert guaranteed_threshold_index(N4, n4, k4, 0.95) is None


def test_ratio_estimate_equals_the_pooled_ratio_and_cochrans_variance():
    # Cochran (1977) §6.3, linearised variance of a ratio over clusters, written out here.
    y = np.array([3, 5, 0, 2, 4])
    x = np.array([4, 6, 1, 2, 5])
    r, se, low, high = ratio_estimate(y, x, sampling_fraction=0.1)
    assert r == pytest.approx(14 / 18)
    v = 0.9 / (5 * x.mean() ** 2) * np.sum((y - r * x) ** 2) / 4
    assert se == pytest.approx(np.sqrt(v))
    # Korn & Graubard (1998), df-adjusted effective sample size, Clopper-Pearson on it (scipy).
    n_star = r * (1 - r) / v * (stats.norm.ppf(0.975) / stats.t.ppf(0.975, 4)) ** 2
    ref = (
        stats.beta.ppf(0.025, n_star * r, n_star * (1 - r) + 1),
        stats.beta.ppf(0.975, n_star * r + 1, n_star * (1 - r)),
    )
    assert (low, high) == pytest.approx(ref, abs=1e-10)
    assert np.isnan(ratio_estimate([1], [2])[1])  # one cluster: no spread to estimate from


def test_call_density_of_the_published_bins():
    # Navine et al. (2024): bins with weights 0.5, 0.25, 0.075, 0.175 and positive rates
    # 0.01, 0.1, 0.4, 0.9 give 0.2175.
    assert call_density([0.5, 0.25, 0.075, 0.175], [0.01, 0.1, 0.4, 0.9]) == pytest.approx(0.2175, abs=1e-12)


def test_score_for_probability_and_a_recovered_logistic_fit():
    # Wood & Kahl (2024): beta0 = -2, beta1 = 4 -> p = 0.90, 0.95, 0.99 at 0.7406, 0.7749, 0.8387.
    got = [score_for_probability(p, -2.0, 4.0) for p in (0.90, 0.95, 0.99)]
    assert got == pytest.approx([0.7406, 0.7749, 0.8387], abs=5e-5)
    # Verdicts drawn from that model are fitted back (synthetic truth, 20,000 verdicts).
    rng = np.random.default_rng(3)
    conf = rng.uniform(0.02, 0.98, 20000)
    z = -2.0 + 4.0 * np.log(conf / (1 - conf))
    yes = rng.random(conf.size) < 1 / (1 + np.exp(-z))
    b0, b1 = fit_confidence_calibration(conf, yes)
    assert b0 == pytest.approx(-2.0, abs=0.15) and b1 == pytest.approx(4.0, abs=0.25)
    assert fit_confidence_calibration([0.5, 0.6], [True, False]) is None


def test_presence_probability_and_occupancy_likelihood():
    # An hour with detections of precision 0.5 and 0.2 holds a true one with 1 - 0.5 * 0.8.
    # Strata of precision 0.5, 0.2 and 1.0; units holding one detection of the first two,
    # none, and one of the third.
    counts = [[1, 1, 0], [0, 0, 0], [0, 0, 1]]
    assert presence_probability(counts, [0.5, 0.2, 1.0]) == pytest.approx([0.6, 0.0, 1.0])
    # A unit known to hold a true detection (a yes verdict) is certain.
    assert presence_probability(counts, [0.5, 0.2, 1.0], [False, True, False]) == pytest.approx([0.6, 1.0, 1.0])
    # Royle & Link (2006): psi 0.6, p11 0.5, p10 0.05, K 5 -> L(0), L(1), L(3).
    got = [occupancy_likelihood(y, 5, 0.6, 0.5, 0.05) for y in (0, 1, 3)]
    assert got == pytest.approx([0.328262, 0.175201, 0.187951], abs=5e-7)


def test_a_stratum_with_detections_but_no_verdict_leaves_the_estimate_undefined():
    est = stratified_proportion([100, 50], [10, 0], [8, 0])
    assert np.isnan(est.estimate)
    assert np.isnan(korn_graubard_interval(est)[0])


# --- validation by simulation: do the intervals cover, does the guarantee hold? ---


def _simulated_runs(n_runs: int, seed: int):
    """Deployments with known truth: detections whose chance of being a call rises with
    confidence, five fixed strata, 20 verdicts drawn without replacement in each."""
    rng = np.random.default_rng(seed)
    edges = np.array([0.1, 0.3, 0.5, 0.7, 0.9, 1.0])
    for _ in range(n_runs):
        n_det = rng.integers(2000, 8000)
        conf = 0.1 + 0.9 * rng.beta(1.2, 2.0, n_det)
        # A site unlike the training one: the truth curve itself varies between deployments.
        shift = rng.uniform(-1.0, 1.0)
        logit = -2.0 + 5.0 * conf + shift
        correct = rng.random(n_det) < 1 / (1 + np.exp(-logit))
        stratum = np.clip(np.searchsorted(edges, conf, side="right") - 1, 0, 4)
        N = np.bincount(stratum, minlength=5)
        n = np.minimum(N, 20)
        k = np.array([rng.choice(correct[stratum == h], n[h], replace=False).sum() if n[h] else 0 for h in range(5)])
        yield conf, correct, stratum, N, n, k


def test_precision_intervals_cover_the_true_precision_about_95_percent_of_the_time():
    """Korn-Graubard intervals of the precision above each stratum edge and of the expected
    number of true detections: coverage of the true value within 93-97 % (the issue's
    requirement for a 95 % interval; 600 simulated deployments, seeded)."""
    hits = total = 0
    hits_n = total_n = 0
    for _conf, correct, stratum, N, n, k in _simulated_runs(600, seed=11):
        for h in range(5):
            est = precision_above(N, n, k, h)
            if not np.isfinite(est.estimate):
                continue
            true = correct[stratum >= h].mean()
            low, high = korn_graubard_interval(est)
            hits += low <= true <= high
            total += 1
            true_n = correct[stratum >= h].sum()
            hits_n += est.population * low <= true_n <= est.population * high
            total_n += 1
    assert 0.93 <= hits / total <= 0.97, hits / total
    assert 0.93 <= hits_n / total_n <= 0.97, hits_n / total_n


def test_the_guaranteed_threshold_falls_short_of_its_target_at_most_5_percent_of_the_time():
    """Fixed-sequence testing (Angelopoulos et al. 2021): P(true precision < target) <= 5 %."""
    short = chosen = 0
    for _conf, correct, stratum, N, n, k in _simulated_runs(600, seed=12):
        h = guaranteed_threshold_index(N, n, k, 0.8)
        if h is None:
            continue
        chosen += 1
        short += correct[stratum >= h].mean() < 0.8
    assert chosen > 300  # the test means something: most runs get a threshold
    assert short / chosen <= 0.05, short / chosen


def test_recall_intervals_over_audit_segments_cover_the_true_recall():
    """Ratio estimator over randomly drawn audit segments (Cochran 1977 §6.3): coverage of
    the deployment's true recall within 93-97 % (600 simulated deployments, 40 segments each)."""
    rng = np.random.default_rng(13)
    hits = 0
    runs = 600
    for _ in range(runs):
        segments = 2000  # the deployment cut into segments of effort
        rate = rng.gamma(0.8, 2.5, segments)  # calls cluster in time: many empty segments
        calls = rng.poisson(rate)
        recall = rng.uniform(0.4, 0.9)
        found = rng.binomial(calls, recall)
        true = found.sum() / calls.sum()
        pick = rng.choice(segments, 40, replace=False)
        _, _, low, high = ratio_estimate(found[pick], calls[pick], sampling_fraction=40 / segments)
        hits += low <= true <= high
    assert 0.93 <= hits / runs <= 0.97, hits / runs


def test_zero_variance_uses_the_designs_size_and_a_census_is_exact():
    # All verified detections correct: the estimated variance is 0, so Korn & Graubard's
    # n* falls back to the design's size; for one stratum of 12 sampled of 1,000 that is
    # 12 / (1 - 12/1000), and the one-sided Clopper-Pearson bound of x = n is alpha^(1/n).
    est = stratified_proportion([1000], [12], [12])
    assert est.effective_sample_size == pytest.approx(12 / (1 - 0.012))
    assert korn_graubard_interval(est, one_sided=True)[0] == pytest.approx(0.05 ** (1 / est.effective_sample_size))
    # A stratum verified whole is known exactly (Cochran 1977: the finite-population factor is 0).
    census = stratified_proportion([12], [12], [12])
    assert korn_graubard_interval(census) == (1.0, 1.0)
    assert guaranteed_threshold_index([500, 12], [20, 12], [10, 12], 0.8) == 1
