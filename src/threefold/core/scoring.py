"""The one scoring interface every threefold model implements.

Convention for mode order, shared by the builder and every model: mode 0 is the
user mode, mode 1 the item mode, modes 2.. are context modes (in the tensor's
order). A *query* is a user index plus one level index per context mode.

For a batch of ``q`` queries a model returns a query matrix ``Q`` of shape
``(q, R')`` and an item matrix ``V`` of shape ``(n_items, R')`` plus an optional
additive item term ``b`` of shape ``(n_items,)`` such that::

    scores = Q @ V.T + b          # shape (q, n_items)

Evaluation, tracking and batch scoring use only this interface, so any factor
model (CP, Tucker, structured CP) plugs into them unchanged. The per-component
terms of one score (:meth:`Scorer.score_terms`) sum to that score and are what
factor explanations are built from.

Every model of the tool, factor model or baseline, is a :class:`Ranker`: it
binds to a query set (``users``: user labels, ``contexts``: a DataFrame with one
column of level labels per context mode, ``items``: the item universe as a
:class:`~threefold.core.vocabulary.Vocabulary`, ``times``: request times) and
returns a block scorer ``fn(rows, items=None) -> (len(rows), n_items)``. A
:class:`Scorer` binds through the shared id resolver
(:mod:`threefold.core.resolve`), so evaluation and serving score unknown ids by
the same rule. Baselines (popularity as of each request time, random) are
rankers without factors.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import Callable

import numpy as np

from threefold.core.resolve import DEFAULT_POLICY, BoundFactors, ResolvedScorer

__all__ = ["Ranker", "Scorer", "FittedScorer", "ScoreTerms", "check_queries"]


@dataclass(frozen=True)
class ScoreTerms:
    """Additive decomposition of one score.

    Attributes
    ----------
    labels : tuple of str
        One label per term, e.g. ``"component 3"`` or ``"core (1, 0, 2)"``.
    values : ndarray of shape (n_terms,), float64
        Contributions; ``values.sum()`` equals the score.
    """

    labels: tuple[str, ...]
    values: np.ndarray

    def __post_init__(self) -> None:
        if len(self.labels) != self.values.shape[0]:
            raise ValueError(f"ScoreTerms has {len(self.labels)} labels for {self.values.shape[0]} values.")

    @property
    def total(self) -> float:
        """The score these terms add up to."""
        return float(self.values.sum())


def check_queries(users: np.ndarray, contexts: np.ndarray | None, shape: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray]:
    """Validate a query batch against a model's shape.

    Parameters
    ----------
    users : array-like of shape (q,), int
    contexts : array-like of shape (q, ndim - 2), int, or None when ndim == 2
    shape : tuple of int
        The model's mode sizes (user, item, context...).

    Returns
    -------
    users : ndarray of shape (q,), int64
    contexts : ndarray of shape (q, ndim - 2), int64
    """
    users = np.asarray(users, dtype=np.int64).reshape(-1)
    n_context = len(shape) - 2
    if contexts is None:
        contexts = np.zeros((users.shape[0], 0), dtype=np.int64)
    contexts = np.asarray(contexts, dtype=np.int64).reshape(users.shape[0], -1) if n_context else np.zeros((users.shape[0], 0), dtype=np.int64)
    if contexts.shape != (users.shape[0], n_context):
        raise ValueError(f"contexts must have shape ({users.shape[0]}, {n_context}), got {contexts.shape}.")
    if users.size and (users.min() < 0 or users.max() >= shape[0]):
        raise IndexError(f"user indices must lie in [0, {shape[0]}).")
    for j in range(n_context):
        col = contexts[:, j]
        if col.size and (col.min() < 0 or col.max() >= shape[2 + j]):
            raise IndexError(f"context indices of mode {2 + j} must lie in [0, {shape[2 + j]}).")
    return users, contexts


class Ranker(ABC):
    """What every model offers the evaluation harness and batch scoring: scores for a bound query set."""

    #: Whether :meth:`fold_in` solves rows for newcomers (the rolling protocol and refresh use it).
    supports_fold_in: bool = False
    #: Whether the harness fits it on each stage's events as of request time (baselines), not on a tensor.
    learns_from_events: bool = False

    @abstractmethod
    def bind(self, queries) -> Callable[..., np.ndarray]:
        """A block scorer ``fn(rows, items=None)`` of shape ``(len(rows), n_items or len(items))`` for ``queries``."""

    def fitted(self) -> "Ranker":
        """The fitted model that scores (an estimator's result; the model itself otherwise)."""
        return self


class Scorer(Ranker):
    """Base class of every factor model that ranks items for (user, context) queries.

    Subclasses implement :meth:`query_matrix`, :meth:`item_matrix` and
    :meth:`score_terms`; :meth:`item_bias` defaults to no additive term.
    """

    def bind(self, queries, *, vocabularies=None, policy=DEFAULT_POLICY) -> BoundFactors:
        """Resolve the query set's labels to rows (:class:`~threefold.core.resolve.ResolvedScorer`) and bind."""
        fitted = self.fitted()
        resolved = ResolvedScorer(fitted, vocabularies=vocabularies, policy=policy)
        names = [v.name for v in resolved.vocabularies[2:]]
        missing = [n for n in names if n not in queries.contexts.columns]
        if missing:
            raise ValueError(f"The model has the context mode(s) {missing}, the queries only "
                             f"{list(queries.contexts.columns)}; build the queries with the same contexts.")
        contexts = [queries.contexts[n].to_numpy(dtype=object) for n in names]
        return resolved.bind(np.asarray(queries.users, dtype=object), contexts,
                             np.asarray(queries.items.labels, dtype=object))

    def reason_groups(self) -> tuple[tuple[str, ...], np.ndarray]:
        """How the columns of ``Q`` and ``V`` group into named reasons.

        ``score = Σ_g Σ_{r in g} Q[r] V[i, r] (+ bias)``: each group's partial sum
        is one reason term, and the terms add up to the score without the bias.

        Returns
        -------
        labels : tuple of str
            One label per group.
        group : ndarray of shape (R',), int64
            The group of each column.
        """
        width = np.asarray(self.item_matrix()).shape[1]
        return tuple(f"component {r}" for r in range(width)), np.arange(width, dtype=np.int64)

    def reason_terms(self, users: np.ndarray, contexts: np.ndarray | None, items: np.ndarray,
                     queries: np.ndarray | None = None) -> tuple[tuple[str, ...], np.ndarray]:
        """The named additive terms of the scores of (user, context levels, item) cells.

        The default splits ``Q[r] V[i, r]`` by :meth:`reason_groups`; models whose
        reasons are finer than the columns of ``Q`` (Tucker: core entries) override it.

        Parameters
        ----------
        users : ndarray of shape (n,), int
        contexts : ndarray of shape (n, n_context_modes), int, or None
        items : ndarray of shape (n,), int
            Item index of each cell; ``-1`` is an item with a zero row (no terms).
        queries : ndarray of shape (n, R') or None
            The cells' query rows when the caller has them (``query_matrix(users, contexts)``).

        Returns
        -------
        labels : tuple of str, one per term
        terms : ndarray of shape (n, n_terms), float64
            ``terms.sum(axis=1)`` is the score without the item bias.
        """
        labels, group = self.reason_groups()
        items = np.asarray(items, dtype=np.int64)
        if queries is None:
            queries = self.query_matrix(users, contexts)
        rows = np.asarray(self.item_matrix(), dtype=np.float64)[np.maximum(items, 0)]
        rows[items < 0] = 0.0
        products = np.asarray(queries, dtype=np.float64) * rows
        one_hot = np.zeros((group.size, len(labels)))
        one_hot[np.arange(group.size), group] = 1.0
        return labels, products @ one_hot

    def owned_columns(self, mode: int) -> np.ndarray:
        """ndarray of shape (R',), bool: the factor columns a mode owns (all of them unless a structure says otherwise)."""
        return np.ones(np.asarray(self.fitted().factors[mode]).shape[1], dtype=bool)

    @property
    @abstractmethod
    def shape(self) -> tuple[int, ...]:
        """Mode sizes the model was fitted on (user, item, context...)."""

    @abstractmethod
    def query_matrix(self, users: np.ndarray, contexts: np.ndarray | None = None) -> np.ndarray:
        """ndarray of shape (q, R'): one row per (user, context levels) query."""

    @abstractmethod
    def item_matrix(self) -> np.ndarray:
        """ndarray of shape (n_items, R'): one row per item."""

    def item_bias(self) -> np.ndarray | None:
        """ndarray of shape (n_items,) added to every query's scores, or None."""
        return None

    @abstractmethod
    def score_terms(self, user: int, context: np.ndarray | list[int] | tuple[int, ...], item: int) -> ScoreTerms:
        """Additive terms of the score of one (user, context levels, item)."""

    def score(self, users: np.ndarray, contexts: np.ndarray | None = None, items: np.ndarray | None = None) -> np.ndarray:
        """Scores of every query against the given items (default: all items).

        Parameters
        ----------
        users : array-like of shape (q,), int
        contexts : array-like of shape (q, n_context_modes), int, or None
        items : array-like of shape (k,), int, or None

        Returns
        -------
        ndarray of shape (q, k) or (q, n_items), float64
        """
        users, contexts = check_queries(users, contexts, self.shape)
        q = self.query_matrix(users, contexts)
        v = self.item_matrix()
        b = self.item_bias()
        if items is not None:
            items = np.asarray(items, dtype=np.int64)
            v = v[items]
            b = None if b is None else b[items]
        out = np.asarray(q, dtype=np.float64) @ np.asarray(v, dtype=np.float64).T
        if b is not None:
            out += b
        return out


class FittedScorer(Scorer):
    """An estimator that scores through its fitted result ``result_`` (itself a :class:`Scorer`).

    Estimators (``CPModel``, the Tucker estimators) set ``result_`` in ``fit``;
    every scoring call before that raises a clear error.
    """

    def _fitted(self) -> Scorer:
        if not hasattr(self, "result_"):
            raise RuntimeError(f"This {type(self).__name__} is not fitted yet; call fit(tensor) first.")
        return self.result_

    def fitted(self) -> Scorer:
        return self._fitted()

    @property
    def supports_fold_in(self) -> bool:
        return self._fitted().supports_fold_in

    def fold_in(self, tensor, mode) -> np.ndarray:
        """Rows for new users, items or context levels, solved with every fitted factor fixed."""
        return self._fitted().fold_in(tensor, mode)

    def owned_columns(self, mode: int) -> np.ndarray:
        return self._fitted().owned_columns(mode)

    def reason_groups(self) -> tuple[tuple[str, ...], np.ndarray]:
        return self._fitted().reason_groups()

    def reason_terms(self, users, contexts, items, queries=None) -> tuple[tuple[str, ...], np.ndarray]:
        return self._fitted().reason_terms(users, contexts, items, queries)

    @property
    def shape(self) -> tuple[int, ...]:
        return self._fitted().shape

    def query_matrix(self, users, contexts=None) -> np.ndarray:
        return self._fitted().query_matrix(users, contexts)

    def item_matrix(self) -> np.ndarray:
        return self._fitted().item_matrix()

    def item_bias(self) -> np.ndarray | None:
        return self._fitted().item_bias()

    def score_terms(self, user, context, item) -> ScoreTerms:
        return self._fitted().score_terms(user, context, item)
