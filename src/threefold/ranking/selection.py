"""Top-K selection: the one routine that turns scores into ranked lists, for evaluation and serving.

:func:`top_k` turns a score matrix into the indices of the ``k`` best candidates
per row; :func:`top_k_from_factors` does the same from a model's query and item
matrices (the scoring interface of :mod:`threefold.core.scoring`), one block of
queries at a time, so the full ``(q, n_items)`` score matrix never exists.

Ties are broken deterministically: among equal scores the lower item index
ranks first. Candidates that are masked out, and candidates whose score is
``-inf``, are never ranked; when a row has fewer than ``k`` rankable candidates
its list is padded at the end with ``-1``.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from threefold.core.checks import check_int

__all__ = ["top_k", "top_k_from_factors"]

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
    :class:`threefold.core.scoring.Scorer`) computed in the factors' dtype (float32
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
