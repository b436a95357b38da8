"""What list policies cost and buy: the same requests ranked without and with the rules, compared per user.

:func:`policy_effect` takes both sets of lists and one relevance matrix and
reports, per measure, the mean without and with the rules and the paired
difference with its bootstrap interval and Wilcoxon p-value
(:func:`threefold.evaluation.click_estimates.paired_comparison`, users as the
unit, each user's mean over their requests):

* ``ndcg@K``: NDCG with the relevance as gain (per-item accuracy);
* ``alpha_ndcg@K``: α-NDCG over an aspect column such as ``topic``
  (Clarke et al., SIGIR 2008; :mod:`threefold.evaluation.set_metrics`);
* ``expected_clicks``: Σ_k θ_k · relevance under the position-based model
  (Craswell et al., WSDM 2008), when an examination curve θ is given;
* ``distinct_aspects``: how many aspect levels a list covers.

Relevance is whatever the caller can defend: the simulator's true click
probabilities on the demo site, or on a real log the clicks of a held-out
window (then every measure inherits the logging policy's bias; see
docs/evaluation.md).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from threefold.evaluation.click_estimates import paired_comparison
from threefold.evaluation.set_metrics import alpha_ndcg, expected_clicks

__all__ = ["policy_effect", "list_measures"]


def list_measures(lists, relevance, *, aspect=None, examination=None, k: int = 10, alpha: float = 0.5) -> dict:
    """Per-list values of every measure; see the module docstring.

    Parameters
    ----------
    lists : ndarray of shape (q, K), int
        Columns of ``relevance``, best first, -1 for an empty slot.
    relevance : ndarray of shape (q, n), float
    aspect : ndarray of shape (n,), int, or None
    examination : ndarray of shape (K,), float, or None
    k : int, default=10
    alpha : float, default=0.5

    Returns
    -------
    dict of str to ndarray of shape (q,), float64
    """
    lists = np.asarray(lists, np.int64)
    n = np.asarray(relevance).shape[1]
    none = np.full(n, -1, np.int64)
    out = {f"ndcg@{k}": alpha_ndcg(lists, relevance, none, k=k, alpha=0.0)}
    if aspect is not None:
        aspect = np.asarray(aspect, np.int64)
        out[f"alpha_ndcg@{k}"] = alpha_ndcg(lists, relevance, aspect, k=k, alpha=alpha)
        listed = lists[:, :k]
        levels = np.where(listed >= 0, aspect[np.maximum(listed, 0)], -1)
        out["distinct_aspects"] = np.array([np.unique(row[row >= 0]).size for row in levels], np.float64)
    if examination is not None:
        out["expected_clicks"] = expected_clicks(lists[:, :k], relevance, examination)
    return out


def policy_effect(without, with_rules, relevance, users, *, aspect=None, examination=None, k: int = 10,
                  alpha: float = 0.5, n_resamples: int = 1000, random_state=0) -> pd.DataFrame:
    """Compare lists built without and with the rules on the same requests.

    Parameters
    ----------
    without, with_rules : ndarray of shape (q, K), int
        The two sets of lists (columns of ``relevance``).
    relevance : ndarray of shape (q, n), float
    users : array-like of shape (q,)
        The user of each request (the unit of the paired test).
    aspect, examination, k, alpha
        As in :func:`list_measures`.
    n_resamples, random_state
        Of the paired bootstrap.

    Returns
    -------
    DataFrame
        One row per measure: ``without``, ``with_rules``, ``difference``, ``low``,
        ``high`` (95% bootstrap interval of the mean paired difference),
        ``p_value`` (Wilcoxon signed-rank), ``users``.
    """
    a = list_measures(without, relevance, aspect=aspect, examination=examination, k=k, alpha=alpha)
    b = list_measures(with_rules, relevance, aspect=aspect, examination=examination, k=k, alpha=alpha)
    codes = pd.factorize(pd.Series(np.asarray(users, dtype=object)).astype(str))[0]
    rows = []
    for name in a:
        frame = pd.DataFrame({"user": codes, "a": a[name], "b": b[name]}).dropna()
        per_user = frame.groupby("user")[["a", "b"]].mean()
        paired = paired_comparison(per_user["b"].to_numpy(), per_user["a"].to_numpy(), n_resamples=n_resamples,
                                   random_state=random_state)
        rows.append({"measure": name, "without": float(per_user["a"].mean()), "with_rules": float(per_user["b"].mean()),
                     "difference": paired.mean_difference, "low": paired.interval.low, "high": paired.interval.high,
                     "p_value": paired.p_value, "users": paired.n_pairs})
    return pd.DataFrame(rows)
