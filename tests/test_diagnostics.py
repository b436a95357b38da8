"""Model diagnostics (threefold.explain.diagnostics) against their papers and tensorly."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import tensorly as tl
from numpy.testing import assert_allclose
from tensorly.decomposition import parafac
from tensorly.metrics import congruence_coefficient

from threefold.core.tensor import SparseTensor
from threefold.explain.diagnostics import congruence, core_consistency, factor_match_score, level_similarity


def _trilinear(shape=(9, 8, 7), rank=3, seed=0):
    rng = np.random.default_rng(seed)
    factors = [rng.standard_normal((size, rank)) for size in shape]
    return factors, tl.cp_to_tensor((np.ones(rank), factors))


def test_corcondia_is_100_at_the_true_rank_and_falls_at_rank_plus_one():
    """Bro & Kiers (J. Chemometrics 2003): a noiseless trilinear tensor has core consistency
    100 at its rank and clearly less above it. The CP fits are tensorly's ``parafac``."""
    _, data = _trilinear()
    exact = parafac(tl.tensor(data), rank=3, init="svd", n_iter_max=2000, tol=1e-12)
    over = parafac(tl.tensor(data), rank=4, init="random", random_state=0, n_iter_max=2000, tol=1e-12)
    at_rank = core_consistency(data, exact.factors, exact.weights)
    above = core_consistency(data, over.factors, over.weights)
    assert abs(at_rank - 100.0) <= 1.0, at_rank
    assert above < 90.0, above


def test_corcondia_of_the_planted_factors_is_exactly_100():
    """The definition (Bro & Kiers 2003): the least-squares core of the generating factors is the superdiagonal."""
    factors, data = _trilinear(seed=3)
    assert_allclose(core_consistency(data, factors), 100.0, atol=1e-8)


def test_corcondia_matches_a_slow_reference_and_the_sparse_path():
    """Slow reference: the core from the Kronecker form vec(G) = (A_3⁺ ⊗ A_2⁺ ⊗ A_1⁺) vec(X) (Kolda & Bader 2009,
    section 4), in the test; the sparse path contracts the largest mode first and must agree."""
    rng = np.random.default_rng(1)
    data = rng.random((6, 5, 4)) * (rng.random((6, 5, 4)) < 0.4)
    factors = [rng.standard_normal((s, 2)) for s in data.shape]
    inverses = [np.linalg.pinv(f) for f in factors]
    kron = np.kron(np.kron(inverses[2], inverses[1]), inverses[0])
    core = (kron @ data.reshape(-1, order="F")).reshape((2, 2, 2), order="F")
    target = np.zeros((2, 2, 2))
    target[[0, 1], [0, 1], [0, 1]] = 1.0
    expected = 100.0 * (1.0 - np.sum((core - target) ** 2) / 2)
    assert_allclose(core_consistency(data, factors), expected, rtol=1e-10)
    sparse = SparseTensor.from_dense(data)
    assert_allclose(core_consistency(sparse, factors), expected, rtol=1e-6)


def test_corcondia_refuses_mismatched_shapes():
    factors, data = _trilinear()
    with pytest.raises(ValueError, match=r"the data's shape \(9, 8, 7\) differs from the factors' \(9, 8, 6\)"):
        core_consistency(data, [factors[0], factors[1], factors[2][:6]])


def test_factor_match_score_is_one_for_a_permuted_flipped_rescaled_copy():
    """Definition of the factor match score (Tomasi & Bro 2006): order, sign and scale do not count."""
    factors, _ = _trilinear(rank=4, seed=2)
    order = np.array([2, 0, 3, 1])
    signs = np.array([-1.0, 1.0, -1.0, 1.0])
    copy = [factors[0][:, order] * signs * 3.0, factors[1][:, order] * signs / 3.0, factors[2][:, order] * 0.5]
    score, pairing = factor_match_score(factors, copy)
    assert_allclose(score, 1.0, atol=1e-12)
    assert_allclose(order[pairing], np.arange(4))


def test_factor_match_score_equals_the_best_permutation_by_brute_force():
    """Slow reference in the test: every permutation of 4 components tried."""
    rng = np.random.default_rng(5)
    a = [rng.standard_normal((s, 4)) for s in (6, 5, 3)]
    b = [rng.standard_normal((s, 4)) for s in (6, 5, 3)]

    def cos(x, y):
        return abs(x @ y) / (np.linalg.norm(x) * np.linalg.norm(y))

    best = max(np.mean([np.prod([cos(a[n][:, r], b[n][:, p[r]]) for n in range(3)]) for r in range(4)])
               for p in itertools.permutations(range(4)))
    assert_allclose(factor_match_score(a, b)[0], best, rtol=1e-12)


def test_congruence_matches_tensorly_for_one_mode():
    """tensorly.metrics.congruence_coefficient (reference library): mean matched absolute cosine of one factor."""
    rng = np.random.default_rng(7)
    a, b = rng.standard_normal((10, 3)), rng.standard_normal((10, 3))
    expected, _ = congruence_coefficient(a, b, absolute_value=True)
    assert_allclose(factor_match_score([a], [b])[0], expected, rtol=1e-10)
    assert_allclose(congruence(a, a).diagonal(), 1.0, rtol=1e-12)


def test_level_similarity_groups_levels_that_behave_alike():
    """Cosine between level rows (its definition) and scipy's average linkage: the two alike levels merge first."""
    factor = np.array([[1.0, 0.0], [0.9, 0.1], [0.0, 1.0], [0.0, 0.0]])
    cosine, tree = level_similarity(factor)
    assert_allclose(cosine[0, 1], 0.9 / np.hypot(0.9, 0.1), rtol=1e-12)
    assert_allclose(cosine[3], [0.0, 0.0, 0.0, 1.0])
    assert sorted(tree[0, :2].astype(int)) == [0, 1]
    assert level_similarity(np.ones((1, 2)))[1] is None
