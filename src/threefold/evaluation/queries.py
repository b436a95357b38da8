"""The ranking task of offline evaluation: queries, their candidates and their clicks.

Every request of the evaluation events (a ``request_id``, or a single click row
when the log has no request ids) with at least one click is a *query*: the
user, the context levels at the request and the request time (its earliest
row). Its relevant items are the items clicked in it.

Candidates (``candidates=``)
----------------------------
``"eligible"``
    The items live at the request time per the catalog:
    ``published_at <= t < expires_at``. An item the catalog lacks, or with no
    ``published_at``, counts as published when it is first seen in the log
    (``history``), and an item with no ``expires_at`` never expires.
``"shown"``
    The list actually shown in that request (its impressions); needed for the
    unbiased click estimates, which can only reweight what was shown.

Clicks on items that are not candidates of their query cannot be ranked by any
model; they are removed from the relevant items and counted in the report, and
a query left without a relevant candidate is dropped and counted.

Item indices
------------
All models rank the items of one universe: the training item vocabulary first
(indices kept), then every other item of the catalog and the evaluation events
in sorted label order (:meth:`Vocabulary.extend`). Ties between equal scores
are broken by this index (lower first; :func:`threefold.ranking.topk.top_k`), so a
model that cannot tell items apart favors items seen in training, in label order.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Literal, Sequence

import numpy as np
import pandas as pd
import scipy.sparse as sp

from threefold.core.checks import check_choice
from threefold.data.context import ContextSpec, derive_contexts
from threefold.evaluation.splits import _requests
from threefold.core.vocabulary import Vocabulary

__all__ = ["Candidates", "QuerySet", "build_queries", "catalog_times"]

CandidateKind = Literal["eligible", "shown"]
_ITEM_FIELDS = ("item_id", "event", "position", "dwell_seconds")
_NEVER = np.iinfo(np.int64).max
_ALWAYS = np.iinfo(np.int64).min


@dataclass(frozen=True, eq=False)
class Candidates:
    """Which items each query may rank.

    Attributes
    ----------
    kind : {"eligible", "shown"}
    n_items : int
    times : ndarray of shape (q,), int64
        Request times (used by ``"eligible"``).
    published, expires : ndarray of shape (n_items,), int64, or None
        Live interval ``[published, expires)`` of each item (``"eligible"``).
    shown : scipy.sparse.csr_array of shape (q, n_items), bool, or None
        The shown lists (``"shown"``).
    """

    kind: str
    n_items: int
    times: np.ndarray
    published: np.ndarray | None = None
    expires: np.ndarray | None = None
    shown: sp.csr_array | None = None

    def mask(self, rows: np.ndarray | slice) -> np.ndarray:
        """ndarray of shape (b, n_items), bool: the candidates of the queries ``rows``."""
        if self.kind == "shown":
            return self.shown[rows].toarray()
        t = self.times[rows][:, None]
        return (self.published[None, :] <= t) & (t < self.expires[None, :])

    def contains(self, query: np.ndarray, item: np.ndarray) -> np.ndarray:
        """ndarray of shape (n,), bool: whether each (query, item) pair is a candidate."""
        if self.kind == "shown":
            keys = _pair_keys(self.shown, self.n_items)
            if keys.size == 0:
                return np.zeros(np.shape(query), dtype=bool)
            want = query.astype(np.int64) * self.n_items + item
            pos = np.minimum(np.searchsorted(keys, want), keys.size - 1)
            return keys[pos] == want
        t = self.times[query]
        return (self.published[item] <= t) & (t < self.expires[item])

    def take(self, rows: np.ndarray) -> "Candidates":
        """The candidates of a subset of queries."""
        shown = None if self.shown is None else self.shown[rows]
        return replace(self, times=self.times[rows], shown=shown)


def _pair_keys(matrix: sp.csr_array, n_cols: int) -> np.ndarray:
    """Sorted ``row * n_cols + col`` of the stored entries of a CSR matrix with sorted indices."""
    rows = np.repeat(np.arange(matrix.shape[0], dtype=np.int64), np.diff(matrix.indptr))
    return rows * n_cols + matrix.indices


@dataclass(frozen=True, eq=False)
class QuerySet:
    """Queries of one evaluation window, all ranked over the same item universe.

    Attributes
    ----------
    users : ndarray of shape (q,), object (str)
    contexts : DataFrame of shape (q, n_context_modes), object (str)
        Context levels of each query, one column per context mode.
    times : ndarray of shape (q,), int64
        Request time, epoch seconds (UTC). Queries are sorted by it.
    request_ids : ndarray of shape (q,), object
    items : Vocabulary
        The item universe (see the module docstring).
    relevant : scipy.sparse.csr_array of shape (q, n_items), float64
        Clicks per (query, candidate item).
    candidates : Candidates
    shown_positions : scipy.sparse.csr_array of shape (q, n_items), float64, or None
        1-based position of each shown item (``"shown"`` candidates only).
    index : ndarray of shape (q,), int64
        Stable query ids (positions in the full query set), kept by :meth:`take`.
    requests : DataFrame of shape (q, ...)
        The earliest event row of each request without its item fields
        (``user_id``, ``timestamp``, context columns, ...), e.g. for a
        simulator's true relevance.
    report : dict
        Counts of requests, queries and dropped clicks.
    """

    users: np.ndarray
    contexts: pd.DataFrame
    times: np.ndarray
    request_ids: np.ndarray
    items: Vocabulary
    relevant: sp.csr_array
    candidates: Candidates
    shown_positions: sp.csr_array | None
    index: np.ndarray
    requests: pd.DataFrame
    report: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.times.shape[0])

    @property
    def n_items(self) -> int:
        return len(self.items)

    def take(self, rows: np.ndarray) -> "QuerySet":
        """The queries ``rows`` (positions), with their ids kept in ``index``."""
        rows = np.asarray(rows, dtype=np.int64)
        return replace(
            self, users=self.users[rows], contexts=self.contexts.iloc[rows].reset_index(drop=True),
            times=self.times[rows], request_ids=self.request_ids[rows], relevant=self.relevant[rows],
            candidates=self.candidates.take(rows),
            shown_positions=None if self.shown_positions is None else self.shown_positions[rows],
            index=self.index[rows], requests=self.requests.iloc[rows].reset_index(drop=True),
        )

    def with_context(self, mode: str, level: str | np.ndarray) -> "QuerySet":
        """The same queries with one context mode set to ``level`` (a label, or one per query)."""
        if mode not in self.contexts.columns:
            raise KeyError(f"No context mode {mode!r}; the queries have {list(self.contexts.columns)}.")
        contexts = self.contexts.copy()
        contexts[mode] = level
        return replace(self, contexts=contexts)


def _epoch_column(values: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """int64 epoch seconds of a catalog time column and the mask of values present."""
    if pd.api.types.is_datetime64_any_dtype(values):
        stamps = pd.to_datetime(values, utc=True)
        out = np.full(len(values), _ALWAYS, dtype=np.int64)
        ok = stamps.notna().to_numpy()
        out[ok] = stamps[ok].dt.as_unit("s").astype("int64").to_numpy()
        return out, ok
    numeric = pd.to_numeric(values, errors="coerce")
    ok = numeric.notna().to_numpy()
    out = np.full(len(values), _ALWAYS, dtype=np.int64)
    out[ok] = numeric[ok].to_numpy(dtype=np.float64).astype(np.int64)
    return out, ok


def catalog_times(
    items: Vocabulary, catalog: pd.DataFrame | None, history: pd.DataFrame | None
) -> tuple[np.ndarray, np.ndarray]:
    """Live interval of every item of a universe.

    Parameters
    ----------
    items : Vocabulary
    catalog : DataFrame or None
        ``item_id`` with optional ``published_at`` / ``expires_at`` (epoch
        seconds or datetimes).
    history : DataFrame or None
        Events whose earliest row per item stands in for a missing ``published_at``.

    Returns
    -------
    published, expires : ndarray of shape (n_items,), int64
        ``published`` is ``2**63 - 1`` (never live) for an item with neither a
        catalog time nor any event; ``expires`` is ``2**63 - 1`` when unknown.
    """
    n = len(items)
    published = np.full(n, _NEVER, dtype=np.int64)
    expires = np.full(n, _NEVER, dtype=np.int64)
    if history is not None and len(history):
        code = items.encode(history["item_id"], policy="drop").codes
        keep = code >= 0
        np.minimum.at(published, code[keep], history["timestamp"].to_numpy(dtype=np.int64)[keep])
    if catalog is not None:
        if "item_id" not in catalog.columns:
            raise KeyError(f"The catalog needs an 'item_id' column; it has {list(catalog.columns)}.")
        code = items.encode(catalog["item_id"].astype(str), policy="drop").codes
        keep = code >= 0
        for name, target in (("published_at", published), ("expires_at", expires)):
            if name in catalog.columns:
                values, ok = _epoch_column(catalog[name])
                use = keep & ok
                target[code[use]] = values[use]
    return published, expires


def build_queries(
    events: pd.DataFrame,
    contexts: Sequence[ContextSpec] = (),
    *,
    candidates: CandidateKind = "eligible",
    catalog: pd.DataFrame | None = None,
    item_vocabulary: Vocabulary | None = None,
    history: pd.DataFrame | None = None,
) -> QuerySet:
    """Queries of the evaluation events.

    Parameters
    ----------
    events : DataFrame
        Evaluation events (e.g. ``Stage.evaluate``), normalized.
    contexts : sequence of ContextSpec
        The context modes of the models, derived at the request's earliest row.
    candidates : {"eligible", "shown"}, default="eligible"
    catalog : DataFrame or None
        Items catalog (``item_id``, ``published_at``, ``expires_at``).
    item_vocabulary : Vocabulary or None
        The training item vocabulary; its indices come first in the universe.
    history : DataFrame or None
        Events before the window (e.g. ``Stage.train``), used for the
        first-seen times of items without a catalog ``published_at``.

    Returns
    -------
    QuerySet
    """
    check_choice("candidates", candidates, ("eligible", "shown"), owner="build_queries")
    for column in ("user_id", "item_id", "timestamp"):
        if column not in events.columns:
            raise KeyError(f"build_queries needs the column {column!r}; the events have {list(events.columns)}.")
    events = events.reset_index(drop=True)
    ts = events["timestamp"].to_numpy(dtype=np.int64)
    event = events["event"].to_numpy(dtype=object) if "event" in events.columns else np.full(len(events), "click", object)
    is_click, is_impression = event == "click", event == "impression"
    if candidates == "shown" and not (is_impression.any() and "request_id" in events.columns):
        raise ValueError("candidates='shown' needs impressions with request ids; use candidates='eligible'.")
    request = _requests(events)
    if "request_id" not in events.columns:
        request = np.where(is_click, request, -1)  # without request ids only clicks make requests
    valid = request >= 0
    n_req = int(request.max(initial=-1)) + 1
    order = np.lexsort((np.arange(len(events)), ts))
    first_row = np.full(n_req, -1, dtype=np.int64)
    seen = order[valid[order]]
    uniq_requests, first_pos = np.unique(request[seen], return_index=True)
    first_row[uniq_requests] = seen[first_pos]
    has_click = np.bincount(request[is_click & valid], minlength=n_req) > 0
    query_requests = np.flatnonzero(has_click & (first_row >= 0))
    query_requests = query_requests[np.lexsort((query_requests, ts[first_row[query_requests]]))]
    rows = first_row[query_requests]
    query_of_request = np.full(n_req, -1, dtype=np.int64)
    query_of_request[query_requests] = np.arange(query_requests.size)

    universe = item_vocabulary if item_vocabulary is not None else Vocabulary((), name="item")
    extra = [events["item_id"].astype(str)]
    if catalog is not None and "item_id" in catalog.columns:
        extra.append(catalog["item_id"].astype(str))
    universe = universe.extend(pd.concat(extra, ignore_index=True))
    n_items = len(universe)
    item = universe.encode(events["item_id"].astype(str), policy="error").codes.astype(np.int64)
    q = query_requests.size
    times = ts[rows]

    shown = positions = None
    if is_impression.any() and "request_id" in events.columns:
        imp = np.flatnonzero(is_impression & valid)
        imp = imp[query_of_request[request[imp]] >= 0]
        has_position = "position" in events.columns
        pos = (pd.to_numeric(events["position"], errors="coerce").to_numpy(dtype=np.float64)[imp] if has_position
               else np.zeros(imp.size))
        key = query_of_request[request[imp]] * n_items + item[imp]
        first = np.lexsort((pos, key))
        uniq, at = np.unique(key[first], return_index=True)
        cells = (uniq // n_items, uniq % n_items)
        shown = sp.csr_array((np.ones(uniq.size, dtype=bool), cells), shape=(q, n_items))
        if has_position:
            positions = sp.csr_array((pos[first][at], cells), shape=(q, n_items))
    if candidates == "shown":
        cand = Candidates(kind="shown", n_items=n_items, times=times, shown=shown)
    else:
        hist = events if history is None else pd.concat([history[["item_id", "timestamp"]], events[["item_id", "timestamp"]]])
        published, expires = catalog_times(universe, catalog, hist)
        cand = Candidates(kind="eligible", n_items=n_items, times=times, published=published, expires=expires)

    clicks = np.flatnonzero(is_click & valid)
    cq, ci = query_of_request[request[clicks]], item[clicks]
    keep = cq >= 0
    cq, ci = cq[keep], ci[keep]
    inside = cand.contains(cq, ci) if cq.size else np.zeros(0, bool)
    relevant = sp.csr_array((np.ones(int(inside.sum())), (cq[inside], ci[inside])), shape=(q, n_items))
    relevant.sum_duplicates()
    relevant.sort_indices()
    kept = np.flatnonzero(np.diff(relevant.indptr) > 0)
    context_frame = derive_contexts(events.iloc[rows], contexts).reset_index(drop=True)
    report = {
        "requests": int(np.count_nonzero(first_row >= 0)),
        "clicked_requests": int(q),
        "clicks": int(cq.size),
        "clicks_not_candidates": int(cq.size - inside.sum()),
        "queries_without_candidate_click": int(q - kept.size),
        "queries": int(kept.size),
        "candidates": candidates,
    }
    full = QuerySet(
        users=events["user_id"].astype(str).to_numpy(dtype=object)[rows],
        contexts=context_frame,
        times=times,
        request_ids=(events["request_id"].astype(object).to_numpy()[rows] if "request_id" in events.columns
                     else np.asarray(rows, dtype=object)),
        items=universe,
        relevant=relevant,
        candidates=cand,
        shown_positions=positions,
        index=np.arange(q, dtype=np.int64),
        requests=events.iloc[rows].drop(columns=[c for c in _ITEM_FIELDS if c in events.columns]).reset_index(drop=True),
        report=report,
    )
    return replace(full.take(kept), index=np.arange(kept.size, dtype=np.int64))
