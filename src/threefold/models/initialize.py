"""Initial factors of CP models: random, from sparse unfoldings, or given (warm start).

Each mode ``n`` gets a factor of shape ``(I_n, R)``; only the columns the mode
owns (``active[n]``) are initialized, the others hold the constant 1 (see
:mod:`threefold.models.cp.structure`).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import svds

from threefold.core.tensor import SparseTensor

__all__ = ["initial_factors", "leading_left_vectors", "SMALL_MODE"]

#: Modes with at most this many rows take their leading vectors from the
#: eigendecomposition of the small Gram matrix ``X_(n) X_(n)ᵀ`` instead of a
#: truncated sparse SVD.
SMALL_MODE = 512


def initial_factors(
    tensor: SparseTensor,
    active: np.ndarray,
    init: str | Sequence[np.ndarray],
    *,
    dtype: np.dtype,
    rng: np.random.Generator,
) -> list[np.ndarray]:
    """Initial factors for every mode.

    Parameters
    ----------
    tensor : SparseTensor
    active : ndarray of shape (ndim, R), bool
        Columns each mode owns.
    init : {"random", "svd"} or sequence of ndarray
        ``"random"``: uniform on [0, 1) (common practice, as tensorly's
        ``random_cp``). ``"svd"``: the leading left singular vectors of each
        mode's sparse unfolding of the preference values, as many as the mode
        owns columns (see :func:`leading_left_vectors`). A sequence: one array
        of shape ``(J_n, R)`` per mode with ``J_n <= I_n``; rows ``J_n .. I_n``
        (labels appended to a vocabulary since) start at zero, and the first
        sweep solves them from their own cells.
    dtype : float32 or float64
    rng : numpy.random.Generator

    Returns
    -------
    list of ndarray of shape (I_n, R), dtype
        Columns outside ``active[n]`` are 1.
    """
    ndim, rank = active.shape
    factors = []
    for n in range(ndim):
        size = tensor.shape[n]
        factor = np.ones((size, rank), dtype=dtype)
        cols = np.flatnonzero(active[n])
        if isinstance(init, str) and init == "random":
            factor[:, cols] = rng.random((size, cols.size))
        elif isinstance(init, str) and init == "svd":
            if cols.size:
                factor[:, cols] = leading_left_vectors(tensor, n, cols.size, rng)
        else:
            given = np.asarray(init[n])
            factor[: given.shape[0], cols] = given[:, cols]
            factor[given.shape[0] :, cols] = 0.0
        factors.append(factor)
    return factors


def leading_left_vectors(tensor: SparseTensor, mode: int, k: int, rng: np.random.Generator) -> np.ndarray:
    """Leading ``k`` left singular vectors of a mode's unfolding, never densified.

    The unfolding's columns are restricted to the combinations of the other
    modes' indices that hold a stored cell (the others are zero columns and
    change no left singular vector), so its width is at most ``nnz``. A mode
    with at most ``max(SMALL_MODE, k + 1)`` rows uses the eigendecomposition of
    its small Gram matrix ``X_(n) X_(n)ᵀ``; larger modes use
    ``scipy.sparse.linalg.svds``. Columns beyond what the unfolding can give
    (a mode with fewer rows than ``k``, or an unfolding narrower than
    ``k + 1``) are filled with random unit vectors.

    Parameters
    ----------
    tensor : SparseTensor
    mode : int
    k : int
    rng : numpy.random.Generator
        Seeds ARPACK's start vector and the random columns.

    Returns
    -------
    ndarray of shape (I_mode, k), float64
        Orthonormal leading columns, by decreasing singular value.
    """
    size = tensor.shape[mode]
    unfolding = _compressed_unfolding(tensor, mode)
    width = unfolding.shape[1]
    out = np.empty((size, k))
    if size <= max(SMALL_MODE, k + 1):
        gram = (unfolding @ unfolding.T).toarray()
        _, vectors = np.linalg.eigh(gram)
        found = vectors[:, ::-1][:, : min(k, size)]
    else:
        available = min(k, width - 1)  # svds needs k < min(unfolding.shape)
        found = _svds_vectors(unfolding, available, rng) if available >= 1 else np.zeros((size, 0))
    out[:, : found.shape[1]] = found
    fill = rng.random((size, k - found.shape[1]))
    out[:, found.shape[1] :] = fill / np.maximum(np.linalg.norm(fill, axis=0), 1e-300)
    return out


def _svds_vectors(unfolding: sp.csr_matrix, k: int, rng: np.random.Generator) -> np.ndarray:
    # left vectors only: the right ones would be (prod of other sizes) × k, and are never used
    u, s, _ = svds(unfolding, k=k, random_state=int(rng.integers(2**31 - 1)), return_singular_vectors="u")
    return u[:, np.argsort(-s, kind="stable")]


def _compressed_unfolding(tensor: SparseTensor, mode: int) -> sp.csr_matrix:
    """Mode unfolding of the preference values with only the columns that hold a cell."""
    others = [m for m in range(tensor.ndim) if m != mode]
    sizes = [tensor.shape[m] for m in others]
    if float(np.prod(sizes, dtype=np.float64)) < 2.0**62:
        keys = np.ravel_multi_index(tuple(tensor.coords[others].astype(np.int64)), sizes)
        _, cols = np.unique(keys, return_inverse=True)
    else:
        _, cols = np.unique(np.ascontiguousarray(tensor.coords[others].T), axis=0, return_inverse=True)
    cols = cols.reshape(-1)
    width = int(cols.max()) + 1 if cols.size else 1
    return sp.csr_matrix(
        (tensor.preference.astype(np.float64), (tensor.coords[mode], cols)), shape=(tensor.shape[mode], width)
    )
