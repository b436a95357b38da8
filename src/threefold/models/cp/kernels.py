"""Compiled kernels of the implicit CP engine: row systems, conjugate gradient, loss sums.

All kernels work on one *stacked* factor array ``F`` of shape
``(sum_n I_n, R)``: mode ``n``'s rows are ``F[offsets[n]:offsets[n + 1]]``, so a
cell's row in mode ``m`` is the *global* index ``offsets[m] + i_m``. A mode's
cells come grouped by their row in that mode (CSR-like ``indptr``) with the
global indices of the *other* modes in ``other`` of shape ``(ndim - 1, nnz)``.

The row system of row ``i`` of mode ``n`` (iTALS: Hidasi & Tikk, ECML-PKDD 2012;
arXiv:1309.7611; ``docs/models.md``), over the columns ``A`` the mode updates::

    M = base + Σ_e c_e v_e v_eᵀ          base = w0·H[A, A] + reg·I
    b = rhs0 + Σ_e (wp_e − c_e·off_e) v_e  rhs0 = −w0·H[A, Ā]·1

with ``v_e`` the Hadamard product of the other modes' rows of cell ``e`` restricted
to ``A``, ``off_e`` the sum of that product over the fixed columns ``Ā``,
``c_e = w_e − w0`` and ``wp_e = w_e·p_e``. ``H`` is the Hadamard product of the
other modes' Gram matrices, computed outside (it costs ``O(Σ I_m R²)``).

Slow reference of the correction terms (what the kernels compute, never formed)::

    for e in cells_of_row_i:
        v = prod(F[other[:, e]], axis=0)
        M += c[e] * outer(v[A], v[A]);  b += (wp[e] - c[e] * v[Ā].sum()) * v[A]

Every kernel takes float32 or float64 factors; systems are accumulated and
solved in float64. No dense tensor and no Khatri–Rao product is ever formed.
The kernels call BLAS from their parallel loops: run them with BLAS limited
to one thread (:func:`threads` does both).
"""

from __future__ import annotations

from contextlib import contextmanager

import numba
import numpy as np
from numba import njit, prange
from threadpoolctl import threadpool_limits

#: Reassociation lets LLVM vectorize the short dot products; results stay
#: deterministic (same code, same inputs, same order of blocks).
_FAST = {"reassoc", "contract"}

__all__ = ["solve_rows", "block_systems", "solve_systems", "stored_sums", "threads"]


@contextmanager
def threads(n_threads: int | None):
    """Run a block with ``n_threads`` numba threads (``None``: unchanged) and one BLAS thread."""
    previous = numba.get_num_threads()
    if n_threads is not None:
        numba.set_num_threads(min(int(n_threads), numba.config.NUMBA_NUM_THREADS))
    try:
        with threadpool_limits(limits=1, user_api="blas"):
            yield
    finally:
        numba.set_num_threads(previous)


@njit(cache=True, nogil=True, fastmath=_FAST)
def _gather(F, other, start, n, active, inactive, V, off, v):
    """Fill ``V[:n]`` and ``off[:n]`` with the other-mode products of cells ``start .. start+n``.

    When the mode owns every column (plain CP) the product goes straight into
    ``V``; otherwise it is built in ``v`` and split into owned columns and the
    fixed columns' sum.
    """
    R = F.shape[1]
    plain = inactive.size == 0
    for j in range(n):
        e = start + j
        w = V[j] if plain else v
        g = other[0, e]
        for r in range(R):
            w[r] = F[g, r]
        for m in range(1, other.shape[0]):
            g = other[m, e]
            for r in range(R):
                w[r] *= F[g, r]
        off[j] = 0.0
        if not plain:
            for a in range(active.size):
                V[j, a] = v[active[a]]
            for a in range(inactive.size):
                off[j] += v[inactive[a]]


@njit(cache=True, nogil=True, fastmath=_FAST)
def _accumulate(V, off, c, wp, start, n, Vc, part, M, b):
    """``M += Σ c_e v_e v_eᵀ`` (one BLAS product ``(c·V)ᵀ V``) and ``b += Σ (wp_e − c_e off_e) v_e``.

    ``M`` and ``b`` are float64; the product is formed in the factor dtype. A
    group of cells whose weights all equal ``w0`` (``c = 0``) adds nothing to
    ``M`` and skips the product.
    """
    k = V.shape[1]
    any_c = False
    for j in range(n):
        ce = c[start + j]
        coef = wp[start + j] - ce * off[j]
        any_c = any_c or ce != 0.0
        for a in range(k):
            Vc[j, a] = ce * V[j, a]
            b[a] += coef * V[j, a]
    if not any_c:
        return
    np.dot(Vc[:n].T, V[:n], part)
    for a in range(k):
        for d in range(k):
            M[a, d] += part[a, d]


@njit(cache=True, nogil=True, fastmath=_FAST)
def _cholesky(L):
    """In-place lower Cholesky factor of ``L``; False when not positive definite."""
    k = L.shape[0]
    for j in range(k):
        s = L[j, j]
        for t in range(j):
            s -= L[j, t] * L[j, t]
        if not s > 0.0:
            return False
        d = np.sqrt(s)
        L[j, j] = d
        for i in range(j + 1, k):
            s = L[i, j]
            for t in range(j):
                s -= L[i, t] * L[j, t]
            L[i, j] = s / d
    return True


@njit(cache=True, nogil=True, fastmath=_FAST)
def _solve_spd(M, b, x, L):
    """Solve ``M x = b`` for symmetric positive (semi)definite ``M``; False if hopeless.

    A matrix that fails Cholesky gets a ridge of 1e-6 of its mean diagonal; a zero
    matrix (a row with no cells, ``w0 = 0`` and ``reg = 0``) gives ``x = 0``.
    """
    k = M.shape[0]
    L[:, :] = M
    if not _cholesky(L):
        mean_diag = 0.0
        for a in range(k):
            mean_diag += M[a, a] / k
        if not mean_diag > 0.0:
            x[:] = 0.0
            return True
        L[:, :] = M
        for a in range(k):
            L[a, a] += 1e-6 * mean_diag
        if not _cholesky(L):
            return False
    for i in range(k):  # forward: L y = b
        s = b[i]
        for t in range(i):
            s -= L[i, t] * x[t]
        x[i] = s / L[i, i]
    for i in range(k - 1, -1, -1):  # backward: Lᵀ x = y
        s = x[i]
        for t in range(i + 1, k):
            s -= L[t, i] * x[t]
        x[i] = s / L[i, i]
    return True


@njit(cache=True, nogil=True, fastmath=_FAST)
def _apply(V, c, start, n, base, x, out):
    """``out = M x`` without forming ``M``: ``base x + Σ_e c_e (v_eᵀ x) v_e`` over ``n`` gathered cells."""
    k = x.size
    for a in range(k):
        s = 0.0
        for d in range(k):
            s += base[a, d] * x[d]
        out[a] = s
    for j in range(n):
        ce = c[start + j]
        if ce == 0.0:
            continue
        y = 0.0
        for a in range(k):
            y += V[j, a] * x[a]
        y *= ce
        for a in range(k):
            out[a] += y * V[j, a]


@njit(cache=True, nogil=True, fastmath=_FAST)
def _residual(V, off, c, wp, start, n, base, rhs0, x, r):
    """``r = b − M x`` in one pass: ``rhs0 − base x + Σ_e (wp_e − c_e (off_e + v_eᵀ x)) v_e``."""
    k = x.size
    for a in range(k):
        s = rhs0[a]
        for d in range(k):
            s -= base[a, d] * x[d]
        r[a] = s
    for j in range(n):
        y = 0.0
        for a in range(k):
            y += V[j, a] * x[a]
        coef = wp[start + j] - c[start + j] * (off[j] + y)
        for a in range(k):
            r[a] += coef * V[j, a]


@njit(cache=True, nogil=True, fastmath=_FAST)
def _conjugate_gradient(V, c, start, n, base, r, x, steps, work):
    """``steps`` CG iterations on ``M x = b`` from ``x``, given ``r = b − M x`` (Takács et al. 2011)."""
    p = work[0]
    Mp = work[1]
    rs = 0.0
    for a in range(x.size):
        p[a] = r[a]
        rs += r[a] * r[a]
    for _ in range(steps):
        if not rs > 0.0:
            break
        _apply(V, c, start, n, base, p, Mp)
        pMp = 0.0
        for a in range(x.size):
            pMp += p[a] * Mp[a]
        if not pMp > 0.0:
            break
        alpha = rs / pMp
        rs_new = 0.0
        for a in range(x.size):
            x[a] += alpha * p[a]
            r[a] -= alpha * Mp[a]
            rs_new += r[a] * r[a]
        beta = rs_new / rs
        for a in range(x.size):
            p[a] = r[a] + beta * p[a]
        rs = rs_new


@njit(parallel=True, cache=True, fastmath=_FAST)
def solve_rows(F, row_offset, indptr, other, c, wp, active, inactive, base, rhs0, chunk_bounds, cg_steps, buffer_cells):
    """Update the rows of one mode in place, in parallel over chunks of rows.

    Parameters
    ----------
    F : ndarray of shape (n_stacked_rows, R), float32 or float64
        Stacked factors; rows ``row_offset .. row_offset + I_n`` are updated.
    row_offset : int
    indptr : ndarray of shape (I_n + 1,), int64
        Cells of row ``i`` are ``indptr[i]:indptr[i + 1]``.
    other : ndarray of shape (ndim - 1, nnz), int32
        Global rows of the other modes, per cell.
    c, wp : ndarray of shape (nnz,), F.dtype
        ``w − w0`` and ``w·p`` per cell.
    active, inactive : ndarray of int64
        Columns this mode updates, and columns fixed at 1 in this mode.
    base : ndarray of shape (k, k), float64
        ``w0·H[A, A] + reg·I``.
    rhs0 : ndarray of shape (k,), float64
        ``−w0·H[A, Ā]·1``.
    chunk_bounds : ndarray of shape (n_chunks + 1,), int64
        Row ranges handed to threads, balanced by cost.
    cg_steps : int
        0 for exact solves, else the number of CG steps warm-started at the
        current row.
    buffer_cells : int
        Cells gathered at once. A CG row keeps its cells gathered between
        steps; a row with more cells than this is solved exactly instead
        (accumulating its system costs about one CG pass over its cells).
    """
    k = active.size
    R = F.shape[1]
    for ch in prange(chunk_bounds.size - 1):
        V = np.empty((buffer_cells, k), F.dtype)
        Vc = np.empty((buffer_cells, k), F.dtype)
        part = np.empty((k, k), F.dtype)
        off = np.empty(buffer_cells, F.dtype)
        v = np.empty(R, F.dtype)
        M = np.empty((k, k))
        L = np.empty((k, k))
        b = np.empty(k)
        x = np.empty(k)
        work = np.empty((2, k))
        for i in range(chunk_bounds[ch], chunk_bounds[ch + 1]):
            lo = indptr[i]
            hi = indptr[i + 1]
            g = row_offset + i
            if cg_steps > 0 and hi - lo <= buffer_cells:
                _gather(F, other, lo, hi - lo, active, inactive, V, off, v)
                for a in range(k):
                    x[a] = F[g, active[a]]
                _residual(V, off, c, wp, lo, hi - lo, base, rhs0, x, b)
                _conjugate_gradient(V, c, lo, hi - lo, base, b, x, cg_steps, work)
            else:
                M[:, :] = base
                b[:] = rhs0
                for start in range(lo, hi, buffer_cells):
                    n = min(buffer_cells, hi - start)
                    _gather(F, other, start, n, active, inactive, V, off, v)
                    _accumulate(V, off, c, wp, start, n, Vc, part, M, b)
                if not _solve_spd(M, b, x, L):
                    continue
            for a in range(k):
                F[g, active[a]] = x[a]


@njit(parallel=True, cache=True, fastmath=_FAST)
def block_systems(F, other, c, wp, block_starts, block_stops, active, inactive, grams, rhs):
    """Correction terms of row systems, one block of cells at a time (for modes with few rows).

    A mode with few rows and many cells (a context mode) parallelizes badly
    over rows; instead its cells are cut into blocks, blocks run in parallel,
    and each block's ``Σ c_e v_e v_eᵀ`` is one BLAS product ``(c·V)ᵀ V``. The caller adds the blocks
    of each row to ``base`` and ``rhs0`` and solves.

    Parameters
    ----------
    F, other, c, wp, active, inactive
        As in :func:`solve_rows`.
    block_starts, block_stops : ndarray of shape (n_blocks,), int64
        Cell ranges; a block never spans two rows.
    grams : ndarray of shape (n_blocks, k, k), float64
        Output: ``Σ c_e v_e v_eᵀ`` over each block.
    rhs : ndarray of shape (n_blocks, k), float64
        Output: ``Σ (wp_e − c_e off_e) v_e`` over each block.
    """
    k = active.size
    for blk in prange(block_starts.size):
        start = block_starts[blk]
        n = block_stops[blk] - start
        V = np.empty((n, k), F.dtype)
        Vc = np.empty((n, k), F.dtype)
        part = np.empty((k, k), F.dtype)
        off = np.empty(n, F.dtype)
        v = np.empty(F.shape[1], F.dtype)
        grams[blk] = 0.0
        rhs[blk] = 0.0
        _gather(F, other, start, n, active, inactive, V, off, v)
        _accumulate(V, off, c, wp, start, n, Vc, part, grams[blk], rhs[blk])


@njit(parallel=True, cache=True, fastmath=_FAST)
def stored_sums(F, coords, offsets, p, w, w0, n_chunks):
    """Per-chunk sums over stored cells needed by the loss.

    Parameters
    ----------
    F : ndarray of shape (n_stacked_rows, R)
    coords : ndarray of shape (ndim, nnz), int32
        Cell indices per mode (local to each mode).
    offsets : ndarray of shape (ndim + 1,), int64
    p, w : ndarray of shape (nnz,)
        Preference and confidence.
    w0 : float
    n_chunks : int

    Returns
    -------
    ndarray of shape (n_chunks, 2), float64
        Columns ``Σ p·x̂`` and ``Σ (w − w0)(p − x̂)²``; the caller sums the
        chunks in order, so the result does not depend on the thread count.
    """
    nnz = p.size
    R = F.shape[1]
    ndim = coords.shape[0]
    out = np.zeros((n_chunks, 2))
    for ch in prange(n_chunks):
        lo = ch * nnz // n_chunks
        hi = (ch + 1) * nnz // n_chunks
        v = np.empty(R)
        s_px = 0.0
        s_err = 0.0
        for e in range(lo, hi):
            g = offsets[0] + coords[0, e]
            for r in range(R):
                v[r] = F[g, r]
            for m in range(1, ndim):
                g = offsets[m] + coords[m, e]
                for r in range(R):
                    v[r] *= F[g, r]
            xhat = 0.0
            for r in range(R):
                xhat += v[r]
            s_px += p[e] * xhat
            s_err += (w[e] - w0) * (p[e] - xhat) ** 2
        out[ch, 0] = s_px
        out[ch, 1] = s_err
    return out


@njit(cache=True)
def solve_systems(M, b, F, rows, active):
    """Solve a few small systems ``M[j] x = b[j]`` and write ``x`` to ``F[rows[j], active]``.

    Used after :func:`block_systems`; a system that cannot be solved leaves its
    row unchanged, as in :func:`solve_rows`.
    """
    k = active.size
    L = np.empty((k, k))
    x = np.empty(k)
    for j in range(rows.size):
        if _solve_spd(M[j], b[j], x, L):
            for a in range(k):
                F[rows[j], active[a]] = x[a]
