"""Context comparison (threefold.explain.compare): list changes and their split into factor-column terms."""

from __future__ import annotations

import numpy as np
import pytest
import tensorly as tl
from numpy.testing import assert_allclose
from scipy.stats import kendalltau

from threefold.explain.compare import compare_contexts, difference_terms
from threefold.models.tucker.hooi import fit_hooi

from _tracking import tiny_cp


def _dense(result):
    return tl.cp_to_tensor((result.weights.astype(np.float64), [f.astype(np.float64) for f in result.factors]))


@pytest.mark.parametrize("structure", ["user*item*daypart*device:3", "user*item:2 + item*device:1 + user*item*daypart:2"])
def test_column_terms_sum_to_the_score_difference(structure):
    """The issue's check: per-column terms sum to s(B) - s(A) within 1e-6; s from tensorly's reconstruction
    (reference library)."""
    result, _ = tiny_cp(seed=4, structure=structure)
    dense = _dense(result)
    users, items = np.arange(result.shape[0]), np.arange(result.shape[1])
    a, b = np.array([0, 1]), np.array([2, 0])
    terms = difference_terms(result, users, a, b, items)
    expected = dense[:, :, b[0], b[1]] - dense[:, :, a[0], a[1]]
    assert_allclose(terms.sum(axis=2), expected, atol=1e-6)


def test_tucker_terms_sum_to_the_score_difference():
    """Same check for HOOI (Tucker columns of the item factor); reference tensorly.tucker_to_tensor."""
    rng = np.random.default_rng(2)
    from threefold.core.tensor import SparseTensor

    data = rng.random((8, 7, 3, 2)) * (rng.random((8, 7, 3, 2)) < 0.5)
    result = fit_hooi(SparseTensor.from_dense(data), rank=(3, 3, 2, 2), random_state=0)
    dense = tl.tucker_to_tensor((result.core.astype(np.float64), [f.astype(np.float64) for f in result.factors]))
    terms = difference_terms(result, np.arange(8), np.array([0, 1]), np.array([2, 0]), np.arange(7))
    assert_allclose(terms.sum(axis=2), dense[:, :, 2, 0] - dense[:, :, 0, 1], atol=1e-6)


def test_overlap_and_rank_agreement_per_user():
    """Jaccard by its definition (slow reference in the test); Kendall tau-b from scipy (reference library)."""
    result, _ = tiny_cp(seed=5, structure="user*item:2 + user*item*device:2")
    dense = _dense(result)
    users = np.arange(result.shape[0])
    out = compare_contexts(result, users, [0, 0], [0, 1], k=3)
    for row in out.per_user.itertuples():
        sa, sb = dense[row.user, :, 0, 0], dense[row.user, :, 0, 1]
        top_a, top_b = set(np.argsort(-sa, kind="stable")[:3]), set(np.argsort(-sb, kind="stable")[:3])
        assert_allclose(row.jaccard, len(top_a & top_b) / len(top_a | top_b))
        assert_allclose(row.kendall_tau, kendalltau(sa, sb).statistic, rtol=1e-9)
    same = compare_contexts(result, users, [0, 1], [0, 1], k=3)
    assert_allclose(same.per_user["jaccard"], 1.0)
    assert_allclose(same.drivers["share"], 0.0)


def test_movers_and_drivers_are_consistent():
    """Rank change = mean rank under B - under A; driver shares sum to 1 (definitions)."""
    result, _ = tiny_cp(seed=5, structure="user*item:2 + item*device:2")
    out = compare_contexts(result, np.arange(result.shape[0]), [0, 0], [0, 1], k=3, n_movers=2,
                           label_a="device=a", label_b="device=b")
    assert_allclose(out.movers["rank_change"], out.movers["mean_rank_b"] - out.movers["mean_rank_a"])
    assert_allclose(out.drivers["share"].sum(), 1.0)
    # with a user*item term and an item*device term, only item*device columns can change with the device
    assert_allclose(out.drivers["share"].to_numpy()[:2], 0.0, atol=1e-12)
    assert "device=a  vs  device=b" in out.to_text()


def test_no_users_is_refused():
    result, _ = tiny_cp(seed=5)
    with pytest.raises(ValueError, match="compare_contexts: no users to compare"):
        compare_contexts(result, np.array([], dtype=int), [0, 0], [0, 1])
