"""Specifications of the per-query accuracy metrics (top-k itself: tests/test_topk.py)."""

import numpy as np
import pytest
import scipy.sparse as sp
from numpy.testing import assert_allclose
from sklearn.metrics import ndcg_score

from threefold.evaluation.metrics import graded_ndcg, ranked_gains, ranking_metrics
from threefold.ranking.topk import top_k


def slow_metrics(ranked, relevance, k):
    """Reference: the textbook definitions, one query at a time, binary relevance."""
    out = {name: [] for name in ("recall", "precision", "ndcg", "ap", "rr", "hit")}
    for row, rel in zip(ranked, relevance):
        relevant = {j for j in range(rel.size) if rel[j] > 0}
        hits = [1.0 if (j >= 0 and j in relevant) else 0.0 for j in row[:k]]
        n_rel = len(relevant)
        out["precision"].append(sum(hits) / k)
        out["hit"].append(float(sum(hits) > 0))
        first = next((i + 1 for i, h in enumerate(hits) if h), None)
        out["rr"].append(1.0 / first if first else 0.0)
        if n_rel == 0:
            for name in ("recall", "ndcg", "ap"):
                out[name].append(np.nan)
            continue
        out["recall"].append(sum(hits) / n_rel)
        dcg = sum(h / np.log2(i + 2) for i, h in enumerate(hits))
        idcg = sum(1 / np.log2(i + 2) for i in range(min(k, n_rel)))
        out["ndcg"].append(dcg / idcg)
        ap = sum(sum(hits[: i + 1]) / (i + 1) * hits[i] for i in range(k))
        out["ap"].append(ap / min(k, n_rel))
    return {name: np.array(v) for name, v in out.items()}


# ---------------------------------------------------------------- NDCG
def test_ndcg_equals_sklearn_ndcg_score_on_tie_free_data():
    # Reference library: sklearn.metrics.ndcg_score (linear gains, ideal order over all items).
    rng = np.random.default_rng(2)
    relevance = rng.random((40, 30))
    scores = rng.random((40, 30))
    binary = (relevance > 0.8).astype(float)
    binary[binary.sum(axis=1) == 0, 0] = 1.0
    for k in (1, 3, 5, 10, 30):
        ranked = top_k(scores, k)
        assert_allclose(graded_ndcg(ranked, relevance, k).mean(), ndcg_score(relevance, scores, k=k), rtol=1e-12)
        assert_allclose(
            ranking_metrics(ranked, binary, k).ndcg.mean(), ndcg_score(binary, scores, k=k), rtol=1e-12
        )
        assert_allclose(graded_ndcg(ranked, sp.csr_array(relevance), k).mean(), ndcg_score(relevance, scores, k=k),
                        rtol=1e-12)


def test_dcg_and_ndcg_of_the_worked_list():
    # Järvelin & Kekäläinen, ACM TOIS 2002, common form DCG = sum rel_i / log2(i + 1);
    # values from methods.md section 7:
    # DCG  = 3/1 + 2/log2(3) + 3/2 + 0/log2(5) + 1/log2(6) + 2/log2(7)
    #      = 3 + 1.26186 + 1.5 + 0 + 0.38685 + 0.71241 = 6.861
    # IDCG (order 3,3,2,2,1,0) = 3 + 1.89279 + 1 + 0.86135 + 0.38685 + 0 = 7.141
    # NDCG = 6.861 / 7.141 = 0.961
    relevance = np.array([[3.0, 2, 3, 0, 1, 2]])
    ranked = np.arange(6)[None, :]
    dcg = (ranked_gains(ranked, relevance) / np.log2(np.arange(2, 8))).sum()
    assert_allclose(dcg, 6.861, atol=5e-4)
    assert_allclose(graded_ndcg(ranked, relevance, 6), [[0.961]], atol=5e-4)


# ---------------------------------------------------------------- the methods.md section 7 example
def test_average_precision_recall_and_mrr_of_the_worked_ranking():
    # methods.md section 7: ranking [d1, d4, d2, d9, d8], relevant {d2, d8, d10}; d_j -> index j - 1.
    # Hits at ranks 3 and 5: P@3 = 1/3, P@5 = 2/5.
    # AP@5 = (1/min(5, 3)) * (1/3 + 2/5) = 0.7333 / 3 = 0.2444;  Recall@5 = 2/3 = 0.667;
    # Precision@5 = 2/5; reciprocal rank = 1/3 (first hit at rank 3);
    # NDCG@5 = (1/log2(4) + 1/log2(6)) / (1 + 1/log2(3) + 1/log2(4)) = 0.88685 / 2.13093 = 0.41618.
    relevance = np.zeros((1, 10))
    relevance[0, [1, 7, 9]] = 1.0
    ranked = np.array([[0, 3, 1, 8, 7]])
    for rel in (relevance, sp.csr_array(relevance)):
        m = ranking_metrics(ranked, rel, 5)
        assert_allclose(m.average_precision, [[0.2444]], atol=5e-5)
        assert_allclose(m.recall, [[0.667]], atol=5e-4)
        assert_allclose(m.precision, [[0.4]], rtol=1e-12)
        assert_allclose(m.reciprocal_rank, [[1 / 3]], rtol=1e-12)
        assert_allclose(m.ndcg, [[0.41618]], atol=5e-6)
        assert_allclose(m.hit_rate, [[1.0]])


def test_mrr_averages_reciprocal_ranks_and_counts_misses_as_zero():
    # MRR = mean of 1/rank of the first hit (methods.md section 7): queries with first hit at
    # rank 3, rank 1 and none within K = 3 give (1/3 + 1 + 0) / 3 = 0.4444.
    relevance = np.array([[0, 0, 1, 0], [1, 1, 0, 0], [0, 0, 0, 1]], dtype=float)
    ranked = np.array([[0, 1, 2], [0, 1, 2], [0, 1, 2]])
    summary = ranking_metrics(ranked, relevance, 3).summary()
    assert_allclose(summary["reciprocal_rank@3"], (1 / 3 + 1 + 0) / 3, rtol=1e-12)
    assert_allclose(summary["hit_rate@3"], 2 / 3, rtol=1e-12)


def test_all_metrics_match_slow_reference_dense_and_sparse():
    rng = np.random.default_rng(3)
    scores = rng.random((50, 25))
    relevance = (rng.random((50, 25)) < 0.15) * rng.integers(1, 4, size=(50, 25)).astype(float)
    mask = rng.random((50, 25)) < 0.6  # some lists shorter than K
    ranked = top_k(scores, 10, candidate_mask=mask)
    ks = (3, 5, 10)
    dense = ranking_metrics(ranked, relevance, ks)
    sparse = ranking_metrics(ranked, sp.csr_matrix(relevance), ks)
    for j, k in enumerate(ks):
        ref = slow_metrics(ranked, relevance, k)
        for ours, name in ((dense, "dense"), (sparse, "sparse")):
            assert_allclose(ours.recall[:, j], ref["recall"], rtol=1e-12, err_msg=name)
            assert_allclose(ours.precision[:, j], ref["precision"], rtol=1e-12, err_msg=name)
            assert_allclose(ours.ndcg[:, j], ref["ndcg"], rtol=1e-12, err_msg=name)
            assert_allclose(ours.average_precision[:, j], ref["ap"], rtol=1e-12, err_msg=name)
            assert_allclose(ours.reciprocal_rank[:, j], ref["rr"], rtol=1e-12, err_msg=name)
            assert_allclose(ours.hit_rate[:, j], ref["hit"], rtol=1e-12, err_msg=name)


def test_graded_ndcg_sparse_matches_dense_and_slow_reference():
    rng = np.random.default_rng(4)
    relevance = np.where(rng.random((30, 20)) < 0.3, rng.random((30, 20)), 0.0)
    ranked = top_k(rng.random((30, 20)), 5)
    expected = []
    for row, rel in zip(ranked, relevance):
        dcg = sum(rel[j] / np.log2(i + 2) for i, j in enumerate(row))
        ideal = sorted(rel, reverse=True)[:5]
        idcg = sum(g / np.log2(i + 2) for i, g in enumerate(ideal))
        expected.append(dcg / idcg if idcg > 0 else np.nan)
    assert_allclose(graded_ndcg(ranked, relevance, 5)[:, 0], expected, rtol=1e-12)
    assert_allclose(graded_ndcg(ranked, sp.csr_array(relevance), 5)[:, 0], expected, rtol=1e-12)


def test_queries_without_relevant_items_are_nan_and_left_out_of_the_summary():
    relevance = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 0.0]])
    m = ranking_metrics(np.array([[1, 0], [0, 1]]), relevance, 2)
    assert np.isnan(m.recall[1, 0]) and np.isnan(m.ndcg[1, 0]) and np.isnan(m.average_precision[1, 0])
    assert m.summary()["recall@2"] == 1.0


def test_ranking_metrics_reject_bad_input():
    relevance = np.zeros((2, 3))
    with pytest.raises(ValueError, match="'k' parameter of ranking_metrics must be an int in the range \\[1, 2\\]"):
        ranking_metrics(np.zeros((2, 2), dtype=int), relevance, 3)
    with pytest.raises(IndexError, match="ranked indices must lie in"):
        ranking_metrics(np.array([[0, 3], [0, 1]]), relevance, 2)
    with pytest.raises(ValueError, match="relevance must have shape"):
        ranking_metrics(np.zeros((3, 2), dtype=int), relevance, 2)
    with pytest.raises(ValueError, match="2-D int array"):
        ranking_metrics(np.zeros((2, 2)), relevance, 2)
