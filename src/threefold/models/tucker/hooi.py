"""HOOI: the Tucker decomposition of a sparse tensor by higher-order orthogonal iteration.

Minimizes the unweighted least-squares error ``‖X − G ×_1 U_1 ... ×_N U_Nᵀ‖²`` of
the zero-filled preference tensor over orthonormal factors ``U_n`` (De Lathauwer,
De Moor & Vandewalle, "On the best rank-(R1, R2, ..., RN) approximation of
higher-order tensors", SIAM J. Matrix Anal. Appl. 21(4), 2000; Kolda & Bader,
SIAM Review 51(3), 2009, section 4.2):

1. initialize every ``U_n`` by the truncated HOSVD of the sparse unfoldings;
2. per sweep, for each mode ``n``: ``Y = X ×_{m≠n} U_mᵀ`` from the stored cells
   (memory ``I_n · Π_{m≠n} R_m``), then ``U_n`` ← the leading ``R_n`` left
   singular vectors of ``Y_(n)``;
3. the core is ``G = U_Nᵀ Y_(N)`` (folded), and with orthonormal factors
   ``‖X − X̂‖² = ‖X‖² − ‖G‖²``, so no reconstruction is ever formed.

Costs per sweep, with the fiber tree of :mod:`threefold.models.tucker.kernels`:
``O(nnz · R_leaf + Σ_nodes R · Π R)`` for the products (at most
``O(nnz · Π_{m≠n} R_m)`` per mode) plus ``O(I_n (Π_{m≠n} R_m)²)`` for the
small Gram matrix of each ``Y_(n)``.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
import scipy.linalg

from threefold.models.cp import kernels
from threefold.core.checks import check_choice
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
from threefold.models.tucker.kernels import build_fiber_tree, ttmc

__all__ = ["fit_hooi", "hooi_fold_in", "HOOIModel"]

Callback = Callable[[SweepRecord, tuple], "bool | None"]


def leading_vectors(y: np.ndarray, rank: int, rng: np.random.Generator) -> np.ndarray:
    """Leading ``rank`` left singular vectors of a dense matrix from its smaller Gram matrix.

    ``eigh(Y Yᵀ)`` when ``Y`` has at most as many rows as columns, else
    ``eigh(Yᵀ Y)`` and ``U = orth(Y V)``; columns the matrix cannot give (rank
    above its smaller side) are random and orthonormal to the others, as in
    tensorly's Tucker.

    Parameters
    ----------
    y : ndarray of shape (I, J)
    rank : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of shape (I, rank), float64, orthonormal columns by decreasing singular value
    """
    n_rows, n_cols = y.shape
    y = np.asarray(y, dtype=np.float64)
    wide = n_rows <= n_cols
    gram = y @ y.T if wide else y.T @ y
    keep = min(rank, gram.shape[0])
    _, vectors = scipy.linalg.eigh(gram, subset_by_index=(gram.shape[0] - keep, gram.shape[0] - 1))
    u = vectors[:, ::-1]
    if not wide:
        u, r = np.linalg.qr(y @ u)
        u = u * np.where(np.diag(r) < 0, -1.0, 1.0)
    if keep < rank:
        extra = rng.random((n_rows, rank - keep))
        extra -= u @ (u.T @ extra)
        u = np.hstack([u, np.linalg.qr(extra)[0]])
    return u


def _fold_core(y_core: np.ndarray, levels: np.ndarray, rank: tuple[int, ...]) -> np.ndarray:
    """Fold ``U_nᵀ Y_(n)`` (columns in C order over ``levels[1:]``) into a core in mode order."""
    permuted = y_core.reshape(tuple(rank[m] for m in levels))
    return np.ascontiguousarray(np.transpose(permuted, np.argsort(levels)))


def _initial_factors(tensor: SparseTensor, rank: tuple[int, ...], init, rng) -> list[np.ndarray]:
    if isinstance(init, str):
        check_choice("init", init, ("hosvd",), owner="fit_hooi")
        return hosvd_factors(tensor, rank, rng)
    factors = list(init.factors) if isinstance(init, TuckerResult) else list(init)
    if len(factors) != tensor.ndim:
        raise ValueError(f"The 'init' parameter of fit_hooi must be 'hosvd', a TuckerResult or {tensor.ndim} "
                         f"factor arrays. Got {len(factors)} arrays instead.")
    out = []
    for n, f in enumerate(factors):
        f = np.asarray(f, dtype=np.float64)
        if f.ndim != 2 or f.shape[1] != rank[n] or f.shape[0] > tensor.shape[n]:
            raise ValueError(f"Initial factor of mode {tensor.mode_names[n]!r} must have shape "
                             f"(at most {tensor.shape[n]}, {rank[n]}), got {f.shape}.")
        f = np.vstack([f, np.zeros((tensor.shape[n] - f.shape[0], rank[n]))])  # appended indices start at 0
        out.append(np.linalg.qr(f)[0])
    return out


def _loss_and_fit(norm_sq: float, core: np.ndarray) -> tuple[float, float]:
    """``‖X − X̂‖² = ‖X‖² − ‖G‖²`` (orthonormal factors) and ``1 − ‖X − X̂‖ / ‖X‖``."""
    loss = max(norm_sq - float(np.sum(core * core)), 0.0)
    return loss, (1.0 - np.sqrt(loss / norm_sq) if norm_sq > 0 else 1.0)


#: The parameters of :func:`fit_hooi` and :class:`HOOIModel`.
HOOI_PARAMS = tucker_params("HOOIModel", max_sweeps=50, tol=1e-8, init_choices=("hosvd",))


def fit_hooi(
    tensor: SparseTensor,
    *,
    rank: int | Sequence[int] = 8,
    init="hosvd",
    max_sweeps: int = 50,
    tol: float = 1e-8,
    random_state: int | np.random.Generator | None = None,
    n_threads: int | None = None,
    dtype: np.dtype | type | None = None,
    callback: Callback | None = None,
) -> TuckerResult:
    """Fit a Tucker model to the preference values by HOOI.

    Parameters
    ----------
    tensor : SparseTensor
        Its preference values are ``X``; every cell not stored is 0 and
        confidences are ignored (HOOI is unweighted).
    rank : int or sequence of int, default=8
        Core size per mode (one int for all modes); each at most its mode's size.
    init : "hosvd", TuckerResult or sequence of ndarray, default="hosvd"
        Truncated HOSVD of the sparse unfoldings, or given factors (a previous
        model's; modes may have grown, appended rows start at zero), made
        orthonormal by QR.
    max_sweeps : int, default=50
    tol : float, default=1e-8
        Stop when the relative change of ``‖X − X̂‖²`` of a sweep falls below
        ``tol``; with ``tol = 0`` exactly ``max_sweeps`` sweeps run and no
        warning is given.
    random_state : int, numpy.random.Generator or None
        Seeds the sparse SVD start vectors and the random columns of a factor
        whose unfolding has fewer singular vectors than the rank.
    n_threads : int or None
        numba threads for this fit (``None``: numba's current setting).
    dtype : float32, float64 or None
        Precision of the returned core and factors (``None``: the tensor's);
        the fit itself runs in float64.
    callback : callable or None
        Called after every sweep as ``callback(record, model)`` with the
        :class:`~threefold.models.cp.result.SweepRecord` of the sweep and ``model = (core,
        factors)``, read-only float64 arrays; returning True stops the fit.

    Returns
    -------
    TuckerResult
        ``method="hooi"``, orthonormal factors; history with
        ``loss = ‖X − X̂‖² = ‖X‖² − ‖G‖²`` and ``fit = 1 − ‖X − X̂‖ / ‖X‖``.

    Warns
    -----
    ConvergenceWarning
        When ``tol > 0`` and ``max_sweeps`` sweeps did not reach it.
    """
    owner = "fit_hooi"
    checked = check_fit_parameters(HOOI_PARAMS, tensor, dict(
        rank=rank, init=init, max_sweeps=max_sweeps, tol=tol, random_state=random_state, n_threads=n_threads,
        dtype=dtype, callback=callback), owner)
    rank, max_sweeps, tol, dtype = (checked[k] for k in ("rank", "max_sweeps", "tol", "dtype"))
    rng = np.random.default_rng(random_state)
    with kernels.threads(n_threads):
        start = time.perf_counter()
        values = tensor.preference.astype(np.float64)
        norm_sq = float(values @ values)
        factors = _initial_factors(tensor, rank, init, rng)
        trees = [build_fiber_tree(tensor.coords, tensor.shape, n) for n in range(tensor.ndim)]
        state = {"core": _fold_core(factors[-1].T @ ttmc(trees[-1], tensor.coords, values, factors, tensor.shape[-1]),
                                    trees[-1].levels, rank)}

        def sweep():
            for n, tree in enumerate(trees):
                y = ttmc(tree, tensor.coords, values, factors, tensor.shape[n])
                factors[n] = leading_vectors(y, rank[n], rng)
            state["core"] = _fold_core(factors[-1].T @ y, trees[-1].levels, rank)
            return _loss_and_fit(norm_sq, state["core"])

        first = SweepRecord(0, *_loss_and_fit(norm_sq, state["core"]), time.perf_counter() - start)
        history, stop_reason = run_sweeps(sweep, first, max_sweeps=max_sweeps, tol=tol, loss_floor=1e-12 * norm_sq,
                                          callback=callback, owner=owner,
                                          state=lambda: read_only_model(state["core"], factors))
    return HOOIResult(
        core=state["core"].astype(dtype), factors=tuple(f.astype(dtype) for f in factors),
        mode_names=tensor.mode_names, vocabularies=tensor.vocabularies, history=tuple(history),
        stop_reason=stop_reason, method="hooi",
    )


def hooi_fold_in(result: TuckerResult, tensor: SparseTensor, mode: int | str) -> np.ndarray:
    """Rows for new indices of one mode, from their own cells, everything else fixed.

    The least-squares projection of each new slice onto the fitted model:
    ``u = y G_(n)⁺`` with ``y = x_slice ×_{m≠n} U_mᵀ`` (the slice's row of
    ``Y_(n)``) and ``G_(n)⁺`` the pseudo-inverse of the core's unfolding. It
    minimizes ``‖x_slice − u G_(n) (⊗_{m≠n} U_m)ᵀ‖`` because the other factors
    are orthonormal, and for a row of the training tensor it gives back that
    row's HOOI factor when the other factors are those of its last update. A
    slice with no cells gets the zero row.

    Parameters
    ----------
    result : TuckerResult
    tensor : SparseTensor
        Cells of the new indices: mode ``mode`` indexes the new rows
        ``0 .. n_new - 1``; every other mode has the model's size and names.
    mode : int or str

    Returns
    -------
    ndarray of shape (n_new, R_mode), the model's dtype
    """
    n = check_fold_in(result, tensor, mode)
    factors = [np.asarray(f, dtype=np.float64) for f in result.factors]
    factors[n] = np.zeros((tensor.shape[n], result.rank[n]))
    tree = build_fiber_tree(tensor.coords, tensor.shape, n)
    y = ttmc(tree, tensor.coords, tensor.preference.astype(np.float64), factors, tensor.shape[n])
    core_unfolded = np.transpose(np.asarray(result.core, np.float64), tree.levels).reshape(result.rank[n], -1)
    return (y @ np.linalg.pinv(core_unfolded)).astype(result.core.dtype)


@dataclass(frozen=True, eq=False)
class HOOIResult(TuckerResult):
    """A Tucker model fitted by HOOI; folds in newcomers by projection (:func:`hooi_fold_in`)."""

    method: str = "hooi"
    supports_fold_in = True

    def fold_in(self, tensor: SparseTensor, mode: int | str) -> np.ndarray:
        return hooi_fold_in(self, tensor, mode)


class HOOIModel(TuckerEstimator):
    """Estimator around :func:`fit_hooi`; parameters as there, fitted state as in :class:`TuckerEstimator`."""

    _fit_function = staticmethod(fit_hooi)

    params = HOOI_PARAMS

