"""Rank items for requests with a saved model: the recommender behind serving and batch scoring.

:class:`Recommender` ranks items for a DataFrame of requests. It resolves ids to
factor rows through :class:`threefold.core.resolve.ResolvedScorer`, the same
rule offline evaluation uses, and selects with :mod:`threefold.ranking.topk`.
It imports nothing of MLflow; :mod:`threefold.tracking.pyfunc` wraps it for any
MLflow client, and :mod:`threefold.ranking.batch` runs it over files in parts.

Input rows: ``request_id``, ``user_id``, optional ``timestamp`` (every form the
event-log reader accepts: ISO 8601 with a UTC offset, epoch seconds, or
wall-clock ISO 8601 in the model's time zone), optional ``k`` (the request's
list length), the context columns (a column named like a context mode gives its
level; otherwise the level is derived from the raw columns the mode is built
from and ``timestamp``, by the training build's own code) and optionally
``item_id``: the rows of one request that carry an ``item_id`` are its
candidates, ranked as given; a request without one ranks the catalog items live
at its ``timestamp`` (published, not expired; every item when there is no time).

Output, one row per (request, rank): ``request_id``, ``user_id``, ``rank``
(1 = best), ``item_id``, ``score``, one column per context mode with the level
used (empty where it fell back), ``user_status`` and ``item_status``
(``known``, ``unknown:<rule>`` naming the fallback of
:class:`~threefold.core.resolve.UnknownPolicy`, or for an item
``from_metadata``: a row predicted from catalog attributes by
``threefold refresh --items``, the item having no events yet), ``status``, and with
``explain`` the reason columns (:meth:`Recommender.reasons`). Nothing unknown
fails the batch; ``status`` joins the flags that apply with ``;``:

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

Scores of the catalog path are computed in the model's dtype (float32 models
in float32); explicit candidates are scored in float64.
"""

from __future__ import annotations

import os
from typing import Sequence

import numpy as np
import pandas as pd
import pyarrow as pa

from threefold.core.checks import check_choice, check_int
from threefold.core.defaults import LIST_LENGTH
from threefold.core.exceptions import InputRowsError
from threefold.core.resolve import FALLBACK_LABEL, ResolvedScorer
from threefold.data.context import ColumnContext, CrossedContext, parse_context, spec_name
from threefold.data._eventscan import EARLIEST_TIME, LATEST_TIME
from threefold.data.timestamps import check_timezone, parse_timestamps
from threefold.models.model_io import load_model
from threefold.models.refresh import FROM_METADATA as _FROM_METADATA
from threefold.ranking.explore import exploration_values, merge_explored, parse_explore
from threefold.ranking.history import id_hashes
from threefold.ranking.policies import PIN_BASE, PolicyCounts, PolicyTables, apply_policies, pool_size
from threefold.ranking.topk import ALWAYS_LIVE, top_k, top_k_product

__all__ = ["Recommender", "OUTPUT_COLUMNS", "DEFAULT_K", "EXPLAIN_CHOICES", "context_specs", "raw_columns", "blank_mask",
           "request_levels"]

#: Columns of every output, in order; the context modes' level columns follow ``score``
#: and reason columns follow ``status`` (see :meth:`Recommender.output_columns`).
OUTPUT_COLUMNS = ("request_id", "user_id", "rank", "item_id", "score", "user_status", "item_status", "status")
_FLAG_ORDER = ("unknown_user", "unknown_context", "unknown_item", "no_candidates")
#: ``status`` text of every combination of flags (bit j: ``_FLAG_ORDER[j]``).
_STATUS_TEXT = np.array([";".join(f for j, f in enumerate(_FLAG_ORDER) if code >> j & 1) or "ok"
                         for code in range(1 << len(_FLAG_ORDER))], dtype=object)
#: What ``explain`` may ask for: no reasons, the three largest, all of them.
EXPLAIN_CHOICES = ("none", "top3", "all")
#: List length when a request or a caller names none (the one place this default lives).
DEFAULT_K = LIST_LENGTH
_TOP3 = 3
#: Cells explained at a time by :meth:`Recommender.reasons` (bounds the memory of the term matrix).
_REASON_BLOCK = 1 << 17


def context_specs(serving: dict) -> list:
    """Context specifications from the ``serving`` metadata saved with a model."""
    return [parse_context(name, timezone=serving["timezone"], daypart_starts=serving["daypart_starts"],
                          daypart_labels=serving["daypart_labels"]) for name in serving["contexts"]]


def raw_columns(spec) -> list[str]:
    """The request columns a context mode's level is derived from (besides ``timestamp``)."""
    if isinstance(spec, ColumnContext):
        return [spec.column]
    if isinstance(spec, CrossedContext):
        return [c for part in spec.parts for c in raw_columns(part)]
    return []


def _needs_time(spec) -> bool:
    """Whether a context mode's level depends on the timestamp (dayparts, week parts, crosses with them)."""
    if isinstance(spec, ColumnContext):
        return False
    if isinstance(spec, CrossedContext):
        return any(_needs_time(part) for part in spec.parts)
    return True


def _dtype_of(column: str) -> str:
    """The pandas dtype of an output column (for an empty output with the full schema)."""
    if column == "rank":
        return "int64"
    if column == "explored":
        return "bool"
    if column == "score" or column.endswith(("_term", "_share")):
        return "float64"
    return "object"


def _largest(labels, terms: np.ndarray, count: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Names, terms and shares of the ``count`` largest terms (by magnitude) of every row."""
    magnitude = np.abs(terms)
    if count < len(labels):
        order = np.argpartition(-magnitude, count - 1, axis=1)[:, :count]
        picked = np.take_along_axis(magnitude, order, axis=1)
        order = np.take_along_axis(order, np.lexsort((order, -picked), axis=1), axis=1)
    else:
        order = np.argsort(-magnitude, axis=1, kind="stable")
    chosen = np.take_along_axis(terms, order, axis=1)
    total = magnitude.sum(axis=1, keepdims=True)
    shares = np.divide(chosen, total, out=np.zeros_like(chosen), where=total > 0)
    names = np.asarray(labels, dtype=object)[order]
    names[total[:, 0] == 0] = None
    return names, chosen, shares


def _arrow(column: pd.Series) -> pa.Array:
    """A request column as Arrow (object columns as text, so mixed ints and strings parse alike)."""
    if column.dtype == object:
        column = column.astype("string")
    return pa.array(column, from_pandas=True)


def request_levels(policies, requests: pd.DataFrame, contexts: dict) -> dict:
    """The value of every request column (or context mode) the guardrails of ``policies`` condition on.

    Parameters
    ----------
    policies : ListPolicies
    requests : DataFrame of shape (q, ...)
    contexts : dict of str to array of shape (q,)
        Each context mode's level per request.

    Returns
    -------
    dict of str to ndarray of shape (q,), object
        A request column wins over a context mode of the same name; blank values are None.

    Raises
    ------
    ValueError
        A column that is neither (named with both lists).
    """
    levels = {}
    for column in policies.request_columns():
        if column in requests.columns:
            values = requests[column].astype("string")
            levels[column] = values.where(~blank_mask(requests[column]), None).to_numpy(dtype=object)
        elif column in contexts:
            levels[column] = np.asarray(contexts[column], dtype=object)
        else:
            raise ValueError(f"{policies.source}: a guardrail conditions on {column!r}, which is neither a column of "
                             f"the requests ({list(requests.columns)}) nor a context mode ({list(contexts)}).")
    return levels


def blank_mask(column: pd.Series) -> np.ndarray:
    """ndarray of shape (n,), bool: missing or blank values."""
    text = column.astype("string")
    return (text.isna() | (text.str.strip() == "")).to_numpy(dtype=bool)


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
    timezone : str or None
        IANA zone that timestamps without a UTC offset are local to (the
        training build's ``timezone``); None refuses such timestamps.
    item_origin : ndarray of shape (n_items,), uint8, or None
        Where each item row comes from (:mod:`threefold.models.refresh`): rows
        predicted from catalog metadata are reported ``from_metadata``.
    item_covariance : (rows, covariance, columns) or None
        Posterior covariances of the folded-in and predicted item rows (from
        refresh), for exploration (:mod:`threefold.ranking.explore`).
    """

    def __init__(self, result, contexts: Sequence, published: np.ndarray | None = None,
                 expires: np.ndarray | None = None, timezone: str | None = None,
                 item_origin: np.ndarray | None = None, item_covariance: tuple | None = None):
        names = tuple(spec_name(s) for s in contexts)
        if tuple(result.mode_names[2:]) != names:
            raise ValueError(f"The model's context modes {result.mode_names[2:]} differ from the specifications {names}.")
        self.contexts = list(contexts)
        self.context_names = names
        self.zone = check_timezone(timezone)
        self.items = result.vocabularies[1]
        self.item_labels = np.asarray(self.items.labels, dtype=object)
        self.resolved = ResolvedScorer(result)
        self.policy = self.resolved.policy
        scorer = self.resolved.scorer
        matrix = np.asarray(scorer.item_matrix())
        self.dtype = np.float32 if matrix.dtype == np.float32 else np.float64
        self.item_factors = np.ascontiguousarray(matrix, dtype=self.dtype)
        bias = scorer.item_bias()
        self.item_bias = None if bias is None else np.ascontiguousarray(bias, dtype=self.dtype)
        one = np.zeros(1, np.int64)
        self.reason_labels = scorer.reason_terms(one, np.zeros((1, len(names)), np.int64) if names else None, one - 1)[0]
        n_items = len(self.items)
        self.published = np.full(n_items, np.iinfo(np.int64).min) if published is None else np.asarray(published, np.int64)
        self.expires = np.full(n_items, np.iinfo(np.int64).max) if expires is None else np.asarray(expires, np.int64)
        if item_origin is not None and len(item_origin) != n_items:
            raise ValueError(f"item_origin has {len(item_origin)} entries for a model of {n_items} items.")
        self.from_metadata = (np.zeros(n_items, bool) if item_origin is None
                              else np.asarray(item_origin) == _FROM_METADATA)
        rows, cov, columns = item_covariance if item_covariance is not None else (np.zeros(0, np.int64), None, None)
        self.explorable = np.asarray(rows, np.int64)
        if self.explorable.size:  # Σ = L Lᵀ once per model; a tiny ridge keeps float32 round-off PSD
            cov = np.asarray(cov, np.float64)
            scale = np.maximum(np.abs(np.diagonal(cov, axis1=1, axis2=2)).max(axis=1), 1e-300)[:, None, None]
            self.chol = np.linalg.cholesky(cov + 1e-9 * scale * np.eye(cov.shape[1]))
            self.chol_columns = np.asarray(columns, np.int64)

    @classmethod
    def from_folder(cls, path: str | os.PathLike) -> "Recommender":
        """Load a model folder written by :func:`threefold.models.model_io.save_model` with ``serving`` metadata."""
        result, meta, extra = load_model(path)
        serving = meta["extra"].get("serving")
        if serving is None:
            raise ValueError(f"The model at {path} has no serving metadata (context specifications); "
                             "save it with extra={'serving': ...} as the train pipeline does.")
        return cls(result, context_specs(serving), extra.get("published_at"), extra.get("expires_at"),
                   timezone=serving.get("timezone"), item_origin=extra.get("item_origin"),
                   item_covariance=(extra["item_covariance_rows"], extra["item_covariance"],
                                    extra["item_covariance_columns"]) if "item_covariance_rows" in extra else None)

    def output_columns(self, explain: str = "none", explore=None, policies: bool = False) -> list[str]:
        """The output's columns, in order, for an ``explain`` setting (``explored`` when exploring,
        ``pinned`` with list policies)."""
        check_choice("explain", explain, EXPLAIN_CHOICES, owner="predict")
        columns = list(OUTPUT_COLUMNS[:5]) + list(self.context_names) + list(OUTPUT_COLUMNS[5:])
        if parse_explore(explore) is not None:
            columns.append("explored")
        if policies:
            columns.append("pinned")
        count = 0 if explain == "none" else len(self.reason_labels)
        if explain == "top3":
            count = min(count, _TOP3)
        return columns + [f"reason_{j}{s}" for j in range(1, count + 1) for s in ("", "_term", "_share")]

    # ------------------------------------------------------------------ inputs
    def request_times(self, first: pd.DataFrame) -> np.ndarray:
        """ndarray of shape (n,), int64: each request's epoch seconds, :data:`ALWAYS_LIVE` where none is given.

        Every form the event-log reader accepts: ISO 8601 with an offset, epoch
        seconds, or wall-clock ISO 8601 in the model's time zone (daylight-saving
        folds take the earlier time, as the training build does).

        Raises
        ------
        InputRowsError
            On a value in no accepted form (rows are positions in ``first``).
        """
        times = np.full(len(first), ALWAYS_LIVE, dtype=np.int64)
        if "timestamp" not in first.columns or not len(first):
            return times
        column = first["timestamp"]
        blank = blank_mask(column)
        parsed = parse_timestamps(_arrow(column), self.zone)
        bad = ~parsed.valid & ~blank
        if bad.any():
            naive = parsed.naive & bad
            problem = ("a time without UTC offset, and the model has no time zone" if naive.all()
                       else "not a timestamp (ISO 8601 with offset, or epoch seconds)")
            raise InputRowsError("timestamp", np.flatnonzero(bad), problem, column[bad].astype(str).tolist())
        outside = parsed.valid & ((parsed.seconds < EARLIEST_TIME) | (parsed.seconds >= LATEST_TIME))
        if outside.any():
            raise InputRowsError("timestamp", np.flatnonzero(outside), "a time before 1970 or from 2100 on "
                                 "(epoch milliseconds? timestamps are epoch seconds)", column[outside].astype(str).tolist())
        times[parsed.valid] = parsed.seconds[parsed.valid]
        return times

    def request_k(self, first: pd.DataFrame, k: int) -> np.ndarray:
        """ndarray of shape (n,), int64: each request's list length (its ``k`` column, else ``k``)."""
        out = np.full(len(first), k, dtype=np.int64)
        if "k" not in first.columns:
            return out
        column = first["k"]
        given = ~blank_mask(column)
        values = pd.to_numeric(column.where(given), errors="coerce").to_numpy(dtype=np.float64)
        bad = given & ~(np.isfinite(values) & (values >= 1) & (values == np.round(values)))
        if bad.any():
            raise InputRowsError("k", np.flatnonzero(bad), "not a whole number of at least 1",
                                 column[bad].astype(str).tolist())
        out[given] = values[given].astype(np.int64)
        return out

    def _context_labels(self, spec, first: pd.DataFrame, times: np.ndarray) -> np.ndarray:
        """Level label of each request in one context mode (the fallback label where none can be had).

        A column named like a derived mode (``daypart``) gives its level directly;
        otherwise the training build's own code derives it (an event column mode
        such as ``device`` included, so a blank value is the level ``unknown`` there too).
        """
        name = spec_name(spec)
        out = np.full(len(first), FALLBACK_LABEL, dtype=object)
        if name in first.columns and not isinstance(spec, ColumnContext):  # a level given directly
            values = first[name].astype("string")
            ok = ~blank_mask(first[name])
            out[ok] = values[ok].to_numpy(dtype=object)
            return out
        timed = times != ALWAYS_LIVE if _needs_time(spec) else np.ones(len(first), dtype=bool)
        rows = first.loc[timed].assign(timestamp=times[timed])
        try:
            derived = spec.labels_for(rows)
        except (KeyError, ValueError):  # a column the mode needs is absent: every level falls back
            return out
        out[np.flatnonzero(timed)] = derived.to_numpy(dtype=object)
        return out

    # ------------------------------------------------------------------ ranking
    def recommend(self, requests: pd.DataFrame, k: int = DEFAULT_K, explain: str = "none",
                  catalog: bool = True, explore=None, explore_slots: int = 1, explore_seed: int = 0,
                  policies: PolicyTables | None = None, policy_counts: PolicyCounts | None = None) -> pd.DataFrame:
        """Top ``k`` items of every request; see the module docstring.

        Parameters
        ----------
        requests : DataFrame
            Rows with ``request_id`` and ``user_id``, optional ``timestamp``,
            ``k``, context columns and ``item_id``.
        k : int, default=10
            List length of requests without their own ``k``.
        explain : {"none", "top3", "all"}, default="none"
            Reason columns to add (:meth:`reasons`): none, the three largest, or every reason.
        catalog : bool, default=True
            Whether a request without candidate rows ranks the live catalog;
            False gives it a ``no_candidates`` row (batch jobs with a candidates table).
        explore : None, "off", "thompson" or float BETA
            Exploration of the items with a posterior covariance
            (:mod:`threefold.ranking.explore`); off by default.
        explore_slots : int, default=1
            Most items per list that exploration may bring in.
        explore_seed : int, default=0
            Seed of Thompson sampling (the same seed and batch give the same lists).
        policies : PolicyTables or None
            List policies (:mod:`threefold.ranking.policies`) applied to a pool of the
            best-scored candidates before the cut to K; the output gains ``pinned``.
        policy_counts : PolicyCounts or None
            Receives what each rule did (summed over calls).

        Returns
        -------
        DataFrame with the columns of :meth:`output_columns`, requests in order
        of first appearance, ranks ascending.

        Raises
        ------
        ValueError
            A required column is missing; :class:`InputRowsError` names the rows
            of a bad ``timestamp`` or ``k``.
        """
        k = check_int("k", k, low=1, owner="predict")
        explore = parse_explore(explore)
        explore_slots = check_int("explore_slots", explore_slots, low=0, owner="predict")
        if policies is not None and explore is not None:
            raise ValueError("Exploration and list policies cannot be combined yet: score with --explore or with "
                             "--policies.")
        columns = self.output_columns(explain, explore, policies is not None)
        missing = [c for c in ("request_id", "user_id") if c not in requests.columns]
        if missing:
            raise ValueError(f"The requests need the column(s) {missing}; they have {list(requests.columns)}.")
        frame = requests.reset_index(drop=True)
        if frame.empty:
            return pd.DataFrame({c: pd.Series(dtype=_dtype_of(c)) for c in columns})
        blank = blank_mask(frame["request_id"])
        if blank.any():  # two requests without an id would merge into one
            raise InputRowsError("request_id", np.flatnonzero(blank), "a missing or blank request id")
        request_codes, request_ids = pd.factorize(frame["request_id"].astype("string"), sort=False)
        first_rows = np.unique(request_codes, return_index=True)[1]
        if first_rows.size < len(frame):  # several rows per request (candidates): one user each
            users_of = pd.DataFrame({"r": request_codes, "u": frame["user_id"].astype("string").fillna("\x00")})
            mixed = users_of.groupby("r")["u"].transform("nunique").to_numpy() > 1
            if mixed.any():  # one id for two users: one of them would get no list
                raise InputRowsError("request_id", np.flatnonzero(mixed), "one request id given for several users",
                                     frame["request_id"][mixed].astype(str).tolist())
        first = frame.iloc[first_rows].reset_index(drop=True)
        try:
            times = self.request_times(first)
            lengths = self.request_k(first, k)
        except InputRowsError as error:  # rows of ``first`` back to rows of ``requests``
            raise InputRowsError(error.column, first_rows[error.rows], error.problem, error.examples) from None
        users = first["user_id"].astype("string").fillna(FALLBACK_LABEL).to_numpy(dtype=object)
        labels = [self._context_labels(spec, first, times) for spec in self.contexts]
        user_rows, context_rows, unknown_user, unknown_context = self.resolved.resolve_queries(users, labels)
        queries = np.asarray(self.resolved.query_matrix(user_rows, context_rows))
        item_ids = frame["item_id"].astype("string") if "item_id" in frame.columns else None
        with_candidates = np.zeros(len(first), dtype=bool)
        if item_ids is not None:
            with_candidates[np.unique(request_codes[item_ids.notna().to_numpy(dtype=bool)])] = True
        pool = lengths if policies is None else np.maximum(lengths, pool_size(policies.policies, int(lengths.max())))
        parts = []
        if with_candidates.any():
            parts.append(self._rank_candidates(request_codes, item_ids, queries, with_candidates, pool))
        rest = np.flatnonzero(~with_candidates)
        if rest.size:
            parts.append(self._rank_catalog(queries, times, rest, pool) if catalog else self._empty(rest))
        ranked = [np.concatenate(v) for v in zip(*parts)]
        order = np.lexsort((ranked[1], ranked[0]))
        request, rank, item_code, item_label, score = (v[order] for v in ranked)
        pinned = None
        if policies is not None:
            levels = self._request_levels(policies, first, labels)
            request, rank, item_code, item_label, score, pinned = self._apply_policies(
                policies, (request, rank, item_code, item_label, score), first, levels, queries, times, lengths,
                policy_counts if policy_counts is not None else PolicyCounts())
        explored = None
        if explore is not None:
            candidates = None
            if item_ids is not None:
                rows = np.flatnonzero(item_ids.notna().to_numpy(dtype=bool))
                candidates = (request_codes[rows], self.resolved.item_codes(item_ids.to_numpy(dtype=object)[rows]))
            request, rank, item_code, item_label, score, explored = self._explore(
                (request, rank, item_code, item_label, score), queries, times, lengths, with_candidates, candidates,
                explore, explore_slots, np.random.default_rng(explore_seed))
        out = self._frame(first, request_ids, labels, context_rows, request, rank, item_code, item_label, score,
                          unknown_user, unknown_context)
        if explored is not None:
            out["explored"] = explored
        if pinned is not None:
            out["pinned"] = pinned
        if explain != "none":
            reasons = self.reasons(user_rows[request], context_rows[request], item_code,
                                   top=_TOP3 if explain == "top3" else None, queries=queries, query_of=request)
            out = pd.concat([out, reasons], axis=1)
        return out[columns]

    def _frame(self, first, request_ids, labels, context_rows, request, rank, item_code, item_label, score,
               unknown_user, unknown_context) -> pd.DataFrame:
        """The output rows (without reasons) from the ranked (request, rank, item) triples."""
        empty = rank == 0
        unknown_item = (item_code < 0) & ~empty
        flags = {"unknown_user": unknown_user[request], "unknown_context": unknown_context[request],
                 "unknown_item": unknown_item, "no_candidates": empty}
        code = np.zeros(request.size, dtype=np.int64)  # one bit per flag, then one lookup
        for bit, flag in enumerate(_FLAG_ORDER):
            code |= flags[flag].astype(np.int64) << bit
        status = _STATUS_TEXT[code]
        user_status = np.array(["known", f"unknown:{self.policy.user}"], dtype=object)[flags["unknown_user"].astype(np.int8)]
        metadata_row = self.from_metadata[np.maximum(item_code, 0)] & (item_code >= 0) & ~empty
        item_status = np.array(["known", f"unknown:{self.policy.item}", None, "from_metadata"], dtype=object)[
            np.where(empty, 2, np.where(metadata_row, 3, unknown_item.astype(np.int8)))]
        out = {
            "request_id": np.asarray(request_ids, dtype=object)[request],
            "user_id": first["user_id"].astype(object).where(first["user_id"].notna(), None).to_numpy()[request],
            "rank": rank.astype(np.int64),
            "item_id": item_label,
            "score": score.astype(np.float64),
        }
        fallback = self.resolved.sizes
        for j, name in enumerate(self.context_names):
            used = context_rows[:, j] != fallback[2 + j]
            out[name] = np.where(used, labels[j], None)[request]
        out.update(user_status=user_status, item_status=item_status, status=status)
        return pd.DataFrame(out)

    def reasons(self, users: np.ndarray, contexts: np.ndarray, item_codes: np.ndarray, top: int | None = 3,
                queries: np.ndarray | None = None, query_of: np.ndarray | None = None) -> pd.DataFrame:
        """The reason terms of scored (user, context, item) cells, largest first, as flat columns.

        Every score splits into the model's named terms
        (:meth:`threefold.core.scoring.Scorer.reason_terms`: a CP structure's
        terms, a Tucker model's core entries); the terms add up to the score
        minus any item bias. ``reason_j_share`` is the term divided by the sum
        of the absolute terms, so the shares of a score made only of positive
        terms add up to 1, and a negative term shows as a negative share.

        Parameters
        ----------
        users : ndarray of shape (n,), int64
            Resolved user rows (the fallback row included).
        contexts : ndarray of shape (n, n_context_modes), int64
            Resolved context rows.
        item_codes : ndarray of shape (n,), int64
            The model's item index of each cell (< 0: not in the model, zero row, no reasons).
        top : int or None, default=3
            How many reasons per cell (None: all), ordered by absolute term.
        queries, query_of : ndarray of shape (q, R') and (n,), or None
            Query rows already computed, and the row of each cell (saves recomputing them).

        Returns
        -------
        DataFrame with columns ``reason_1, reason_1_term, reason_1_share, ...``
            ``reason_j`` names the term (None where the cell has no terms).

        Cells are explained in blocks of :data:`_REASON_BLOCK`, so memory stays bounded.
        """
        n = item_codes.shape[0]
        count = len(self.reason_labels) if top is None else min(top, len(self.reason_labels))
        names = np.empty((n, count), dtype=object)
        chosen = np.empty((n, count))
        shares = np.empty((n, count))
        scorer = self.resolved.scorer
        for start in range(0, n, _REASON_BLOCK):
            block = slice(start, min(start + _REASON_BLOCK, n))
            given = None if queries is None else queries[query_of[block]]
            labels, terms = scorer.reason_terms(users[block], contexts[block] if contexts.shape[1] else None,
                                                np.where(item_codes[block] >= 0, item_codes[block], -1), queries=given)
            names[block], chosen[block], shares[block] = _largest(labels, terms, count)
        columns = {}
        for j in range(count):
            columns[f"reason_{j + 1}"] = names[:, j]
            columns[f"reason_{j + 1}_term"] = chosen[:, j]
            columns[f"reason_{j + 1}_share"] = shares[:, j]
        return pd.DataFrame(columns)

    def _rank_candidates(self, request_codes, item_ids, queries, with_candidates, lengths):
        """Rank each request's own candidate rows (duplicates kept once, ties in the order given).

        Returns ``(request, rank, item code, item label, score)`` per ranked row;
        items outside the model have code -1 and score 0 (the zero item row).
        """
        rows = np.flatnonzero(item_ids.notna().to_numpy(dtype=bool))
        pairs = pd.DataFrame({"request": request_codes[rows], "item_id": item_ids.to_numpy(dtype=object)[rows]})
        pairs = pairs.drop_duplicates().reset_index(drop=True)
        labels = pairs["item_id"].to_numpy(dtype=object)
        codes = self.resolved.item_codes(labels)
        known = codes >= 0
        request = pairs["request"].to_numpy()
        scores = np.zeros(len(pairs))
        scores[known] = np.einsum("ij,ij->i", np.asarray(queries[request[known]], np.float64),
                                  np.asarray(self.item_factors[codes[known]], np.float64))
        if self.item_bias is not None:
            scores[known] += self.item_bias[codes[known]]
        slot = pairs.groupby("request", sort=False).cumcount().to_numpy()
        requests = np.flatnonzero(with_candidates)
        row_of = np.full(len(with_candidates), -1)
        row_of[requests] = np.arange(requests.size)
        at = (row_of[request], slot)
        matrix = np.full((requests.size, int(slot.max()) + 1), -np.inf)
        matrix[at] = scores
        pair_index = np.full(matrix.shape, -1)
        pair_index[at] = np.arange(len(pairs))
        best = top_k(matrix, int(min(lengths[requests].max(), matrix.shape[1])))
        r, c = np.nonzero((best >= 0) & (np.arange(best.shape[1])[None, :] < lengths[requests][:, None]))
        chosen = pair_index[r, best[r, c]]
        return requests[r], c + 1, codes[chosen], labels[chosen], scores[chosen]

    def _explore(self, ranked, queries, times, lengths, with_candidates, candidates, explore, slots, rng):
        """The ranked rows with exploration applied (:mod:`threefold.ranking.explore`), plus the ``explored`` flags."""
        request, rank, item_code, item_label, score = ranked
        m = self.explorable.size
        if m == 0 or slots == 0:
            return (*ranked, np.zeros(request.size, bool))
        n = len(lengths)
        width = int(lengths.max())
        listed = rank > 0
        plain_items = np.full((n, width), -2, np.int64)
        plain_scores = np.full((n, width), -np.inf)
        entry_row = np.full((n, width), -1, np.int64)
        at = (request[listed], rank[listed] - 1)
        plain_items[at], plain_scores[at], entry_row[at] = item_code[listed], score[listed], np.flatnonzero(listed)
        codes = self.explorable
        allowed = np.zeros((n, m), bool)
        catalog_rows = np.flatnonzero(~with_candidates)
        t = times[catalog_rows][:, None]
        allowed[catalog_rows] = (t == ALWAYS_LIVE) | ((self.published[codes][None, :] <= t) & (t < self.expires[codes][None, :]))
        if candidates is not None:
            position = np.full(len(self.item_labels), -1)
            position[codes] = np.arange(m)
            cand_request, cand_code = candidates
            j = np.where(cand_code >= 0, position[np.maximum(cand_code, 0)], -1)
            allowed[cand_request[j >= 0], j[j >= 0]] = True
        allowed[~np.isin(np.arange(n), request[listed])] = False  # no_candidates requests stay as they are
        rows = self.item_factors[codes]
        bias = None if self.item_bias is None else self.item_bias[codes]
        values = exploration_values(queries, rows, bias, self.chol, self.chol_columns, explore, rng)
        entry, explored_code = merge_explored(plain_items, plain_scores, codes, values, allowed, lengths, slots)
        r, c = np.nonzero((entry >= 0) | (explored_code >= 0))
        from_plain = entry[r, c] >= 0
        source = entry_row[r, np.maximum(entry[r, c], 0)]
        new_code = np.where(from_plain, item_code[np.maximum(source, 0)], explored_code[r, c])
        plain_score = np.einsum("ij,ij->i", np.asarray(queries[r], np.float64), np.asarray(self.item_factors[
            np.maximum(new_code, 0)], np.float64)) + (0.0 if self.item_bias is None else self.item_bias[np.maximum(new_code, 0)])
        new_score = np.where(from_plain, score[np.maximum(source, 0)], plain_score)
        new_label = np.where(from_plain, item_label[np.maximum(source, 0)], self.item_labels[np.maximum(new_code, 0)])
        empty = ~listed
        out = (np.concatenate([r, request[empty]]), np.concatenate([c + 1, rank[empty]]),
               np.concatenate([new_code, item_code[empty]]), np.concatenate([new_label, item_label[empty]]),
               np.concatenate([new_score, score[empty]]), np.concatenate([~from_plain, np.zeros(empty.sum(), bool)]))
        order = np.lexsort((out[1], out[0]))
        return tuple(v[order] for v in out)

    def _request_levels(self, tables: PolicyTables, first: pd.DataFrame, labels) -> dict:
        """The value of every request column (or context mode) the guardrails condition on."""
        return request_levels(tables.policies, first, dict(zip(self.context_names, labels)))

    def _apply_policies(self, tables, ranked, first, levels, queries, times, lengths, counts):
        """The ranked rows after the list policies, plus the ``pinned`` flags; as :meth:`_rank_candidates`."""
        request, rank, item_code, item_label, score = ranked
        n = len(first)
        listed = rank > 0
        width = int(rank[listed].max()) if listed.any() else 1
        entry = np.full((n, width), -1, np.int64)
        entry[request[listed], rank[listed] - 1] = np.flatnonzero(listed)
        valid = entry >= 0
        at = np.maximum(entry, 0)
        codes = np.where(valid, item_code[at], -1)
        cached = getattr(self, "_universe_cache", None)
        if cached is None or cached[0] is not tables:  # model rows to universe positions, once per tables
            self._universe_cache = cached = (tables, tables.positions(self.item_labels))
        universe = np.where(codes >= 0, cached[1][np.maximum(codes, 0)], -1)
        strangers = valid & (codes < 0)  # candidates the model does not know: looked up by id
        universe[strangers] = tables.positions(item_label[at[strangers]])
        item_hash = np.where(universe >= 0, tables.item_hash[np.maximum(universe, 0)], 0).astype(np.uint64)
        if strangers.any():
            item_hash[strangers] = id_hashes(item_label[at[strangers]])
        users = first["user_id"].astype("string").fillna(FALLBACK_LABEL).to_numpy(dtype=object)
        t = times[:, None]
        pin_live = (t == ALWAYS_LIVE) | ((tables.pin_published[None, :] <= t) & (t < tables.pin_expires[None, :]))
        chosen, rule_counts = apply_policies(
            tables, universe=universe, codes=codes, valid=valid, scores=np.where(valid, score[at], -np.inf),
            item_hash=item_hash, request_levels=levels, user_hash=id_hashes(users), lengths=lengths,
            item_factors=self.item_factors, pin_live=pin_live)
        counts.merge(rule_counts)
        pin_ids = np.array([item for item, _ in tables.policies.pins], dtype=object)
        pin_codes = self.resolved.item_codes(pin_ids) if pin_ids.size else np.zeros(0, np.int64)
        r, c = np.nonzero(chosen != -1)
        e = chosen[r, c]
        is_pin = e <= PIN_BASE
        j = np.where(is_pin, PIN_BASE - e, 0)
        source = entry[r, np.maximum(e, 0)]
        new_code = np.where(is_pin, pin_codes[j] if pin_ids.size else -1, item_code[np.maximum(source, 0)])
        new_score = score[np.maximum(source, 0)].astype(np.float64)
        scored_pin = np.flatnonzero(is_pin & (new_code >= 0))  # a pin the model knows: its own score
        if scored_pin.size:
            new_score[scored_pin] = np.einsum("ij,ij->i", np.asarray(queries[r[scored_pin]], np.float64),
                                              np.asarray(self.item_factors[new_code[scored_pin]], np.float64))
            if self.item_bias is not None:
                new_score[scored_pin] += self.item_bias[new_code[scored_pin]]
        new_score[is_pin & (new_code < 0)] = 0.0
        new_label = np.where(is_pin, pin_ids[j] if pin_ids.size else None, item_label[np.maximum(source, 0)])
        empty = np.flatnonzero(np.bincount(r, minlength=n) == 0)  # every candidate removed (or none): one empty row
        gone = self._empty(empty)
        out = (np.concatenate([r, gone[0]]), np.concatenate([c + 1, gone[1]]), np.concatenate([new_code, gone[2]]),
               np.concatenate([new_label, gone[3]]), np.concatenate([new_score, gone[4]]),
               np.concatenate([is_pin, np.zeros(empty.size, bool)]))
        if not empty.size:  # np.nonzero already gave (request, rank) order
            return out
        order = np.lexsort((out[1], out[0]))
        return tuple(v[order] for v in out)

    @staticmethod
    def _empty(requests):
        """One ``no_candidates`` row per request; as :meth:`_rank_candidates`."""
        n = requests.size
        return requests, np.zeros(n, np.int64), np.full(n, -1), np.full(n, None, dtype=object), np.full(n, np.nan)

    def _rank_catalog(self, queries, times, requests, lengths):
        """Rank the items live at each request's time (every item where no time is given); as :meth:`_rank_candidates`."""
        n_items = self.item_factors.shape[0]
        kmax = int(min(lengths[requests].max(), max(n_items, 1)))
        best, scores = top_k_product(np.asarray(queries[requests], dtype=self.dtype), self.item_factors, kmax,
                                     item_bias=self.item_bias, live=(self.published, self.expires, times[requests]))
        keep = (best >= 0) & (np.arange(kmax)[None, :] < lengths[requests][:, None])
        r, c = np.nonzero(keep)
        codes = best[r, c]
        ranked = (requests[r], c + 1, codes, self.item_labels[codes], scores[r, c].astype(np.float64))
        empty = self._empty(requests[~keep[:, 0]])
        return tuple(np.concatenate([a, b]) for a, b in zip(ranked, empty))
