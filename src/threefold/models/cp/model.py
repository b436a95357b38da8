"""CP models of implicit feedback tensors: the fit, fold-in and the estimator.

``fit_cp`` minimizes, over all cells of a :class:`~threefold.core.tensor.SparseTensor`,

    Σ w·(p − x̂)²  +  reg · Σ_n ‖F_n‖²,     x̂(i_1..i_N) = Σ_r Π_n F_n[i_n, r],

with ``w = w0`` and ``p = 0`` on every cell not stored, by alternating least
squares (exact row solves, or a few conjugate-gradient steps per row) in time
linear in the stored cells (iTALS: Hidasi & Tikk, ECML-PKDD 2012;
arXiv:1309.7611). A :class:`~threefold.models.cp.structure.Structure` says which modes
each component uses (General Factorization Framework: Hidasi & Tikk, DMKD 30,
2016; arXiv:1401.4529). ``docs/models.md`` explains the model and its choices.

References
----------
Hidasi, B. & Tikk, D. "Fast ALS-based tensor factorization for context-aware
recommendation from implicit feedback", ECML-PKDD 2012; arXiv:1309.7611.
Takács, G., Pilászy, I. & Tikk, D. "Applications of the conjugate gradient
method for implicit feedback collaborative filtering", RecSys 2011.
Hu, Y., Koren, Y. & Volinsky, C. "Collaborative filtering for implicit feedback
datasets", ICDM 2008 (fold-in).
"""

from __future__ import annotations

import time
from typing import Callable, Sequence

import numpy as np

from threefold.models.cp import als

from threefold.models.cp import kernels
from threefold.core.checks import check_choice
from threefold.core.params import (Param, ParamTable, STRING, STRINGS, callable_rule, choice_rule,
                                    dtype_rule, float_rule, int_rule, optional, seed_rule)
from threefold.models.cp.result import CPResult, mode_position
from threefold.models.fitloop import SweepRecord, run_sweeps
from threefold.models.initialize import initial_factors
from threefold.models.base import FactorEstimator
from threefold.models.cp.structure import Structure, resolve_structure
from threefold.core.tensor import SparseTensor

__all__ = ["SweepRecord", "CPResult", "fit_cp", "fold_in", "CPModel", "CP_PARAMS"]


def _structure_rule(key, value, owner):
    if value is None or isinstance(value, (str, Structure)):
        return value
    raise ValueError(f"The {key!r} parameter of {owner} must be None, a Structure or a spec string such as "
                     f"'user*item:32 + user*item*daypart:8'. Got {value!r} instead.")


def _init_rule(key, value, owner):
    if isinstance(value, str):
        return check_choice(key, value, ("random", "svd"), owner=owner)
    return value  # factor arrays or a CPResult: checked against the tensor in fit_cp


def _modes_rule(key, value, owner):
    if isinstance(value, (str, bytes)) or not isinstance(value, (list, tuple)):
        raise ValueError(f"The {key!r} parameter of {owner} must be a list of mode names or positions. "
                         f"Got {value!r} instead.")
    return value


#: The parameters of :func:`fit_cp` and :class:`CPModel`: the one place their defaults and rules live.
CP_PARAMS = ParamTable("CPModel", [
    Param("rank", 16, int_rule(low=1), "components of a plain CP, and of every structure term without ':rank'"),
    Param("structure", None, _structure_rule, "which modes each term spans, e.g. 'user*item:32 + user*item*daypart:8'; "
          "None: plain CP over every mode", config=optional(STRING)),
    Param("solver", "als", choice_rule("als", "cg"), "exact row solves ('als') or conjugate-gradient steps ('cg')"),
    Param("cg_steps", 3, int_rule(low=1), "conjugate-gradient steps per row with solver='cg'"),
    Param("reg", 0.1, float_rule(low=0.0), "ridge weight on every factor entry a mode owns"),
    Param("init", "random", _init_rule, "'random', 'svd', factor arrays or a CPResult to warm-start from",
          config=choice_rule("random", "svd")),
    Param("max_sweeps", 30, int_rule(low=1), "most ALS sweeps"),
    Param("tol", 1e-4, float_rule(low=0.0), "stop when a sweep changes the loss by less than this share"),
    Param("fixed_modes", (), _modes_rule, "modes kept at their initial factors", config=STRINGS),
    Param("random_state", None, seed_rule, "seed of the initialization (None: drawn anew)"),
    Param("n_threads", None, optional(int_rule(low=1)), "numba threads (None: numba's setting); results do not depend on it"),
    Param("dtype", None, dtype_rule, "factor precision, 'float32' or 'float64' (None: the tensor's)",
          config=optional(choice_rule("float32", "float64"))),
    Param("callback", None, callable_rule, "called after every sweep as callback(record, factors); True stops",
          config=False),
])


# ---------------------------------------------------------------------- fitting
def fit_cp(
    tensor: SparseTensor,
    *,
    rank: int = 16,
    structure: Structure | str | None = None,
    solver: str = "als",
    cg_steps: int = 3,
    reg: float = 0.1,
    init: str | Sequence[np.ndarray] | CPResult = "random",
    max_sweeps: int = 30,
    tol: float = 1e-4,
    fixed_modes: Sequence[int | str] = (),
    random_state: int | np.random.Generator | None = None,
    n_threads: int | None = None,
    dtype: np.dtype | type | None = None,
    callback: Callable[[SweepRecord, tuple[np.ndarray, ...]], bool | None] | None = None,
) -> CPResult:
    """Fit a CP model (any structure) to the implicit all-cells loss.

    Parameters
    ----------
    tensor : SparseTensor
        Mode 0 users, mode 1 items, modes 2.. context (at least 2 modes).
    rank : int, default=16
        Components of a plain CP, and of every structure term without ``:rank``.
    structure : Structure, str or None, default=None
        Which modes each term uses (see :mod:`threefold.models.cp.structure`); ``None``
        is plain N-way CP over every mode.
    solver : {"als", "cg"}, default="als"
        Exact row solves (``O(nnz·R² + Σ I_n R³)`` per sweep) or ``cg_steps``
        conjugate-gradient steps per row warm-started at the current row
        (``O(cg_steps·(nnz·R + Σ I_n R²))``). Modes with few rows and many
        cells are solved exactly by blocked products with either solver.
    cg_steps : int, default=3
    reg : float, default=0.1
        Ridge weight on every factor entry a mode owns.
    init : {"random", "svd"}, sequence of ndarray, or CPResult, default="random"
        See :func:`threefold.models.initialize.initial_factors`. A CPResult warm-starts
        from its fitted factors (same structure and modes; modes may have grown
        by appended labels, whose rows start at zero).
    max_sweeps : int, default=30
    tol : float, default=1e-4
        Stop when the relative loss change of a sweep falls below ``tol``; with
        ``tol = 0`` exactly ``max_sweeps`` sweeps run and no warning is given.
    fixed_modes : sequence of int or str, default=()
        Modes kept at their initial factors (e.g. refresh only the users).
    random_state : int, Generator or None
    n_threads : int or None
        numba threads for this fit (``None``: numba's current setting). The
        result does not depend on it.
    dtype : float32, float64 or None
        Factor precision; ``None`` takes the tensor's.
    callback : callable or None
        Called after every sweep as ``callback(record, factors)`` with a
        :class:`SweepRecord` and the current (unnormalized, read-only) factors;
        returning True stops the fit.

    Returns
    -------
    CPResult

    Warns
    -----
    ConvergenceWarning
        When ``tol > 0`` and ``max_sweeps`` sweeps did not reach it.
    """
    owner = "fit_cp"
    if not isinstance(tensor, SparseTensor):
        raise TypeError(f"fit_cp needs a SparseTensor, got {type(tensor).__name__}.")
    if tensor.ndim < 2:
        raise ValueError(f"fit_cp needs a tensor with at least 2 modes, got {tensor.ndim}.")
    checked = CP_PARAMS.check_all(dict(
        rank=rank, structure=structure, solver=solver, cg_steps=cg_steps, reg=reg, init=init, max_sweeps=max_sweeps,
        tol=tol, fixed_modes=fixed_modes, random_state=random_state, n_threads=n_threads, dtype=dtype,
        callback=callback), owner=owner)
    rank, cg_steps, reg, max_sweeps, tol = (checked[k] for k in ("rank", "cg_steps", "reg", "max_sweeps", "tol"))
    dtype = tensor.dtype if dtype is None else np.dtype(dtype)
    if tensor.dtype != dtype:
        tensor = tensor.astype(dtype)
    structure = resolve_structure(structure, tensor.mode_names, rank)
    active = structure.active_mask(tensor.mode_names)
    fixed = {mode_position(tensor.mode_names, m) for m in fixed_modes}
    update_modes = tuple(n for n in range(tensor.ndim) if n not in fixed and active[n].any())
    rng = np.random.default_rng(random_state)

    start = time.perf_counter()
    init = _warm_start_factors(init, tensor, structure) if isinstance(init, CPResult) else _check_init(init, tensor, structure.rank)
    factors = initial_factors(tensor, active, init, dtype=dtype, rng=rng)
    with kernels.threads(n_threads):
        problem = als.make_problem(tensor, factors, active, reg=reg, update_modes=update_modes)
        first = SweepRecord(0, *als.loss_and_fit(problem), time.perf_counter() - start)

        def sweep():
            for n in update_modes:
                als.update_mode(problem, n, cg_steps if solver == "cg" else 0)
            return als.loss_and_fit(problem)

        history, stop_reason = run_sweeps(sweep, first, max_sweeps=max_sweeps, tol=tol, callback=callback,
                                          loss_floor=1e-12 * max(problem.sum_wp2, np.finfo(float).tiny),
                                          state=lambda: _read_only_views(problem), owner=owner)
    weights, normalized, norms = _normalize(
        [problem.factor(n).copy() for n in range(tensor.ndim)], active, structure.component_terms()
    )
    return CPResult(
        weights=weights, factors=tuple(normalized), column_norms=norms, structure=structure,
        mode_names=tensor.mode_names, vocabularies=tensor.vocabularies, history=tuple(history),
        stop_reason=stop_reason, w0=tensor.w0, reg=reg,
    )


def _read_only_views(problem: als.Problem) -> tuple[np.ndarray, ...]:
    views = tuple(problem.factor(n) for n in range(len(problem.offsets) - 1))
    for view in views:
        view.flags.writeable = False
    return views


def _check_init(init, tensor: SparseTensor, rank: int):
    if isinstance(init, str):
        return check_choice("init", init, ("random", "svd"), owner="fit_cp")
    if not isinstance(init, (list, tuple)) or len(init) != tensor.ndim:
        raise ValueError(
            f"The 'init' parameter of fit_cp must be 'random', 'svd', a CPResult or {tensor.ndim} factor arrays. "
            f"Got {type(init).__name__} instead."
        )
    for n, given in enumerate(init):
        given = np.asarray(given)
        if given.ndim != 2 or given.shape[1] != rank or given.shape[0] > tensor.shape[n]:
            raise ValueError(
                f"Initial factor of mode {tensor.mode_names[n]!r} must have shape (at most {tensor.shape[n]}, {rank}), "
                f"got {given.shape}."
            )
        if not np.all(np.isfinite(given)):
            raise ValueError(f"Initial factor of mode {tensor.mode_names[n]!r} holds non-finite values.")
    return init


def _warm_start_factors(result: CPResult, tensor: SparseTensor, structure: Structure) -> list[np.ndarray]:
    """The fitted factors of a previous model, checked against the grown tensor."""
    if result.mode_names != tensor.mode_names:
        raise ValueError(f"Warm start: the model's modes {result.mode_names} differ from the tensor's {tensor.mode_names}.")
    if str(result.structure) != str(structure):
        raise ValueError(f"Warm start: the model's structure {str(result.structure)!r} differs from {str(structure)!r}.")
    for n, name in enumerate(tensor.mode_names):
        if result.shape[n] > tensor.shape[n]:
            raise ValueError(
                f"Warm start: mode {name!r} has {result.shape[n]} rows in the model but {tensor.shape[n]} in the tensor; "
                "vocabularies only grow by appending."
            )
        old, new = result.vocabularies[n], tensor.vocabularies[n]
        if old is not None and new is not None and new.labels[: len(old)] != old.labels:
            raise ValueError(f"Warm start: the {name!r} vocabulary is not the model's vocabulary with labels appended.")
    return result.unnormalized_factors()


def _normalize(
    factors: list[np.ndarray], active: np.ndarray, terms: np.ndarray
) -> tuple[np.ndarray, list[np.ndarray], np.ndarray]:
    """Unit-norm owned columns, weights = product of norms, components sorted by weight within terms."""
    norms = np.ones(active.shape)
    for n, f in enumerate(factors):
        cols = np.flatnonzero(active[n])
        norms[n, cols] = np.linalg.norm(f[:, cols].astype(np.float64), axis=0)
        safe = np.where(norms[n, cols] > 0, norms[n, cols], 1.0)
        f[:, cols] = (f[:, cols] / safe).astype(f.dtype)
    weights = norms.prod(axis=0)
    order = np.lexsort((-weights, terms))
    return weights[order], [f[:, order] for f in factors], norms[:, order]


# ---------------------------------------------------------------------- fold-in
def fold_in(result: CPResult, tensor: SparseTensor, mode: int | str, *, n_threads: int | None = None) -> np.ndarray:
    """Rows for new users, items or context levels, solved from their own cells; see :meth:`CPResult.fold_in`."""
    return result.fold_in(tensor, mode, n_threads=n_threads)


# ---------------------------------------------------------------------- estimator
class CPModel(FactorEstimator):
    """Estimator around :func:`fit_cp`; parameters as there (:data:`CP_PARAMS`), fitted state ending in ``_``.

    Attributes
    ----------
    result_ : CPResult
    weights_ : ndarray of shape (R,)
    factors_ : tuple of ndarray of shape (I_n, R)
    structure_ : Structure
    history_ : tuple of SweepRecord
    n_sweeps_ : int
    converged_ : bool
    """

    params = CP_PARAMS
    _fit_function = staticmethod(fit_cp)
    _result_attributes = ("weights", "factors", "structure", "history", "n_sweeps", "converged")

    def fold_in(self, tensor: SparseTensor, mode: int | str) -> np.ndarray:
        """Rows for new users, items or context levels; see :func:`fold_in`."""
        return fold_in(self._fitted(), tensor, mode, n_threads=self.n_threads)
