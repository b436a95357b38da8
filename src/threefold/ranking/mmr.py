"""Maximal marginal relevance re-ranking (Carbonell & Goldstein, SIGIR 1998).

Greedy diversity-aware list building: the next item is

    argmax over unselected d of  λ · s(d) − (1 − λ) · max over selected d' of sim(d, d')

where ``s`` is the relevance (e.g. the model score) and the max term is absent
for the first pick, which is therefore the most relevant item. ``λ = 1`` gives
the ranking by relevance; smaller ``λ`` trades relevance for diversity.

References
----------
Carbonell, J. & Goldstein, J. (1998). The use of MMR, diversity-based reranking
for reordering documents and producing summaries. SIGIR 1998, 335-336.
"""

from __future__ import annotations

import numpy as np

from threefold.core.checks import check_int, check_number

__all__ = ["mmr_rerank"]


def mmr_rerank(relevance: np.ndarray, similarity: np.ndarray, k: int, *, tradeoff: float = 0.7) -> np.ndarray:
    """Order up to ``k`` candidates by maximal marginal relevance.

    Works on one candidate list or on a batch of lists at once (one greedy
    step per output slot, vectorized over lists).

    Parameters
    ----------
    relevance : ndarray of shape (n,) or (q, n), float
        Relevance of each candidate; ``-inf`` marks a non-candidate, never picked.
    similarity : ndarray of shape (n, n) or (q, n, n), float
        Symmetric candidate-to-candidate similarity (e.g. cosine of item
        factors, or 1 for a shared topic). A 2-D matrix is shared by all lists.
    k : int
        Length of the re-ranked list, at least 1.
    tradeoff : float, default=0.7
        ``λ`` in [0, 1].

    Returns
    -------
    ndarray of shape (k,) or (q, k), int64
        Candidate positions in pick order; ties go to the lower position;
        ``-1`` pads lists with fewer than ``k`` candidates.
    """
    k = check_int("k", k, low=1, owner="mmr_rerank")
    lam = check_number("tradeoff", tradeoff, low=0.0, high=1.0, owner="mmr_rerank")
    rel = np.asarray(relevance, dtype=np.float64)
    single = rel.ndim == 1
    rel = np.atleast_2d(rel)
    q, n = rel.shape
    sim = np.asarray(similarity, dtype=np.float64)
    if sim.shape not in ((n, n), (q, n, n)):
        raise ValueError(f"similarity must have shape ({n}, {n}) or ({q}, {n}, {n}), got {sim.shape}.")
    if np.isnan(rel).any() or np.isnan(sim).any():
        raise ValueError("relevance and similarity must not contain NaN.")
    sim = np.broadcast_to(sim, (q, n, n))
    rows = np.arange(q)
    available = rel > -np.inf
    closest = np.zeros((q, n))  # max similarity to the selected items (none yet: term absent)
    out = np.full((q, k), -1, dtype=np.int64)
    for step in range(min(k, n)):
        gain = np.where(available, lam * np.where(available, rel, 0.0) - (1.0 - lam) * closest, -np.inf)
        pick = gain.argmax(axis=1)
        ok = available[rows, pick]
        out[ok, step] = pick[ok]
        available[rows[ok], pick[ok]] = False
        picked_sim = sim[rows, pick]
        closest = np.where(ok[:, None], picked_sim if step == 0 else np.maximum(closest, picked_sim), closest)
    return out[0] if single else out
