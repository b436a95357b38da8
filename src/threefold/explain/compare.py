"""How the lists change between two contexts, and which factor columns drive the change.

For users ``u`` and two context settings ``A`` and ``B`` (one level per context
mode), a factor model scores item ``i`` as ``s(u, A, i) = Σ_r Q_A[u, r] V[i, r]
(+ item bias)`` (:meth:`~threefold.core.scoring.Scorer.query_matrix`,
:meth:`~threefold.core.scoring.Scorer.item_matrix`). The difference therefore
splits exactly into one term per factor column::

    s(u, B, i) − s(u, A, i) = Σ_r (Q_B[u, r] − Q_A[u, r]) V[i, r]

(for CP a column is a component; for Tucker a column of the item factor). The
bias cancels. :func:`compare_contexts` reports per user the overlap of the two
top-K lists (Jaccard) and the rank agreement of the candidate scores (Kendall's
tau-b, :func:`scipy.stats.kendalltau`), the items that rise and fall most in
mean rank, and each column's share of the mean score change of those items.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["ContextComparison", "compare_contexts", "difference_terms"]


def difference_terms(scorer, users: np.ndarray, context_a: np.ndarray, context_b: np.ndarray,
                     items: np.ndarray) -> np.ndarray:
    """Per-column terms of ``s(u, B, i) - s(u, A, i)``.

    Parameters
    ----------
    scorer : Scorer
    users : ndarray of shape (n,), int
    context_a, context_b : ndarray of shape (n_context_modes,), int
        One level index per context mode.
    items : ndarray of shape (m,), int

    Returns
    -------
    ndarray of shape (n, m, R'), float64
        Summed over the last axis it is the score difference of every (user, item).
    """
    users = np.asarray(users, dtype=np.int64)
    qa = scorer.query_matrix(users, np.tile(np.asarray(context_a, dtype=np.int64), (users.size, 1)))
    qb = scorer.query_matrix(users, np.tile(np.asarray(context_b, dtype=np.int64), (users.size, 1)))
    v = np.asarray(scorer.item_matrix(), dtype=np.float64)[np.asarray(items, dtype=np.int64)]
    return (np.asarray(qb, dtype=np.float64) - np.asarray(qa, dtype=np.float64))[:, None, :] * v[None, :, :]


@dataclass(frozen=True)
class ContextComparison:
    """The outcome of :func:`compare_contexts`.

    Attributes
    ----------
    label_a, label_b : str
        E.g. ``"device=phone"``.
    per_user : DataFrame
        ``user, jaccard, kendall_tau``: one row per compared user.
    movers : DataFrame
        ``item, mean_rank_a, mean_rank_b, rank_change, score_change`` for the
        items that rise (negative rank change) and fall most; ``rank_change =
        mean_rank_b - mean_rank_a``.
    drivers : DataFrame
        ``column, label, mean_term, share``: each factor column's mean term of
        the score change of the movers, and its share of the summed absolute terms.
    k : int
    """

    label_a: str
    label_b: str
    per_user: pd.DataFrame
    movers: pd.DataFrame
    drivers: pd.DataFrame
    k: int

    def summary(self) -> dict:
        return {"a": self.label_a, "b": self.label_b, "k": self.k, "users": int(len(self.per_user)),
                "mean_jaccard": float(self.per_user["jaccard"].mean()),
                "mean_kendall_tau": float(self.per_user["kendall_tau"].mean())}

    def to_text(self, item_labels=None) -> str:
        s = self.summary()
        lines = [f"{self.label_a}  vs  {self.label_b}  ({s['users']} users, top {self.k}):",
                 f"  top-{self.k} overlap (Jaccard) {s['mean_jaccard']:.2f}, rank agreement (Kendall tau) "
                 f"{s['mean_kendall_tau']:.2f}"]
        name = (lambda i: str(item_labels[i])) if item_labels is not None else str
        rise = self.movers.nsmallest(3, "rank_change")
        fall = self.movers.nlargest(3, "rank_change")
        lines.append("  rise most under " + self.label_b + ": " + ", ".join(
            f"{name(r.item)} ({_moved(r.rank_change)})" for r in rise.itertuples()))
        lines.append("  fall most under " + self.label_b + ": " + ", ".join(
            f"{name(r.item)} ({_moved(r.rank_change)})" for r in fall.itertuples()))
        top = self.drivers.nlargest(3, "share")
        lines.append("  driven by: " + ", ".join(f"{r.label} ({100 * r.share:.0f}%)" for r in top.itertuples()))
        return "\n".join(lines)


def compare_contexts(scorer, users: np.ndarray, context_a: np.ndarray, context_b: np.ndarray, *, k: int = 10,
                     items: np.ndarray | None = None, column_labels=None, label_a: str = "A", label_b: str = "B",
                     n_movers: int = 10) -> ContextComparison:
    """Compare every user's ranking of ``items`` under context ``A`` and ``B``.

    Parameters
    ----------
    scorer : Scorer
    users : ndarray of shape (n,), int
    context_a, context_b : ndarray of shape (n_context_modes,), int
    k : int, default=10
    items : ndarray of int, optional
        Candidate items (default: all).
    column_labels : sequence of str, optional
        One name per factor column (default ``"column r"``).
    n_movers : int, default=10
        Items reported among the risers and among the fallers.

    Returns
    -------
    ContextComparison
    """
    from scipy.stats import kendalltau

    users = np.asarray(users, dtype=np.int64)
    if users.size == 0:
        raise ValueError("compare_contexts: no users to compare.")
    n_items = np.asarray(scorer.item_matrix()).shape[0]
    items = np.arange(n_items) if items is None else np.asarray(items, dtype=np.int64)
    k = min(int(k), items.size)
    if k < 1:
        raise ValueError("compare_contexts: k and the number of candidate items must be at least 1.")
    n_modes = len(scorer.shape) - 2
    context_a = np.asarray(context_a, dtype=np.int64).reshape(n_modes)
    context_b = np.asarray(context_b, dtype=np.int64).reshape(n_modes)
    scores_a = scorer.score(users, np.tile(context_a, (users.size, 1)), items)
    scores_b = scorer.score(users, np.tile(context_b, (users.size, 1)), items)
    ranks_a = _ranks(scores_a)
    ranks_b = _ranks(scores_b)
    jaccard = np.empty(users.size)
    tau = np.empty(users.size)
    for j in range(users.size):
        top_a = set(np.flatnonzero(ranks_a[j] <= k))
        top_b = set(np.flatnonzero(ranks_b[j] <= k))
        jaccard[j] = len(top_a & top_b) / len(top_a | top_b)
        tau[j] = kendalltau(scores_a[j], scores_b[j]).statistic if items.size > 1 else 1.0
    per_user = pd.DataFrame({"user": users, "jaccard": jaccard, "kendall_tau": tau})
    change = ranks_b.mean(axis=0) - ranks_a.mean(axis=0)
    order = np.argsort(change, kind="stable")
    chosen = np.unique(np.concatenate([order[:n_movers], order[::-1][:n_movers]]))
    terms = difference_terms(scorer, users, context_a, context_b, items[chosen])  # (n, m, R')
    movers = pd.DataFrame({"item": items[chosen], "mean_rank_a": ranks_a.mean(axis=0)[chosen],
                           "mean_rank_b": ranks_b.mean(axis=0)[chosen], "rank_change": change[chosen],
                           "score_change": (scores_b - scores_a).mean(axis=0)[chosen]})
    mean_terms = terms.mean(axis=(0, 1))
    width = mean_terms.size
    labels = list(column_labels) if column_labels is not None else [f"column {r}" for r in range(width)]
    absolute = np.abs(terms).mean(axis=(0, 1))
    total = absolute.sum()
    drivers = pd.DataFrame({"column": np.arange(width), "label": labels, "mean_term": mean_terms,
                            "share": absolute / total if total > 0 else np.zeros(width)})
    return ContextComparison(label_a, label_b, per_user, movers.sort_values("rank_change").reset_index(drop=True),
                             drivers, k)


def _ranks(scores: np.ndarray) -> np.ndarray:
    """1-based rank of every column per row (highest score first, ties by column order)."""
    order = np.argsort(-scores, axis=1, kind="stable")
    ranks = np.empty_like(order)
    rows = np.arange(scores.shape[0])[:, None]
    ranks[rows, order] = np.arange(1, scores.shape[1] + 1)
    return ranks


def _moved(rank_change: float) -> str:
    """A mean rank change in words: a negative change is a move up the list."""
    if abs(rank_change) < 0.05:
        return "no change"
    return f"{'up' if rank_change < 0 else 'down'} {abs(rank_change):.1f} ranks"
