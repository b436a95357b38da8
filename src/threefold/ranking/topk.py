"""Fused, blocked top-k selection: one routine for every ranking of the tool.

:func:`top_k` ranks the rows of a score matrix; :func:`top_k_product` ranks the
rows of ``Q @ V.T + b`` without ever holding the full ``(q, n_items)`` score
matrix. Both keep, per row, a running heap of the ``k`` best candidates seen so
far; a new score enters only when it beats the heap's worst entry, so almost
every item is rejected by one comparison. Candidate rules (a mask, publication
windows, explicit candidate lists, exclusion lists) are applied inside the same
loop, and only to the few items that pass that comparison: no full-width mask
array is ever built.

Ranking rules (the same for both functions):

* scores are ordered high to low; equal scores are ordered by LOWER index first;
* a candidate whose score is ``-inf`` or NaN is never ranked, nor is a
  candidate ruled out by the mask or the candidate rules;
* a row with fewer than ``k`` rankable candidates ends in ``-1`` (and, for
  :func:`top_k_product`, score ``-inf``).

This module depends on numpy, numba and threadpoolctl only (scipy sparse
matrices are accepted through their ``indptr``/``indices``/``data`` arrays);
it imports no other threefold module.
"""

from __future__ import annotations

import numbers
import threading
from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
from numba import njit, prange, types
from numba.extending import overload

__all__ = ["ALWAYS_LIVE", "top_k", "top_k_product"]

#: Query time meaning "no publication rule for this query": every item is live.
#: (An item published at ``np.iinfo(np.int64).min`` is published since always;
#: an item expiring at ``np.iinfo(np.int64).max`` never expires.)
ALWAYS_LIVE: int = int(np.iinfo(np.int64).min)

#: Target size of one block of scores in :func:`top_k_product` (bytes).
_BLOCK_BYTES = 16 << 20
#: Never fewer queries per block than this (a GEMM of a few rows wastes BLAS's packing).
_MIN_BLOCK = 16
#: Use the gather path (one dot product per listed candidate) when the candidate
#: lists hold on average fewer than n_items / _GATHER_RATIO items per query.
_GATHER_RATIO = 5
#: Columns per chunk of the full-row scan (one maximum per chunk).
_CHUNK = 64


# ---------------------------------------------------------------------------
# Kernels. Inner kernels assume valid input (checked at the public boundary).
# A row's heap lives in its output rows: ``hv`` (scores) and ``hi`` (indices)
# of length k, the worst kept entry at position 0. Empty slots hold (-inf, -1).
# Entry a is worse than entry b iff a.s < b.s or (a.s == b.s and a.j > b.j).
# ---------------------------------------------------------------------------


def _bits(a):
    """The bits of a float array as an int array of the same width (a view)."""
    return a.view(np.int32 if a.dtype == np.float32 else np.int64)


@overload(_bits, jit_options={"nogil": True})
def _bits_impl(a):
    if a.dtype == types.float32:
        return lambda a: a.view(np.int32)
    return lambda a: a.view(np.int64)


def _key(bits, b):
    """Order-preserving integer key of the float bits ``b`` (an element of the int view ``bits``), same width.

    ``a < b`` as floats iff ``key(a) < key(b)``; -0.0 maps just below +0.0,
    NaNs with the sign bit clear above +inf, the others below -inf. The map
    is its own inverse (``_key(bits, _key(bits, b)) == b``).
    """
    w = 8 * bits.dtype.itemsize - 1
    b = int(b)
    return b ^ ((b >> w) & ((1 << w) - 1))


@overload(_key, jit_options={"nogil": True})
def _key_impl(bits, b):
    if bits.dtype.bitwidth == 32:  # int32 arithmetic throughout: 16 lanes per AVX-512 register
        return lambda bits, b: np.int32(b ^ np.int32(np.int32(b >> np.int32(31)) & np.int32(0x7FFFFFFF)))
    return lambda bits, b: np.int64(b ^ ((b >> np.int64(63)) & np.int64(0x7FFFFFFFFFFFFFFF)))


def _key_min(bits):
    """The smallest key of the width of ``bits`` (below every float's key)."""
    return int(np.iinfo(bits.dtype).min)


@overload(_key_min, jit_options={"nogil": True})
def _key_min_impl(bits):
    if bits.dtype.bitwidth == 32:
        return lambda bits: np.int32(-2147483648)
    return lambda bits: np.int64(-9223372036854775808)


@njit(cache=True, nogil=True, inline="always")
def _sift_down(hv, hi, pos, size):
    """Move the entry at ``pos`` down the min-heap ``hv[:size]``/``hi[:size]`` to its place."""
    v = hv[pos]
    j = hi[pos]
    while True:
        c = 2 * pos + 1
        if c >= size:
            break
        d = c + 1
        if d < size and (hv[d] < hv[c] or (hv[d] == hv[c] and hi[d] > hi[c])):
            c = d
        if hv[c] < v or (hv[c] == v and hi[c] > j):
            hv[pos] = hv[c]
            hi[pos] = hi[c]
            pos = c
        else:
            break
    hv[pos] = v
    hi[pos] = j


@njit(cache=True, nogil=True, inline="always")
def _push(hv, hi, s, j, k):
    """Replace the heap's worst entry by ``(s, j)``; return the new worst ``(score, index)``."""
    hv[0] = s
    hi[0] = j
    _sift_down(hv, hi, 0, k)
    return hv[0], hi[0]


@njit(cache=True, nogil=True)
def _heap_finish(hv, hi):
    """Heap-sort in place: best first; empty slots (-inf, -1) end up last."""
    for end in range(hv.shape[0] - 1, 0, -1):
        v = hv[0]
        j = hi[0]
        hv[0] = hv[end]
        hi[0] = hi[end]
        hv[end] = v
        hi[end] = j
        _sift_down(hv, hi, 0, end)


@njit(cache=True, nogil=True, inline="always")
def _advance_excluded(ex_idx, ep, ee, j):
    """Move the pointer ``ep`` of a sorted exclusion list ``ex_idx[ep:ee]`` up to ``j`` (ascending ``j``);
    return the new pointer and whether ``j`` is excluded. Amortized O(1) per column."""
    while ep < ee and ex_idx[ep] < j:
        ep += 1
    return ep, ep < ee and ex_idx[ep] == j


@njit(cache=True, nogil=True)
def _excluded(ex_idx, lo, hi, j):
    """Whether ``j`` is in the ascending slice ``ex_idx[lo:hi]`` (binary search)."""
    end = hi
    while lo < hi:
        mid = (lo + hi) >> 1
        if ex_idx[mid] < j:
            lo = mid + 1
        else:
            hi = mid
    return lo < end and ex_idx[lo] == j


@njit(cache=True, nogil=True)
def _select_range(scores, lo, hi_row, row0, bias, has_bias, mask, has_mask, pub, exp, times, has_live,
                  ex_ptr, ex_idx, has_ex, al_ptr, al_idx, has_al, out_idx, out_val, cmax, top):
    """Top-k of the rows ``lo <= r < hi_row`` of ``scores (+ bias)`` into the output rows ``row0 + r``.

    The heap of a row lives in its output rows ``hv = out_val[i]``,
    ``hi = out_idx[i]`` (worst kept entry at position 0, empty slots
    (-inf, -1)); entry a is worse than entry b iff ``a.s < b.s`` or
    (``a.s == b.s`` and ``a.j > b.j``). A column ``j`` of score ``s`` enters
    iff ``s >= thr and (s > thr or j < thrj)`` (the heap's worst entry
    (thr, thrj)) and it passes the row's candidate rules, read only then.

    A full row of ``n`` columns is cut into ``nc = n // _CHUNK`` chunks of
    ``_CHUNK`` consecutive columns (the last ``n - nc * _CHUNK`` columns form
    a tail). (1) The bias is added to the row in place (the row is a scratch
    block), then the largest score of every chunk goes to ``cmax``: a
    vectorized max over order-preserving integer keys of the float bits, so
    NaN never hides a larger score (a chunk holding a NaN whose sign bit is
    clear gets +inf: scanned, to be safe). With a mask or a live rule the
    maximum runs over the chunk's candidates only (-inf if none), so that
    rules ruling out most items do not leave the heap's threshold low. (2) The k chunks of largest
    maxima, in ``top`` best first. (3) Those chunks, then the tail, are
    offered to the heap column by column. (4) Every other chunk whose maximum
    still reaches the heap's k-th best is offered too. A chunk is skipped when
    its maximum is below the heap's worst score, or equal to it while its first
    column comes after the worst entry's column. Step 4 makes the result exact
    whatever the candidate rules ruled out in step 3; without rules it
    scans little, since the k-th largest chunk maximum is a lower bound of
    the row's k-th best score.
    Rows sorted by score cost about as much as others. With candidate lists
    (``has_al``) only the listed columns are offered, in ascending order,
    duplicates once.
    """
    n = scores.shape[1]
    k = out_val.shape[1]
    nc = n // _CHUNK
    end = nc * _CHUNK
    for r in range(lo, hi_row):
        i = row0 + r
        srow = scores[r]
        hv = out_val[i]
        hi = out_idx[i]
        for t in range(k):
            hv[t] = -np.inf
            hi[t] = -1
        neg_inf = hv[0]
        t_i = times[i] if has_live else 0
        live_i = has_live and t_i != ALWAYS_LIVE
        ep = ex_ptr[i] if has_ex else 0
        ee = ex_ptr[i + 1] if has_ex else 0
        mrow = mask[r] if has_mask else mask[0]
        if has_al:
            thr = neg_inf
            thrj = -1
            prev = -1
            for p in range(al_ptr[i], al_ptr[i + 1]):
                j = np.int64(al_idx[p])
                if j == prev:
                    continue
                prev = j
                s = srow[j] + bias[j] if has_bias else srow[j]
                if not (s >= thr and (s > thr or j < thrj)):
                    continue
                if has_mask and not mrow[j]:
                    continue
                if live_i and not (pub[j] <= t_i and t_i < exp[j]):
                    continue
                if has_ex:
                    ep, hit = _advance_excluded(ex_idx, ep, ee, j)
                    if hit:
                        continue
                thr, thrj = _push(hv, hi, s, j, k)
            _heap_finish(hv, hi)
            continue
        # (1) chunk maxima (the bias is added to the row in place first), NaN ignored
        if has_bias:
            for j in range(n):
                srow[j] = srow[j] + bias[j]
        bits = _bits(srow)
        mbits = _bits(cmax)
        kmin = _key_min(bits)
        for c in range(nc):
            j0 = c * _CHUNK
            ch = bits[j0:j0 + _CHUNK]
            m = kmin
            if has_mask:  # the maximum over the candidates only (branch-free, vectorized)
                mch = mrow[j0:j0 + _CHUNK]
                for t in range(_CHUNK):
                    x = _key(bits, ch[t]) if mch[t] else kmin
                    m = x if x > m else m
            elif live_i:
                pch = pub[j0:j0 + _CHUNK]
                ech = exp[j0:j0 + _CHUNK]
                for t in range(_CHUNK):
                    x = _key(bits, ch[t]) if (pch[t] <= t_i) & (t_i < ech[t]) else kmin
                    m = x if x > m else m
            else:
                for t in range(_CHUNK):
                    x = _key(bits, ch[t])
                    m = x if x > m else m
            if m == kmin:
                cmax[c] = neg_inf  # no candidate here
            else:
                mbits[c] = _key(bits, m)  # the key map is its own inverse
                if cmax[c] != cmax[c]:  # a positive NaN outranks every key: be safe, scan the chunk
                    cmax[c] = np.inf
        # (2) the k chunks of largest maxima, best first, from a heap of chunk maxima in hv/hi
        for c in range(nc):
            if cmax[c] > hv[0]:
                hv[0] = cmax[c]
                hi[0] = c
                _sift_down(hv, hi, 0, k)
        _heap_finish(hv, hi)
        n_top = 0
        for t in range(k):
            if hi[t] >= 0:
                top[n_top] = hi[t]
                n_top += 1
            hv[t] = -np.inf
            hi[t] = -1
        thr = neg_inf
        thrj = -1
        # (3) those chunks (w < n_top), then the tail (w == n_top), then (4) every other chunk
        for w in range(n_top + 1 + nc):
            if w == n_top:
                j0, j1 = end, n
            else:
                c = top[w] if w < n_top else w - n_top - 1
                cm = cmax[c]
                if cm == neg_inf:
                    continue
                if w < n_top:
                    cmax[c] = neg_inf  # scanned: skip in (4)
                if cm < thr or (cm == thr and c * _CHUNK > thrj):  # nothing here can enter
                    continue
                j0, j1 = c * _CHUNK, c * _CHUNK + _CHUNK
            for j in range(j0, j1):
                s = srow[j]  # the bias is in already
                ok = s >= thr  # one branch below for the score and the mask / live rule together
                if has_mask:
                    ok &= mrow[j]
                if live_i:
                    ok &= (pub[j] <= t_i) & (t_i < exp[j])
                if not ok or not (s > thr or j < thrj):
                    continue
                if has_ex and ep < ee and _excluded(ex_idx, ep, ee, j):
                    continue
                thr, thrj = _push(hv, hi, s, j, k)
        _heap_finish(hv, hi)


@njit(cache=True, nogil=True, parallel=True)
def _select_rows_parallel(scores, row0, bias, has_bias, mask, has_mask, pub, exp, times, has_live,
                          ex_ptr, ex_idx, has_ex, al_ptr, al_idx, has_al, out_idx, out_val):
    """Output rows ``row0 + r`` from the rows ``r`` of ``scores``, groups of 8 rows in parallel."""
    m, n = scores.shape
    for g in prange((m + 7) // 8):
        cmax = np.empty(n // _CHUNK, dtype=scores.dtype)
        top = np.empty(out_idx.shape[1], dtype=np.int64)
        _select_range(scores, 8 * g, min(m, 8 * g + 8), row0, bias, has_bias, mask, has_mask, pub, exp, times,
                      has_live, ex_ptr, ex_idx, has_ex, al_ptr, al_idx, has_al, out_idx, out_val, cmax, top)


@njit(cache=True, nogil=True)
def _select_rows_serial(scores, row0, bias, has_bias, mask, has_mask, pub, exp, times, has_live,
                        ex_ptr, ex_idx, has_ex, al_ptr, al_idx, has_al, out_idx, out_val):
    """As :func:`_select_rows_parallel`, in the calling thread (for the block workers)."""
    cmax = np.empty(scores.shape[1] // _CHUNK, dtype=scores.dtype)
    top = np.empty(out_idx.shape[1], dtype=np.int64)
    _select_range(scores, 0, scores.shape[0], row0, bias, has_bias, mask, has_mask, pub, exp, times,
                  has_live, ex_ptr, ex_idx, has_ex, al_ptr, al_idx, has_al, out_idx, out_val, cmax, top)


@njit(cache=True, nogil=True, fastmath={"reassoc", "contract"})
def _gather_range(query, items, lo, hi_row, bias, has_bias, pub, exp, times, has_live,
                  ex_ptr, ex_idx, has_ex, al_ptr, al_idx, out_idx, out_val):
    """Top-k of the queries ``lo <= i < hi_row`` over their candidate lists: one dot product per live listed item.

    Heaps and the entry test as in :func:`_select_range`; the lists are read
    in ascending order (duplicates once), so the exclusion list is merged, not
    searched. Dot products are summed in the factors' dtype in any order
    (``fastmath`` reassociation, vectorized); comparisons keep IEEE semantics.
    """
    n_rank = query.shape[1]
    k = out_val.shape[1]
    for i in range(lo, hi_row):
        hv = out_val[i]
        hi = out_idx[i]
        for t in range(k):
            hv[t] = -np.inf
            hi[t] = -1
        thr = hv[0]
        thrj = -1
        t_i = times[i] if has_live else 0
        live_i = has_live and t_i != ALWAYS_LIVE
        ep = ex_ptr[i] if has_ex else 0
        ee = ex_ptr[i + 1] if has_ex else 0
        qrow = query[i]
        prev = -1
        for p in range(al_ptr[i], al_ptr[i + 1]):
            j = np.int64(al_idx[p])
            if j == prev:
                continue
            prev = j
            if live_i and not (pub[j] <= t_i and t_i < exp[j]):
                continue
            if has_ex:
                ep, hit = _advance_excluded(ex_idx, ep, ee, j)
                if hit:
                    continue
            vrow = items[j]
            s = qrow[0] * vrow[0]
            for r in range(1, n_rank):
                s += qrow[r] * vrow[r]
            if has_bias:
                s = s + bias[j]
            if s >= thr and (s > thr or j < thrj):
                thr, thrj = _push(hv, hi, s, j, k)
        _heap_finish(hv, hi)


@njit(cache=True, nogil=True, parallel=True)
def _gather_rows(query, items, bias, has_bias, pub, exp, times, has_live,
                 ex_ptr, ex_idx, has_ex, al_ptr, al_idx, out_idx, out_val):
    """:func:`_gather_range` over all queries, groups of 64 queries in parallel."""
    q = query.shape[0]
    for g in prange((q + 63) // 64):
        _gather_range(query, items, 64 * g, min(q, 64 * g + 64), bias, has_bias, pub, exp, times, has_live,
                      ex_ptr, ex_idx, has_ex, al_ptr, al_idx, out_idx, out_val)


@njit(cache=True, nogil=True)
def _csr_state(indptr, indices, n_cols):
    """0: rows sorted ascending; 1: some row unsorted; 2: an index outside [0, n_cols)."""
    state = 0
    for i in range(indptr.shape[0] - 1):
        prev = -1
        for p in range(indptr[i], indptr[i + 1]):
            j = indices[p]
            if j < 0 or j >= n_cols:
                return 2
            if j < prev:
                state = 1
            prev = j
    return state


@njit(cache=True, nogil=True, parallel=True)
def _csr_sort_rows(indptr, indices):
    """Sort every row of ``indices`` in place."""
    for i in prange(indptr.shape[0] - 1):
        indices[indptr[i]:indptr[i + 1]].sort()


# ---------------------------------------------------------------------------
# Boundary checks
# ---------------------------------------------------------------------------


def _check_int(name: str, value: object, owner: str, low: int = 1, high: int | None = None) -> int:
    rng = f"[{low}, {'inf)' if high is None else f'{high}]'}"
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < low or (
        high is not None and value > high
    ):
        raise ValueError(f"The {name!r} parameter of {owner} must be an int in the range {rng}. Got {value!r} instead.")
    return int(value)


def _float_array(name: str, value, ndim: int, owner: str) -> np.ndarray:
    """``value`` as a C-contiguous float32/float64 array of ``ndim`` dimensions (float16 widened exactly)."""
    arr = np.asarray(value)
    if arr.ndim != ndim or arr.dtype.kind != "f" or arr.dtype.itemsize > 8:
        raise ValueError(
            f"{name} of {owner} must be a {ndim}-D float16, float32 or float64 array, "
            f"got shape {arr.shape} and dtype {arr.dtype}."
        )
    if arr.dtype == np.float16:
        arr = arr.astype(np.float32)
    return np.ascontiguousarray(arr)


def _int_array(name: str, value, shape: tuple, owner: str) -> np.ndarray:
    arr = np.asarray(value)
    if arr.dtype.kind not in "iu" or arr.shape != shape:
        raise ValueError(f"{name} of {owner} must be an int array of shape {shape}, got {arr.dtype} {arr.shape}.")
    if arr.dtype.kind == "u" and arr.size and arr.max() > np.iinfo(np.int64).max:
        raise ValueError(f"{name} of {owner} holds values beyond the int64 range.")
    return np.ascontiguousarray(arr, dtype=np.int64)


def _csr_rows(name: str, value, q: int, n_items: int, owner: str) -> tuple[np.ndarray, np.ndarray]:
    """``(indptr int64 (q+1,), indices int32 (nnz,))`` with rows sorted ascending, from CSR-like input.

    Accepts a scipy sparse matrix or array of shape (q, n_items) (its stored
    non-zero entries mark the items; explicit zeros are ignored) or a pair
    ``(indptr, indices)``. Duplicates are allowed (counted once).
    """
    if hasattr(value, "tocsr") and hasattr(value, "shape"):  # scipy.sparse, without importing it
        if tuple(value.shape) != (q, n_items):
            raise ValueError(f"{name} of {owner} must have shape ({q}, {n_items}), got {tuple(value.shape)}.")
        csr = value.tocsr()
        if csr.data.size and not np.all(csr.data != 0):
            csr = csr.copy()
            csr.eliminate_zeros()
        indptr, indices = csr.indptr, csr.indices
    elif isinstance(value, (tuple, list)) and len(value) == 2:
        indptr, indices = (np.asarray(v) for v in value)
    else:
        raise ValueError(
            f"{name} of {owner} must be a scipy sparse matrix of shape ({q}, {n_items}) or a pair "
            f"(indptr, indices), got {type(value).__name__}."
        )
    if indptr.ndim != 1 or indptr.dtype.kind not in "iu" or indptr.shape[0] != q + 1:
        raise ValueError(f"{name} of {owner}: indptr must be a 1-D int array of length {q + 1}, got {indptr.dtype} {indptr.shape}.")
    if indices.ndim != 1 or indices.dtype.kind not in "iu":
        raise ValueError(f"{name} of {owner}: indices must be a 1-D int array, got {indices.dtype} {indices.shape}.")
    indptr = np.ascontiguousarray(indptr, dtype=np.int64)
    if indptr[0] != 0 or indptr[-1] != indices.shape[0] or np.any(np.diff(indptr) < 0):
        raise ValueError(
            f"{name} of {owner}: indptr must start at 0, never decrease and end at len(indices) = {indices.shape[0]}."
        )
    if indices.dtype != np.int32:
        if indices.size and (indices.min() < 0 or indices.max() >= n_items):
            raise ValueError(f"{name} of {owner} holds item indices outside [0, {n_items}).")
        indices = indices.astype(np.int32)
    indices = np.ascontiguousarray(indices)
    state = _csr_state(indptr, indices, n_items)
    if state == 2:
        raise ValueError(f"{name} of {owner} holds item indices outside [0, {n_items}).")
    if state == 1:
        indices = indices.copy()
        _csr_sort_rows(indptr, indices)
    return indptr, indices


_NO_INT = np.zeros(1, dtype=np.int64)
_NO_INT32 = np.zeros(0, dtype=np.int32)
_NO_MASK = np.zeros((1, 1), dtype=bool)

_blas_lock = threading.Lock()
_blas_controller = None


def _blas_one_thread():
    """A context holding the BLAS libraries loaded so far to one thread (process-wide)."""
    global _blas_controller
    from threadpoolctl import ThreadpoolController

    with _blas_lock:
        if _blas_controller is None:
            _blas_controller = ThreadpoolController()
    return _blas_controller.limit(limits=1, user_api="blas")


class _numba_threads:
    """Context: ``numba.set_num_threads(n)`` in this thread, restoring the previous value."""

    def __init__(self, n: int):
        self.n = n

    def __enter__(self):
        self.previous = numba.get_num_threads()
        numba.set_num_threads(self.n)

    def __exit__(self, *exc):
        numba.set_num_threads(self.previous)
        return False


# ---------------------------------------------------------------------------
# Public API
# ---------------------------------------------------------------------------


def top_k(scores: np.ndarray, k: int, candidate_mask: np.ndarray | None = None) -> np.ndarray:
    """Indices of the ``k`` highest-scoring candidates of every row.

    Parameters
    ----------
    scores : ndarray of shape (q, n_candidates), float16, float32 or float64
        Not modified. ``-inf`` and NaN entries are never ranked.
    k : int
        List length, at least 1 (may exceed ``n_candidates``).
    candidate_mask : ndarray of shape (q, n_candidates), bool, or None
        True where the column is a candidate of the row; default: all.

    Returns
    -------
    ndarray of shape (q, k), int64
        Column indices, best first. Equal scores are ordered by lower index
        first. Masked candidates and ``-inf``/NaN scores are never ranked;
        rows with fewer than ``k`` rankable candidates end in ``-1``.

    Raises
    ------
    ValueError
        If ``k`` is not an int >= 1, ``scores`` is not a 2-D float array, or
        ``candidate_mask`` is not a bool array of the same shape.

    Notes
    -----
    Definition (slow reference) for one row, with ``valid`` the columns that
    are candidates and whose score is neither ``-inf`` nor NaN::

        sorted(valid, key=lambda j: (-scores[j], j))[:k]

    Rows run in parallel (numba threads, :func:`numba.get_num_threads`). A
    row is cut into chunks of 64 columns; one vectorized pass finds every
    chunk's largest score (NaN ignored), the k-th largest of those maxima is a
    lower bound ``t0`` of the row's k-th best score, and only the chunks whose
    maximum reaches ``t0`` (then any other chunk whose maximum still reaches
    the heap's k-th best) are offered, column by column, to a heap of the
    ``k`` best entries; the mask is read only for the scores that would enter
    the heap. Time O(n_candidates + (n_candidates / 64) log k + 64 k log k) per
    row for distinct scores in any order (sorted rows included), up to
    O(n_candidates log k) when the mask rules out most of the best scores;
    memory O(n_candidates / 64) per thread beyond the output.
    """
    k = _check_int("k", k, "top_k")
    scores = _float_array("scores", scores, 2, "top_k")
    q, n = scores.shape
    if candidate_mask is not None:
        candidate_mask = np.asarray(candidate_mask)
        if candidate_mask.shape != scores.shape or candidate_mask.dtype != bool:
            raise ValueError(
                f"candidate_mask of top_k must be a bool array of shape {scores.shape}, "
                f"got {candidate_mask.dtype} {candidate_mask.shape}."
            )
        candidate_mask = np.ascontiguousarray(candidate_mask)
    out_idx = np.full((q, k), -1, dtype=np.int64)
    if q == 0 or n == 0:
        return out_idx
    out_val = np.empty((q, k), dtype=scores.dtype)
    has_mask = candidate_mask is not None
    _select_rows_parallel(
        scores, 0, np.zeros(1, scores.dtype), False, candidate_mask if has_mask else _NO_MASK, has_mask,
        _NO_INT, _NO_INT, _NO_INT, False, _NO_INT, _NO_INT32, False, _NO_INT, _NO_INT32, False, out_idx, out_val,
    )
    return out_idx


def top_k_product(
    query_matrix: np.ndarray,
    item_matrix: np.ndarray,
    k: int,
    *,
    item_bias: np.ndarray | None = None,
    live: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
    allowed=None,
    excluded=None,
    n_threads: int | None = None,
    block_queries: int | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Top-k items of every query by ``query_matrix @ item_matrix.T + item_bias``, never holding all scores.

    Parameters
    ----------
    query_matrix : ndarray of shape (q, R), float16, float32 or float64
    item_matrix : ndarray of shape (n_items, R), float16, float32 or float64
        Scores are computed in the common dtype of the two factors (float16
        is widened to float32; float32 factors are scored in float32).
    k : int
        List length, at least 1 (may exceed ``n_items``).
    item_bias : ndarray of shape (n_items,), float, or None
        Added to every query's scores; cast to the factors' dtype.
    live : tuple (published, expires, times) or None
        ``published``, ``expires``: int arrays of shape (n_items,); ``times``:
        int array of shape (q,), all epoch seconds (any int dtype, read as
        int64). Item ``j`` is a candidate of query ``i`` iff
        ``published[j] <= times[i] < expires[j]``. ``times[i] ==``
        :data:`ALWAYS_LIVE` (``np.iinfo(np.int64).min``) switches the rule off
        for query ``i``; ``published[j] = np.iinfo(np.int64).min`` and
        ``expires[j] = np.iinfo(np.int64).max`` make item ``j`` live at every
        real time.
    allowed : scipy sparse matrix of shape (q, n_items), or pair (indptr, indices), or None
        The ONLY items each query may rank: row ``i`` lists them in
        ``indices[indptr[i]:indptr[i + 1]]`` (``indptr`` int of shape (q + 1,),
        ``indices`` int of shape (nnz,), any order, duplicates counted once).
        For a scipy matrix (any format; CSR is used as is) the stored non-zero
        entries mark the items; explicit zeros are ignored. Default: every item.
    excluded : same forms as ``allowed``, or None
        Items each query must never rank (e.g. already consumed).
    n_threads : int or None
        Threads to use, in ``[1, numba.config.NUMBA_NUM_THREADS]``; default
        :func:`numba.get_num_threads`. Restored on return.
    block_queries : int or None
        Queries per block of scores; default: as many as make about 16 MB of
        scores (at least 16).

    Returns
    -------
    indices : ndarray of shape (q, k), int64
        Item indices, best first; equal scores ordered by lower item index
        first; ``-1`` padding at the end of rows with fewer than ``k``
        rankable candidates.
    scores : ndarray of shape (q, k), the factors' dtype (float32 or float64)
        The selected items' scores; ``-inf`` where the index is ``-1``.

    Raises
    ------
    ValueError
        On a parameter outside its range, or arrays of the wrong shape, dtype
        or structure (indices outside ``[0, n_items)``, a bad ``indptr``).

    Notes
    -----
    Definition (slow reference) for one query ``i``, with ``s = Q[i] @ V.T + b``
    and ``valid`` the items that pass the candidate rules and whose score is
    neither ``-inf`` nor NaN::

        sorted(valid, key=lambda j: (-s[j], j))[:k]

    Two paths:

    * Blocks (default): ``Q_blk @ V.T`` by BLAS for a block of queries (about
      16 MB of scores, reused buffer), then the selection of :func:`top_k`
      on every row of the block (chunk maxima, then a heap of size ``k``);
      the bias and the candidate rules are applied inside that selection,
      and the rules only to the scores that would enter the heap. With ``allowed`` lists, only the
      listed columns of a block are read. Each of ``n_threads`` workers takes
      whole blocks (GEMM with BLAS held to one thread, then its own selection),
      so the block is selected while still in that core's cache and the two
      thread pools never oversubscribe the cores. Time
      O(q · n_items · R) for the GEMM plus O(q · n_items) for the pass; memory
      ``n_threads`` blocks beyond the output.
    * Gather: when ``allowed`` lists hold on average fewer than
      ``n_items / 5`` items per query, no GEMM at all: one dot product per live,
      not excluded, listed item, O(nnz · R), rows in parallel.

    Scores of the gather path are summed in a different order than BLAS's and
    can differ from ``Q @ V.T + b`` in the last bits (same dtype).
    BLAS's thread count is changed process-wide for the duration of the call.
    """
    owner = "top_k_product"
    k = _check_int("k", k, owner)
    query = _float_array("query_matrix", query_matrix, 2, owner)
    items = _float_array("item_matrix", item_matrix, 2, owner)
    if query.shape[1] != items.shape[1]:
        raise ValueError(
            f"query_matrix (q, R) and item_matrix (n_items, R) of {owner} must share R, "
            f"got {query.shape} and {items.shape}."
        )
    dtype = np.result_type(query.dtype, items.dtype)
    query = query.astype(dtype, copy=False)
    items = items.astype(dtype, copy=False)
    q, n_items = query.shape[0], items.shape[0]
    max_threads = numba.config.NUMBA_NUM_THREADS
    n_threads = numba.get_num_threads() if n_threads is None else _check_int("n_threads", n_threads, owner, 1, max_threads)
    if block_queries is not None:
        block_queries = _check_int("block_queries", block_queries, owner)
    has_bias = item_bias is not None
    bias = np.zeros(1, dtype)
    if has_bias:
        b = np.asarray(item_bias)
        if b.shape != (n_items,) or b.dtype.kind not in "fiu":
            raise ValueError(f"item_bias of {owner} must be a real array of shape ({n_items},), got {b.dtype} {b.shape}.")
        bias = np.ascontiguousarray(b, dtype=dtype)
    has_live = live is not None
    pub = exp = times = _NO_INT
    if has_live:
        if not isinstance(live, (tuple, list)) or len(live) != 3:
            raise ValueError(f"live of {owner} must be a tuple (published, expires, times), got {type(live).__name__}.")
        pub = _int_array("live[0] (published)", live[0], (n_items,), owner)
        exp = _int_array("live[1] (expires)", live[1], (n_items,), owner)
        times = _int_array("live[2] (times)", live[2], (q,), owner)
        real = times[times != ALWAYS_LIVE]
        if real.size == 0 or (np.all(pub <= real.min()) and np.all(real.max() < exp)):
            has_live = False  # every item is live at every request time: the rule changes nothing, skip its reads
            pub = exp = times = _NO_INT
    has_al = allowed is not None
    al_ptr, al_idx = _csr_rows("allowed", allowed, q, n_items, owner) if has_al else (_NO_INT, _NO_INT32)
    has_ex = excluded is not None
    ex_ptr, ex_idx = _csr_rows("excluded", excluded, q, n_items, owner) if has_ex else (_NO_INT, _NO_INT32)

    out_idx = np.full((q, k), -1, dtype=np.int64)
    out_val = np.full((q, k), -np.inf, dtype=dtype)
    if q == 0 or n_items == 0:
        return out_idx, out_val
    if query.shape[1] == 0:  # R = 0: every score is 0 (+ bias); one zero column gives the same
        query = np.zeros((q, 1), dtype)
        items = np.zeros((n_items, 1), dtype)

    if has_al and al_idx.shape[0] * _GATHER_RATIO < q * n_items:
        with _numba_threads(n_threads):
            _gather_rows(query, items, bias, has_bias, pub, exp, times, has_live,
                         ex_ptr, ex_idx, has_ex, al_ptr, al_idx, out_idx, out_val)
        return out_idx, out_val

    rows = block_queries or max(_MIN_BLOCK, _BLOCK_BYTES // (n_items * dtype.itemsize))
    rows = min(rows, q)
    starts = range(0, q, rows)
    items_t = items.T
    counter = iter(starts)
    lock = threading.Lock()

    def work() -> None:
        buf = np.empty((rows, n_items), dtype=dtype)
        while True:
            with lock:
                start = next(counter, None)
            if start is None:
                return
            stop = min(start + rows, q)
            block = buf[: stop - start]
            np.matmul(query[start:stop], items_t, out=block)
            _select_rows_serial(block, start, bias, has_bias, _NO_MASK, False, pub, exp, times, has_live,
                                ex_ptr, ex_idx, has_ex, al_ptr, al_idx, has_al, out_idx, out_val)

    n_workers = min(n_threads, len(starts))
    with _blas_one_thread():
        if n_workers == 1:
            work()
        else:
            with ThreadPoolExecutor(max_workers=n_workers) as pool:
                for future in [pool.submit(work) for _ in range(n_workers)]:
                    future.result()
    return out_idx, out_val
