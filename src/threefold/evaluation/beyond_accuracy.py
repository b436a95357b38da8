"""Beyond-accuracy measures of ranked lists: coverage, exposure, diversity, novelty, stability.

Every function takes ranked lists as an int array of shape ``(q, K)`` of item
indices, best first, with ``-1`` marking an empty slot (as returned by
:func:`threefold.ranking.topk.top_k`), and is vectorized over lists.

References
----------
Ziegler, C.-N., McNee, S. M., Konstan, J. A. & Lausen, G. (2005). Improving
recommendation lists through topic diversification. WWW 2005.
Zhou, T., Kuscsik, Z., Liu, J.-G., Medo, M., Wakeling, J. R. & Zhang, Y.-C.
(2010). Solving the apparent diversity-accuracy dilemma of recommender systems.
PNAS 107(10), 4511-4515.
Fagin, R., Kumar, R. & Sivakumar, D. (2003). Comparing top k lists. SIAM J.
Discrete Math. 17(1), 134-160.
Lathia, N., Hailes, S., Capra, L. & Amatriain, X. (2010). Temporal diversity in
recommender systems. SIGIR 2010.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from threefold.core.checks import check_int, check_number

__all__ = [
    "ContextSensitivity",
    "catalog_coverage",
    "context_sensitivity",
    "exposure_counts",
    "gini_index",
    "intra_list_diversity",
    "jaccard_distance",
    "novelty",
    "temporal_diversity",
    "top_k_kendall_distance",
]

_BLOCK = 8192


def _check_lists(ranked: np.ndarray, name: str = "ranked", n_items: int | None = None) -> np.ndarray:
    ranked = np.asarray(ranked)
    if ranked.ndim != 2 or not np.issubdtype(ranked.dtype, np.integer):
        raise ValueError(f"{name} must be a 2-D int array of shape (q, K), got {ranked.dtype} {ranked.shape}.")
    if ranked.size and ranked.min() < -1:
        raise IndexError(f"{name} holds {ranked.min()}; item indices are >= 0 and -1 marks an empty slot.")
    if n_items is not None and ranked.size and ranked.max() >= n_items:
        raise IndexError(f"{name} holds item {ranked.max()} but the catalog has {n_items} items.")
    return ranked.astype(np.int64, copy=False)


def exposure_counts(ranked: np.ndarray, n_items: int) -> np.ndarray:
    """How many lists show each item.

    Parameters
    ----------
    ranked : ndarray of shape (q, K), int, ``-1`` for empty slots
    n_items : int
        Catalog size.

    Returns
    -------
    ndarray of shape (n_items,), int64
    """
    n_items = check_int("n_items", n_items, low=1, owner="exposure_counts")
    ranked = _check_lists(ranked, n_items=n_items)
    return np.bincount(ranked[ranked >= 0], minlength=n_items).astype(np.int64)


def catalog_coverage(ranked: np.ndarray, n_items: int) -> float:
    """Share of the catalog that appears in at least one list: |∪ lists| / n_items (common practice)."""
    return float(np.count_nonzero(exposure_counts(ranked, n_items)) / n_items)


def gini_index(exposure: np.ndarray) -> float:
    """Gini coefficient of a non-negative exposure vector, zero-exposure items included.

    ``G = (1 / (n - 1)) Σ_j (2j - n - 1) p_j`` with ``p`` the exposure shares
    sorted ascending and ``j = 1..n`` (0: equal exposure, 1: one item gets all).

    Parameters
    ----------
    exposure : ndarray of shape (n_items,), non-negative, positive total
        E.g. :func:`exposure_counts` over all users' lists.

    Returns
    -------
    float
    """
    x = np.asarray(exposure, dtype=np.float64).reshape(-1)
    if x.size < 2:
        raise ValueError(f"The Gini index needs at least 2 items, got {x.size}.")
    if not np.all(np.isfinite(x)) or x.min() < 0 or x.sum() <= 0:
        raise ValueError("exposure must be finite and non-negative with a positive total.")
    n = x.size
    p = np.sort(x) / x.sum()
    j = np.arange(1, n + 1)
    return float(np.dot(2 * j - n - 1, p) / (n - 1))


def intra_list_diversity(
    ranked: np.ndarray,
    *,
    item_topics: np.ndarray | None = None,
    item_factors: np.ndarray | None = None,
) -> np.ndarray:
    """Intra-list diversity (Ziegler et al., WWW 2005) of every list.

    ``ILD = 2 / (K (K - 1)) Σ_{a<b} (1 - sim(a, b))`` over the list's non-empty
    slots, with ``sim`` either topic equality (1 if the two items share a topic,
    else 0) or the cosine of the items' latent factors (a zero vector has
    cosine 0 with everything). Give exactly one of ``item_topics`` and
    ``item_factors``.

    Parameters
    ----------
    ranked : ndarray of shape (q, K), int, ``-1`` for empty slots
    item_topics : ndarray of shape (n_items,), int, or None
        A categorical attribute per item (e.g. its topic code).
    item_factors : ndarray of shape (n_items, R), float, or None
        Latent item vectors (e.g. a model's item matrix).

    Returns
    -------
    ndarray of shape (q,), float64
        In [0, 1] by topic, [0, 2] by cosine; NaN for lists with fewer than 2 items.
    """
    if (item_topics is None) == (item_factors is None):
        raise ValueError("Give exactly one of item_topics and item_factors.")
    if item_topics is not None:
        attribute = np.asarray(item_topics).reshape(-1)
    else:
        attribute = np.asarray(item_factors, dtype=np.float64)
        if attribute.ndim != 2:
            raise ValueError(f"item_factors must have shape (n_items, R), got {attribute.shape}.")
        norms = np.linalg.norm(attribute, axis=1, keepdims=True)
        attribute = attribute / np.where(norms > 0, norms, 1.0)
    ranked = _check_lists(ranked, n_items=attribute.shape[0])
    q, k = ranked.shape
    out = np.empty(q)
    upper = np.triu(np.ones((k, k), dtype=bool), 1)
    for start in range(0, q, _BLOCK):
        lists = ranked[start:start + _BLOCK]
        valid = lists >= 0
        values = attribute[np.where(valid, lists, 0)]
        if item_topics is not None:
            sim = (values[:, :, None] == values[:, None, :]).astype(np.float64)
        else:
            sim = values @ values.transpose(0, 2, 1)
        pairs = upper & valid[:, :, None] & valid[:, None, :]
        n_pairs = pairs.sum(axis=(1, 2))
        total = np.where(pairs, 1.0 - sim, 0.0).sum(axis=(1, 2))
        with np.errstate(invalid="ignore", divide="ignore"):
            out[start:start + _BLOCK] = np.where(n_pairs > 0, total / n_pairs, np.nan)
    return out


def novelty(ranked: np.ndarray, item_popularity: np.ndarray, n_users: int) -> np.ndarray:
    """Mean self-information of the items of every list (Zhou et al., PNAS 2010).

    ``novelty = mean over the list of -log2(share_i)``, with the popularity
    base ``share_i = (k_i + 1) / (n_users + 1)``: ``k_i`` is the number of
    distinct training users who clicked item ``i`` and ``n_users`` the number
    of training users. Zhou et al. use ``k_i / n_users``; the add-one
    smoothing (common practice) keeps items nobody clicked in training, as
    fresh news items are, finite.

    Parameters
    ----------
    ranked : ndarray of shape (q, K), int, ``-1`` for empty slots
    item_popularity : ndarray of shape (n_items,), non-negative, at most ``n_users``
    n_users : int

    Returns
    -------
    ndarray of shape (q,), float64
        Bits; NaN for empty lists.
    """
    n_users = check_int("n_users", n_users, low=1, owner="novelty")
    pop = np.asarray(item_popularity, dtype=np.float64).reshape(-1)
    if pop.size and (pop.min() < 0 or pop.max() > n_users):
        raise ValueError(f"item_popularity must lie in [0, n_users={n_users}].")
    ranked = _check_lists(ranked, n_items=pop.size)
    valid = ranked >= 0
    info = -np.log2((pop[np.where(valid, ranked, 0)] + 1.0) / (n_users + 1.0))
    count = valid.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, np.where(valid, info, 0.0).sum(axis=1) / count, np.nan)


def _positions(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Position of each ``a[i, j]`` in ``b[i]``, or -1 when absent (or empty slot)."""
    eq = (a[:, :, None] == b[:, None, :]) & (a[:, :, None] >= 0)
    return np.where(eq.any(axis=2), eq.argmax(axis=2), -1)


def _check_pair(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    a = _check_lists(a, "a")
    b = _check_lists(b, "b")
    if a.shape[0] != b.shape[0]:
        raise ValueError(f"a and b must hold the same number of lists, got {a.shape[0]} and {b.shape[0]}.")
    return a, b


def jaccard_distance(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``1 - |A ∩ B| / |A ∪ B|`` of the item sets of two lists, row by row (0 for two empty lists).

    Parameters
    ----------
    a : ndarray of shape (q, Ka), int, ``-1`` for empty slots
    b : ndarray of shape (q, Kb), int, ``-1`` for empty slots

    Returns
    -------
    ndarray of shape (q,), float64
    """
    a, b = _check_pair(a, b)
    common = (_positions(a, b) >= 0).sum(axis=1)
    union = (a >= 0).sum(axis=1) + (b >= 0).sum(axis=1) - common
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(union > 0, 1.0 - common / union, 0.0)


def top_k_kendall_distance(a: np.ndarray, b: np.ndarray, p: float = 0.5, *, normalize: bool = True) -> np.ndarray:
    """Kendall distance with penalty parameter p between top-k lists, K^(p) (Fagin, Kumar & Sivakumar 2003).

    Over every unordered pair {i, j} of distinct items of the union of the two
    lists, the penalty is:

    1. both items in both lists: 1 if their order differs, else 0;
    2. both in one list, exactly one (say i) in the other: 1 if j is ahead of
       i in the list holding both, else 0 (i is implicitly ahead in the other);
    3. i only in one list, j only in the other: 1;
    4. both in one list, neither in the other: ``p``.

    Writing an absent item's rank as "after every listed item", cases 1-3 all
    count discordant pairs and case 4 is a pair tied in exactly one list, which
    is how the vectorized code computes it. (The four cases are recalled from
    the paper, not re-read: the copy at hand showed only its abstract and the
    Kendall tau between permutations, which case 1 reproduces.)

    Parameters
    ----------
    a : ndarray of shape (q, Ka), int, ``-1`` for empty slots
    b : ndarray of shape (q, Kb), int, ``-1`` for empty slots
    p : float, default=0.5
        Penalty of case 4, in [0, 1] (0.5: the paper's "neutral" choice).
    normalize : bool, default=True
        Divide by the distance between two disjoint lists of the same
        lengths, ``ka * kb + p * (ka (ka - 1) / 2 + kb (kb - 1) / 2)``
        (``k^2 + p k (k - 1)`` for two full top-k lists), so values lie in [0, 1].

    Returns
    -------
    ndarray of shape (q,), float64
    """
    p = check_number("p", p, low=0.0, high=1.0, owner="top_k_kendall_distance")
    a, b = _check_pair(a, b)
    q, ka = a.shape
    out = np.empty(q)
    for start in range(0, q, _BLOCK):
        x, y = a[start:start + _BLOCK], b[start:start + _BLOCK]
        absent = x.shape[1] + y.shape[1]  # larger than every position
        pos_x_in_y = _positions(x, y)
        only_y = (y >= 0) & (_positions(y, x) < 0)
        rank_a = np.concatenate([np.broadcast_to(np.arange(ka), x.shape), np.full(y.shape, absent)], axis=1)
        rank_b = np.concatenate([np.where(pos_x_in_y >= 0, pos_x_in_y, absent), np.broadcast_to(np.arange(y.shape[1]), y.shape)], axis=1)
        slot = np.concatenate([x >= 0, only_y], axis=1)
        da = np.sign(rank_a[:, :, None] - rank_a[:, None, :])
        db = np.sign(rank_b[:, :, None] - rank_b[:, None, :])
        pairs = np.triu(np.ones((slot.shape[1],) * 2, dtype=bool), 1) & slot[:, :, None] & slot[:, None, :]
        penalty = np.where(da * db < 0, 1.0, 0.0) + np.where((da == 0) != (db == 0), p, 0.0)
        dist = np.where(pairs, penalty, 0.0).sum(axis=(1, 2))
        if normalize:
            na, nb = (x >= 0).sum(axis=1), (y >= 0).sum(axis=1)
            worst = na * nb + p * (na * (na - 1) + nb * (nb - 1)) / 2.0
            with np.errstate(invalid="ignore", divide="ignore"):
                dist = np.where(worst > 0, dist / worst, 0.0)
        out[start:start + _BLOCK] = dist
    return out


@dataclass(frozen=True)
class ContextSensitivity:
    """How much a user's top-K list changes across context levels.

    Attributes
    ----------
    jaccard : ndarray of shape (n_users,), float64
        Mean Jaccard distance over all pairs of context levels.
    kendall : ndarray of shape (n_users,), float64
        Mean normalized top-k Kendall distance K^(p) over the same pairs.
    p : float
        Penalty parameter used for ``kendall``.
    """

    jaccard: np.ndarray
    kendall: np.ndarray
    p: float


def context_sensitivity(lists_by_level: np.ndarray, p: float = 0.5) -> ContextSensitivity:
    """Mean pairwise distance between one user's top-K lists at different context levels.

    Parameters
    ----------
    lists_by_level : ndarray of shape (n_users, n_levels, K), int, ``-1`` for empty slots
        Row ``u`` holds the user's list at each level of one context mode
        (the other query fields held fixed).
    p : float, default=0.5
        Penalty parameter of :func:`top_k_kendall_distance`.

    Returns
    -------
    ContextSensitivity
        Zero for a model that ignores the context.
    """
    lists = np.asarray(lists_by_level)
    if lists.ndim != 3 or lists.shape[1] < 2:
        raise ValueError(f"lists_by_level must have shape (n_users, n_levels >= 2, K), got {lists.shape}.")
    level_a, level_b = np.triu_indices(lists.shape[1], 1)
    jac = np.zeros(lists.shape[0])
    ken = np.zeros(lists.shape[0])
    for la, lb in zip(level_a, level_b):
        jac += jaccard_distance(lists[:, la], lists[:, lb])
        ken += top_k_kendall_distance(lists[:, la], lists[:, lb], p)
    return ContextSensitivity(jaccard=jac / level_a.size, kendall=ken / level_a.size, p=float(p))


def temporal_diversity(previous: np.ndarray, current: np.ndarray) -> np.ndarray:
    """Share of each current list that is new: ``|L2 \\ L1| / |L2|`` (Lathia et al., SIGIR 2010).

    ``1 - temporal_diversity`` is the day-over-day repetition of a user's list.
    Lathia et al. divide by the list length N; with full lists ``|L2| = N``.

    Parameters
    ----------
    previous : ndarray of shape (q, K), int, ``-1`` for empty slots
        Each user's earlier list (e.g. yesterday's).
    current : ndarray of shape (q, K), int, ``-1`` for empty slots
        The same users' later list.

    Returns
    -------
    ndarray of shape (q,), float64
        In [0, 1]; NaN where the current list is empty.
    """
    previous, current = _check_pair(previous, current)
    size = (current >= 0).sum(axis=1)
    new = ((current >= 0) & (_positions(current, previous) < 0)).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(size > 0, new / size, np.nan)
