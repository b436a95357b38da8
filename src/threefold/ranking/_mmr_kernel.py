"""Compiled greedy list building for the diversity policy: MMR with a per-level coverage cap, one list per thread.

The definition (Carbonell & Goldstein, SIGIR 1998) and the cap are those of
:func:`threefold.ranking.policies.apply_policies`, step 5; this kernel is its
inner loop, written once in numba so that a pool of P candidates costs
``length · P · R`` multiply-adds per list, over the pool's unit rows gathered
once per list into a contiguous (P, R) buffer (twice as fast as reading them
from the whole factor matrix; the dot products may be reassociated, nothing
else is relaxed).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = ["greedy_lists"]


@njit(cache=True, parallel=True, fastmath={"reassoc", "contract"})  # the dot may vectorize; infinities kept
def greedy_lists(keep, rel, lam, unit, codes, sim_level, use_factors, level, n_levels, cap, length):
    """Order the kept pool entries of every list greedily.

    Parameters
    ----------
    keep : ndarray of shape (q, P), bool
    rel : ndarray of shape (q, P), float64
        Relevance in [0, 1].
    lam : float
        λ of MMR (1: relevance only).
    unit : ndarray of shape (n_items, R), float32
        Unit item factor rows (``use_factors``), else any 2-D array.
    codes : ndarray of shape (q, P), int64
        Item row of each entry (-1: none, similarity 0).
    sim_level : ndarray of shape (q, P), int64
        Catalog level of each entry when similarity is "same level" (-1: none).
    use_factors : bool
    level : ndarray of shape (q, P), int64
        Level of the capped column (-1: not capped).
    n_levels : int
    cap : int
        Most entries per level; 0: no cap.
    length : int

    Returns
    -------
    out : ndarray of shape (q, length), int64
        Pool columns in pick order, -1 past the end.
    passed : ndarray of shape (q,), int64
        Steps where the cap changed the pick.
    """
    q, p = keep.shape
    out = np.full((q, length), -1, np.int64)
    passed = np.zeros(q, np.int64)
    rank = unit.shape[1]
    for i in prange(q):
        available = keep[i].copy()
        closest = np.zeros(p)
        used = np.zeros(n_levels + 1, np.int64)
        pool = np.zeros((p, rank), np.float32)  # the pool's unit rows, contiguous (zero: no row)
        if use_factors and lam < 1.0:
            for j in range(p):
                if keep[i, j] and codes[i, j] >= 0:
                    pool[j] = unit[codes[i, j]]
        for step in range(length):
            best, pick_any = -np.inf, -1
            best_free, pick = -np.inf, -1
            for j in range(p):
                if not available[j]:
                    continue
                g = lam * rel[i, j] - (1.0 - lam) * closest[j]
                if g > best:
                    best, pick_any = g, j
                if cap > 0 and level[i, j] >= 0 and used[level[i, j]] >= cap:
                    continue
                if g > best_free:
                    best_free, pick = g, j
            if pick < 0:
                break
            if pick_any != pick:
                passed[i] += 1
            out[i, step] = pick
            available[pick] = False
            if cap > 0 and level[i, pick] >= 0:
                used[level[i, pick]] += 1
            if lam < 1.0:
                for j in range(p):
                    if not available[j]:
                        continue
                    sim = 0.0
                    if use_factors:
                        total = np.float32(0.0)
                        for r in range(rank):
                            total += pool[j, r] * pool[pick, r]
                        sim = float(total)
                    elif sim_level[i, j] >= 0 and sim_level[i, j] == sim_level[i, pick]:
                        sim = 1.0
                    closest[j] = sim if step == 0 else max(closest[j], sim)
    return out, passed
