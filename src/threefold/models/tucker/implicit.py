"""Implicit-weighted Tucker by alternating least squares, linear in the stored cells.

The model ``x̂ = G ×_1 F_1 ... ×_N F_N`` minimizes, over ALL cells of the tensor,

    L = Σ_cells w · (p − x̂)² + reg · (Σ_n ‖F_n‖²_F + ‖G‖²_F)

with ``p`` and ``w`` from the feedback weighting (``w = w0`` and ``p = 0`` on every
cell not stored) — the confidence weighting of implicit feedback (Hu, Koren &
Volinsky, ICDM 2008) as used for CP by iTALS (Hidasi & Tikk, ECML-PKDD 2012),
here with the Tucker model of Karatzoglou et al., "Multiverse recommendation",
RecSys 2010 (who fit explicit ratings by SGD). The all-cells sums are never
materialized:

* **row of mode n** (``v_e = G ×_{m≠n} F_m[i_m(e)]``, length ``R_n``)::

      (w0 · G_(n) (⊗_{m≠n} F_mᵀF_m) G_(n)ᵀ + Σ_e (w_e − w0) v_e v_eᵀ + reg·I) u = Σ_e w_e p_e v_e

  The first term is ``Σ v vᵀ`` over every cell of the slice, the sums run over
  the row's stored cells only.
* **core** (``k_e = ⊗_n F_n[i_n(e)]``, length ``P = Π R_n``)::

      (w0 · ⊗_n F_nᵀF_n + Σ_e (w_e − w0) k_e k_eᵀ + reg·I) vec(G) = Σ_e w_e p_e k_e

  solved exactly when the core is small (``P`` ≤ 2,000 and forming the stored
  part costs at most 2·10¹⁰ multiply-adds), otherwise by conjugate gradient
  with a Jacobi preconditioner, warm-started from the current core, whose
  matrix-vector product applies the Kronecker part mode by mode and the stored
  part as one evaluation plus one scatter over the stored cells.

Each block update minimizes ``L`` exactly (rows, exact core) or decreases it
(CG from the current core), so the loss never increases from sweep to sweep.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from typing import Callable, Sequence

import numpy as np
import scipy.linalg

from threefold.models.cp import kernels
from threefold.core.checks import check_choice
from threefold.core.params import Param, choice_rule, float_rule, int_rule
from threefold.models.base import RowPosterior, solve_posterior
from threefold.models.fitloop import SweepRecord, run_sweeps
from threefold.core.tensor import SparseTensor
from threefold.models.tucker.result import (
    TuckerEstimator,
    TuckerResult,
    check_fit_parameters,
    check_fold_in,
    hosvd_factors,
    read_only_model,
    tucker_params,
)
from threefold.models.tucker.kernels import FiberTree, build_fiber_tree, ttmc_core
from threefold.models.tucker.rows import evaluate, implicit_rows

__all__ = ["fit_implicit_tucker", "update_rows", "update_core", "implicit_loss", "implicit_tucker_fold_in",
           "ImplicitTuckerModel"]

#: The exact core solve is used only up to this many core entries ...
CORE_EXACT_ENTRIES = 2000
#: ... and while forming its stored-cell part costs at most this many multiply-adds (nnz · P²).
CORE_EXACT_WORK = 2e10

Callback = Callable[[SweepRecord, tuple], "bool | None"]


def _multi_mode(core: np.ndarray, matrices: Sequence[np.ndarray | None]) -> np.ndarray:
    """``core ×_n matrices[n]`` for every n whose matrix is not None."""
    out = core
    for n, m in enumerate(matrices):
        if m is not None:
            out = np.moveaxis(np.tensordot(m, out, axes=(1, n)), 0, n)
    return out


def _unfold(core: np.ndarray, n: int) -> np.ndarray:
    return np.moveaxis(core, n, 0).reshape(core.shape[n], -1)


def _tree(tensor: SparseTensor, mode: int, trees: dict | None) -> FiberTree:
    if trees is None:
        return build_fiber_tree(tensor.coords, tensor.shape, mode)
    if mode not in trees:
        trees[mode] = build_fiber_tree(tensor.coords, tensor.shape, mode)
    return trees[mode]


def _core_mode(shape: tuple[int, ...], rank: tuple[int, ...]) -> int:
    """Root of the core products: the largest mode.

    Its tree puts a smaller factor at the leaf level, whose rows every stored
    cell reads (fewer cache misses than the largest factor), and the root rows
    are folded into the core as they complete (:func:`ttmc_core`), so no
    ``I_root``-row intermediate is formed.
    """
    return int(np.argmax(shape))


def _weights64(tensor: SparseTensor) -> tuple[np.ndarray, np.ndarray]:
    """Preference and confidence in float64 (the kernels are compiled for float64 only)."""
    preference, confidence = tensor.weights()
    return preference.astype(np.float64, copy=False), confidence.astype(np.float64, copy=False)


def _base_matrix(core: np.ndarray, factors: Sequence[np.ndarray], mode: int, w0: float, reg: float) -> np.ndarray:
    """The all-cells part of a mode's row systems, ``w0·G_(n)(⊗_{m≠n} F_mᵀF_m)G_(n)ᵀ + reg·I``."""
    grams = [None if m == mode else f.T @ f for m, f in enumerate(factors)]
    base = w0 * _unfold(core, mode) @ _unfold(_multi_mode(core, grams), mode).T
    return 0.5 * (base + base.T) + reg * np.eye(core.shape[mode])


def row_posterior_systems(tensor: SparseTensor, mode: int, core: np.ndarray, factors: Sequence[np.ndarray],
                          reg: float, *, chunk_cells: int = 4096) -> tuple[np.ndarray, np.ndarray]:
    """The row systems of :func:`update_rows`, formed explicitly: ``M_i`` and ``b_i`` of every row.

    ``M_i = base + Σ_e (w_e − w0) v_e v_eᵀ`` and ``b_i = Σ_e w_e p_e v_e`` with
    ``v_e = G ×_{m≠n} F_m[i_m(e)]`` (the same systems the fiber-tree kernel
    solves), built in chunks of cells so memory stays ``chunk_cells · R_n²``.

    Returns
    -------
    systems : ndarray of shape (tensor.shape[mode], R_n, R_n), float64
    rights : ndarray of shape (tensor.shape[mode], R_n), float64
    """
    r = core.shape[mode]
    unfolded = _unfold(core, mode)
    others = [m for m in range(tensor.ndim) if m != mode]
    preference, confidence = _weights64(tensor)
    systems = np.broadcast_to(_base_matrix(core, factors, mode, tensor.w0, reg), (tensor.shape[mode], r, r)).copy()
    rights = np.zeros((tensor.shape[mode], r))
    for start in range(0, tensor.nnz, chunk_cells):
        stop = min(start + chunk_cells, tensor.nnz)
        kron = factors[others[0]][tensor.coords[others[0], start:stop]]
        for m in others[1:]:
            rows = factors[m][tensor.coords[m, start:stop]]
            kron = (kron[:, :, None] * rows[:, None, :]).reshape(kron.shape[0], -1)
        v = kron @ unfolded.T
        w, p = confidence[start:stop], preference[start:stop]
        row = tensor.coords[mode, start:stop]
        np.add.at(systems, row, ((w - tensor.w0)[:, None, None] * v[:, :, None]) * v[:, None, :])
        np.add.at(rights, row, (w * p)[:, None] * v)
    return systems, rights


def implicit_tucker_row_posterior(result: TuckerResult, tensor: SparseTensor, mode: int | str, *,
                                  prior: np.ndarray | None = None, covariance: bool = True) -> RowPosterior:
    """Fold-in rows with their covariances (and an optional prior mean); see ``CPResult.row_posterior``."""
    n = check_fold_in(result, tensor, mode)
    factors = [np.asarray(f, dtype=np.float64) for f in result.factors]
    systems, rights = row_posterior_systems(tensor, n, np.asarray(result.core, dtype=np.float64), factors, result.reg)
    x, inverse = solve_posterior(systems, rights, reg=result.reg, prior=prior, covariance=covariance)
    return RowPosterior(rows=x.astype(result.core.dtype), columns=np.arange(result.core.shape[n], dtype=np.int64),
                        covariance=inverse)


def update_rows(tensor: SparseTensor, mode: int, core: np.ndarray, factors: Sequence[np.ndarray], reg: float,
                *, trees: dict | None = None) -> np.ndarray:
    """Solve every row of one mode's weighted system, the core and other factors fixed.

    Parameters
    ----------
    tensor : SparseTensor
        ``shape[mode]`` may differ from the model's (fold-in of new rows).
    mode : int
    core : ndarray of shape (R_1, ..., R_N), float64
    factors : sequence of ndarray of shape (I_n, R_n), float64; ``factors[mode]`` is unused
    reg : float
    trees : dict or None
        Cache of fiber trees by root mode.

    Returns
    -------
    ndarray of shape (tensor.shape[mode], R_mode), float64
    """
    base = _base_matrix(core, factors, mode, tensor.w0, reg)
    preference, confidence = _weights64(tensor)
    shaped = list(factors)
    shaped[mode] = np.zeros((tensor.shape[mode], core.shape[mode]))
    return implicit_rows(_tree(tensor, mode, trees), tensor.coords, preference, confidence, tensor.w0, core, shaped,
                         base, tensor.shape)


def _scatter(tree: FiberTree, tensor: SparseTensor, values: np.ndarray, factors, rank) -> np.ndarray:
    """``Σ_e values[e] · k_e`` folded into a core: ``F_rᵀ Y`` from the fiber tree, never forming ``Y``."""
    permuted = ttmc_core(tree, tensor.coords, values, factors).reshape(tuple(rank[m] for m in tree.levels))
    return np.transpose(permuted, np.argsort(tree.levels))


def _stored_kron_rows(tensor: SparseTensor, factors, start: int, stop: int) -> np.ndarray:
    """Rows ``k_e = ⊗_n F_n[i_n(e)]`` of cells ``start..stop`` (C order, matching ``core.ravel()``)."""
    z = factors[0][tensor.coords[0, start:stop]]
    for n in range(1, len(factors)):
        rows = factors[n][tensor.coords[n, start:stop]]
        z = (z[:, :, None] * rows[:, None, :]).reshape(z.shape[0], -1)
    return z


def update_core(tensor: SparseTensor, core: np.ndarray, factors: Sequence[np.ndarray], reg: float, *,
                solver: str = "auto", cg_steps: int = 10, trees: dict | None = None) -> np.ndarray:
    """Update the core from its normal equations, the factors fixed.

    Parameters
    ----------
    tensor : SparseTensor
    core : ndarray of shape (R_1, ..., R_N), float64
        Current core (the CG start).
    factors : sequence of ndarray of shape (I_n, R_n), float64
    reg : float
    solver : {"auto", "exact", "cg"}, default="auto"
        "exact" forms the ``P × P`` system (refused above 2,000 core entries);
        "cg" runs ``cg_steps`` preconditioned CG steps; "auto" picks "exact"
        while ``P ≤ 2000`` and ``nnz · P² ≤ 2·10¹⁰``.
    cg_steps : int, default=10
    trees : dict or None

    Returns
    -------
    ndarray of shape (R_1, ..., R_N), float64
    """
    rank = core.shape
    size = core.size
    grams = [f.T @ f for f in factors]
    preference, confidence = _weights64(tensor)
    w0 = tensor.w0
    if solver == "auto":
        solver = "exact" if size <= CORE_EXACT_ENTRIES and tensor.nnz * size * size <= CORE_EXACT_WORK else "cg"
    if solver == "exact":
        if size > CORE_EXACT_ENTRIES:
            raise ValueError(f"The exact core solve forms a {size} × {size} matrix; use solver='cg' above "
                             f"{CORE_EXACT_ENTRIES} core entries.")
        system = w0 * _kron_all(grams) + reg * np.eye(size)
        rhs = np.zeros(size)
        wp = confidence * preference
        c = confidence - w0
        block = max(1, (1 << 22) // size)
        for start in range(0, tensor.nnz, block):
            z = _stored_kron_rows(tensor, factors, start, min(start + block, tensor.nnz))
            system += z.T @ (c[start:start + block, None] * z)
            rhs += z.T @ wp[start:start + block]
        return scipy.linalg.solve(system, rhs, assume_a="pos").reshape(rank)
    tree = _tree(tensor, _core_mode(tensor.shape, rank), trees)
    c = confidence - w0

    def matvec(x: np.ndarray) -> np.ndarray:
        stored = _scatter(tree, tensor, c * evaluate(tree, tensor.coords, x, factors, tensor.shape), factors, rank)
        return w0 * _multi_mode(x, grams) + stored + reg * x

    rhs = _scatter(tree, tensor, confidence * preference, factors, rank)
    diag = w0 * _kron_all([np.diag(g)[None, :] for g in grams]).reshape(rank) + reg
    diag = diag + _scatter(tree, tensor, c, [f * f for f in factors], rank)
    return _pcg(matvec, rhs, core.astype(np.float64), diag, cg_steps)


def _kron_all(matrices: Sequence[np.ndarray]) -> np.ndarray:
    out = matrices[0]
    for m in matrices[1:]:
        out = np.kron(out, m)
    return out


def _pcg(matvec, rhs: np.ndarray, x: np.ndarray, diag: np.ndarray, steps: int) -> np.ndarray:
    """Preconditioned conjugate gradient (Jacobi), ``steps`` iterations from ``x`` (Hestenes & Stiefel 1952)."""
    r = rhs - matvec(x)
    z = r / diag
    p = z.copy()
    rz = float(np.sum(r * z))
    stop = 1e-28 * float(np.sum(rhs * rhs / diag))
    for _ in range(steps):
        if rz <= stop:
            break
        ap = matvec(p)
        alpha = rz / float(np.sum(p * ap))
        x = x + alpha * p
        r = r - alpha * ap
        z = r / diag
        rz_new = float(np.sum(r * z))
        p = z + (rz_new / rz) * p
        rz = rz_new
    return x


def implicit_loss(tensor: SparseTensor, core: np.ndarray, factors: Sequence[np.ndarray], reg: float, *,
                  trees: dict | None = None) -> tuple[float, float]:
    """The weighted, regularized loss over all cells and the weighted fit.

    ``L = w0 ⟨G, G ×_n F_nᵀF_n⟩ + Σ_e [w_e (p_e − x̂_e)² − w0 x̂_e²] + reg (Σ‖F_n‖² + ‖G‖²)``
    and ``fit = 1 − sqrt(E / Σ_e w_e p_e²)`` with ``E`` the loss without the
    regularization (the weighted squared error over all cells).

    Returns
    -------
    loss : float
    fit : float
    """
    grams = [f.T @ f for f in factors]
    tree = _tree(tensor, _core_mode(tensor.shape, core.shape), trees)
    p, w = _weights64(tensor)
    xhat = evaluate(tree, tensor.coords, core, factors, tensor.shape)
    error = tensor.w0 * float(np.sum(core * _multi_mode(core, grams)))
    error += float(np.sum(w * (p - xhat) ** 2 - tensor.w0 * xhat * xhat))
    penalty = reg * (sum(float(np.sum(f * f)) for f in factors) + float(np.sum(core * core)))
    total = float(np.sum(w * p * p))
    fit = 1.0 - np.sqrt(max(error, 0.0) / total) if total > 0 else 1.0
    return error + penalty, fit


def _initial_model(tensor: SparseTensor, rank: tuple[int, ...], init, rng, trees) -> tuple[np.ndarray, list]:
    owner = "fit_implicit_tucker"
    if isinstance(init, str):
        check_choice("init", init, ("hosvd", "random"), owner=owner)
        if init == "random":  # uniform factors as tensorly's random init (common practice), a small random core
            factors = [rng.random((size, r)) for size, r in zip(tensor.shape, rank)]
            return 0.1 * rng.standard_normal(rank), factors
        factors = hosvd_factors(tensor, rank, rng)
        values = tensor.preference.astype(np.float64)
        return _scatter(_tree(tensor, _core_mode(tensor.shape, rank), trees), tensor, values, factors, rank), factors
    if not isinstance(init, TuckerResult) and not (isinstance(init, (tuple, list)) and len(init) == 2):
        raise ValueError(f"The 'init' parameter of {owner} must be 'hosvd', 'random', a TuckerResult or "
                         f"(core, factors). Got {type(init).__name__} instead.")
    core, given = init
    core = np.asarray(core, dtype=np.float64)
    if core.shape != rank or len(given) != tensor.ndim:
        raise ValueError(f"The 'init' parameter of {owner} needs a core of shape {rank} and {tensor.ndim} factors, "
                         f"got a core of shape {core.shape} and {len(given)} factors.")
    factors = []
    for n, f in enumerate(given):
        f = np.asarray(f, dtype=np.float64)
        if f.ndim != 2 or f.shape[1] != rank[n] or f.shape[0] > tensor.shape[n]:
            raise ValueError(f"Initial factor of mode {tensor.mode_names[n]!r} must have shape "
                             f"(at most {tensor.shape[n]}, {rank[n]}), got {f.shape}.")
        factors.append(np.vstack([f, np.zeros((tensor.shape[n] - f.shape[0], rank[n]))]))  # appended rows start at 0
    return core, factors


#: The parameters of :func:`fit_implicit_tucker` and :class:`ImplicitTuckerModel`.
IMPLICIT_TUCKER_PARAMS = tucker_params("ImplicitTuckerModel", max_sweeps=30, tol=1e-4, init_choices=("hosvd", "random"),
                                       extra=(Param("reg", 0.1, float_rule(low=0.0), "ridge weight on the factors and the core"),
                                              Param("core_solver", "auto", choice_rule("auto", "exact", "cg"),
                                                    "core update: exact normal equations, CG, or chosen by size"),
                                              Param("core_cg_steps", 10, int_rule(low=1), "CG steps of the core update")))


def fit_implicit_tucker(
    tensor: SparseTensor,
    *,
    rank: int | Sequence[int] = 8,
    reg: float = 0.1,
    init="hosvd",
    max_sweeps: int = 30,
    tol: float = 1e-4,
    core_solver: str = "auto",
    core_cg_steps: int = 10,
    random_state: int | np.random.Generator | None = None,
    n_threads: int | None = None,
    dtype: np.dtype | type | None = None,
    callback: Callback | None = None,
) -> TuckerResult:
    """Fit an implicit-weighted Tucker model by ALS (the rows of every mode, then the core).

    Parameters
    ----------
    tensor : SparseTensor
        Preference, confidence and ``w0`` from its feedback weighting.
    rank : int or sequence of int, default=8
        Core size per mode (one int for all modes); each at most its mode's size.
    reg : float, default=0.1
        Ridge weight on every factor entry and every core entry.
    init : {"hosvd", "random"}, TuckerResult or (core, factors), default="hosvd"
        HOSVD factors of the preference tensor with the projected core
        ``X ×_n U_nᵀ``; uniform random factors with a small random core; or a
        previous model (modes may have grown: appended rows start at zero and
        the first sweep solves them from their own cells).
    max_sweeps : int, default=30
    tol : float, default=1e-4
        Stop when the relative loss change of a sweep falls below ``tol``; with
        ``tol = 0`` exactly ``max_sweeps`` sweeps run and no warning is given.
    core_solver : {"auto", "exact", "cg"}, default="auto"
        See :func:`update_core`.
    core_cg_steps : int, default=10
        Preconditioned CG steps per core update when the core is solved by CG.
    random_state : int, numpy.random.Generator or None
    n_threads : int or None
        numba threads for this fit (``None``: numba's current setting).
    dtype : float32, float64 or None
        Precision of the returned core and factors (``None``: the tensor's);
        factors, core and row systems are computed in float64.
    callback : callable or None
        Called after every sweep as ``callback(record, model)`` with the
        :class:`~threefold.models.cp.result.SweepRecord` of the sweep and ``model = (core,
        factors)``, read-only float64 arrays; returning True stops the fit.

    Returns
    -------
    TuckerResult
        ``method="implicit"``; history with the loss of :func:`implicit_loss`
        and the weighted fit ``1 − sqrt(Σ w (p − x̂)² / Σ w p²)``.

    Warns
    -----
    ConvergenceWarning
        When ``tol > 0`` and ``max_sweeps`` sweeps did not reach it.
    """
    owner = "fit_implicit_tucker"
    checked = check_fit_parameters(IMPLICIT_TUCKER_PARAMS, tensor, dict(
        rank=rank, reg=reg, init=init, max_sweeps=max_sweeps, tol=tol, core_solver=core_solver,
        core_cg_steps=core_cg_steps, random_state=random_state, n_threads=n_threads, dtype=dtype,
        callback=callback), owner)
    rank, max_sweeps, tol, dtype, reg = (checked[k] for k in ("rank", "max_sweeps", "tol", "dtype", "reg"))
    preference, confidence = _weights64(tensor)  # weigh the evidence once, not in every block update
    tensor = replace(tensor, evidence=None, dtype=np.dtype(np.float64), stored_preference=preference,
                     stored_confidence=confidence)
    # Store the cells in the order of the core products' tree: most passes then read them sequentially.
    tensor = tensor.take(build_fiber_tree(tensor.coords, tensor.shape, _core_mode(tensor.shape, rank)).perm)
    rng = np.random.default_rng(random_state)
    with kernels.threads(n_threads):
        start = time.perf_counter()
        trees: dict[int, FiberTree] = {}
        core, factors = _initial_model(tensor, rank, init, rng, trees)
        state = {"core": core}

        def sweep():
            for n in range(tensor.ndim):
                factors[n] = update_rows(tensor, n, state["core"], factors, reg, trees=trees)
            state["core"] = update_core(tensor, state["core"], factors, reg, solver=core_solver,
                                        cg_steps=core_cg_steps, trees=trees)
            return implicit_loss(tensor, state["core"], factors, reg, trees=trees)

        first = SweepRecord(0, *implicit_loss(tensor, core, factors, reg, trees=trees), time.perf_counter() - start)
        loss_floor = 1e-12 * float(np.sum(tensor.stored_confidence * tensor.stored_preference**2))
        history, stop_reason = run_sweeps(sweep, first, max_sweeps=max_sweeps, tol=tol, loss_floor=loss_floor,
                                          callback=callback, owner=owner,
                                          state=lambda: read_only_model(state["core"], factors))
    return ImplicitTuckerResult(
        core=state["core"].astype(dtype), factors=tuple(f.astype(dtype) for f in factors),
        mode_names=tensor.mode_names, vocabularies=tensor.vocabularies, history=tuple(history),
        stop_reason=stop_reason, method="implicit", w0=tensor.w0, reg=reg,
    )


def implicit_tucker_fold_in(result: TuckerResult, tensor: SparseTensor, mode: int | str) -> np.ndarray:
    """Rows for new indices of one mode from their own cells, everything else fixed.

    Each row is the exact solution of its weighted row system (:func:`update_rows`)
    with the fitted core and factors, the model's ``reg`` and the tensor's
    weighting (Hu, Koren & Volinsky, ICDM 2008, generalized to Tucker). All rows
    are solved in one parallel batch; a row with no cells gets the zero row.

    Parameters
    ----------
    result : TuckerResult
        Fitted with ``method="implicit"``.
    tensor : SparseTensor
        Cells of the new indices: mode ``mode`` indexes the new rows
        ``0 .. n_new - 1``; every other mode has the model's size and names, and
        ``w0`` is the model's.
    mode : int or str

    Returns
    -------
    ndarray of shape (n_new, R_mode), the model's dtype
    """
    n = check_fold_in(result, tensor, mode)
    if result.method != "implicit":
        raise ValueError(f"implicit_tucker_fold_in needs an implicit Tucker model, got method={result.method!r}.")
    if tensor.w0 != result.w0:
        raise ValueError(f"fold_in: the tensor's w0={tensor.w0:g} differs from the model's w0={result.w0:g}.")
    factors = [np.asarray(f, dtype=np.float64) for f in result.factors]
    rows = update_rows(tensor, n, np.asarray(result.core, dtype=np.float64), factors, result.reg)
    return rows.astype(result.core.dtype)


@dataclass(frozen=True, eq=False)
class ImplicitTuckerResult(TuckerResult):
    """A Tucker model fitted to the implicit weighted loss; folds in newcomers by exact row solves."""

    method: str = "implicit"
    supports_fold_in = True

    def fold_in(self, tensor: SparseTensor, mode: int | str) -> np.ndarray:
        return implicit_tucker_fold_in(self, tensor, mode)

    def row_posterior(self, tensor: SparseTensor, mode: int | str, *, prior: np.ndarray | None = None,
                      covariance: bool = True) -> RowPosterior:
        """Fold-in rows with their covariances; see :func:`implicit_tucker_row_posterior`."""
        return implicit_tucker_row_posterior(self, tensor, mode, prior=prior, covariance=covariance)


class ImplicitTuckerModel(TuckerEstimator):
    """Estimator around :func:`fit_implicit_tucker`; parameters as there, fitted state as in :class:`TuckerEstimator`."""

    _fit_function = staticmethod(fit_implicit_tucker)

    params = IMPLICIT_TUCKER_PARAMS

