"""Per-query accuracy metrics of ranked lists, vectorized over blocks of queries.

Ranked lists come from :mod:`threefold.ranking.topk` (the one top-k of the tool).

Metrics
-------
Every metric is computed from the ranked lists and a relevance matrix, given
either dense, ``(q, n_candidates)``, or sparse (any scipy sparse matrix of the
same shape, e.g. CSR of the clicked items per query). Binary metrics count an
item as relevant when its relevance is > 0. With ``r_i = 1`` if the item at
rank ``i`` is relevant, ``R`` the number of relevant items of the query:

* Precision@K = Σ_{i≤K} r_i / K (the denominator is K even when fewer than K
  candidates were ranked; common practice)
* Recall@K = Σ_{i≤K} r_i / R
* hit rate@K = 1 if Σ_{i≤K} r_i > 0 else 0
* MRR@K: mean of 1 / (rank of the first relevant item), 0 when none is in the top K
* AP@K = (1 / min(K, R)) Σ_{i≤K} P@i · r_i (normalizer min(K, R))
* NDCG@K = DCG@K / IDCG@K with DCG = Σ_{i≤K} g_i / log2(i + 1) (Järvelin &
  Kekäläinen 2002, common form with linear gains); binary gains ``g = r``, or
  graded gains (:func:`graded_ndcg`) = the relevance value itself, with the
  ideal list made of the K largest relevance values of the query.

A query with no relevant item gets NaN for Recall, AP and NDCG;
:meth:`RankingMetrics.summary` averages over the other queries.

References
----------
Järvelin, K. & Kekäläinen, J. (2002). Cumulated gain-based evaluation of IR
techniques. ACM TOIS 20(4), 422-446.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import scipy.sparse as sp

from threefold.core.checks import check_int

__all__ = ["RankingMetrics", "ranking_metrics", "graded_ndcg", "ranked_gains"]

def _check_ranked(
    ranked: np.ndarray, relevance, ks: Sequence[int] | int | None
) -> tuple[np.ndarray, tuple[int, ...]]:
    """Validate ranked lists against relevance; return them with the list lengths ``ks``."""
    ranked = np.asarray(ranked)
    if ranked.ndim != 2 or not np.issubdtype(ranked.dtype, np.integer):
        raise ValueError(f"ranked must be a 2-D int array of shape (q, K), got {ranked.dtype} {ranked.shape}.")
    if ks is not None:
        ks = (ks,) if np.isscalar(ks) else tuple(ks)
        if not ks:
            raise ValueError("ks must hold at least one list length.")
        ks = tuple(check_int("k", k, low=1, high=ranked.shape[1], owner="ranking_metrics") for k in ks)
    if relevance.ndim != 2 or relevance.shape[0] != ranked.shape[0]:
        raise ValueError(f"relevance must have shape ({ranked.shape[0]}, n_candidates), got {relevance.shape}.")
    if ranked.size and (ranked.max() >= relevance.shape[1] or ranked.min() < -1):
        raise IndexError(
            f"ranked indices must lie in [0, {relevance.shape[1]}) or be -1 (empty slot), "
            f"got [{ranked.min()}, {ranked.max()}]."
        )
    return ranked, ks


def _as_relevance(relevance):
    """Dense float64 array or canonical CSR array (summed duplicates, sorted indices)."""
    if sp.issparse(relevance):
        csr = sp.csr_array(relevance, dtype=np.float64, copy=True)
        csr.sum_duplicates()
        csr.sort_indices()
        return csr
    return np.asarray(relevance, dtype=np.float64)


def ranked_gains(ranked: np.ndarray, relevance) -> np.ndarray:
    """Relevance of the item at each rank.

    Parameters
    ----------
    ranked : ndarray of shape (q, K), int; ``-1`` marks an empty slot
    relevance : ndarray of shape (q, n_candidates) or scipy sparse of that shape

    Returns
    -------
    ndarray of shape (q, K), float64
        ``relevance[i, ranked[i, j]]``, 0 for empty slots.
    """
    relevance = _as_relevance(relevance)
    ranked, _ = _check_ranked(ranked, relevance, None)
    return _gather(ranked, relevance)


def _gather(ranked: np.ndarray, relevance) -> np.ndarray:
    valid = ranked >= 0
    cols = np.where(valid, ranked, 0)
    if not sp.issparse(relevance):
        return np.where(valid, np.take_along_axis(relevance, cols, axis=1), 0.0)
    if relevance.nnz == 0:
        return np.zeros(ranked.shape)
    n_cols = relevance.shape[1]
    entry_rows = np.repeat(np.arange(relevance.shape[0], dtype=np.int64), np.diff(relevance.indptr))
    keys = entry_rows * n_cols + relevance.indices  # ascending: CSR with sorted indices
    wanted = np.arange(ranked.shape[0], dtype=np.int64)[:, None] * n_cols + cols
    pos = np.minimum(np.searchsorted(keys, wanted), keys.size - 1)
    found = valid & (keys[pos] == wanted)
    return np.where(found, relevance.data[pos], 0.0)


def _n_relevant(relevance) -> np.ndarray:
    if sp.issparse(relevance):
        rows = np.repeat(np.arange(relevance.shape[0]), np.diff(relevance.indptr))
        return np.bincount(rows, weights=relevance.data > 0, minlength=relevance.shape[0])
    return (relevance > 0).sum(axis=1).astype(np.float64)


def _ideal_gains(relevance, k: int) -> np.ndarray:
    """The k largest relevance values of every row, descending, zero-padded."""
    q, n = relevance.shape
    if not sp.issparse(relevance):
        kk = min(k, n)
        part = np.partition(relevance, n - kk, axis=1)[:, n - kk:] if kk < n else relevance
        out = np.zeros((q, k))
        out[:, :kk] = -np.sort(-part, axis=1)
        return np.maximum(out, 0.0)
    rows = np.repeat(np.arange(q), np.diff(relevance.indptr))
    order = np.lexsort((-relevance.data, rows))
    slot = np.arange(order.size) - relevance.indptr[rows[order]]
    keep = slot < k
    out = np.zeros((q, k))
    out[rows[order][keep], slot[keep]] = relevance.data[order][keep]
    return np.maximum(out, 0.0)


def _discount(k: int) -> np.ndarray:
    return 1.0 / np.log2(np.arange(2, k + 2))


@dataclass(frozen=True)
class RankingMetrics:
    """Per-query accuracy metrics at several list lengths.

    Attributes
    ----------
    ks : tuple of int
        List lengths, one column each in every array below.
    recall, precision, ndcg, average_precision, reciprocal_rank, hit_rate : ndarray of shape (q, len(ks)), float64
        Binary-relevance metrics (definitions in the module docstring); NaN for
        recall, ndcg and average_precision when the query has no relevant item.
    """

    ks: tuple[int, ...]
    recall: np.ndarray
    precision: np.ndarray
    ndcg: np.ndarray
    average_precision: np.ndarray
    reciprocal_rank: np.ndarray
    hit_rate: np.ndarray

    _NAMES = ("recall", "precision", "ndcg", "average_precision", "reciprocal_rank", "hit_rate")

    def summary(self) -> dict[str, float]:
        """Means over the queries with at least one relevant item, keyed like ``"ndcg@10"``.

        ``"reciprocal_rank@K"`` averaged over queries is MRR@K.
        """
        has_relevant = ~np.isnan(self.recall[:, 0])
        out = {}
        for name in self._NAMES:
            values = getattr(self, name)[has_relevant]
            for j, k in enumerate(self.ks):
                out[f"{name}@{k}"] = float(values[:, j].mean()) if values.shape[0] else float("nan")
        return out


def ranking_metrics(ranked: np.ndarray, relevance, ks: Sequence[int] | int = (3, 5, 10)) -> RankingMetrics:
    """Recall, Precision, NDCG, AP, reciprocal rank and hit rate at each K in ``ks``.

    Parameters
    ----------
    ranked : ndarray of shape (q, K_max), int
        Ranked candidate indices, best first, ``-1`` for empty slots (as from :func:`top_k`).
    relevance : ndarray of shape (q, n_candidates), or scipy sparse matrix of that shape
        An item is relevant when its value is > 0 (e.g. CSR of clicks per query).
    ks : int or sequence of int, default=(3, 5, 10)
        List lengths, each in [1, K_max].

    Returns
    -------
    RankingMetrics
    """
    relevance = _as_relevance(relevance)
    ranked, ks = _check_ranked(ranked, relevance, ks)
    k_max = max(ks)
    hits = (_gather(ranked[:, :k_max], relevance) > 0).astype(np.float64)
    n_rel = _n_relevant(relevance)
    idx = np.asarray(ks) - 1
    positions = np.arange(1, k_max + 1, dtype=np.float64)
    cum_hits = np.cumsum(hits, axis=1)
    discount = _discount(k_max)
    with np.errstate(invalid="ignore", divide="ignore"):
        dcg = np.cumsum(hits * discount, axis=1)[:, idx]
        ideal_cum = np.concatenate([[0.0], np.cumsum(discount)])
        idcg = ideal_cum[np.minimum(np.asarray(ks)[None, :], n_rel[:, None]).astype(np.int64)]
        ap_sum = np.cumsum(hits * cum_hits / positions, axis=1)[:, idx]
        denom = np.minimum(np.asarray(ks)[None, :], n_rel[:, None])
        none = n_rel[:, None] == 0
        first = np.where(hits.any(axis=1), hits.argmax(axis=1) + 1.0, np.inf)
        return RankingMetrics(
            ks=ks,
            recall=np.where(none, np.nan, cum_hits[:, idx] / n_rel[:, None]),
            precision=cum_hits[:, idx] / np.asarray(ks, dtype=np.float64),
            ndcg=np.where(none, np.nan, dcg / idcg),
            average_precision=np.where(none, np.nan, ap_sum / denom),
            reciprocal_rank=np.where(first[:, None] <= np.asarray(ks)[None, :], 1.0 / first[:, None], 0.0),
            hit_rate=(cum_hits[:, idx] > 0).astype(np.float64),
        )


def graded_ndcg(ranked: np.ndarray, relevance, ks: Sequence[int] | int = (3, 5, 10)) -> np.ndarray:
    """NDCG@K with graded gains: the relevance of every ranked candidate.

    Used on simulated data, where ``relevance`` is the simulator's true
    relevance of every candidate; the ideal list is the K candidates of
    largest relevance, in decreasing order. Negative relevance counts as 0 in
    the ideal list (and as itself in the ranked list).

    Parameters
    ----------
    ranked : ndarray of shape (q, K_max), int
    relevance : ndarray of shape (q, n_candidates), or scipy sparse of that shape, non-negative
    ks : int or sequence of int, default=(3, 5, 10)

    Returns
    -------
    ndarray of shape (q, len(ks)), float64
        NaN for a query whose relevance is all zero.
    """
    relevance = _as_relevance(relevance)
    ranked, ks = _check_ranked(ranked, relevance, ks)
    k_max = max(ks)
    idx = np.asarray(ks) - 1
    discount = _discount(k_max)
    dcg = np.cumsum(_gather(ranked[:, :k_max], relevance) * discount, axis=1)[:, idx]
    idcg = np.cumsum(_ideal_gains(relevance, k_max) * discount, axis=1)[:, idx]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(idcg > 0, dcg / idcg, np.nan)
