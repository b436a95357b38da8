"""CP models of implicit feedback tensors: the fit, fold-in and the estimator.

``fit_cp`` minimizes, over all cells of a :class:`~threefold.tensor.SparseTensor`,

    Σ w·(p − x̂)²  +  reg · Σ_n ‖F_n‖²,     x̂(i_1..i_N) = Σ_r Π_n F_n[i_n, r],

with ``w = w0`` and ``p = 0`` on every cell not stored, by alternating least
squares (exact row solves, or a few conjugate-gradient steps per row) in time
linear in the stored cells (iTALS: Hidasi & Tikk, ECML-PKDD 2012;
arXiv:1309.7611). A :class:`~threefold.structure.Structure` says which modes
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
import warnings
from typing import Callable, Sequence

import numpy as np

from threefold import als, kernels
from threefold._checks import check_choice, check_int, check_number
from threefold.cp_result import CPResult, SweepRecord, mode_position
from threefold.exceptions import ConvergenceWarning
from threefold.initialize import initial_factors
from threefold.scoring import FittedScorer
from threefold.structure import Structure, resolve_structure
from threefold.tensor import SparseTensor

__all__ = ["SweepRecord", "CPResult", "fit_cp", "fold_in", "CPModel"]


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
        Which modes each term uses (see :mod:`threefold.structure`); ``None``
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
        See :func:`threefold.initialize.initial_factors`. A CPResult warm-starts
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
    rank = check_int("rank", rank, low=1, owner=owner)
    check_choice("solver", solver, ("als", "cg"), owner=owner)
    cg_steps = check_int("cg_steps", cg_steps, low=1, owner=owner)
    reg = check_number("reg", reg, low=0.0, owner=owner)
    max_sweeps = check_int("max_sweeps", max_sweeps, low=1, owner=owner)
    tol = check_number("tol", tol, low=0.0, owner=owner)
    if n_threads is not None:
        check_int("n_threads", n_threads, low=1, owner=owner)
    if callback is not None and not callable(callback):
        raise ValueError(f"The 'callback' parameter of {owner} must be callable or None. Got {callback!r} instead.")
    dtype = tensor.dtype if dtype is None else np.dtype(dtype)
    check_choice("dtype", np.dtype(dtype), (np.dtype(np.float32), np.dtype(np.float64)), owner=owner)
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
        history = [SweepRecord(0, *als.loss_and_fit(problem), time.perf_counter() - start)]
        loss_floor = 1e-12 * max(problem.sum_wp2, np.finfo(float).tiny)  # an exact fit has loss ~ 0
        stop_reason = "max_sweeps"
        for sweep in range(1, max_sweeps + 1):
            start = time.perf_counter()
            for n in update_modes:
                als.update_mode(problem, n, cg_steps if solver == "cg" else 0)
            record = SweepRecord(sweep, *als.loss_and_fit(problem), time.perf_counter() - start)
            history.append(record)
            if callback is not None and callback(record, _read_only_views(problem)):
                stop_reason = "callback"
                break
            change = abs(history[-2].loss - record.loss) / max(abs(history[-2].loss), loss_floor)
            if tol > 0 and change < tol:
                stop_reason = "converged"
                break
    if stop_reason == "max_sweeps" and tol > 0:
        warnings.warn(
            f"fit_cp stopped after max_sweeps={max_sweeps} sweeps before the relative loss change fell "
            f"below tol={tol:g}; raise max_sweeps or tol.",
            ConvergenceWarning,
            stacklevel=2,
        )
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
    """Rows for new users, items or context levels, solved from their own cells.

    Every other factor stays fixed and the weighting is the training one, so
    each row is the exact solution of its row system (methods.md section 8;
    Hu, Koren & Volinsky, ICDM 2008, generalized to tensors and structures).
    All rows are solved in one parallel batch.

    Parameters
    ----------
    result : CPResult
    tensor : SparseTensor
        The new rows' cells: mode ``mode`` indexes the new rows ``0 .. n_new - 1``;
        every other mode has the model's size and mode names, and ``w0`` is the
        model's.
    mode : int or str
    n_threads : int or None

    Returns
    -------
    ndarray of shape (n_new, R), the model's dtype
        In the model's normalized coordinates (ready for :meth:`CPResult.with_rows`);
        a row with no cells is zero in a plain CP.
    """
    n = mode_position(result.mode_names, mode)
    if tensor.mode_names != result.mode_names:
        raise ValueError(f"fold_in: the tensor's modes {tensor.mode_names} differ from the model's {result.mode_names}.")
    for m, name in enumerate(result.mode_names):
        if m != n and tensor.shape[m] != result.shape[m]:
            raise ValueError(
                f"fold_in: mode {name!r} has {tensor.shape[m]} rows in the tensor but {result.shape[m]} in the model."
            )
    if tensor.w0 != result.w0:
        raise ValueError(f"fold_in: the tensor's w0={tensor.w0:g} differs from the model's w0={result.w0:g}.")
    dtype = result.factors[0].dtype
    factors = result.unnormalized_factors()
    factors[n] = np.zeros((tensor.shape[n], result.rank), dtype=dtype)
    active = result.structure.active_mask(result.mode_names)
    with kernels.threads(n_threads):
        problem = als.make_problem(tensor.astype(dtype), factors, active, reg=result.reg, update_modes=(n,))
        als.update_mode(problem, n, 0)
    rows = problem.factor(n).copy()
    cols = np.flatnonzero(active[n])
    norms = result.column_norms[n, cols]
    rows[:, cols] = np.where(norms > 0, rows[:, cols] / np.where(norms > 0, norms, 1.0), 0.0)
    return rows


# ---------------------------------------------------------------------- estimator
class CPModel(FittedScorer):
    """Estimator around :func:`fit_cp`; parameters as there, fitted state ending in ``_``.

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

    def __init__(
        self, *, rank=16, structure=None, solver="als", cg_steps=3, reg=0.1, init="random", max_sweeps=30,
        tol=1e-4, fixed_modes=(), random_state=None, n_threads=None, dtype=None, callback=None,
    ):
        self.rank = rank
        self.structure = structure
        self.solver = solver
        self.cg_steps = cg_steps
        self.reg = reg
        self.init = init
        self.max_sweeps = max_sweeps
        self.tol = tol
        self.fixed_modes = fixed_modes
        self.random_state = random_state
        self.n_threads = n_threads
        self.dtype = dtype
        self.callback = callback

    def get_params(self) -> dict:
        """The constructor parameters, by name (the names configs and the command line use)."""
        names = ("rank", "structure", "solver", "cg_steps", "reg", "init", "max_sweeps", "tol",
                 "fixed_modes", "random_state", "n_threads", "dtype", "callback")
        return {name: getattr(self, name) for name in names}

    def fit(self, tensor: SparseTensor) -> "CPModel":
        """Fit to a tensor; returns self."""
        result = fit_cp(tensor, **self.get_params())
        self.result_ = result
        self.weights_ = result.weights
        self.factors_ = result.factors
        self.structure_ = result.structure
        self.history_ = result.history
        self.n_sweeps_ = result.n_sweeps
        self.converged_ = result.converged
        return self

    def fold_in(self, tensor: SparseTensor, mode: int | str) -> np.ndarray:
        """Rows for new users, items or context levels; see :func:`fold_in`."""
        return fold_in(self._fitted(), tensor, mode, n_threads=self.n_threads)
