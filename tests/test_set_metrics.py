"""Set-level list measures: expected clicks (position-based model) and α-NDCG (threefold.evaluation.set_metrics)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from sklearn.metrics import ndcg_score

from threefold.evaluation.set_metrics import alpha_ndcg, expected_clicks


def test_expected_clicks_is_the_sum_of_examination_times_click_probability():
    # Definition of the position-based model (Craswell et al., WSDM 2008), computed by hand:
    # θ = (1, 0.5, 0.25), p of the listed items (0.2, 0.4, 0.1): 0.2 + 0.2 + 0.025 = 0.425; an empty slot adds 0.
    p = np.array([[0.2, 0.4, 0.1, 0.9], [0.2, 0.4, 0.1, 0.9]])
    ranked = np.array([[0, 1, 2], [3, -1, -1]])
    assert_allclose(expected_clicks(ranked, p, [1.0, 0.5, 0.25]), [0.425, 0.9], rtol=1e-12)


def test_alpha_zero_is_ndcg_as_scikit_learn_computes_it():
    # Reference library: sklearn.metrics.ndcg_score (linear gains, log2 discount); y_score gives the listed
    # items descending scores and every other item a lower one, so its top-k is our list.
    rng = np.random.default_rng(3)
    q, n, k = 6, 12, 5
    relevance = rng.integers(0, 3, (q, n)).astype(float)
    relevance[0] = 0.0
    relevance[0, 7] = 2.0
    ranked = np.stack([rng.permutation(n)[:k] for _ in range(q)])
    aspect = rng.integers(0, 3, n)
    ours = alpha_ndcg(ranked, relevance, aspect, k=k, alpha=0.0)
    for i in range(q):
        score = np.zeros(n)
        score[ranked[i]] = np.arange(k, 0, -1)
        assert_allclose(ours[i], ndcg_score(relevance[i][None], score[None], k=k), rtol=1e-12)


def test_alpha_ndcg_worked_by_hand():
    # Worked by hand (the paper's own example is not at hand here): items 0, 1 on aspect A, item 2 on B, all
    # relevant (J = 1), α = 0.5, list (0, 1, 2): gains 1, 0.5, 1 -> DCG = 1 + 0.5/log2(3) + 1/log2(4).
    # Greedy ideal (0, 2, 1): gains 1, 1, 0.5 -> IDCG = 1 + 1/log2(3) + 0.5/log2(4).
    dcg = 1 + 0.5 / np.log2(3) + 0.5
    idcg = 1 + 1 / np.log2(3) + 0.25
    value = alpha_ndcg(np.array([[0, 1, 2]]), np.ones((1, 3)), np.array([0, 0, 1]), k=3, alpha=0.5)
    assert_allclose(value, [dcg / idcg], rtol=1e-12)
    diverse = alpha_ndcg(np.array([[0, 2, 1]]), np.ones((1, 3)), np.array([0, 0, 1]), k=3, alpha=0.5)
    assert_allclose(diverse, [1.0], rtol=1e-12)


def test_alpha_ndcg_nan_without_relevant_items_and_errors():
    assert np.isnan(alpha_ndcg(np.array([[0, 1]]), np.zeros((1, 3)), np.array([0, 1, 2]), k=2))[0]
    with pytest.raises(ValueError, match=r"aspect must have shape \(3,\)"):
        alpha_ndcg(np.array([[0, 1]]), np.ones((1, 3)), np.array([0, 1]), k=2)
    with pytest.raises(ValueError, match=r"The 'alpha' parameter of alpha_ndcg must be a float in the range \[0, 1\]"):
        alpha_ndcg(np.array([[0, 1]]), np.ones((1, 3)), np.array([0, 1, 2]), alpha=2.0)
    with pytest.raises(ValueError, match=r"examination must give θ for each of the 3 positions"):
        expected_clicks(np.array([[0, 1, 2]]), np.ones((1, 3)), [1.0])


def test_policy_effect_pairs_users_and_reports_the_mean_difference():
    # Slow reference written here: per-user means of each measure, then the mean of their differences; the
    # interval is a percentile bootstrap of that mean (common practice), so it must contain it.
    from threefold.evaluation.policy_effect import list_measures, policy_effect

    rng = np.random.default_rng(8)
    q, n, k = 40, 15, 5
    relevance = rng.random((q, n)) * (rng.random((q, n)) < 0.4)
    users = rng.choice(["u1", "u2", "u3", "u4", "u5"], q)
    a = np.stack([rng.permutation(n)[:k] for _ in range(q)])
    b = np.stack([rng.permutation(n)[:k] for _ in range(q)])
    aspect = rng.integers(0, 4, n)
    theta = [1.0, 0.7, 0.5, 0.4, 0.3]
    table = policy_effect(a, b, relevance, users, aspect=aspect, examination=theta, k=k, n_resamples=200)
    ma = list_measures(a, relevance, aspect=aspect, examination=theta, k=k)
    mb = list_measures(b, relevance, aspect=aspect, examination=theta, k=k)
    for row in table.itertuples():
        diffs = [np.nanmean(mb[row.measure][users == u]) - np.nanmean(ma[row.measure][users == u])
                 for u in sorted(set(users))]
        assert_allclose(row.difference, np.mean(diffs), rtol=1e-10, atol=1e-12)
        assert row.low <= row.difference <= row.high and row.users == 5
    same = policy_effect(a, a, relevance, users, aspect=aspect, k=k, n_resamples=50)
    assert_allclose(same["difference"], 0.0, atol=1e-15)
    assert (same["p_value"] == 1.0).all()
