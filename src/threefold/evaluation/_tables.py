"""Private helpers of :mod:`threefold.evaluation.harness`: per-user aggregation, breakdown levels, click estimates.

Every interval is a percentile bootstrap over *users* (a user's queries stay
together): the statistic is a ratio of per-user sums, so the point value is
the mean over queries (or clicks) and the resampling respects that queries of
one user are not independent.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.sparse as sp

from threefold.evaluation.click_estimates import bootstrap_interval, click_estimates, paired_comparison
from threefold.evaluation.queries import QuerySet

ROW_COLUMNS = ["model", "metric", "k", "value", "low", "high", "breakdown", "level", "n_users"]
COMPARISON_COLUMNS = ["model", "baseline", "metric", "k", "mean_difference", "low", "high", "p_value",
                      "effect_size", "n_users"]


def interval(
    values: np.ndarray, users: np.ndarray, n_users: int, *, denominators: np.ndarray | None = None,
    n_resamples: int, random_state: int,
) -> tuple[float, float, float, int]:
    """Ratio of per-user sums with its bootstrap interval over users.

    Parameters
    ----------
    values : ndarray of shape (n,), float; NaN entries are left out
    users : ndarray of shape (n,), int in [0, n_users)
    denominators : ndarray of shape (n,) or None
        Per-entry denominators (default 1: the statistic is the mean of ``values``).

    Returns
    -------
    value, low, high : float
        NaN when no entry is defined.
    n : int
        Users with at least one defined entry.
    """
    ok = ~np.isnan(values)
    den = np.ones(values.shape) if denominators is None else denominators
    sums = np.bincount(users[ok], weights=values[ok], minlength=n_users)
    dens = np.bincount(users[ok], weights=den[ok], minlength=n_users)
    present = np.bincount(users[ok], minlength=n_users) > 0
    if not present.any() or dens[present].sum() <= 0:
        return float("nan"), float("nan"), float("nan"), int(present.sum())
    if present.sum() == 1:
        value = float(sums[present].sum() / dens[present].sum())
        return value, value, value, 1
    result = bootstrap_interval(sums[present], denominators=dens[present], n_resamples=n_resamples,
                                random_state=random_state)
    return result.estimate, result.low, result.high, int(present.sum())


def user_means(values: np.ndarray, users: np.ndarray, n_users: int) -> np.ndarray:
    """ndarray of shape (n_users,): mean of each user's defined values, NaN for users without one."""
    ok = ~np.isnan(values)
    sums = np.bincount(users[ok], weights=values[ok], minlength=n_users)
    counts = np.bincount(users[ok], minlength=n_users)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)


def compare(model: np.ndarray, base: np.ndarray, users: np.ndarray, n_users: int, *, n_resamples: int,
            random_state: int) -> dict | None:
    """Paired comparison of per-user means (users defined under both); None with fewer than 2 users."""
    a, b = user_means(model, users, n_users), user_means(base, users, n_users)
    both = ~np.isnan(a) & ~np.isnan(b)
    if both.sum() < 2:
        return None
    result = paired_comparison(a[both], b[both], n_resamples=n_resamples, random_state=random_state)
    return {"mean_difference": result.mean_difference, "low": result.interval.low, "high": result.interval.high,
            "p_value": result.p_value, "effect_size": result.effect_size, "n_users": result.n_pairs}


def bin_labels(values: np.ndarray, edges: tuple[float, ...], unit: str) -> np.ndarray:
    """Label of each value: ``"<=e0"``, ``"e0-e1"`` (upper edge included), ..., ``">eN"``; NaN -> ``"unknown"``."""
    edges = tuple(edges)
    names = [f"<={edges[0]:g}{unit}"] + [f"{a:g}-{b:g}{unit}" for a, b in zip(edges, edges[1:])] + [f">{edges[-1]:g}{unit}"]
    out = np.asarray(names, dtype=object)[np.searchsorted(np.asarray(edges, dtype=np.float64), values, side="left")]
    out[np.isnan(values)] = "unknown"
    return out


def relevant_pairs(queries: QuerySet) -> tuple[np.ndarray, np.ndarray]:
    """(query, item) of every relevant pair, CSR order."""
    rel = queries.relevant
    rows = np.repeat(np.arange(len(queries), dtype=np.int64), np.diff(rel.indptr))
    return rows, rel.indices.astype(np.int64)


def rank_of(ranked: np.ndarray, query: np.ndarray, item: np.ndarray) -> np.ndarray:
    """1-based rank of ``item`` in ``ranked[query]``; 0 when absent."""
    hit = ranked[query] == item[:, None]
    return np.where(hit.any(axis=1), hit.argmax(axis=1) + 1, 0)


def lookup(matrix: sp.csr_array, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Stored values ``matrix[rows[i], cols[i]]`` (NaN where nothing is stored); CSR with sorted indices."""
    matrix = sp.csr_array(matrix)
    matrix.sort_indices()
    n_cols = matrix.shape[1]
    keys = np.repeat(np.arange(matrix.shape[0], dtype=np.int64), np.diff(matrix.indptr)) * n_cols + matrix.indices
    if keys.size == 0:
        return np.full(rows.shape, np.nan)
    want = rows.astype(np.int64) * n_cols + cols
    at = np.minimum(np.searchsorted(keys, want), keys.size - 1)
    return np.where(keys[at] == want, matrix.data[at].astype(np.float64), np.nan)


def ratio_at(ratios: np.ndarray, positions: np.ndarray) -> np.ndarray:
    """Examination ratio θ_k/θ_1 at 1-based positions (the last ratio beyond the estimated ones)."""
    idx = np.clip(positions.astype(np.int64) - 1, 0, ratios.size - 1)
    return ratios[idx]


def click_rows(
    name: str, ranked: np.ndarray, queries: QuerySet, users: np.ndarray, n_users: int, ratios: np.ndarray,
    ks: tuple[int, ...], clip: float, *, n_resamples: int, random_state: int,
) -> list[dict]:
    """Naive, IPS and SNIPS click-through of a ranking, one observation per logged click with a position.

    Reward of a click on item ``d``: ``θ̃_r`` where ``r`` is the rank the model
    gives ``d`` (0 outside the top K); weight ``min(1 / θ̃_p, clip)`` with ``p``
    its logged position (θ̃ = θ/θ_1). SNIPS is consistent for
    ``Σ γ·θ̃_r / Σ γ`` over the shown items (γ: relevance); naive weighs every click alike.
    """
    if queries.shown_positions is None:
        return []
    query, item = relevant_pairs(queries)
    pos = lookup(queries.shown_positions, query, item)
    ok = np.isfinite(pos) & (pos >= 1)
    query, item, pos = query[ok], item[ok], pos[ok]
    if query.size == 0:
        return []
    weights = 1.0 / ratio_at(ratios, pos)
    rank = rank_of(ranked, query, item)
    rows = []
    for k in ks:
        reward = np.where((rank >= 1) & (rank <= k), ratio_at(ratios, np.maximum(rank, 1)), 0.0)
        est = click_estimates(reward, weights, max_weight=clip)
        w = np.minimum(weights, clip)
        for metric, value, num, den in (("click_through_naive", est.naive, reward, None),
                                        ("click_through_ips", est.ips, w * reward, None),
                                        ("click_through_snips", est.snips, w * reward, w)):
            _, low, high, n = interval(num, users[query], n_users, denominators=den, n_resamples=n_resamples,
                                       random_state=random_state)
            rows.append(row(name, metric, k, (value, low, high, n)))
    return rows


def row(model: str, metric: str, k: int | None, stats: tuple, breakdown: str = "all", level: str = "all") -> dict:
    value, low, high, n = stats
    return {"model": model, "metric": metric, "k": k, "value": value, "low": low, "high": high,
            "breakdown": breakdown, "level": level, "n_users": n}


def text_table(table: pd.DataFrame, metrics: tuple[str, ...] = ("recall", "ndcg", "mrr", "hit_rate", "ndcg_true",
                                                          "click_through_snips")) -> str:
    """Overall metrics as ``value [low, high]``: one line per model and metric, one column per K."""
    main = table[(table["breakdown"] == "all") & table["metric"].isin(metrics)]
    if main.empty:
        return "(no overall metrics)"
    cells = main.assign(
        k=main["k"].astype("Int64"),
        text=[f"{v:.4f} [{lo:.4f}, {hi:.4f}]" for v, lo, hi in zip(main["value"], main["low"], main["high"])],
    )
    wide = cells.pivot(index=["model", "metric"], columns="k", values="text")
    order = [m for m in metrics if m in set(main["metric"])]
    wide = wide.reindex(pd.MultiIndex.from_product([sorted(set(main["model"])), order], names=["model", "metric"]))
    wide.columns = [f"@{k}" for k in wide.columns]
    return wide.dropna(how="all").to_string()
