"""Exploration for items the model barely knows: an upper-confidence bonus or a posterior sample, capped per list.

A refreshed model (:mod:`threefold.models.refresh`) keeps, for every item row it
folded in or predicted from catalog attributes, the posterior covariance
``Σ_j = M_j⁻¹`` of the row. With the request's query vector ``q`` (the score is
``qᵀ x_j``):

* **UCB** (``explore = BETA``): the item competes with ``qᵀ x_j + BETA·sqrt(qᵀ Σ_j q)``
  — the upper confidence bound of LinUCB (Li, Chu, Langford & Schapire, WWW 2010,
  eq. 4 with ``α = BETA``);
* **Thompson sampling** (``explore = "thompson"``): the item competes with
  ``qᵀ x̃_j``, ``x̃_j ~ N(x_j, Σ_j)`` drawn for each (request, item) (Chapelle &
  Li, NeurIPS 2011), seeded so a rerun gives the same lists.

Trained items have no covariance and compete with their plain score. The cap:
at most ``slots`` items of a list may be there *because of* exploration — items
that are not in the plain top-k. They replace the lowest plain items; the rest
of the list keeps its plain order. The output marks them ``explored``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["parse_explore", "exploration_values", "merge_explored"]


def parse_explore(value) -> float | str | None:
    """``None``/``"off"`` -> None; ``"thompson"``; or a non-negative BETA (number or its text)."""
    if value is None or (isinstance(value, str) and value.strip().lower() in ("", "off", "none")):
        return None
    if isinstance(value, str) and value.strip().lower() == "thompson":
        return "thompson"
    try:
        beta = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"explore must be 'off', 'thompson' or a non-negative number BETA, got {value!r}.") from None
    if not np.isfinite(beta) or beta < 0:
        raise ValueError(f"explore must be 'off', 'thompson' or a non-negative number BETA, got {value!r}.")
    return beta


def exploration_values(queries: np.ndarray, rows: np.ndarray, bias: np.ndarray | None, chol: np.ndarray,
                       columns: np.ndarray, explore: float | str, rng: np.random.Generator | None = None,
                       block: int = 1024) -> np.ndarray:
    """The exploring score of every (request, explorable item).

    Parameters
    ----------
    queries : ndarray of shape (n, R)
        Query vectors of the requests.
    rows : ndarray of shape (m, R)
        Item rows of the explorable items.
    bias : ndarray of shape (m,) or None
    chol : ndarray of shape (m, k, k), float64
        Lower Cholesky factors ``L_j`` of their covariances (``Σ_j = L_j L_jᵀ``).
    columns : ndarray of shape (k,), int64
        Columns of the rows the covariances span.
    explore : float or "thompson"
    rng : numpy Generator, required for Thompson sampling

    Returns
    -------
    ndarray of shape (n, m), float64
    """
    queries = np.asarray(queries, np.float64)
    plain = queries @ np.asarray(rows, np.float64).T
    if bias is not None:
        plain += bias
    out = np.empty_like(plain)
    for start in range(0, queries.shape[0], block):
        q = queries[start:start + block][:, columns]
        spread = np.einsum("nk,mkl->nml", q, chol)  # L_jᵀ q for every pair: ‖·‖² = qᵀ Σ_j q
        if explore == "thompson":
            noise = rng.standard_normal(spread.shape)
            out[start:start + block] = plain[start:start + block] + np.einsum("nml,nml->nm", spread, noise)
        else:
            out[start:start + block] = plain[start:start + block] + float(explore) * np.sqrt(
                np.einsum("nml,nml->nm", spread, spread))
    return out


def merge_explored(plain_items: np.ndarray, plain_scores: np.ndarray, explore_codes: np.ndarray,
                   explore_values: np.ndarray, allowed: np.ndarray, lengths: np.ndarray,
                   slots: int) -> tuple[np.ndarray, np.ndarray]:
    """Lists with at most ``slots`` explored items each; see the module docstring.

    Parameters
    ----------
    plain_items : ndarray of shape (n, K), int64
        Each request's plain top-K by rank: item codes, ``-1`` for an item
        outside the model (kept, at its plain score), ``-2`` past the list's end.
    plain_scores : ndarray of shape (n, K)
        Their plain scores; an explorable item of the plain list competes with
        its exploring value instead.
    explore_codes : ndarray of shape (m,), int64
    explore_values : ndarray of shape (n, m)
    allowed : ndarray of shape (n, m), bool
        Which explorable items each request may show (live, or among its candidates).
    lengths : ndarray of shape (n,), int64
        List length of each request (≤ K).
    slots : int
        Most explored items per list.

    Returns
    -------
    entry : ndarray of shape (n, K), int64
        Per rank, the column of ``plain_items`` it takes, ``-1`` for an explored
        item or past the list's end.
    explored : ndarray of shape (n, K), int64
        Per rank, the explorable item's code when it is there because of
        exploration, else ``-1``.
    """
    n, width = plain_items.shape
    position = {int(c): j for j, c in enumerate(explore_codes)}
    ranks = np.arange(width)[None, :]
    values = np.asarray(plain_scores, np.float64).copy()
    values[(plain_items == -2) | (ranks >= lengths[:, None])] = -np.inf
    in_list = np.zeros(allowed.shape, bool)
    for r, c in zip(*np.nonzero(np.isfinite(values) & (plain_items >= 0))):
        j = position.get(int(plain_items[r, c]), -1)
        if j >= 0:
            in_list[r, j] = True
            values[r, c] = explore_values[r, j]
    outside = np.where(allowed & ~in_list, explore_values, -np.inf)
    take = min(int(slots), outside.shape[1])
    best = np.argsort(-outside, axis=1, kind="stable")[:, :take]
    pool_values = np.concatenate([values, np.take_along_axis(outside, best, 1)], axis=1)
    pool_entry = np.concatenate([np.broadcast_to(np.arange(width), (n, width)), np.full((n, take), -1)], axis=1)
    pool_code = np.concatenate([np.full((n, width), -1), explore_codes[best]], axis=1)
    order = np.argsort(-pool_values, axis=1, kind="stable")[:, :width]  # ties: the plain list first
    kept = np.isfinite(np.take_along_axis(pool_values, order, 1)) & (ranks < lengths[:, None])
    entry = np.where(kept, np.take_along_axis(pool_entry, order, 1), -1)
    explored = np.where(kept, np.take_along_axis(pool_code, order, 1), -1)
    return entry, explored
