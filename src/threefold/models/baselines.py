"""Baselines ranked through the same harness as the factor models.

Every ranker of the evaluation harness (:mod:`threefold.evaluation.harness`) has one
method, ``bind(queries)``, returning a block scorer ``fn(rows, items=None)``:
the scores of the queries at positions ``rows`` for the item indices ``items``
(increasing; None: the whole item universe), shape ``(len(rows), len(items))``. The harness masks the candidates and takes the
top K, identically for every ranker.

* :class:`RandomBaseline`: a uniform score per (query, item) from a counter-based
  hash of the seed, the query id and the item index, so a query's list does not
  depend on how queries are blocked.
* :class:`PopularityBaseline`: clicks per item in ``[t - window, t)`` at each
  request time ``t``, over all requests (global popularity) or over the requests
  with the same levels of some context modes (context popularity). It uses only
  events strictly before each request, as a production popularity list refreshed
  continuously would; never one frozen at the cutoff. Common practice for news.
* Context-free implicit matrix factorization is the CP engine with the
  ``"user*item"`` structure (:func:`context_free_mf`), not a second code path.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
import pandas as pd

from threefold.core.checks import check_int
from threefold.core.params import STRINGS, Param, ParamModel, ParamTable, int_rule, optional
from threefold.core.scoring import Ranker
from threefold.data.context import ContextSpec, derive_contexts, spec_name
from threefold.models.cp.model import CPModel
from threefold.data.timestamps import duration_rule, to_seconds

__all__ = ["RandomBaseline", "PopularityBaseline", "window_counts", "context_free_mf", "hash_uniform",
           "RANDOM_PARAMS", "POPULARITY_PARAMS"]

#: The parameters of :class:`RandomBaseline`.
RANDOM_PARAMS = ParamTable("RandomBaseline", [
    Param("random_state", 0, int_rule(low=0), "seed of the per-(query, item) random scores"),
])

#: The parameters of :class:`PopularityBaseline`.
POPULARITY_PARAMS = ParamTable("PopularityBaseline", [
    Param("window", "24h", optional(duration_rule), "length of the recent window counted before each request "
          "(seconds or e.g. '6h'; None: every earlier click)"),
    Param("context_modes", (), STRINGS, "context modes whose levels must match the request's (empty: global popularity)"),
])

BlockScorer = Callable[[np.ndarray], np.ndarray]

_MASK64 = np.uint64(0xFFFFFFFFFFFFFFFF)


def _splitmix64(x: np.ndarray) -> np.ndarray:
    """The SplitMix64 finalizer (Steele, Lea & Flood, OOPSLA 2014) on uint64 arrays."""
    with np.errstate(over="ignore"):
        x = (x + np.uint64(0x9E3779B97F4A7C15)) & _MASK64
        x = ((x ^ (x >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)) & _MASK64
        x = ((x ^ (x >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)) & _MASK64
        return x ^ (x >> np.uint64(31))


def hash_uniform(seed: int, query_ids: np.ndarray, items: int | np.ndarray) -> np.ndarray:
    """Uniform numbers in [0, 1) from ``(seed, query id, item index)``.

    Parameters
    ----------
    seed : int
    query_ids : ndarray of shape (q,), int
    items : int or ndarray of shape (n,), int
        The item indices (an int ``n`` means ``0 .. n - 1``).

    Returns
    -------
    ndarray of shape (q, n), float64
    """
    items = np.arange(items) if np.isscalar(items) else np.asarray(items)
    with np.errstate(over="ignore"):
        q = _splitmix64(np.uint64(seed) ^ _splitmix64(np.asarray(query_ids, dtype=np.uint64)))
        x = _splitmix64(q[:, None] ^ items.astype(np.uint64)[None, :])
    return (x >> np.uint64(11)).astype(np.float64) * 2.0**-53


class RandomBaseline(ParamModel, Ranker):
    """Uniformly random ranking of the candidates.

    Parameters
    ----------
    random_state : int, default=0
    """

    params = RANDOM_PARAMS
    learns_from_events = True

    def fit(self, events: pd.DataFrame | None = None, contexts: Sequence[ContextSpec] = ()) -> "RandomBaseline":
        """Nothing to learn; returns self."""
        self.seed_ = check_int("random_state", self.random_state, low=0, owner="RandomBaseline")
        return self

    def bind(self, queries) -> BlockScorer:
        seed = self.seed_ if hasattr(self, "seed_") else self.fit().seed_
        return lambda rows, items=None: hash_uniform(seed, queries.index[rows], queries.n_items if items is None else items)


def window_counts(
    event_times: np.ndarray, event_keys: np.ndarray, n_keys: int, query_times: np.ndarray, window: int | None
) -> np.ndarray:
    """Events per key in ``[t - window, t)`` for every query time ``t``.

    Parameters
    ----------
    event_times : ndarray of shape (n,), int64, sorted ascending
    event_keys : ndarray of shape (n,), int, in [0, n_keys)
    n_keys : int
    query_times : ndarray of shape (b,), int64
    window : int or None
        Seconds; None counts every earlier event.

    Returns
    -------
    ndarray of shape (b, n_keys), int64

    Notes
    -----
    With the query times sorted, an event at time ``e`` counts for the queries
    ``j`` with ``e < t_j <= e + window``: a contiguous range of sorted queries.
    Each event adds +1 at the range start and -1 at its end of a difference
    array, and a cumulative sum over queries gives every count: cost
    O(events in ``[min t - window, max t)`` + b · n_keys), no loop over
    queries. Slow reference: ``sum((t - window <= e) & (e < t))`` per key.
    """
    b = query_times.shape[0]
    if b == 0:
        return np.zeros((0, n_keys), dtype=np.int64)
    order = np.argsort(query_times, kind="stable")
    ts = query_times[order]
    low = np.iinfo(np.int64).min if window is None else ts[0] - window
    lo = np.searchsorted(event_times, low, side="left")
    hi = np.searchsorted(event_times, ts[-1], side="left")
    times, keys = event_times[lo:hi], np.asarray(event_keys[lo:hi], dtype=np.int64)
    first = np.searchsorted(ts, times, side="right")
    last = np.full(times.shape, b, dtype=np.int64) if window is None else np.searchsorted(ts, times + window, side="right")
    diff = np.bincount(first * n_keys + keys, minlength=(b + 1) * n_keys)
    diff -= np.bincount(last * n_keys + keys, minlength=(b + 1) * n_keys)
    counts = np.cumsum(diff.reshape(b + 1, n_keys)[:b], axis=0)
    out = np.empty_like(counts)
    out[order] = counts
    return out


class PopularityBaseline(ParamModel, Ranker):
    """Clicks per item in a recent window before each request, globally or within context levels.

    Parameters
    ----------
    window : int or str or None, default="24h"
        Length of the recent window (seconds or a duration such as ``"6h"``);
        None counts every earlier click.
    context_modes : sequence of str, default=()
        Empty: global popularity. Mode names: popularity among the clicks made
        in the same levels of these context modes as the query (context popularity).

    Notes
    -----
    Ties (items with equal counts, e.g. zero) are broken by item index by the
    harness, like every ranker's.
    """

    params = POPULARITY_PARAMS
    learns_from_events = True

    def fit(self, events: pd.DataFrame, contexts: Sequence[ContextSpec] = ()) -> "PopularityBaseline":
        """Keep the click times, items and context levels of ``events``; returns self.

        Parameters
        ----------
        events : DataFrame
            Every event the baseline may count (e.g. a stage's training plus
            evaluation events); each request only counts clicks strictly before it.
        contexts : sequence of ContextSpec
            Specifications of the modes named in ``context_modes``.
        """
        self.window_ = None if self.window is None else to_seconds(self.window, "window")
        modes = tuple(self.context_modes)
        specs = {spec_name(s): s for s in contexts}
        missing = [m for m in modes if m not in specs]
        if missing:
            raise ValueError(f"PopularityBaseline: no context specification for the mode(s) {missing}; "
                             f"pass them in 'contexts' (given: {list(specs)}).")
        clicks = events[events["event"] == "click"] if "event" in events.columns else events
        order = np.argsort(clicks["timestamp"].to_numpy(dtype=np.int64), kind="stable")
        clicks = clicks.iloc[order]
        self.modes_ = modes
        self.times_ = clicks["timestamp"].to_numpy(dtype=np.int64)
        self.items_ = clicks["item_id"].astype(str).to_numpy(dtype=object)
        levels = derive_contexts(clicks, [specs[m] for m in modes])
        codes, self.combinations_ = pd.factorize(_combination_keys(levels, modes))
        self.groups_ = codes.astype(np.int64)
        self._coded = None
        return self

    def _events_for(self, items) -> tuple[np.ndarray, np.ndarray, dict]:
        """Click times, item indices in the universe ``items`` and the clicks of each context group (cached)."""
        if self._coded is None or self._coded[0] is not items:
            code = items.encode(self.items_, policy="drop").codes.astype(np.int64)
            keep = np.flatnonzero(code >= 0)
            groups = self.groups_[keep]
            order = np.argsort(groups, kind="stable")  # stable: time order kept within a group
            bounds = np.searchsorted(groups[order], np.arange(len(self.combinations_) + 1))
            by_group = {g: order[bounds[g]:bounds[g + 1]] for g in range(len(self.combinations_))}
            self._coded = (items, self.times_[keep], code[keep], by_group)
        return self._coded[1:]

    def bind(self, queries) -> BlockScorer:
        if not hasattr(self, "times_"):
            raise RuntimeError("This PopularityBaseline is not fitted yet; call fit(events) first.")
        n_items = queries.n_items
        times, items, by_group = self._events_for(queries.items)
        if not self.modes_:
            def score_all(rows: np.ndarray, columns: np.ndarray | None = None) -> np.ndarray:
                out = window_counts(times, items, n_items, queries.times[rows], self.window_).astype(np.float64)
                return out if columns is None else out[:, columns]

            return score_all
        missing = [m for m in self.modes_ if m not in queries.contexts.columns]
        if missing:
            raise ValueError(f"The queries have no context mode(s) {missing}.")
        query_group = pd.Index(self.combinations_).get_indexer(_combination_keys(queries.contexts, self.modes_))

        def score(rows: np.ndarray, columns: np.ndarray | None = None) -> np.ndarray:
            rows = np.arange(len(queries))[rows]
            out = np.zeros((rows.size, n_items))
            groups = query_group[rows]
            for g in np.unique(groups[groups >= 0]):  # one pass per context combination, not per query
                sel = np.flatnonzero(groups == g)
                ev = by_group[g]
                out[sel] = window_counts(times[ev], items[ev], n_items, queries.times[rows[sel]], self.window_)
            return out if columns is None else out[:, columns]

        return score


def _combination_keys(levels: pd.DataFrame, modes: Sequence[str]) -> np.ndarray:
    """One string per row joining the levels of ``modes`` (a unit separator between them)."""
    if not modes:
        return np.zeros(len(levels), dtype=object) if len(levels) else np.zeros(0, dtype=object)
    out = levels[modes[0]].astype(str).to_numpy(dtype=object)
    for mode in modes[1:]:
        out = out + "\x1f" + levels[mode].astype(str).to_numpy(dtype=object)
    return out


def context_free_mf(**params) -> CPModel:
    """Context-free implicit matrix factorization: the CP engine with the ``"user*item"`` structure.

    Fit it on the same tensor as the context-aware models; the context modes
    are simply unused by every component. ``params`` go to :class:`CPModel`
    (``structure`` is fixed).
    """
    if "structure" in params:
        raise ValueError("context_free_mf fixes structure='user*item'; pass the other CPModel parameters only.")
    return CPModel(structure="user*item", **params)
