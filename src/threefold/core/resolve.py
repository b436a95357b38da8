"""From ids to factor rows: the one rule for unknown users, items and context levels.

Offline evaluation and serving must score the same (user, item, context) the
same way, unknown ids included, or what is measured is not what is served. Both
resolve ids through :class:`ResolvedScorer`, under one named rule
(:class:`UnknownPolicy`):

=================  ===================  ===============================================
what is unknown    row used             why
=================  ===================  ===============================================
user               ``mean``             the mean of the trained user rows: the average
                                        reader's taste is the best guess without
                                        evidence, and keeps the item and context terms
                                        of a structure in play (a zero row would
                                        rank every item by index for a plain CP)
context level      ``mean``             the mean of the mode's trained level rows:
                                        the context marginalized out
item               ``zero``             the fold-in of an item with no events
                                        (Hu, Koren & Volinsky, ICDM 2008): no
                                        interaction score, no bias
=================  ===================  ===============================================

"Unknown" covers a label outside the model's vocabulary, a missing label, and
a label whose row was never trained (zero on every column its mode owns, e.g. a
level that had no cells). ``zero`` may be chosen for users and contexts too;
the policy is recorded with the results.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from threefold.core.checks import check_choice
from threefold.core.vocabulary import Vocabulary

__all__ = ["UnknownPolicy", "DEFAULT_POLICY", "ResolvedScorer", "BoundFactors", "FALLBACK_LABEL"]

#: Label of the appended fallback row (never a real id: it starts with a NUL character).
FALLBACK_LABEL = "\x00threefold-fallback"


@dataclass(frozen=True)
class UnknownPolicy:
    """The row an unknown id gets, per kind of mode.

    Attributes
    ----------
    user : {"mean", "zero"}, default="mean"
    context : {"mean", "zero"}, default="mean"
    item : {"zero"}, default="zero"
    """

    user: str = "mean"
    context: str = "mean"
    item: str = "zero"

    def __post_init__(self) -> None:
        check_choice("user", self.user, ("mean", "zero"), owner="UnknownPolicy")
        check_choice("context", self.context, ("mean", "zero"), owner="UnknownPolicy")
        check_choice("item", self.item, ("zero",), owner="UnknownPolicy")

    def to_dict(self) -> dict[str, str]:
        return {"user": self.user, "context": self.context, "item": self.item}


DEFAULT_POLICY = UnknownPolicy()


def untrained_rows(scorer, mode: int) -> np.ndarray:
    """ndarray of shape (I_mode,), bool: rows zero on every column the mode owns (no training cells)."""
    factor = np.asarray(scorer.factors[mode])
    columns = scorer.owned_columns(mode)
    if not columns.any():
        return np.zeros(factor.shape[0], dtype=bool)
    return np.all(factor[:, columns] == 0, axis=1)


class ResolvedScorer:
    """A fitted factor model with one fallback row appended to the user and context modes.

    Parameters
    ----------
    scorer : CPResult or TuckerResult
        A fitted result with ``factors``, ``with_rows`` and ``owned_columns``.
    vocabularies : sequence of Vocabulary, optional
        One per mode; default the model's.
    policy : UnknownPolicy, default=DEFAULT_POLICY

    Attributes
    ----------
    scorer : Scorer
        The model with the fallback rows appended (row ``I_n`` of modes 0, 2, 3, ...).
    """

    def __init__(self, scorer, vocabularies: Sequence[Vocabulary] | None = None,
                 policy: UnknownPolicy = DEFAULT_POLICY):
        vocabs = tuple(vocabularies) if vocabularies is not None else tuple(scorer.vocabularies or ())
        if len(vocabs) != len(scorer.shape) or any(v is None for v in vocabs):
            raise ValueError("Resolving ids needs a vocabulary for every mode of the model; pass vocabularies= "
                             "(e.g. tensor.vocabularies).")
        self.vocabularies = vocabs
        self.policy = policy
        self.sizes = tuple(scorer.shape)
        self.remap: dict[int, np.ndarray] = {}
        augmented = scorer
        for mode in [0] + list(range(2, len(self.sizes))):
            factor = np.asarray(scorer.factors[mode], dtype=np.float64)
            untrained = untrained_rows(scorer, mode)
            rule = policy.user if mode == 0 else policy.context
            if rule == "mean":
                trained = factor[~untrained] if (~untrained).any() else factor
                fallback = trained.mean(axis=0, keepdims=True)
            else:
                fallback = _zero_owned(scorer, mode, factor)
            augmented = augmented.with_rows(mode, fallback, labels=[FALLBACK_LABEL])
            self.remap[mode] = np.where(untrained, factor.shape[0], np.arange(factor.shape[0]))
        self.scorer = augmented

    def rows(self, mode: int, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Factor rows of ``labels`` in a user or context mode, and which fell back.

        Parameters
        ----------
        mode : int
            0 (users) or a context mode (2, 3, ...).
        labels : ndarray of shape (n,), object (str or None)

        Returns
        -------
        rows : ndarray of shape (n,), int64
            Indices into the augmented factor (``I_mode`` is the fallback row).
        unknown : ndarray of shape (n,), bool
        """
        codes = self.vocabularies[mode].encode(np.asarray(labels, dtype=object), policy="drop").codes.astype(np.int64)
        fallback = self.sizes[mode]
        rows = np.where(codes >= 0, self.remap[mode][np.maximum(codes, 0)], fallback)
        return rows, rows == fallback

    def item_codes(self, labels: np.ndarray) -> np.ndarray:
        """ndarray of shape (n,), int64: the model's item index of each label, -1 when unknown (zero row)."""
        return self.vocabularies[1].encode(np.asarray(labels, dtype=object), policy="drop").codes.astype(np.int64)

    def query_matrix(self, users: np.ndarray, contexts: np.ndarray) -> np.ndarray:
        """ndarray of shape (q, R'): query rows of resolved user and context rows."""
        return self.scorer.query_matrix(users, contexts if contexts.shape[1] else None)

    def resolve_queries(self, users: np.ndarray, contexts: Sequence[np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Resolved user rows, context rows ``(q, n_context)`` and the unknown flags of both.

        Parameters
        ----------
        users : ndarray of shape (q,), object
        contexts : sequence of ndarray of shape (q,), object
            One label array per context mode, in the model's order.

        Returns
        -------
        user_rows : ndarray of shape (q,), int64
        context_rows : ndarray of shape (q, n_context), int64
        unknown_user, unknown_context : ndarray of shape (q,), bool
        """
        user_rows, unknown_user = self.rows(0, users)
        n_context = len(self.sizes) - 2
        if len(contexts) != n_context:
            raise ValueError(f"The model has {n_context} context mode(s); got labels for {len(contexts)}.")
        context_rows = np.zeros((user_rows.shape[0], n_context), dtype=np.int64)
        unknown_context = np.zeros(user_rows.shape[0], dtype=bool)
        for j, labels in enumerate(contexts):
            context_rows[:, j], unknown = self.rows(2 + j, labels)
            unknown_context |= unknown
        return user_rows, context_rows, unknown_user, unknown_context

    def bind(self, users: np.ndarray, contexts: Sequence[np.ndarray], item_labels: np.ndarray) -> "BoundFactors":
        """Block scorer of queries against an item universe given by labels (unknown items: zero rows)."""
        user_rows, context_rows, _, _ = self.resolve_queries(users, contexts)
        q = np.asarray(self.query_matrix(user_rows, context_rows))
        v = np.asarray(self.scorer.item_matrix())
        codes = self.item_codes(item_labels)
        known = codes >= 0
        items = np.zeros((codes.shape[0], v.shape[1]), dtype=v.dtype)
        items[known] = v[codes[known]]
        bias = self.scorer.item_bias()
        if bias is not None:
            aligned = np.zeros(codes.shape[0], dtype=v.dtype)
            aligned[known] = np.asarray(bias)[codes[known]]
            bias = aligned
        return BoundFactors(q.astype(v.dtype, copy=False), items, bias)


def _zero_owned(scorer, mode: int, factor: np.ndarray) -> np.ndarray:
    """A row zero on the columns the mode owns (ones elsewhere, the neutral value of unowned columns)."""
    row = np.ones((1, factor.shape[1]))
    row[:, scorer.owned_columns(mode)] = 0.0
    return row


class BoundFactors:
    """Block scorer of a factor model over resolved queries: ``Q[rows] @ V[items].T + b[items]``.

    Parameters
    ----------
    query : ndarray of shape (q, R')
    items : ndarray of shape (n_items, R')
    bias : ndarray of shape (n_items,) or None
    """

    def __init__(self, query: np.ndarray, items: np.ndarray, bias: np.ndarray | None):
        self.query = query
        self.item_factors = items
        self._items_t = np.ascontiguousarray(items.T)
        self._bias = bias

    def __call__(self, rows, items: np.ndarray | None = None) -> np.ndarray:
        if items is None:
            scores = self.query[rows] @ self._items_t
            bias = self._bias
        else:
            scores = self.query[rows] @ self.item_factors[items].T
            bias = None if self._bias is None else self._bias[items]
        if bias is not None:
            scores += bias
        return scores
