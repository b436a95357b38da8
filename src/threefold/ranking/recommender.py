"""Rank items for requests with a saved model: the recommender behind serving and batch scoring.

:class:`Recommender` ranks items for a DataFrame of requests. It resolves ids to
factor rows through :class:`threefold.core.resolve.ResolvedScorer`, the same
rule offline evaluation uses, and selects with :mod:`threefold.ranking.selection`.
It imports nothing of MLflow; :mod:`threefold.tracking.pyfunc` wraps it for any
MLflow client.

Input rows: ``request_id``, ``user_id``, the context columns (a column named
like a context mode gives its level; otherwise the level is derived from the
raw columns the mode is built from and ``timestamp``, int64 epoch seconds UTC)
and optionally ``item_id``: the rows of one request that carry an ``item_id``
are its candidates, ranked as given; a request without one ranks the whole
catalog of items live at its ``timestamp`` (every item when there is none).

Output: ``request_id``, ``user_id``, ``item_id``, ``rank`` (1 = best), ``score``
and ``status``, the top ``k`` per request. Nothing unknown fails the batch:

===================  ==========================================================
``unknown_user``     user missing or not seen in training: scored as the
                     average user (the mean of the user factor rows)
``unknown_context``  a level missing, not derivable or not seen in training:
                     the mean of that mode's level rows (context marginalized)
``unknown_item``     a candidate not seen in training: item row zero, the
                     fold-in of an item with no events (score 0 in CP/Tucker)
``no_candidates``    nothing to rank: one row with no item, rank 0, score NaN
``ok``               none of the above
===================  ==========================================================

Several flags join with ``;`` (``unknown_user;unknown_context``).
"""

from __future__ import annotations

import os
from typing import Sequence

import numpy as np
import pandas as pd

from threefold.core.checks import check_choice, check_int
from threefold.core.resolve import FALLBACK_LABEL, ResolvedScorer
from threefold.data.context import ColumnContext, CrossedContext, parse_context, spec_name
from threefold.models.model_io import load_model
from threefold.ranking.selection import top_k

__all__ = ["Recommender", "OUTPUT_COLUMNS", "DEFAULT_K", "context_specs", "raw_columns"]

OUTPUT_COLUMNS = ("request_id", "user_id", "item_id", "rank", "score", "status")
_FLAG_ORDER = ("unknown_user", "unknown_context", "unknown_item", "no_candidates")
_BLOCK_CELLS = 1 << 22
#: What ``explain`` may ask for: no reasons, the three largest, all of them.
EXPLAIN_CHOICES = ("none", "top3", "all")
#: List length when a request or a caller names none (the one place this default lives).
DEFAULT_K = 10


def context_specs(serving: dict) -> list:
    """Context specifications from the ``serving`` metadata saved with a model."""
    return [parse_context(name, timezone=serving["timezone"], daypart_starts=serving["daypart_starts"],
                          daypart_labels=serving["daypart_labels"]) for name in serving["contexts"]]


def raw_columns(spec) -> list[str]:
    if isinstance(spec, ColumnContext):
        return [spec.column]
    if isinstance(spec, CrossedContext):
        return [c for part in spec.parts for c in raw_columns(part)]
    return []


class Recommender:
    """A loaded model ready to rank requests; see the module docstring for the rules.

    Parameters
    ----------
    result : CPResult or TuckerResult
        A fitted model whose mode names are ``("user", "item", *context modes)``.
    contexts : sequence of ContextSpec
        How each context mode's level is derived from request columns.
    published, expires : ndarray of shape (n_items,), int64, or None
        Live interval of every item of the model (epoch seconds); None: always live.
    """

    def __init__(self, result, contexts: Sequence, published: np.ndarray | None = None,
                 expires: np.ndarray | None = None):
        names = tuple(spec_name(s) for s in contexts)
        if tuple(result.mode_names[2:]) != names:
            raise ValueError(f"The model's context modes {result.mode_names[2:]} differ from the specifications {names}.")
        self.contexts = list(contexts)
        self.items = result.vocabularies[1]
        self.resolved = ResolvedScorer(result)
        scorer = self.resolved.scorer
        self.item_factors = np.asarray(scorer.item_matrix(), dtype=np.float64)
        self.reason_labels, self.reason_group = result.reason_groups()
        bias = scorer.item_bias()
        self.item_bias = None if bias is None else np.asarray(bias, dtype=np.float64)
        n_items = len(self.items)
        self.published = np.full(n_items, np.iinfo(np.int64).min) if published is None else np.asarray(published, np.int64)
        self.expires = np.full(n_items, np.iinfo(np.int64).max) if expires is None else np.asarray(expires, np.int64)

    @classmethod
    def from_folder(cls, path: str | os.PathLike) -> "Recommender":
        """Load a model folder written by :func:`threefold.models.model_io.save_model` with ``serving`` metadata."""
        result, meta, extra = load_model(path)
        serving = meta["extra"].get("serving")
        if serving is None:
            raise ValueError(f"The model at {path} has no serving metadata (context specifications); "
                             "save it with extra={'serving': ...} as the train pipeline does.")
        return cls(result, context_specs(serving), extra.get("published_at"), extra.get("expires_at"))

    # ------------------------------------------------------------------ inputs
    def _query_codes(self, first: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """User and context rows of each request (fallback rows for unknowns), and their flags."""
        users = first["user_id"].astype("string").fillna(FALLBACK_LABEL).to_numpy(dtype=object)
        labels = [self._context_labels(spec, first) for spec in self.contexts]
        return self.resolved.resolve_queries(users, labels)

    @staticmethod
    def _context_labels(spec, first: pd.DataFrame) -> np.ndarray:
        name = spec_name(spec)
        out = np.full(len(first), FALLBACK_LABEL, dtype=object)
        if name in first.columns:
            values = first[name].astype("string")
            ok = values.notna() & (values.str.strip() != "")
            out[ok.to_numpy(dtype=bool)] = values[ok].to_numpy(dtype=object)
            return out
        rows = first
        if "timestamp" in first.columns:
            stamps = pd.to_numeric(first["timestamp"], errors="coerce")
            rows = first.loc[stamps.notna()].assign(timestamp=stamps[stamps.notna()].astype("int64"))
        try:
            derived = spec.labels_for(rows)
        except (KeyError, ValueError):  # a column the mode needs is absent: every level falls back
            return out
        out[first.index.get_indexer(rows.index)] = derived.to_numpy(dtype=object)
        return out

    # ------------------------------------------------------------------ ranking
    def recommend(self, requests: pd.DataFrame, k: int = DEFAULT_K, explain: str = "none") -> pd.DataFrame:
        """Top ``k`` items of every request; see the module docstring.

        Parameters
        ----------
        requests : DataFrame
            Rows with ``request_id`` and ``user_id``, optional ``timestamp``,
            context columns and ``item_id``.
        k : int, default=10
        explain : {"none", "top3", "all"}, default="none"
            Reason columns to add (:meth:`reasons`): none, the three largest, or every reason.

        Returns
        -------
        DataFrame with the columns of :data:`OUTPUT_COLUMNS` (then ``reason_1``,
        ``reason_1_share``, ... with ``explain``), requests in order of first appearance.
        """
        k = check_int("k", k, low=1, owner="predict")
        check_choice("explain", explain, EXPLAIN_CHOICES, owner="predict")
        missing = [c for c in ("request_id", "user_id") if c not in requests.columns]
        if missing:
            raise ValueError(f"The requests need the column(s) {missing}; they have {list(requests.columns)}.")
        frame = requests.reset_index(drop=True)
        request_codes, request_ids = pd.factorize(frame["request_id"].astype("string").fillna(""), sort=False)
        first = frame.iloc[np.unique(request_codes, return_index=True)[1]].reset_index(drop=True)
        users, contexts, unknown_user, unknown_context = self._query_codes(first)
        queries = np.asarray(self.resolved.query_matrix(users, contexts), dtype=np.float64)
        has_items = "item_id" in frame.columns
        item_ids = frame["item_id"].astype("string") if has_items else None
        with_candidates = np.zeros(len(first), dtype=bool)
        if has_items:
            with_candidates[np.unique(request_codes[item_ids.notna().to_numpy(dtype=bool)])] = True
        parts = []
        if with_candidates.any():
            parts.append(self._rank_candidates(frame, request_codes, item_ids, queries, with_candidates, k))
        catalog = np.flatnonzero(~with_candidates)
        if catalog.size:
            parts.append(self._rank_catalog(first, queries, catalog, k))
        ranked = pd.concat(parts, ignore_index=True).sort_values(["request", "rank"], kind="stable")
        request = ranked["request"].to_numpy()
        flags = {"unknown_user": unknown_user[request], "unknown_context": unknown_context[request],
                 "unknown_item": ranked["unknown_item"].to_numpy(dtype=bool),
                 "no_candidates": ranked["rank"].to_numpy() == 0}
        status = np.full(len(ranked), "", dtype=object)
        for flag in _FLAG_ORDER:
            status = np.where(flags[flag], np.where(status == "", flag, status + ";" + flag), status)
        status[status == ""] = "ok"
        out = pd.DataFrame({
            "request_id": np.asarray(request_ids, dtype=object)[request],
            "user_id": first["user_id"].astype(object).where(first["user_id"].notna(), None).to_numpy()[request],
            "item_id": ranked["item_id"].to_numpy(dtype=object),
            "rank": ranked["rank"].to_numpy(dtype=np.int64),
            "score": ranked["score"].to_numpy(dtype=np.float64),
            "status": status.astype(str),
        }, columns=list(OUTPUT_COLUMNS))
        if explain != "none":
            codes = ranked["item_code"].to_numpy(dtype=np.int64)
            reasons = self.reasons(queries[request], codes, top=3 if explain == "top3" else None)
            out = pd.concat([out, reasons], axis=1)
        return out

    def reasons(self, queries: np.ndarray, item_codes: np.ndarray, top: int | None = 3) -> pd.DataFrame:
        """The reason terms of scored (query, item) pairs, largest first, as flat columns.

        Every score splits into one term per reason group of the model
        (:meth:`threefold.core.scoring.Scorer.reason_groups`: a CP structure's
        terms, a Tucker model's item factor columns); the terms add up to the
        score minus any item bias. ``reason_j_share`` is the term divided by the
        sum of the absolute terms, so the shares of a score made only of
        positive terms add up to 1, and a negative term shows as a negative share.

        Parameters
        ----------
        queries : ndarray of shape (n, R'), float64
            The query row of each pair.
        item_codes : ndarray of shape (n,), int64
            The model's item index of each pair (-1: unknown item, zero row, no reasons).
        top : int or None, default=3
            How many reasons per pair (None: all), ordered by absolute term.

        Returns
        -------
        DataFrame with columns ``reason_1, reason_1_term, reason_1_share, ...``
            ``reason_j`` names the group (None past the groups a pair has).
        """
        labels, group = self.reason_labels, self.reason_group
        n_groups = len(labels)
        items = np.where(item_codes[:, None] >= 0, self.item_factors[np.maximum(item_codes, 0)], 0.0)
        products = np.asarray(queries, dtype=np.float64) * items
        terms = np.zeros((products.shape[0], n_groups))
        for g in range(n_groups):
            terms[:, g] = products[:, group == g].sum(axis=1)
        count = n_groups if top is None else min(top, n_groups)
        order = np.argsort(-np.abs(terms), axis=1, kind="stable")[:, :count]
        chosen = np.take_along_axis(terms, order, axis=1)
        magnitude = np.abs(terms).sum(axis=1, keepdims=True)
        shares = np.divide(chosen, magnitude, out=np.zeros_like(chosen), where=magnitude > 0)
        names = np.asarray(labels, dtype=object)[order]
        names[magnitude[:, 0] == 0] = None
        columns = {}
        for j in range(count):
            columns[f"reason_{j + 1}"] = names[:, j]
            columns[f"reason_{j + 1}_term"] = chosen[:, j]
            columns[f"reason_{j + 1}_share"] = shares[:, j]
        return pd.DataFrame(columns)

    def _rank_candidates(self, frame, request_codes, item_ids, queries, with_candidates, k) -> pd.DataFrame:
        """Rank each request's own candidate rows (duplicates kept once, ties in the order given)."""
        rows = np.flatnonzero(item_ids.notna().to_numpy(dtype=bool))
        pairs = pd.DataFrame({"request": request_codes[rows], "item_id": item_ids.to_numpy(dtype=object)[rows]})
        pairs = pairs.drop_duplicates().reset_index(drop=True)
        codes = self.resolved.item_codes(pairs["item_id"].to_numpy(dtype=object))
        known = codes >= 0
        scores = np.zeros(len(pairs))
        scores[known] = np.einsum("ij,ij->i", queries[pairs["request"].to_numpy()[known]], self.item_factors[codes[known]])
        if self.item_bias is not None:
            scores[known] += self.item_bias[codes[known]]
        slot = pairs.groupby("request", sort=False).cumcount().to_numpy()
        requests = np.flatnonzero(with_candidates)
        row_of = np.full(len(with_candidates), -1)
        row_of[requests] = np.arange(requests.size)
        at = (row_of[pairs["request"].to_numpy()], slot)
        matrix = np.full((requests.size, int(slot.max()) + 1), -np.inf)
        matrix[at] = scores
        pair_index = np.full(matrix.shape, -1)
        pair_index[at] = np.arange(len(pairs))
        best = top_k(matrix, min(k, matrix.shape[1]))
        r, c = np.nonzero(best >= 0)
        chosen = pair_index[r, best[r, c]]
        return pd.DataFrame({"request": requests[r], "item_id": pairs["item_id"].to_numpy(dtype=object)[chosen],
                             "rank": c + 1, "score": scores[chosen], "unknown_item": ~known[chosen],
                             "item_code": codes[chosen]})

    def _rank_catalog(self, first: pd.DataFrame, queries: np.ndarray, requests: np.ndarray, k: int) -> pd.DataFrame:
        """Rank the items live at each request's time (all items without a timestamp), in blocks."""
        times = (pd.to_numeric(first["timestamp"], errors="coerce") if "timestamp" in first.columns
                 else pd.Series(np.nan, index=first.index)).to_numpy(dtype=np.float64)
        n_items = self.item_factors.shape[0]
        out = []
        block = max(1, _BLOCK_CELLS // max(n_items, 1))
        for start in range(0, requests.size, block):
            sel = requests[start:start + block]
            scores = queries[sel] @ self.item_factors.T
            if self.item_bias is not None:
                scores += self.item_bias
            t = times[sel][:, None]
            live = np.isnan(t) | ((self.published[None, :] <= t) & (t < self.expires[None, :]))
            best = top_k(scores, min(k, n_items), live)
            r, c = np.nonzero(best >= 0)
            out.append(pd.DataFrame({"request": sel[r], "item_id": np.asarray(self.items.labels, dtype=object)[best[r, c]],
                                     "rank": c + 1, "score": scores[r, best[r, c]], "unknown_item": False,
                                     "item_code": best[r, c]}))
            empty = sel[best[:, 0] < 0]
            if empty.size:
                out.append(pd.DataFrame({"request": empty, "item_id": None, "rank": 0, "score": np.nan,
                                         "unknown_item": False, "item_code": -1}))
        return pd.concat(out, ignore_index=True)
