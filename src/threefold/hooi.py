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

Costs per sweep, with the fiber tree of :mod:`threefold.tucker_kernels`:
``O(nnz · R_leaf + Σ_nodes R · Π R)`` for the products (at most
``O(nnz · Π_{m≠n} R_m)`` per mode) plus ``O(I_n (Π_{m≠n} R_m)²)`` for the
small Gram matrix of each ``Y_(n)``.
"""

from __future__ import annotations

import time
import warnings
from typing import Callable, Sequence

import numpy as np

from threefold._checks import check_int, check_number
from threefold.exceptions import ConvergenceWarning
from threefold.tensor import SparseTensor
from threefold.tucker import (
    SweepStats,
    TuckerResult,
    TuckerScorer,
    check_tucker_rank,
    hosvd_factors,
    leading_left_vectors,
)
from threefold.tucker_kernels import build_fiber_tree, ttmc

__all__ = ["hooi", "hooi_fold_in", "HOOIModel"]

Callback = Callable[[int, TuckerResult], "bool | None"]


def _fold_core(y_core: np.ndarray, levels: np.ndarray, rank: tuple[int, ...]) -> np.ndarray:
    """Fold ``U_nᵀ Y_(n)`` (columns in C order over ``levels[1:]``) into a core in mode order."""
    permuted = y_core.reshape(tuple(rank[m] for m in levels))
    return np.ascontiguousarray(np.transpose(permuted, np.argsort(levels)))


def _initial_factors(tensor: SparseTensor, values: np.ndarray, rank: tuple[int, ...], init, rng) -> list[np.ndarray]:
    if isinstance(init, str):
        if init != "hosvd":
            raise ValueError(f"The 'init' parameter of hooi must be 'hosvd' or (core, factors). Got {init!r} instead.")
        return hosvd_factors(tensor.coords, values, tensor.shape, rank, rng)
    _, factors = init
    if len(factors) != tensor.ndim:
        raise ValueError(f"init has {len(factors)} factors for a {tensor.ndim}-way tensor.")
    out = []
    for n, f in enumerate(factors):
        f = np.asarray(f, dtype=np.float64)
        if f.shape != (tensor.shape[n], rank[n]):
            raise ValueError(f"init factor {n} must have shape {(tensor.shape[n], rank[n])}, got {f.shape}.")
        out.append(np.linalg.qr(f)[0])
    return out


def hooi(
    tensor: SparseTensor,
    rank: int | Sequence[int],
    *,
    max_iter: int = 50,
    tol: float = 1e-8,
    init="hosvd",
    random_state: int | np.random.Generator | None = None,
    callback: Callback | None = None,
) -> TuckerResult:
    """Fit a Tucker model to the preference values by HOOI.

    Parameters
    ----------
    tensor : SparseTensor
        Its preference values are ``X``; every cell not stored is 0 and
        confidences are ignored (HOOI is unweighted).
    rank : int or sequence of int
        Core size per mode (one int for all modes); each at most its mode's size.
    max_iter : int, default=50
        Maximum number of sweeps.
    tol : float, default=1e-8
        Stop when the relative change of ``‖X − X̂‖²`` between sweeps is below
        ``tol``; 0 runs all ``max_iter`` sweeps.
    init : "hosvd" or (core, factors), default="hosvd"
        Truncated HOSVD of the sparse unfoldings, or given factors
        (orthonormalized by QR; the core is ignored).
    random_state : int, numpy.random.Generator or None
        Seeds the sparse SVD start vectors and the random completion of a
        factor when an unfolding has fewer singular vectors than the rank.
    callback : callable or None
        ``callback(sweep, result)`` after every sweep, with ``sweep`` the
        1-based sweep number and ``result`` the :class:`TuckerResult` so far;
        returning True stops the fit.

    Returns
    -------
    TuckerResult
        Orthonormal factors and the core in the tensor's dtype; history with
        ``loss = ‖X − X̂‖²`` and ``fit = 1 − ‖X − X̂‖ / ‖X‖``.
    """
    if not isinstance(tensor, SparseTensor):
        raise TypeError(f"hooi needs a SparseTensor, got {type(tensor).__name__}.")
    rank = check_tucker_rank(rank, tensor.shape, "hooi")
    max_iter = check_int("max_iter", max_iter, low=1, owner="hooi")
    tol = check_number("tol", tol, low=0.0, owner="hooi")
    rng = np.random.default_rng(random_state)
    values = tensor.preference.astype(np.float64)
    norm_sq = float(values @ values)
    factors = _initial_factors(tensor, values, rank, init, rng)
    trees = [build_fiber_tree(tensor.coords, tensor.shape, n) for n in range(tensor.ndim)]
    history: list[SweepStats] = []
    converged = False
    for sweep in range(1, max_iter + 1):
        start = time.perf_counter()
        for n, tree in enumerate(trees):
            y = ttmc(tree, tensor.coords, values, factors, tensor.shape[n])
            factors[n] = leading_left_vectors(y, rank[n], rng)
        core = _fold_core(factors[-1].T @ y, trees[-1].levels, rank)
        loss = max(norm_sq - float(np.sum(core * core)), 0.0)
        fit = 1.0 - np.sqrt(loss / norm_sq) if norm_sq > 0 else 1.0
        history.append(SweepStats(sweep, loss, fit, time.perf_counter() - start))
        if sweep > 1:
            previous = history[-2].loss
            converged = abs(previous - loss) <= tol * max(previous, np.finfo(float).tiny)
        result = TuckerResult(
            core=core.astype(tensor.dtype),
            factors=tuple(f.astype(tensor.dtype) for f in factors),
            history=tuple(history),
            converged=converged,
            method="hooi",
            mode_names=tensor.mode_names,
        )
        if converged or (callback is not None and callback(sweep, result)):
            break
    if not converged and tol > 0 and len(history) == max_iter:
        warnings.warn(f"hooi stopped after max_iter={max_iter} sweeps before reaching tol={tol:g}.", ConvergenceWarning)
    return result


def hooi_fold_in(result: TuckerResult, tensor: SparseTensor, mode: int | str) -> np.ndarray:
    """Rows for new indices of one mode, from their own cells, everything else fixed.

    The least-squares projection of each new slice onto the fitted model:
    ``u = y G_(n)⁺`` with ``y = x_slice ×_{m≠n} U_mᵀ`` (the slice's row of
    ``Y_(n)``) and ``G_(n)⁺`` the pseudo-inverse of the core's unfolding, which
    minimizes ``‖x_slice − u G_(n) (⊗_{m≠n} U_m)ᵀ‖`` because the other factors
    are orthonormal. A slice with no cells gets the zero row.

    Parameters
    ----------
    result : TuckerResult
    tensor : SparseTensor
        Cells of the new indices: ``shape[mode]`` counts the new rows, every other
        mode has the fitted size.
    mode : int or str

    Returns
    -------
    ndarray of shape (tensor.shape[mode], R_mode), float64
    """
    n = tensor.mode_index(mode)
    expected = tuple(s if m != n else tensor.shape[n] for m, s in enumerate(result.shape))
    if tensor.shape != expected:
        raise ValueError(f"Fold-in cells must have shape {expected} (new rows in mode {n}), got {tensor.shape}.")
    factors = [np.asarray(f, dtype=np.float64) for f in result.factors]
    factors[n] = np.zeros((tensor.shape[n], result.rank[n]))
    tree = build_fiber_tree(tensor.coords, tensor.shape, n)
    y = ttmc(tree, tensor.coords, tensor.preference.astype(np.float64), factors, tensor.shape[n])
    core_unfolded = np.transpose(np.asarray(result.core, np.float64), tree.levels).reshape(result.rank[n], -1)
    return y @ np.linalg.pinv(core_unfolded)


class HOOIModel(TuckerScorer):
    """Tucker model fitted by HOOI; scores through the shared scoring interface.

    Parameters
    ----------
    rank : int or tuple of int, default=8
    max_iter : int, default=50
    tol : float, default=1e-8
    random_state : int or None, default=None

    Attributes
    ----------
    result_ : TuckerResult
    core_ : ndarray of shape (R_1, ..., R_N)
    factors_ : tuple of ndarray of shape (I_n, R_n)
    n_iter_ : int
    """

    def __init__(self, *, rank: int | Sequence[int] = 8, max_iter: int = 50, tol: float = 1e-8,
                 random_state: int | None = None) -> None:
        self.rank = rank
        self.max_iter = max_iter
        self.tol = tol
        self.random_state = random_state

    def fit(self, tensor: SparseTensor, *, callback: Callback | None = None) -> "HOOIModel":
        """Fit to ``tensor``; ``callback(sweep, result)`` as in :func:`hooi`. Returns self."""
        self.result_ = hooi(tensor, self.rank, max_iter=self.max_iter, tol=self.tol,
                            random_state=self.random_state, callback=callback)
        self.core_ = self.result_.core
        self.factors_ = self.result_.factors
        self.n_iter_ = self.result_.n_iter
        return self

    def fold_in(self, tensor: SparseTensor, mode: int | str) -> np.ndarray:
        """Rows of new indices of ``mode`` from their cells; see :func:`hooi_fold_in`."""
        return hooi_fold_in(self._fitted(), tensor, mode)
