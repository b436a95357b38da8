"""Exploration: the LinUCB bonus and Thompson samples against their definitions, and the cap on explored slots.

Sources: LinUCB's upper confidence bound ``xᵀθ + α·sqrt(xᵀ A⁻¹ x)`` (Li, Chu, Langford &
Schapire, WWW 2010, eq. 4); Thompson sampling draws the parameters from their
posterior (Chapelle & Li, NeurIPS 2011, Algorithm 1). The lists are random
data (seeded).
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from threefold.ranking.explore import exploration_values, merge_explored, parse_explore


def test_the_ucb_bonus_equals_the_closed_form_on_a_2d_example_worked_by_hand():
    # q = (1, 2), Σ = [[2, 0.5], [0.5, 1]]: qᵀΣq = 2·1 + 2·0.5·1·2 + 1·4 = 8 (by hand);
    # x = (0.3, -0.1): qᵀx = 0.1; with BETA = 0.5 the value is 0.1 + 0.5·√8 = 1.5142135...
    q = np.array([[1.0, 2.0]])
    sigma = np.array([[2.0, 0.5], [0.5, 1.0]])
    chol = np.linalg.cholesky(sigma)[None]
    value = exploration_values(q, np.array([[0.3, -0.1]]), None, chol, np.array([0, 1]), 0.5)
    assert_allclose(value, [[0.1 + 0.5 * np.sqrt(8.0)]], rtol=1e-12)
    assert_allclose(value, [[1.5142135623730951]], rtol=1e-12)


def test_the_bonus_spans_only_the_covariance_columns_and_adds_the_bias():
    q = np.array([[1.0, 2.0, 5.0]])
    chol = np.linalg.cholesky(np.array([[2.0, 0.5], [0.5, 1.0]]))[None]
    value = exploration_values(q, np.array([[0.3, -0.1, 1.0]]), np.array([0.25]), chol, np.array([0, 1]), 1.0)
    assert_allclose(value, [[0.1 + 5.0 + 0.25 + np.sqrt(8.0)]], rtol=1e-12)


def test_thompson_values_have_the_posterior_mean_and_variance():
    # qᵀx̃ with x̃ ~ N(x, Σ) is normal with mean qᵀx and variance qᵀΣq (= 8 here).
    q = np.tile([[1.0, 2.0]], (20_000, 1))
    chol = np.linalg.cholesky(np.array([[2.0, 0.5], [0.5, 1.0]]))[None]
    values = exploration_values(q, np.array([[0.3, -0.1]]), None, chol, np.array([0, 1]), "thompson",
                                rng=np.random.default_rng(0))[:, 0]
    assert abs(values.mean() - 0.1) < 4 * np.sqrt(8.0 / values.size)
    assert abs(values.var() / 8.0 - 1.0) < 0.05
    again = exploration_values(q[:5], np.array([[0.3, -0.1]]), None, chol, np.array([0, 1]), "thompson",
                               rng=np.random.default_rng(0))[:, 0]
    assert_array_equal(again, values[:5])  # seeded: the same lists on a rerun


def test_parse_explore_names_what_it_takes():
    assert parse_explore(None) is None and parse_explore("off") is None and parse_explore("thompson") == "thompson"
    assert parse_explore("0.5") == 0.5
    with pytest.raises(ValueError, match="explore must be 'off', 'thompson' or a non-negative number BETA"):
        parse_explore("-1")
    with pytest.raises(ValueError, match="explore must be 'off', 'thompson' or a non-negative number BETA"):
        parse_explore("lots")


def test_a_worked_merge_keeps_the_plain_order_and_caps_the_explored_slots():
    # Plain list of request 0: items 10, 11, 12 (scores 3, 2, 1). Explorable: 20 (value 2.5), 21 (value 5),
    # 11 (an explorable item already listed, value 0.5). One slot: 21 enters first, 20 stays out,
    # 11 drops to its exploring value 0.5, behind 12: the list is 21, 10, 12 (worked by hand).
    plain_items = np.array([[10, 11, 12]])
    plain_scores = np.array([[3.0, 2.0, 1.0]])
    codes = np.array([20, 21, 11])
    values = np.array([[2.5, 5.0, 0.5]])
    entry, explored = merge_explored(plain_items, plain_scores, codes, values, np.ones((1, 3), bool),
                                     np.array([3]), slots=1)
    assert_array_equal(explored, [[21, -1, -1]])
    assert_array_equal(entry, [[-1, 0, 2]])
    entry, explored = merge_explored(plain_items, plain_scores, codes, values, np.ones((1, 3), bool),
                                     np.array([3]), slots=0)
    assert_array_equal(entry, [[0, 2, 1]])
    assert_array_equal(explored, [[-1, -1, -1]])


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 10_000), slots=st.integers(0, 4), k=st.integers(1, 6))
def test_merges_never_exceed_the_cap_never_show_a_disallowed_item_and_keep_the_plain_order(seed, slots, k):
    rng = np.random.default_rng(seed)
    n, m = 7, 5
    plain_items = np.stack([rng.permutation(30)[:k] for _ in range(n)])  # codes 0..29; explorable 40..44
    plain_scores = -np.sort(-rng.random((n, k)), axis=1)
    codes = np.arange(40, 40 + m)
    values = rng.normal(size=(n, m))
    allowed = rng.random((n, m)) < 0.5
    lengths = rng.integers(1, k + 1, n)
    entry, explored = merge_explored(plain_items, plain_scores, codes, values, allowed, lengths, slots)
    for r in range(n):
        shown = explored[r][explored[r] >= 0]
        assert shown.size <= slots
        assert all(allowed[r, c - 40] for c in shown)
        kept = entry[r][entry[r] >= 0]
        assert list(kept) == sorted(kept)  # plain items keep their order
        assert ((entry[r] >= 0) | (explored[r] >= 0)).sum() == lengths[r]  # the list keeps its length
