"""Top-K ranking and per-query accuracy metrics, vectorized over blocks of queries.

Ranking
-------
:func:`top_k` turns a score matrix into the indices of the ``k`` best candidates
per row; :func:`top_k_from_factors` does the same from a model's query and item
matrices (the scoring interface of :mod:`threefold.scoring`), one block of
queries at a time, so the full ``(q, n_items)`` score matrix never exists.

Ties are broken deterministically: among equal scores the lower item index
ranks first. Candidates that are masked out, and candidates whose score is
``-inf``, are never ranked; when a row has fewer than ``k`` rankable candidates
its list is padded at the end with ``-1``. A NaN score is an error.

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

from threefold._checks import check_int

__all__ = ["RankingMetrics", "top_k", "top_k_from_factors", "ranking_metrics", "graded_ndcg", "ranked_gains"]

#: Target number of score cells per block in :func:`top_k_from_factors`.
_BLOCK_CELLS = 1 << 24
#: Prefilter rows at least this many times wider than k, sampling every _STRIDE-th column.
_PREFILTER_WIDTH = 64
_STRIDE = 8


def _select_exact(scores: np.ndarray, k: int) -> np.ndarray:
    """Top-k column indices of every row of ``scores`` (not modified), ``-1`` for ``-inf``.

    Selection by value: the k-th largest score ``t`` of a row comes from
    ``np.partition``; the row's list is every column scoring above ``t`` plus
    the lowest-index columns scoring exactly ``t``, up to ``k``. Only rows where
    ties straddle the threshold pay for the extra cumulative count. The ``k``
    selected columns are then sorted by (score descending, index ascending).
    """
    q, n = scores.shape
    kk = min(k, n)
    out = np.full((q, k), -1, dtype=np.int64)
    if q == 0 or kk == 0:
        return out
    top = np.partition(scores, n - kk, axis=1)[:, n - kk:] if kk < n else scores
    if np.isnan(top).any():
        raise ValueError("scores contain NaN; mask the candidate instead or give it -inf.")
    threshold = top.min(axis=1)[:, None]
    keep = scores >= threshold
    tied = np.flatnonzero(np.count_nonzero(keep, axis=1) > kk)
    if tied.size:
        s, t = scores[tied], threshold[tied]
        above = s > t
        equal = s == t
        room = kk - above.sum(axis=1, keepdims=True)
        keep[tied] = above | (equal & (np.cumsum(equal, axis=1) <= room))
    cols = np.nonzero(keep)[1].reshape(q, kk)
    vals = np.take_along_axis(scores, cols, axis=1)
    order = np.argsort(-vals, axis=1, kind="stable")  # cols ascend, so ties keep index order
    cols = np.take_along_axis(cols, order, axis=1)
    vals = np.take_along_axis(vals, order, axis=1)
    out[:, :kk] = np.where(vals == -np.inf, -1, cols)
    return out


def _select_top_k(scores: np.ndarray, k: int) -> np.ndarray:
    """Like :func:`_select_exact`, with a prefilter on wide rows.

    The k-th largest score of every ``_STRIDE``-th column is a lower bound of
    the row's k-th largest score, so every column at or above it is kept as a
    candidate (in index order) and :func:`_select_exact` runs on the packed
    candidates only: about ``k * _STRIDE`` per row for exchangeable scores,
    the whole row in the worst case.
    """
    q, n = scores.shape
    kk = min(k, n)
    if q == 0 or n < _PREFILTER_WIDTH * kk:
        return _select_exact(scores, k)
    if np.isnan(scores).any():
        raise ValueError("scores contain NaN; mask the candidate instead or give it -inf.")
    sample = scores[:, ::_STRIDE]
    bound = np.partition(sample, sample.shape[1] - kk, axis=1)[:, sample.shape[1] - kk]
    rows, cols = np.nonzero(scores >= bound[:, None])
    counts = np.bincount(rows, minlength=q)
    slot = np.arange(rows.size) - np.repeat(np.cumsum(counts) - counts, counts)
    packed = np.full((q, max(int(counts.max()), kk)), -np.inf, dtype=scores.dtype)
    packed[rows, slot] = scores[rows, cols]
    packed_cols = np.zeros(packed.shape, dtype=np.int64)
    packed_cols[rows, slot] = cols
    picked = _select_exact(packed, k)
    return np.where(picked >= 0, np.take_along_axis(packed_cols, np.maximum(picked, 0), axis=1), -1)


def top_k(scores: np.ndarray, k: int, candidate_mask: np.ndarray | None = None) -> np.ndarray:
    """Indices of the ``k`` highest-scoring candidates of every row.

    Parameters
    ----------
    scores : ndarray of shape (q, n_candidates), float
        Not modified.
    k : int
        List length, at least 1.
    candidate_mask : ndarray of shape (q, n_candidates), bool, or None
        True where the item is a candidate for the query; default: all.

    Returns
    -------
    ndarray of shape (q, k), int64
        Column indices, best first. Equal scores are ordered by lower index
        first. Masked candidates and ``-inf`` scores are never ranked; rows
        with fewer than ``k`` rankable candidates end in ``-1``.

    Notes
    -----
    Slow reference for one row: ``sorted(valid, key=lambda j: (-scores[j], j))[:k]``.
    Selection uses ``np.partition`` to find each row's k-th largest score and
    keeps the columns at or above it (resolving ties at the threshold by
    index), then sorts the k selected entries: O(n) per row plus O(k log k).
    Rows at least 64 k wide are first narrowed to the columns at or above the
    k-th largest score of every 8th column (a lower bound of the row's k-th
    largest, so nothing is lost). On float32 rows of 20,000 items, ``np.partition``
    measured 2-4 times faster than ``np.argpartition`` on the same machine, and
    the prefilter removes most of the remaining partition work.
    """
    k = check_int("k", k, low=1, owner="top_k")
    scores = np.asarray(scores)
    if scores.ndim != 2 or not np.issubdtype(scores.dtype, np.floating):
        raise ValueError(f"scores must be a 2-D float array, got shape {scores.shape} and dtype {scores.dtype}.")
    work = scores
    if candidate_mask is not None:
        candidate_mask = np.asarray(candidate_mask)
        if candidate_mask.shape != scores.shape or candidate_mask.dtype != bool:
            raise ValueError(
                f"candidate_mask must be a bool array of shape {scores.shape}, got {candidate_mask.dtype} {candidate_mask.shape}."
            )
        work = np.where(candidate_mask, scores, -np.inf).astype(scores.dtype, copy=False)
    return _select_top_k(work, k)


def top_k_from_factors(
    query_matrix: np.ndarray,
    item_matrix: np.ndarray,
    k: int,
    *,
    item_bias: np.ndarray | None = None,
    candidates: np.ndarray | sp.spmatrix | sp.sparray | None = None,
    block_size: int | None = None,
) -> np.ndarray:
    """Top-k items of every query from a model's factors, one block of queries at a time.

    Scores are ``query_matrix @ item_matrix.T + item_bias`` (see
    :class:`threefold.scoring.Scorer`) computed in the factors' dtype (float32
    factors are scored in float32).

    Parameters
    ----------
    query_matrix : ndarray of shape (q, R), float
    item_matrix : ndarray of shape (n_items, R), float
    k : int
    item_bias : ndarray of shape (n_items,), float, or None
    candidates : ndarray of shape (q, n_items), bool, or scipy sparse (q, n_items), or None
        Which items each query may rank: a dense mask, or a sparse matrix whose
        stored non-zero entries mark the candidates (e.g. the list actually
        shown). Default: every item.
    block_size : int or None
        Queries per block; default keeps a block near 2**24 score cells.

    Returns
    -------
    ndarray of shape (q, k), int64
        Item indices, best first, ties by lower item index, ``-1`` padding; see :func:`top_k`.
    """
    k = check_int("k", k, low=1, owner="top_k_from_factors")
    query_matrix = np.asarray(query_matrix)
    item_matrix = np.asarray(item_matrix)
    if query_matrix.ndim != 2 or item_matrix.ndim != 2 or query_matrix.shape[1] != item_matrix.shape[1]:
        raise ValueError(
            f"query_matrix (q, R) and item_matrix (n_items, R) must share R, got {query_matrix.shape} and {item_matrix.shape}."
        )
    q, n_items = query_matrix.shape[0], item_matrix.shape[0]
    if item_bias is not None:
        item_bias = np.asarray(item_bias).reshape(-1)
        if item_bias.shape != (n_items,):
            raise ValueError(f"item_bias must have shape ({n_items},), got {item_bias.shape}.")
    if candidates is not None:
        if sp.issparse(candidates):
            candidates = sp.csr_array(candidates)
        else:
            candidates = np.asarray(candidates)
            if candidates.dtype != bool:
                raise ValueError(f"A dense candidates mask must be bool, got {candidates.dtype}.")
        if candidates.shape != (q, n_items):
            raise ValueError(f"candidates must have shape ({q}, {n_items}), got {candidates.shape}.")
    if block_size is None:
        block_size = max(1, _BLOCK_CELLS // max(n_items, 1))
    block_size = check_int("block_size", block_size, low=1, owner="top_k_from_factors")
    item_t = np.ascontiguousarray(item_matrix.T)
    out = np.empty((q, k), dtype=np.int64)
    for start in range(0, q, block_size):
        stop = min(start + block_size, q)
        scores = query_matrix[start:stop] @ item_t
        if item_bias is not None:
            scores += item_bias
        if candidates is not None:
            block = candidates[start:stop]
            mask = block.toarray() != 0 if sp.issparse(block) else block
            np.putmask(scores, ~mask, -np.inf)
        out[start:stop] = _select_top_k(scores, k)
    return out


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
