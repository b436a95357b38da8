"""Refresh a fitted model with the events since its training cutoff: fold-in, never relabel, never retrain.

The hourly refresh of a churning catalog and the evaluation's rolling protocol
(:mod:`threefold.evaluation.rolling`) both call :func:`refresh_result`, so the
figures the evaluation prints are those of the refreshed model a site deploys.

The rules, for the item mode first and then the user mode (so a new user's
clicks on new items count):

* **The window.** ``events`` are every event since the *base* fit's training
  cutoff (the last full retrain), not only the last hour's: a row is always
  solved from all of its evidence since then, so refreshes compose —
  refreshing a refreshed model with a longer window gives, label by label,
  the rows that one refresh of the base with that window gives (tested; the
  order in which new labels were appended may differ).
* **Vocabularies grow by appending.** Labels seen for the first time are
  appended in sorted order; existing labels keep their rows and positions.
* **Items first, from the trained users.** Item rows are solved against the
  trained user rows (at their trained values) from those users' events; then
  user rows against every item row. Users folded in by a refresh inform items
  at the next full retrain.
* **What is solved.** New rows, rows folded in by an earlier refresh, and rows
  predicted from catalog metadata, whenever they have events in the window;
  with ``update_known`` also the trained rows that have events. Each row is
  the exact least-squares solution of its row system of the implicit loss with
  every other factor fixed — the training weighting, ``w0`` and ``reg``
  (Hu, Koren & Volinsky, ICDM 2008) — the ALS row update itself.
* **Prior means.** A trained row re-solved with ``update_known`` keeps the
  trained value as the mean of its ridge term (``reg·‖x − x_trained‖²``: the
  window's events move it, the training evidence is not forgotten); the
  trained value is kept in the model so later refreshes use the same prior.
  An item predicted from metadata is solved around that prediction when
  ``metadata_prior`` is set, otherwise around zero like any new row.
* **Nothing else moves.** A row without events in the window is left bitwise
  as it was (tested); context modes and their levels never change (a level
  first seen after training maps to the unknown level, as in scoring).
* **Items without events** of a given catalog get the row the metadata map
  predicts (Gantner et al., ICDM 2010; :mod:`threefold.models.metadata`),
  marked ``from_metadata`` in their origin.

Each solved item row (and each metadata row) keeps its posterior covariance
``M_i⁻¹`` for exploration (:mod:`threefold.ranking.explore`); trained rows
have none (exploration is for items the model barely knows).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from threefold.core.vocabulary import Vocabulary
from threefold.data.build import build_tensor

__all__ = ["TRAINED", "FOLDED", "FROM_METADATA", "ORIGIN_NAMES", "RefreshState", "RefreshCounts", "refresh_result"]

#: Origin codes of a factor row.
TRAINED, FOLDED, FROM_METADATA = 0, 1, 2
ORIGIN_NAMES = ("trained", "folded", "from_metadata")


@dataclass(frozen=True)
class RefreshState:
    """What a refreshed model carries beside its factors (saved with it as extra arrays).

    Attributes
    ----------
    origins : tuple of ndarray
        ``origins[0]`` per user row and ``origins[1]`` per item row, uint8:
        :data:`TRAINED`, :data:`FOLDED` or :data:`FROM_METADATA`.
    trained_rows : dict of int to (ndarray of int64, ndarray of shape (n, R))
        Per mode, the rows re-solved with ``update_known`` and their trained values.
    covariance_rows : ndarray of int64
        Item rows with a posterior covariance.
    covariance : ndarray of shape (n, k, k), float32
        Their covariances in the model's coordinates, over ``covariance_columns``.
    covariance_columns : ndarray of int64
        The item-factor columns the covariances span.
    """

    origins: tuple
    trained_rows: dict = field(default_factory=dict)
    covariance_rows: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    covariance: np.ndarray = field(default_factory=lambda: np.zeros((0, 0, 0), np.float32))
    covariance_columns: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))

    @classmethod
    def fresh(cls, result) -> "RefreshState":
        """The state of a model straight from a fit: every row trained."""
        return cls(origins=(np.zeros(result.shape[0], np.uint8), np.zeros(result.shape[1], np.uint8)))

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Extra arrays of a model file (see :func:`threefold.models.model_io.save_model`)."""
        out = {"user_origin": self.origins[0], "item_origin": self.origins[1],
               "item_covariance_rows": self.covariance_rows, "item_covariance": self.covariance,
               "item_covariance_columns": self.covariance_columns}
        for mode, (index, rows) in self.trained_rows.items():
            out[f"trained_rows_index_{mode}"], out[f"trained_rows_{mode}"] = index, rows
        return out

    @classmethod
    def from_arrays(cls, result, arrays: Mapping[str, np.ndarray]) -> "RefreshState":
        """The state saved in a model file; a model that was never refreshed gets :meth:`fresh`."""
        if "item_origin" not in arrays:
            return cls.fresh(result)
        trained = {m: (arrays[f"trained_rows_index_{m}"], arrays[f"trained_rows_{m}"])
                   for m in (0, 1) if f"trained_rows_index_{m}" in arrays}
        return cls(origins=(arrays["user_origin"], arrays["item_origin"]), trained_rows=trained,
                   covariance_rows=arrays["item_covariance_rows"], covariance=arrays["item_covariance"],
                   covariance_columns=arrays["item_covariance_columns"])


@dataclass(frozen=True)
class RefreshCounts:
    """What one refresh did, per mode name (``user``, ``item``)."""

    new: dict
    resolved: dict
    from_metadata: int
    events: int
    cells: dict

    def to_dict(self) -> dict:
        return {"new": dict(self.new), "resolved": dict(self.resolved), "from_metadata": self.from_metadata,
                "events": self.events, "cells": dict(self.cells)}


def refresh_result(
    result,
    events: pd.DataFrame,
    contexts: Sequence,
    build_options: Mapping,
    *,
    state: RefreshState | None = None,
    update_known: bool = False,
    metadata_rows: Mapping[str, np.ndarray] | None = None,
    metadata_prior: bool = False,
):
    """The model refreshed with ``events``; see the module docstring for the rules.

    Parameters
    ----------
    result : CPResult or TuckerResult
        A fitted model (``supports_fold_in``); ``mode_names`` start ``("user", "item")``.
    events : DataFrame
        Normalized events since the base fit's training cutoff (whole requests).
    contexts : sequence of ContextSpec
        The model's context modes.
    build_options : mapping
        The training tensor's options of :func:`threefold.data.build.build_tensor`.
    state : RefreshState or None
        The model's refresh state (None: a model straight from a fit).
    update_known : bool, default=False
        Also re-solve trained rows that have events, around their trained values.
    metadata_rows : mapping of str to ndarray of shape (R,), optional
        Predicted item rows (in the model's coordinates) of catalog items; those
        still without events get them.
    metadata_prior : bool, default=False
        Solve items that have a metadata row around it rather than around zero.

    Returns
    -------
    result : CPResult or TuckerResult
    state : RefreshState
    counts : RefreshCounts
    """
    if not getattr(result, "supports_fold_in", False):
        raise ValueError(f"A {type(result).__name__} cannot fold in rows, so it cannot be refreshed.")
    state = state if state is not None else RefreshState.fresh(result)
    metadata_rows = dict(metadata_rows or {})
    origins = [state.origins[0].copy(), state.origins[1].copy()]
    trained_rows = {m: (i.copy(), r.copy()) for m, (i, r) in state.trained_rows.items()}
    covariance = _CovarianceTable(state)
    options = {**build_options, "unseen_ids": "drop", "unseen_context": "unknown"}
    new, resolved, cells = {}, {}, {}
    for mode, column in ((1, "item_id"), (0, "user_id")):
        name = result.mode_names[mode]
        vocab = result.vocabularies[mode]
        labels_in = np.unique(events[column].astype(str).to_numpy(dtype=object)) if len(events) else np.array([], object)
        position = pd.Index(vocab.labels, dtype=object).get_indexer(labels_in)
        appended = np.sort(labels_in[position < 0]).astype(object)
        known = position[position >= 0]
        if not update_known:
            known = known[origins[mode][known] != TRAINED]
        solve_labels = np.concatenate([np.asarray(vocab.labels, dtype=object)[known], appended])
        solve_index = np.concatenate([known, len(vocab) + np.arange(appended.size)]).astype(np.int64)
        new[name], resolved[name], cells[name] = int(appended.size), int(known.size), 0
        if solve_labels.size == 0:
            continue
        prior = _prior_means(result, mode, known, appended, origins[mode], trained_rows, metadata_rows,
                             metadata_prior, update_known)
        vocabularies = list(result.vocabularies)
        vocabularies[mode] = Vocabulary(tuple(str(s) for s in solve_labels), name=vocab.name)
        tensor, _ = build_tensor(events, contexts, vocabularies=vocabularies, **options)
        solve_from = result
        if mode == 1:  # items from the trained users only, at their trained values: refreshes compose
            tensor = tensor.take(origins[0][tensor.coords[0]] == TRAINED)
            solve_from = _with_trained_rows(result, trained_rows.get(0), 0)
        cells[name] = int(tensor.nnz)
        rows, cov, columns = _solve(solve_from, tensor, mode, prior)
        if update_known and mode in (0, 1):
            _keep_trained(trained_rows, mode, known[origins[mode][known] == TRAINED], result.factors[mode])
        result = _place_rows(result, mode, known, rows[: known.size], rows[known.size:], appended)
        was = origins[mode]
        origins[mode] = np.concatenate([was, np.full(appended.size, FOLDED, np.uint8)])
        origins[mode][known[was[known] == FROM_METADATA]] = FOLDED
        if mode == 1 and cov is not None:
            covariance.set(solve_index, cov, columns)
    result, metadata_count = _add_metadata_items(result, metadata_rows, origins, covariance, events, contexts, options)
    counts = RefreshCounts(new=new, resolved=resolved, from_metadata=metadata_count, events=int(len(events)),
                           cells=cells)
    state = RefreshState(origins=tuple(origins), trained_rows=trained_rows, **covariance.arrays())
    return result, state, counts


def _prior_means(result, mode, known, appended, origin, trained_rows, metadata_rows, metadata_prior, update_known):
    """Prior means of the rows to solve (known first, then appended), or None when all are zero."""
    width = result.factors[mode].shape[1]
    prior = np.zeros((known.size + appended.size, width))
    used = False
    if update_known:
        trained = origin[known] == TRAINED
        kept = dict(zip(*trained_rows[mode])) if mode in trained_rows else {}
        for j in np.flatnonzero(trained):
            prior[j] = kept.get(int(known[j]), result.factors[mode][known[j]])
            used = True
    if metadata_prior and mode == 1 and metadata_rows:
        labels = list(np.asarray(result.vocabularies[1].labels, dtype=object)[known]) + list(appended)
        for j, label in enumerate(labels):
            if label in metadata_rows and not (j < known.size and origin[known[j]] == TRAINED):
                prior[j] = metadata_rows[label]
                used = True
    return prior if used else None


def _with_trained_rows(result, kept, mode):
    """The model with the re-solved trained rows of ``mode`` back at their trained values."""
    if kept is None or kept[0].size == 0:
        return result
    factors = list(result.factors)
    factor = factors[mode].copy()
    factor[kept[0]] = kept[1]
    factors[mode] = factor
    return replace(result, factors=tuple(factors))


def _solve(result, tensor, mode, prior):
    """Rows of the tensor's mode ``mode`` (and item covariances when the model has them)."""
    if hasattr(result, "row_posterior"):
        posterior = result.row_posterior(tensor, mode, prior=prior, covariance=mode == 1)  # exploration: items only
        return posterior.rows, posterior.covariance, posterior.columns
    if prior is not None:
        raise ValueError(f"A {type(result).__name__} folds in by projection and takes no prior mean; "
                         "refresh it without update_known and metadata_prior.")
    return result.fold_in(tensor, mode), None, None


def _keep_trained(trained_rows, mode, index, factor):
    """Record the trained values of rows about to be re-solved for the first time."""
    old_index, old_rows = trained_rows.get(mode, (np.zeros(0, np.int64), np.zeros((0, factor.shape[1]), factor.dtype)))
    fresh = index[~np.isin(index, old_index)]
    trained_rows[mode] = (np.concatenate([old_index, fresh]).astype(np.int64),
                          np.concatenate([old_rows, factor[fresh]]).astype(factor.dtype))


def _place_rows(result, mode, known, known_rows, new_rows, appended):
    """Replace the rows ``known`` and append ``new_rows`` labelled ``appended``."""
    if known.size:
        factors = list(result.factors)
        factor = factors[mode].copy()
        factor[known] = known_rows.astype(factor.dtype)
        factors[mode] = factor
        result = replace(result, factors=tuple(factors))
    if appended.size:
        result = result.with_rows(mode, new_rows, [str(s) for s in appended])
    return result


def _add_metadata_items(result, metadata_rows, origins, covariance, events, contexts, options):
    """Append the catalog items still without a row, at their predicted rows."""
    if not metadata_rows:
        return result, 0
    index = pd.Index(result.vocabularies[1].labels, dtype=object)
    labels = sorted(label for label in metadata_rows if index.get_indexer([label])[0] < 0)
    if not labels:
        return result, 0
    rows = np.stack([np.asarray(metadata_rows[label], dtype=np.float64) for label in labels])
    if hasattr(result, "row_posterior"):  # no cells: the covariance of the prior alone
        vocabularies = list(result.vocabularies)
        vocabularies[1] = Vocabulary(tuple(labels), name=vocabularies[1].name)
        empty, _ = build_tensor(events.iloc[:0], contexts, vocabularies=vocabularies, **options)
        posterior = result.row_posterior(empty, 1)
        covariance.set(len(index) + np.arange(len(labels)), posterior.covariance, posterior.columns)
    result = result.with_rows(1, rows, labels)
    origins[1] = np.concatenate([origins[1], np.full(len(labels), FROM_METADATA, np.uint8)])
    return result, len(labels)


class _CovarianceTable:
    """Item covariances by row, updated in place during one refresh."""

    def __init__(self, state: RefreshState):
        self.table = {int(r): c for r, c in zip(state.covariance_rows, state.covariance)}
        self.columns = state.covariance_columns

    def set(self, rows: np.ndarray, covariance: np.ndarray, columns: np.ndarray) -> None:
        self.columns = np.asarray(columns, np.int64)
        for r, c in zip(rows, covariance):
            self.table[int(r)] = c.astype(np.float32)

    def arrays(self) -> dict:
        rows = np.array(sorted(self.table), dtype=np.int64)
        k = self.columns.size
        cov = np.stack([self.table[int(r)] for r in rows]) if rows.size else np.zeros((0, k, k), np.float32)
        return {"covariance_rows": rows, "covariance": cov.astype(np.float32), "covariance_columns": self.columns}

