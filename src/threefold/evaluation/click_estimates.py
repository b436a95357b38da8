"""Unbiased click estimates under presentation bias, bootstrap intervals, paired tests.

Inverse propensity scoring
--------------------------
A logged observation ``i`` (an item shown at some position, clicked or not)
has reward ``y_i`` (a click, or a click times a metric's gain) and weight
``w_i = 1 / θ_i``, the inverse of the probability that the user examined that
position (the position propensities of the builder's position-based model).
With ``n`` observations:

* naive  ``V = (1/n) Σ y_i``
* IPS    ``V = (1/n) Σ w_i y_i``            (Schnabel et al., ICML 2016)
* SNIPS  ``V = Σ w_i y_i / Σ w_i``          (Swaminathan & Joachims, NeurIPS 2015)

IPS is unbiased whenever ``E[w y]`` is the target value (e.g. ``w = 1/θ`` for
the rate of relevant items among those shown). SNIPS divides by ``Σ w`` instead
of ``n`` and is consistent only when the weights average to 1 under the
logging distribution, i.e. when ``w`` is a likelihood ratio (the evaluated
policy's probability of the logged action over the logging policy's); with raw
inverse examination propensities ``1/θ`` use IPS.

Clipping replaces every weight above ``max_weight`` by ``max_weight``, trading
a little bias for much lower variance when propensities are small.

Statistics over users
---------------------
:func:`bootstrap_interval` resamples users with replacement (percentile
method); :func:`paired_comparison` compares a model with a baseline on the
same users by a paired bootstrap of the mean difference and a Wilcoxon
signed-rank test, with the matched-pairs rank-biserial correlation as effect
size.

References
----------
Schnabel, T., Swaminathan, A., Singh, A., Chandak, N. & Joachims, T. (2016).
Recommendations as treatments: debiasing learning and evaluation. ICML 2016.
Swaminathan, A. & Joachims, T. (2015). The self-normalized estimator for
counterfactual learning. NeurIPS 2015.
Efron, B. & Tibshirani, R. J. (1993). An Introduction to the Bootstrap.
Chapman & Hall (percentile interval, chapter 13).
Wilcoxon, F. (1945). Individual comparisons by ranking methods. Biometrics
Bulletin 1(6), 80-83.
Kerby, D. S. (2014). The simple difference formula: an approach to teaching
nonparametric correlation. Comprehensive Psychology 3, 11.IT.3.1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.stats

from threefold.core.checks import check_int, check_number

__all__ = [
    "BootstrapInterval",
    "ClickEstimates",
    "PairedComparison",
    "bootstrap_interval",
    "click_estimates",
    "paired_comparison",
]

#: Target number of resampled values held at once by the bootstrap.
_RESAMPLE_CELLS = 1 << 22


def _finite_vector(name: str, values: np.ndarray) -> np.ndarray:
    x = np.asarray(values, dtype=np.float64)
    if x.ndim != 1 or x.size == 0:
        raise ValueError(f"{name} must be a non-empty 1-D array, got shape {x.shape}.")
    if not np.all(np.isfinite(x)):
        raise ValueError(f"{name} must be finite (drop or fill NaN first).")
    return x


def _paired_vectors(names: tuple[str, str], first: np.ndarray, second: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    x, y = _finite_vector(names[0], first), _finite_vector(names[1], second)
    if x.shape != y.shape:
        raise ValueError(f"{names[0]} and {names[1]} must have the same shape, got {x.shape} and {y.shape}.")
    return x, y


@dataclass(frozen=True)
class ClickEstimates:
    """Naive, IPS and SNIPS estimates of one click metric.

    Attributes
    ----------
    naive, ips, snips : float
    n_observations : int
    n_clipped : int
        Weights that were lowered to ``max_weight``.
    max_weight : float or None
    """

    naive: float
    ips: float
    snips: float
    n_observations: int
    n_clipped: int
    max_weight: float | None


def click_estimates(rewards: np.ndarray, weights: np.ndarray, *, max_weight: float | None = None) -> ClickEstimates:
    """Naive, inverse-propensity (IPS) and self-normalized (SNIPS) estimates.

    Parameters
    ----------
    rewards : ndarray of shape (n,), float
        Per-observation reward ``y`` (1 for a click, or a gain).
    weights : ndarray of shape (n,), float, > 0
        Importance weights of the observations: inverse propensities ``1 / θ``
        or likelihood ratios (see the module docstring for when SNIPS applies).
    max_weight : float or None, default=None
        Clip weights at this value (>= 1); ``None`` disables clipping.

    Returns
    -------
    ClickEstimates
    """
    y, w = _paired_vectors(("rewards", "weights"), rewards, weights)
    if w.min() <= 0:
        raise ValueError("weights must be positive (inverse propensities).")
    n_clipped = 0
    if max_weight is not None:
        max_weight = check_number("max_weight", max_weight, low=1.0, owner="click_estimates")
        n_clipped = int(np.count_nonzero(w > max_weight))
        w = np.minimum(w, max_weight)
    return ClickEstimates(
        naive=float(y.mean()),
        ips=float(np.dot(w, y) / y.size),
        snips=float(np.dot(w, y) / w.sum()),
        n_observations=int(y.size),
        n_clipped=n_clipped,
        max_weight=max_weight,
    )


@dataclass(frozen=True)
class BootstrapInterval:
    """Percentile bootstrap interval of a mean (or ratio of means) over users.

    Attributes
    ----------
    estimate : float
        The statistic on the full sample.
    low, high : float
        Interval bounds.
    confidence_level : float
    n_resamples : int
    standard_error : float
        Standard deviation (ddof=1) of the bootstrap distribution.
    """

    estimate: float
    low: float
    high: float
    confidence_level: float
    n_resamples: int
    standard_error: float


def bootstrap_interval(
    values: np.ndarray,
    *,
    denominators: np.ndarray | None = None,
    n_resamples: int = 1000,
    confidence_level: float = 0.95,
    random_state: int | np.random.Generator | None = 0,
    batch: int | None = None,
) -> BootstrapInterval:
    """Percentile bootstrap interval of the mean of per-user values.

    Each resample draws ``n`` users with replacement; the interval is the
    ``(1 - c) / 2`` and ``(1 + c) / 2`` quantiles (linear interpolation) of the
    resampled statistic. With ``denominators`` the statistic is the ratio of
    means ``mean(values) / mean(denominators)`` over the same resampled users,
    e.g. SNIPS with per-user sums of ``w·y`` and of ``w``.

    Parameters
    ----------
    values : ndarray of shape (n,), float
        One value per user (e.g. the user's mean NDCG@10).
    denominators : ndarray of shape (n,), float, or None
    n_resamples : int, default=1000
    confidence_level : float, default=0.95
    random_state : int, numpy Generator or None, default=0
        Seed of ``numpy.random.default_rng``.
    batch : int or None
        Resamples drawn per step (memory ``batch * n``); default keeps a step
        near 2**22 values. Results depend on it only through the random draws.

    Returns
    -------
    BootstrapInterval

    Notes
    -----
    Resample ``b`` of a step is row ``b`` of ``rng.integers(0, n, (batch, n))``,
    the same draw ``scipy.stats.bootstrap`` makes with ``batch`` resamples per
    step, so with equal seed and batch both give the same percentile interval.
    """
    x = _finite_vector("values", values)
    n_resamples = check_int("n_resamples", n_resamples, low=2, owner="bootstrap_interval")
    level = check_number("confidence_level", confidence_level, low=0.0, high=1.0, low_open=True, high_open=True,
                         owner="bootstrap_interval")
    den = None
    if denominators is not None:
        x, den = _paired_vectors(("values", "denominators"), x, denominators)
    n = x.size
    if batch is None:
        batch = max(1, _RESAMPLE_CELLS // n)
    batch = check_int("batch", batch, low=1, owner="bootstrap_interval")
    rng = np.random.default_rng(random_state)
    stats = np.empty(n_resamples)
    for start in range(0, n_resamples, batch):
        stop = min(start + batch, n_resamples)
        idx = rng.integers(0, n, (stop - start, n))
        stats[start:stop] = x[idx].mean(axis=-1)
        if den is not None:
            stats[start:stop] /= den[idx].mean(axis=-1)
    alpha = (1.0 - level) / 2.0
    low, high = np.quantile(stats, [alpha, 1.0 - alpha])
    estimate = x.mean() if den is None else x.mean() / den.mean()
    return BootstrapInterval(
        estimate=float(estimate),
        low=float(low),
        high=float(high),
        confidence_level=level,
        n_resamples=n_resamples,
        standard_error=float(stats.std(ddof=1)),
    )


@dataclass(frozen=True)
class PairedComparison:
    """A model against a baseline on the same users.

    Attributes
    ----------
    mean_difference : float
        Mean over users of (model - baseline).
    interval : BootstrapInterval
        Paired bootstrap interval of the mean difference.
    wilcoxon_statistic : float
        ``min(R+, R-)``: the two-sided statistic of ``scipy.stats.wilcoxon``.
    p_value : float
        Two-sided Wilcoxon signed-rank p-value (``scipy.stats.wilcoxon``,
        zero differences dropped; 1.0 when every difference is zero).
    effect_size : float
        Matched-pairs rank-biserial correlation ``(R+ - R-) / (R+ + R-)`` in
        [-1, 1] (Kerby 2014), positive when the model is better; 0 when every
        difference is zero.
    n_pairs : int
    n_nonzero : int
        Users whose difference is not zero (the ones the test ranks).
    """

    mean_difference: float
    interval: BootstrapInterval
    wilcoxon_statistic: float
    p_value: float
    effect_size: float
    n_pairs: int
    n_nonzero: int


def paired_comparison(
    model: np.ndarray,
    baseline: np.ndarray,
    *,
    n_resamples: int = 1000,
    confidence_level: float = 0.95,
    random_state: int | np.random.Generator | None = 0,
) -> PairedComparison:
    """Paired bootstrap and Wilcoxon signed-rank comparison of per-user metric values.

    Parameters
    ----------
    model : ndarray of shape (n_users,), float
        Per-user metric of the model (e.g. mean NDCG@10 over the user's queries).
    baseline : ndarray of shape (n_users,), float
        The same users' metric under the baseline.
    n_resamples, confidence_level, random_state
        Passed to :func:`bootstrap_interval` for the differences.

    Returns
    -------
    PairedComparison
    """
    a, b = _paired_vectors(("model", "baseline"), model, baseline)
    diff = a - b
    interval = bootstrap_interval(diff, n_resamples=n_resamples, confidence_level=confidence_level,
                                  random_state=random_state)
    # The rank test sees differences rounded to 12 decimals: per-user means summed in another order differ by
    # ~1e-17, and that noise must neither turn a tie into a signed difference nor split tied ranks.
    rounded = np.round(diff, 12)
    nonzero = rounded[rounded != 0]
    if nonzero.size == 0:
        statistic, p_value, effect = 0.0, 1.0, 0.0
    else:
        ranks = scipy.stats.rankdata(np.abs(nonzero))  # average ranks for ties
        r_plus, r_minus = ranks[nonzero > 0].sum(), ranks[nonzero < 0].sum()
        statistic = float(min(r_plus, r_minus))
        p_value = float(scipy.stats.wilcoxon(nonzero, zero_method="wilcox", alternative="two-sided").pvalue)
        effect = float((r_plus - r_minus) / (r_plus + r_minus))
    return PairedComparison(
        mean_difference=float(diff.mean()),
        interval=interval,
        wilcoxon_statistic=statistic,
        p_value=p_value,
        effect_size=effect,
        n_pairs=int(diff.size),
        n_nonzero=int(nonzero.size),
    )
