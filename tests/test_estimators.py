"""Specifications of IPS/SNIPS estimates, bootstrap intervals and paired comparisons."""

import numpy as np
import pytest
import scipy.stats
from numpy.testing import assert_allclose

from threefold.evaluation.click_estimates import bootstrap_interval, click_estimates, paired_comparison


# ---------------------------------------------------------------- IPS / SNIPS
def test_ips_and_snips_worked_values():
    # methods.md section 6 (Schnabel et al. 2016; Swaminathan & Joachims 2015):
    # y = [1,0,1,0], w = [3,1,1,1]: IPS = (3 + 1) / 4 = 1.0; SNIPS = 4 / 6 = 0.667; naive = 2/4.
    est = click_estimates(np.array([1, 0, 1, 0]), np.array([3, 1, 1, 1]))
    assert_allclose([est.ips, est.snips, est.naive], [1.0, 0.667, 0.5], atol=5e-4)
    assert est.n_observations == 4 and est.n_clipped == 0


def test_clipping_caps_large_weights():
    # Hand computation: clipping w = [3,1,1,1] at 2 gives [2,1,1,1]:
    # IPS = (2 + 1) / 4 = 0.75, SNIPS = 3 / 5 = 0.6.
    est = click_estimates(np.array([1, 0, 1, 0]), np.array([3, 1, 1, 1]), max_weight=2.0)
    assert_allclose([est.ips, est.snips], [0.75, 0.6], rtol=1e-12)
    assert est.n_clipped == 1 and est.max_weight == 2.0


def test_ips_recovers_the_click_rate_under_full_examination():
    # Planted-truth test: position-based model, P(click) = theta_k * gamma_i; the true value is the
    # mean relevance gamma (every position examined). IPS with w = 1/theta recovers it, the naive
    # estimate is biased low by the examination probabilities. (SNIPS does not apply here: the
    # weights 1/theta do not average to 1.)
    rng = np.random.default_rng(0)
    n = 200_000
    theta = np.array([1.0, 0.6, 0.4, 0.25, 0.15])
    position = rng.integers(0, theta.size, size=n)
    gamma = rng.beta(2, 5, size=n)
    clicks = (rng.random(n) < theta[position]) & (rng.random(n) < gamma)
    est = click_estimates(clicks.astype(float), 1.0 / theta[position])
    assert_allclose(est.ips, gamma.mean(), rtol=0.03)
    assert est.naive < 0.6 * gamma.mean()


def test_ips_and_snips_recover_a_new_policys_click_rate():
    # Planted-truth test: the log shows item a with probability pi0[a], the evaluated policy would
    # show it with pi1[a]; w = pi1/pi0 averages to 1, so both IPS and SNIPS are consistent.
    # True value sum pi1 * gamma = 0.005 + 0.02 + 0.045 + 0.12 + 0.2 = 0.39; the naive mean
    # estimates the logging policy's 0.21 instead.
    rng = np.random.default_rng(1)
    pi0 = np.array([0.4, 0.3, 0.15, 0.1, 0.05])
    pi1 = np.array([0.05, 0.1, 0.15, 0.3, 0.4])
    gamma = np.array([0.1, 0.2, 0.3, 0.4, 0.5])
    shown = rng.choice(5, size=200_000, p=pi0)
    clicks = (rng.random(shown.size) < gamma[shown]).astype(float)
    est = click_estimates(clicks, pi1[shown] / pi0[shown])
    assert_allclose([est.ips, est.snips], [0.39, 0.39], rtol=0.03)
    assert_allclose(est.naive, 0.21, rtol=0.03)


def test_click_estimates_reject_bad_input():
    with pytest.raises(ValueError, match="weights must be positive"):
        click_estimates(np.array([1.0, 0.0]), np.array([1.0, 0.0]))
    with pytest.raises(ValueError, match="same shape"):
        click_estimates(np.array([1.0, 0.0]), np.array([1.0]))
    with pytest.raises(ValueError, match="rewards must be finite"):
        click_estimates(np.array([np.nan, 0.0]), np.array([1.0, 1.0]))
    with pytest.raises(ValueError, match="'max_weight' parameter of click_estimates"):
        click_estimates(np.array([1.0]), np.array([1.0]), max_weight=0.5)


# ---------------------------------------------------------------- bootstrap
@pytest.mark.parametrize("batch", [None, 128])
def test_bootstrap_interval_equals_scipy_bootstrap_on_the_same_resamples(batch):
    # Reference library: scipy.stats.bootstrap, method="percentile". Both draw resample b of a step
    # as row b of rng.integers(0, n, (batch, n)) from numpy.random.default_rng(seed), so with equal
    # seed and batch they use the very same resamples and must agree to rounding.
    values = np.random.default_rng(1).exponential(size=83)
    ours = bootstrap_interval(values, n_resamples=999, random_state=7, batch=batch)
    ref = scipy.stats.bootstrap(
        (values,), np.mean, n_resamples=999, method="percentile", confidence_level=0.95,
        rng=np.random.default_rng(7), batch=batch,
    )
    assert_allclose([ours.low, ours.high], [ref.confidence_interval.low, ref.confidence_interval.high], rtol=1e-12)
    assert_allclose(ours.standard_error, ref.standard_error, rtol=1e-12)
    assert_allclose(ours.estimate, values.mean(), rtol=1e-12)


def test_bootstrap_interval_agrees_with_scipy_across_seeds_within_monte_carlo_error():
    # Reference library: scipy.stats.bootstrap with independent seeds; the percentile bounds of
    # 4000 resamples differ by Monte Carlo noise only (tolerance: a fifth of the standard error).
    values = np.random.default_rng(2).normal(size=200)
    ours = bootstrap_interval(values, n_resamples=4000, random_state=11)
    ref = scipy.stats.bootstrap((values,), np.mean, n_resamples=4000, method="percentile",
                                rng=np.random.default_rng(12))
    se = ref.standard_error
    assert abs(ours.low - ref.confidence_interval.low) < 0.2 * se
    assert abs(ours.high - ref.confidence_interval.high) < 0.2 * se


def test_ratio_bootstrap_matches_slow_reference_on_the_same_draws():
    rng = np.random.default_rng(3)
    num, den = rng.random(40), rng.random(40) + 0.5
    ours = bootstrap_interval(num, denominators=den, n_resamples=300, random_state=5, batch=300)
    draws = np.random.default_rng(5).integers(0, 40, (300, 40))
    stats = [num[d].mean() / den[d].mean() for d in draws]
    assert_allclose([ours.low, ours.high], np.quantile(stats, [0.025, 0.975]), rtol=1e-12)
    assert_allclose(ours.estimate, num.mean() / den.mean(), rtol=1e-12)


def test_bootstrap_is_reproducible_and_rejects_bad_input():
    values = np.arange(10.0)
    assert bootstrap_interval(values, random_state=3) == bootstrap_interval(values, random_state=3)
    with pytest.raises(ValueError, match="'confidence_level' parameter of bootstrap_interval"):
        bootstrap_interval(values, confidence_level=1.0)
    with pytest.raises(ValueError, match="values must be finite"):
        bootstrap_interval(np.array([1.0, np.nan]))
    with pytest.raises(ValueError, match="values and denominators must have the same shape"):
        bootstrap_interval(values, denominators=np.ones(3))


# ---------------------------------------------------------------- paired comparison
def test_paired_comparison_matches_scipy_wilcoxon_and_rank_biserial_by_hand():
    # Differences [1, 2, -3, 4, 0]: the zero is dropped; |d| ranks 1, 2, 3, 4;
    # R+ = 1 + 2 + 4 = 7, R- = 3; rank-biserial (R+ - R-)/(R+ + R-) = 4/10 = 0.4 (Kerby 2014).
    model = np.array([1.0, 2.0, 0.0, 4.0, 0.5])
    baseline = np.array([0.0, 0.0, 3.0, 0.0, 0.5])
    result = paired_comparison(model, baseline, random_state=0)
    ref = scipy.stats.wilcoxon(model, baseline)  # reference library (zero_method="wilcox")
    assert_allclose([result.wilcoxon_statistic, result.p_value], [ref.statistic, ref.pvalue], rtol=1e-12)
    assert_allclose(result.effect_size, 0.4, rtol=1e-12)
    assert_allclose(result.mean_difference, 0.8, rtol=1e-12)
    assert (result.n_pairs, result.n_nonzero) == (5, 4)


def test_paired_comparison_on_larger_sample_with_ties():
    rng = np.random.default_rng(4)
    baseline = rng.integers(0, 5, size=300) / 4
    model = np.clip(baseline + rng.integers(-1, 3, size=300) / 4, 0, 1)
    result = paired_comparison(model, baseline, n_resamples=500, random_state=9)
    ref = scipy.stats.wilcoxon(model, baseline)  # reference library, normal approximation with ties
    assert_allclose([result.wilcoxon_statistic, result.p_value], [ref.statistic, ref.pvalue], rtol=1e-10)
    d = (model - baseline)[model != baseline]
    ranks = scipy.stats.rankdata(np.abs(d))
    slow_r = (ranks[d > 0].sum() - ranks[d < 0].sum()) / ranks.sum()
    assert_allclose(result.effect_size, slow_r, rtol=1e-12)
    same = bootstrap_interval(model - baseline, n_resamples=500, random_state=9)
    assert result.interval == same  # the paired bootstrap resamples users' differences


def test_paired_comparison_of_identical_models():
    values = np.linspace(0, 1, 20)
    result = paired_comparison(values, values)
    assert (result.p_value, result.effect_size, result.n_nonzero) == (1.0, 0.0, 0)
    assert result.interval.low == result.interval.high == 0.0
    with pytest.raises(ValueError, match="model and baseline must have the same shape"):
        paired_comparison(values, values[:5])


def test_paired_comparison_treats_float_noise_as_ties():
    """Per-user means summed in another order differ by ~1e-17; the rank test must see them as ties (common
    practice: metric differences below 1e-12 are rounding noise for values in [0, 1])."""
    base = np.array([0.1, 0.2, 0.3, 0.7, 0.9])
    noisy = base + np.array([1e-17, -2e-17, 0.0, 5e-17, 0.0])
    exact = paired_comparison(base + np.array([0.05, 0.0, 0.0, -0.02, 0.0]), base, random_state=0)
    jittered = paired_comparison(noisy + np.array([0.05, 0.0, 0.0, -0.02, 0.0]), base, random_state=0)
    assert jittered.n_nonzero == exact.n_nonzero == 2
    np.testing.assert_allclose(jittered.p_value, exact.p_value, rtol=1e-12)
