"""Tucker models of sparse context tensors: the shared result, scoring and core diagnostics.

A Tucker model approximates the user × item × context tensor as
``X̂ = G ×_1 F_1 ×_2 F_2 ... ×_N F_N`` (Tucker, Psychometrika 31, 1966; Kolda &
Bader, SIAM Review 51(3), 2009, section 4): one factor matrix ``F_n`` of shape
``(I_n, R_n)`` per mode and a core ``G`` of shape ``(R_1, ..., R_N)`` in which any
user group can meet any item group under any context level. Context-aware
recommendation with Tucker models: Karatzoglou, Amatriain, Baltrunas & Oliver,
"Multiverse recommendation", RecSys 2010.

Two fits share the :class:`TuckerResult` of this module:
:func:`threefold.models.tucker.hooi.fit_hooi` (orthonormal factors, unweighted least squares on the
zero-filled preference tensor) and :func:`threefold.models.tucker.implicit.fit_implicit_tucker`
(confidence-weighted least squares over all cells). ``docs/tucker.md`` explains
how to read the core.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from threefold.core.checks import check_choice, check_int
from threefold.core.params import (Param, ParamTable, callable_rule, choice_rule, dtype_rule, float_rule,
                                    int_rule, ints_rule, optional, seed_rule)
from threefold.models.base import FactorEstimator, FactorResultMixin, mode_position
from threefold.models.fitloop import STOP_REASONS, SweepRecord
from threefold.models.initialize import leading_left_vectors
from threefold.core.scoring import Scorer, ScoreTerms, check_queries
from threefold.core.tensor import SparseTensor
from threefold.core.vocabulary import Vocabulary

__all__ = [
    "TuckerResult",
    "TuckerEstimator",
    "core_contributions",
    "core_slice",
    "check_tucker_rank",
    "hosvd_factors",
    "tucker_params",
]


@dataclass(frozen=True, eq=False)
class TuckerResult(FactorResultMixin, Scorer):
    """A fitted Tucker model ``x̂ = G ×_1 F_1 ... ×_N F_N``; validated at construction.

    Unpacks like a tuple: ``core, factors = result``. Scores through the shared
    interface: ``Q`` is the core contracted with each query's user row and
    context rows, shape ``(q, R_item)``; ``V`` is the item factor; one score term
    per core entry.

    Parameters
    ----------
    core : ndarray of shape (R_1, ..., R_N), float32 or float64
    factors : tuple of ndarray of shape (I_n, R_n), same dtype as ``core``
    mode_names : tuple of str
    vocabularies : tuple of Vocabulary or None
    history : tuple of SweepRecord
        Sweep 0 (the initial state) first.
    stop_reason : {"converged", "max_sweeps", "callback"}
    method : {"hooi", "implicit"}
    w0, reg : float
        The weight of cells not stored and the regularization of the fit
        (``w0 = 1`` and ``reg = 0`` for HOOI, which is unweighted).
    """

    core: np.ndarray
    factors: tuple[np.ndarray, ...]
    mode_names: tuple[str, ...]
    vocabularies: tuple[Vocabulary | None, ...]
    history: tuple[SweepRecord, ...]
    stop_reason: str
    method: str
    w0: float = 1.0
    reg: float = 0.0

    def __post_init__(self) -> None:
        core = np.asarray(self.core)
        if core.dtype not in (np.float32, np.float64) or core.ndim < 2:
            raise ValueError(f"TuckerResult core must be a float32 or float64 array of at least 2 modes, "
                             f"got {core.dtype} {core.shape}.")
        factors = tuple(np.asarray(f) for f in self.factors)
        if len(factors) != core.ndim or len(self.mode_names) != core.ndim or len(self.vocabularies) != core.ndim:
            raise ValueError(f"TuckerResult needs one factor, mode name and vocabulary per core mode ({core.ndim}); "
                             f"got {len(factors)}, {len(self.mode_names)} and {len(self.vocabularies)}.")
        for n, (name, f) in enumerate(zip(self.mode_names, factors)):
            if f.ndim != 2 or f.shape[1] != core.shape[n] or f.dtype != core.dtype:
                raise ValueError(f"Factor of mode {name!r} must be a {core.dtype} array of shape (I, {core.shape[n]}) "
                                 f"to match the core of shape {core.shape}, got {f.dtype} {f.shape}.")
            vocab = self.vocabularies[n]
            if vocab is not None and len(vocab) != f.shape[0]:
                raise ValueError(f"Factor of mode {name!r} has {f.shape[0]} rows but its vocabulary {len(vocab)} labels.")
        if not all(isinstance(h, SweepRecord) for h in self.history):
            raise ValueError("TuckerResult history must hold SweepRecord entries.")
        check_choice("stop_reason", self.stop_reason, STOP_REASONS, owner="TuckerResult")
        check_choice("method", self.method, ("hooi", "implicit"), owner="TuckerResult")
        object.__setattr__(self, "core", core)
        object.__setattr__(self, "factors", factors)
        object.__setattr__(self, "history", tuple(self.history))

    def __iter__(self):
        return iter((self.core, self.factors))

    def reason_terms(self, users, contexts, items, queries=None) -> tuple[tuple[str, ...], np.ndarray]:
        """One term per core entry, ``G[r] · Π_n F_n[cell_n, r_n]`` (:func:`core_contributions`).

        Labels name each entry by its component in every mode, e.g.
        ``"core user 2 × item 0 × daypart 1"``. Cells with item ``-1`` (a zero
        item row) have no terms. Computed in batches of about 2**22 values;
        ``queries`` is not used (core entries are finer than its columns).
        """
        users, contexts = check_queries(users, contexts, self.shape)
        items = np.asarray(items, dtype=np.int64).reshape(-1)
        names = self.mode_names or tuple(f"mode {n}" for n in range(self.core.ndim))
        labels = tuple("core " + " × ".join(f"{names[n]} {r}" for n, r in enumerate(idx))
                       for idx in np.ndindex(*self.core.shape))
        terms = np.zeros((users.shape[0], len(labels)))
        known = np.flatnonzero(items >= 0)
        batch = max(1, (1 << 22) // max(len(labels), 1))
        for start in range(0, known.size, batch):
            sel = known[start:start + batch]
            cells = np.column_stack([users[sel], items[sel], contexts[sel]])
            terms[sel] = core_contributions(self.core, self.factors, cells).reshape(sel.size, -1)
        return labels, terms

    def file_contents(self) -> tuple[str, dict[str, np.ndarray], dict]:
        """``(model type, arrays, metadata)`` this result adds to a model file (:mod:`threefold.models.model_io`)."""
        return "tucker", {"core": self.core}, {"method": self.method}

    @classmethod
    def from_file_contents(cls, meta: dict, arrays: dict, common: dict) -> "TuckerResult":
        return cls(core=arrays["core"], method=meta["method"], **common)

    # ------------------------------------------------------------------ summary
    @property
    def shape(self) -> tuple[int, ...]:
        """Mode sizes (user, item, context...)."""
        return tuple(f.shape[0] for f in self.factors)

    @property
    def rank(self) -> tuple[int, ...]:
        """Core shape ``(R_1, ..., R_N)``."""
        return tuple(self.core.shape)

    def to_dense(self, max_cells: int = 50_000_000) -> np.ndarray:
        """Dense reconstruction ``G ×_1 F_1 ... ×_N F_N``, float64 (small shapes only)."""
        cells = int(np.prod(self.shape, dtype=object))
        if cells > max_cells:
            raise MemoryError(f"A dense reconstruction of shape {self.shape} has {cells:,} cells, above {max_cells:,}.")
        out = np.asarray(self.core, dtype=np.float64)
        for n, f in enumerate(self.factors):
            out = np.moveaxis(np.tensordot(np.asarray(f, dtype=np.float64), out, axes=(1, n)), 0, n)
        return out

    def predict(self, coords: np.ndarray) -> np.ndarray:
        """Model values at given cells.

        Parameters
        ----------
        coords : array-like of shape (ndim, n), int

        Returns
        -------
        ndarray of shape (n,), float64
        """
        coords = np.asarray(coords, dtype=np.int64).reshape(self.core.ndim, -1)
        return core_contributions(self.core, self.factors, coords.T).reshape(coords.shape[1], -1).sum(axis=1)

    # ------------------------------------------------------------------ scoring interface
    def query_matrix(self, users: np.ndarray, contexts: np.ndarray | None = None) -> np.ndarray:
        """ndarray of shape (q, R_item), float64: the core times each query's user and context rows."""
        users, contexts = check_queries(users, contexts, self.shape)
        core = np.asarray(self.core, dtype=np.float64)
        q = np.tensordot(np.asarray(self.factors[0], dtype=np.float64)[users], core, axes=(1, 0))
        for j in range(contexts.shape[1]):  # q has shape (q, R_item, R_context_j, ...)
            q = np.einsum("qic...,qc->qi...", q, np.asarray(self.factors[2 + j], dtype=np.float64)[contexts[:, j]])
        return q

    def item_matrix(self) -> np.ndarray:
        """ndarray of shape (n_items, R_item): the item factor."""
        return self.factors[1]

    def score_terms(self, user: int, context, item: int) -> ScoreTerms:
        """One term per core entry (labels ``"core (r_user, r_item, r_context...)"``), summing to the score."""
        context = np.asarray(context, dtype=np.int64).reshape(1, -1)
        users, contexts = check_queries(np.array([user]), context if context.size else None, self.shape)
        if not 0 <= item < self.shape[1]:
            raise IndexError(f"item index must lie in [0, {self.shape[1]}), got {item}.")
        cell = np.concatenate([users, [item], contexts[0]])[None]
        values = core_contributions(self.core, self.factors, cell)[0]
        labels = tuple(f"core {idx}" for idx in np.ndindex(*self.core.shape))
        return ScoreTerms(labels=labels, values=values.ravel())

def check_fold_in(result: TuckerResult, tensor: SparseTensor, mode: int | str) -> int:
    """Check a fold-in tensor against a model: same modes, same sizes but in ``mode``."""
    n = mode_position(result.mode_names, mode)
    if tensor.mode_names != result.mode_names:
        raise ValueError(f"fold_in: the tensor's modes {tensor.mode_names} differ from the model's {result.mode_names}.")
    for m, name in enumerate(result.mode_names):
        if m != n and tensor.shape[m] != result.shape[m]:
            raise ValueError(
                f"fold_in: mode {name!r} has {tensor.shape[m]} rows in the tensor but {result.shape[m]} in the model."
            )
    return n


def core_contributions(core: np.ndarray, factors: Sequence[np.ndarray], cells: np.ndarray) -> np.ndarray:
    """Per-core-entry contributions to the model value of each cell.

    ``out[c, r_1, ..., r_N] = G[r_1, ..., r_N] · Π_n F_n[cells[c, n], r_n]``, so
    ``out[c].sum()`` is the score of cell ``c``: the additive explanation of a
    score by the (user group, item group, context group...) interactions.
    Memory ``n_cells · Π R_n``; pass cells in batches for large requests.

    Parameters
    ----------
    core : ndarray of shape (R_1, ..., R_N)
    factors : sequence of ndarray of shape (I_n, R_n)
    cells : array-like of shape (n_cells, N), int
        One (user, item, context levels...) index tuple per row.

    Returns
    -------
    ndarray of shape (n_cells, R_1, ..., R_N), float64
    """
    cells = np.asarray(cells, dtype=np.int64)
    ndim = core.ndim
    if cells.ndim != 2 or cells.shape[1] != ndim:
        raise ValueError(f"cells must have shape (n_cells, {ndim}), got {cells.shape}.")
    out = np.broadcast_to(np.asarray(core, dtype=np.float64), (cells.shape[0],) + core.shape).copy()
    for n, f in enumerate(factors):
        if cells.size and (cells[:, n].min() < 0 or cells[:, n].max() >= f.shape[0]):
            raise IndexError(f"cell indices of mode {n} must lie in [0, {f.shape[0]}).")
        rows = np.asarray(f, dtype=np.float64)[cells[:, n]]
        out *= rows.reshape((cells.shape[0],) + (1,) * n + (core.shape[n],) + (1,) * (ndim - n - 1))
    return out


def core_slice(result: TuckerResult, levels: dict[int, int]) -> np.ndarray:
    """The core contracted with the factor rows of fixed levels of some modes.

    With every context mode fixed (``levels = {2: evening, 3: mobile}``) this is
    the ``R_user × R_item`` matrix of how strongly each user group meets each
    item group in that context: ``G ×_{m ∈ levels} F_m[level_m]``.

    Parameters
    ----------
    result : TuckerResult
    levels : dict of int to int
        Mode position → level index.

    Returns
    -------
    ndarray with the fixed modes removed, float64
    """
    for mode, level in levels.items():
        if not 0 <= mode < result.core.ndim:
            raise IndexError(f"Mode {mode} out of range for a {result.core.ndim}-way model.")
        size = result.factors[mode].shape[0]
        if not 0 <= int(level) < size:
            raise IndexError(f"Level {level} of mode {mode} must lie in [0, {size}).")
    out = np.asarray(result.core, dtype=np.float64)
    for mode in sorted(levels, reverse=True):  # later modes first keep earlier axis positions valid
        out = np.tensordot(out, result.factors[mode][int(levels[mode])].astype(np.float64), axes=(mode, 0))
    return out


class TuckerEstimator(FactorEstimator):
    """Shared plumbing of the Tucker estimators: parameters, fit, fitted state, scoring by delegation.

    A subclass names its fit function in ``_fit_function`` and its parameter
    table in ``params`` (the fit function's keyword parameters, checked by a test).

    Attributes
    ----------
    result_ : TuckerResult
    core_ : ndarray of shape (R_1, ..., R_N)
    factors_ : tuple of ndarray of shape (I_n, R_n)
    history_ : tuple of SweepRecord
    n_sweeps_ : int
    converged_ : bool
    """

    _result_attributes = ("core", "factors", "history", "n_sweeps", "converged")


def _tucker_init_rule(*choices: str):
    def rule(key, value, owner):
        if isinstance(value, str):
            return check_choice(key, value, choices, owner=owner)
        return value  # a TuckerResult or factor arrays: checked against the tensor by the fit
    return rule


def tucker_params(owner: str, *, max_sweeps: int, tol: float, init_choices: tuple[str, ...],
                  extra: tuple[Param, ...] = ()) -> ParamTable:
    """The parameter table of a Tucker fit: the shared parameters, ``extra`` after ``init`` and before ``max_sweeps``."""
    return ParamTable(owner, [
        Param("rank", 8, ints_rule(low=1), "core size: one int for every mode, or a list with one per mode"),
        *[p for p in extra if p.name == "reg"],
        Param("init", init_choices[0], _tucker_init_rule(*init_choices),
              f"{' or '.join(repr(c) for c in init_choices)}, a TuckerResult or factor arrays",
              config=choice_rule(*init_choices)),
        Param("max_sweeps", max_sweeps, int_rule(low=1), "most sweeps"),
        Param("tol", tol, float_rule(low=0.0), "stop when a sweep changes the loss by less than this share"),
        *[p for p in extra if p.name != "reg"],
        Param("random_state", None, seed_rule, "seed of the initialization (None: drawn anew)"),
        Param("n_threads", None, optional(int_rule(low=1)), "numba threads (None: numba's setting)"),
        Param("dtype", None, dtype_rule, "factor precision, 'float32' or 'float64' (None: the tensor's)",
              config=optional(choice_rule("float32", "float64"))),
        Param("callback", None, callable_rule, "called after every sweep as callback(record, (core, factors))",
              config=False),
    ])


def check_tucker_rank(rank: int | Sequence[int], shape: tuple[int, ...], owner: str) -> tuple[int, ...]:
    """Validate a Tucker rank: one int per mode (or one for all), each in [1, I_n]."""
    ranks = (rank,) * len(shape) if np.isscalar(rank) else tuple(rank)
    if len(ranks) != len(shape):
        raise ValueError(f"The 'rank' parameter of {owner} needs one entry per mode ({len(shape)}), got {len(ranks)}.")
    out = []
    for n, (r, size) in enumerate(zip(ranks, shape)):
        check_int("rank", r, low=1, owner=owner)
        if r > size:
            raise ValueError(
                f"The 'rank' parameter of {owner} asks for {r} components in mode {n}, which has only {size} "
                f"indices; each rank must be at most its mode's size."
            )
        out.append(int(r))
    return tuple(out)


def hosvd_factors(tensor: SparseTensor, rank: tuple[int, ...], rng: np.random.Generator) -> list[np.ndarray]:
    """Truncated HOSVD factors from the sparse unfoldings, never a dense one.

    Factor ``n`` holds the leading ``rank[n]`` left singular vectors of the
    mode-n unfolding of the preference values (De Lathauwer, De Moor &
    Vandewalle, SIAM J. Matrix Anal. Appl. 21(4), 2000), from
    :func:`threefold.models.initialize.leading_left_vectors`: the eigendecomposition
    of the small Gram matrix ``X_(n) X_(n)ᵀ`` for modes of at most 512 rows,
    ``scipy.sparse.linalg.svds`` otherwise. Columns an unfolding cannot give
    are random, made orthonormal to the others here.

    Returns
    -------
    list of ndarray of shape (I_n, R_n), float64, orthonormal columns
    """
    factors = []
    for n in range(tensor.ndim):
        u = leading_left_vectors(tensor, n, rank[n], rng)
        q, r = np.linalg.qr(u)
        factors.append(q * np.where(np.diag(r) < 0, -1.0, 1.0))  # keeps the leading vectors and their signs
    return factors


def read_only_model(core: np.ndarray, factors: Sequence[np.ndarray]) -> tuple[np.ndarray, tuple[np.ndarray, ...]]:
    """``(core, factors)`` as read-only views, for fit callbacks."""
    views = [core.view()] + [f.view() for f in factors]
    for view in views:
        view.flags.writeable = False
    return views[0], tuple(views[1:])


def check_fit_parameters(table: ParamTable, tensor, values: dict, owner: str) -> dict:
    """Validate a Tucker fit's arguments by its table, and the rank against the tensor; return them checked.

    ``rank`` comes back as a tuple with one entry per mode and ``dtype`` as the
    numpy dtype to fit in (the tensor's when None).
    """
    if not isinstance(tensor, SparseTensor):
        raise TypeError(f"{owner} needs a SparseTensor, got {type(tensor).__name__}.")
    checked = table.check_all(values, owner=owner)
    checked["rank"] = check_tucker_rank(values["rank"], tensor.shape, owner)
    checked["dtype"] = tensor.dtype if values["dtype"] is None else np.dtype(values["dtype"])
    return checked
