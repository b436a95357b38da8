"""Measures of a list as a whole: expected clicks under a position model, and α-NDCG over a catalog column.

Per-item metrics (NDCG, recall) reward putting the likeliest items first and
nothing else; a list of ten stories on one topic can top them and still waste
nine slots. These two judge the set:

* **Expected clicks** under the position-based model (Craswell, Zoeter, Taylor
  & Ramsey, WSDM 2008): a click at position k happens with probability
  ``θ_k · p(click | item)``, so a list's expected number of clicks is
  ``Σ_k θ_k · p_k``, with θ the estimated examination by position
  (:func:`threefold.data.propensity.estimate_position_propensity`) and p the
  relevance (the simulator's truth, or a model's estimate).
* **α-NDCG** (Clarke, Kolla, Cormack, Vechtomova, Ashkan, Büttcher &
  MacKinnon, SIGIR 2008): each relevant item covers an aspect (here: its level
  of a catalog column such as ``topic``); the gain of the item at rank k is
  ``Σ_a J(d_k, a) · (1 − α)^{r_{a,k−1}}`` with ``r_{a,k−1}`` the relevance
  already collected on aspect ``a`` above it, so a second story on an aspect
  counts ``(1 − α)`` of the first. DCG uses the ``1 / log2(1 + k)`` discount;
  the ideal list is built greedily, as in the paper (the exact ideal is
  NP-hard). With α = 0 it is plain NDCG.

Lists are int arrays of shape ``(q, K)`` of item indices, best first, ``-1``
for an empty slot.
"""

from __future__ import annotations

import numpy as np

from threefold.core.checks import check_int, check_number

__all__ = ["expected_clicks", "alpha_ndcg", "alpha_ideal_dcg"]


def _lists(ranked) -> np.ndarray:
    ranked = np.asarray(ranked)
    if ranked.ndim != 2 or ranked.dtype.kind not in "iu":
        raise ValueError(f"ranked must be a 2-D integer array (q, K); got shape {ranked.shape}, dtype {ranked.dtype}.")
    return ranked.astype(np.int64)


def expected_clicks(ranked, click_probability, examination) -> np.ndarray:
    """Expected clicks of every list under the position-based model.

    Parameters
    ----------
    ranked : ndarray of shape (q, K), int
    click_probability : ndarray of shape (q, n_items), float
        ``p(click | item examined)`` for each list's user and context, in [0, 1].
    examination : ndarray of shape (K,) or longer, float
        θ_k, the probability that position k (1-based k = index + 1) is examined.

    Returns
    -------
    ndarray of shape (q,), float64
    """
    ranked = _lists(ranked)
    p = np.asarray(click_probability, np.float64)
    theta = np.asarray(examination, np.float64)
    q, k = ranked.shape
    if p.ndim != 2 or p.shape[0] != q:
        raise ValueError(f"click_probability must have shape ({q}, n_items); got {p.shape}.")
    if theta.ndim != 1 or theta.size < k:
        raise ValueError(f"examination must give θ for each of the {k} positions; got shape {theta.shape}.")
    if (ranked >= p.shape[1]).any():
        raise ValueError(f"ranked holds item indices beyond the {p.shape[1]} columns of click_probability.")
    listed = ranked >= 0
    values = np.where(listed, p[np.arange(q)[:, None], np.maximum(ranked, 0)], 0.0)
    return (values * theta[None, :k]).sum(axis=1)


def alpha_ndcg(ranked, relevance, aspect, *, k: int = 10, alpha: float = 0.5, ideal=None) -> np.ndarray:
    """α-NDCG@k of every list (Clarke et al. 2008), one aspect per item.

    Parameters
    ----------
    ranked : ndarray of shape (q, K), int
    relevance : ndarray of shape (q, n_items), float
        ``J(d, a)`` for the item's own aspect: 1 / 0, or a graded value ≥ 0.
    aspect : ndarray of shape (n_items,), int
        Each item's aspect code (e.g. its topic); ``-1``: an aspect of its own.
    k : int, default=10
    alpha : float, default=0.5
        In [0, 1]; 0 gives NDCG@k.
    ideal : ndarray of shape (q,) or None
        :func:`alpha_ideal_dcg` of the same relevance, aspect, k and α, when
        many sets of lists are judged against one relevance (computed if None).

    Returns
    -------
    ndarray of shape (q,), float64
        NaN for a list whose user has no relevant item.
    """
    k, alpha, rel, codes, n_aspects = _alpha_inputs(relevance, aspect, k, alpha)
    ranked = _lists(ranked)[:, :k]
    if ranked.shape[0] != rel.shape[0]:
        raise ValueError(f"ranked has {ranked.shape[0]} lists and relevance {rel.shape[0]} rows.")
    if ideal is None:
        ideal = alpha_ideal_dcg(rel, aspect, k=k, alpha=alpha)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(ideal > 0, _alpha_dcg(ranked, rel, codes, n_aspects, alpha, k) / ideal, np.nan)


def alpha_ideal_dcg(relevance, aspect, *, k: int = 10, alpha: float = 0.5) -> np.ndarray:
    """The α-DCG@k of the ideal list of every row, built greedily as in Clarke et al. 2008 (section 4).

    The exact ideal is NP-hard; the greedy one takes at each rank the item of
    largest gain given the aspects already covered. Returns shape (q,), float64.
    """
    k, alpha, rel, codes, n_aspects = _alpha_inputs(relevance, aspect, k, alpha)
    q, n = rel.shape
    rows = np.arange(q)
    ideal_lists = np.full((q, min(k, n)), -1, np.int64)
    collected = np.zeros((q, n_aspects))
    available = rel > 0
    for j in range(ideal_lists.shape[1]):
        gain = np.where(available, rel * (1.0 - alpha) ** collected[:, codes], -np.inf)
        pick = gain.argmax(axis=1)
        ok = np.isfinite(gain[rows, pick])
        ideal_lists[ok, j] = pick[ok]
        available[rows[ok], pick[ok]] = False
        collected[rows[ok], codes[pick[ok]]] += rel[rows[ok], pick[ok]]
    return _alpha_dcg(ideal_lists, rel, codes, n_aspects, alpha, k)


def _alpha_inputs(relevance, aspect, k, alpha):
    """Checked k, α, relevance (q, n) and per-item aspect codes (items without one get private codes)."""
    k = check_int("k", k, low=1, owner="alpha_ndcg")
    alpha = check_number("alpha", alpha, low=0.0, high=1.0, owner="alpha_ndcg")
    rel = np.asarray(relevance, np.float64)
    n = rel.shape[1]
    aspect = np.asarray(aspect, np.int64)
    if aspect.shape != (n,):
        raise ValueError(f"aspect must have shape ({n},); got {aspect.shape}.")
    if (rel < 0).any():
        raise ValueError("relevance must be non-negative.")
    shared = int(aspect.max()) + 1 if (aspect >= 0).any() else 0
    codes = np.where(aspect >= 0, aspect, shared + np.arange(n))
    return k, alpha, rel, codes, (int(codes.max()) + 1 if n else 0)


def _alpha_dcg(lists: np.ndarray, rel: np.ndarray, codes: np.ndarray, n_aspects: int, alpha: float,
               k: int) -> np.ndarray:
    """α-DCG of every list: gain rel · (1 − α)^(relevance already collected on the item's aspect), 1/log2(1+rank)."""
    q = rel.shape[0]
    rows = np.arange(q)
    discount = 1.0 / np.log2(np.arange(2, k + 2))
    collected = np.zeros((q, n_aspects))
    dcg = np.zeros(q)
    for j in range(lists.shape[1]):
        item = lists[:, j]
        ok = item >= 0
        a = codes[np.maximum(item, 0)]
        g = np.where(ok, rel[rows, np.maximum(item, 0)] * (1.0 - alpha) ** collected[rows, a], 0.0)
        dcg += g * discount[j]
        collected[rows[ok], a[ok]] += rel[rows[ok], item[ok]]
    return dcg
