"""Top-down Tucker kernels: the core contracted with each stored cell's factor rows.

For a fiber tree rooted at mode ``n`` (:mod:`threefold.models.tucker.kernels`), every
stored cell ``e`` needs ``v_e = G ×_{m≠n} F_m[i_m(e)]`` (length ``R_n``). Going
down the tree level by level, ``H_k = H_{k-1} ×_{level k} F[i]`` depends only on
the indices of levels ``1..k`` (not on the root row), so

* it is computed once per tree node, not once per cell, and
* for the first levels, whose modes are small (context modes come first in the
  tree), it is computed once for *every* index combination up front: a prefix
  table of at most :data:`TABLE_COMBOS` rows, each ``H_k`` for one combination.
  A 100,000-user tree with 6 dayparts and 4 devices then does 24 small core
  contractions per call instead of one per (user, device, daypart) node.

Two kernels use this walk: :func:`evaluate` (model values at the stored cells)
and :func:`implicit_rows` (the weighted row systems of implicit Tucker, solved in
place). Per cell the work is ``R_n · R_leaf`` for the last contraction (plus
``R_n²`` for a row system); per node below the table ``R_n · Π`` of the ranks
under it.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from threefold.models.tucker.kernels import FAST, FiberTree, chunk_roots, pack_factors, run_kernel

__all__ = ["prefix_table", "evaluate", "implicit_rows", "TABLE_COMBOS"]

#: Largest number of index combinations of the first tree levels tabulated up front.
TABLE_COMBOS = 4096


def prefix_table(tree: FiberTree, shape: tuple[int, ...], core: np.ndarray, factors) -> tuple[np.ndarray, np.ndarray]:
    """``H_k`` for every index combination of tree levels ``1..k`` (``k`` as large as the budget allows).

    Returns
    -------
    table : ndarray of shape (n_combinations, R_root · L_k), float64
        Row ``c`` is ``core ×_{levels 1..k} F[i]`` for the combination ``c`` (C
        order over the levels, the first slowest), laid out as ``(R_root, L_k)``
        with ``L_k = Π_{j > k} R_{levels[j]}``. With ``k = 0`` the single row is
        the core itself.
    table_sizes : ndarray of shape (k,), int64
        Mode sizes of levels ``1..k``.
    """
    levels = tree.levels
    ndim = levels.shape[0]
    depth, combos = 0, 1
    while depth + 1 <= ndim - 2 and combos * shape[levels[depth + 1]] <= TABLE_COMBOS:
        depth += 1
        combos *= shape[levels[depth]]
    r_root = core.shape[levels[0]]
    table = np.transpose(np.asarray(core, dtype=np.float64), levels)[None]  # (combos, R_root, R_l1, ...)
    for j in range(1, depth + 1):
        factor = np.asarray(factors[levels[j]], dtype=np.float64)
        rest = table.shape[3:]
        table = np.einsum("car...,ir->cia...", table, factor).reshape((-1, r_root) + rest)
    sizes = np.array([shape[levels[j]] for j in range(1, depth + 1)], dtype=np.int64)
    return np.ascontiguousarray(table.reshape(table.shape[0], -1)), sizes


@njit(cache=True)
def _combination(cell, coords, levels, table_sizes):
    c = 0
    for j in range(table_sizes.shape[0]):
        c = c * table_sizes[j] + coords[levels[j + 1], cell]
    return c


@njit(cache=True, fastmath=FAST)
def _descend(low, cell, coords, levels, flat, offsets, ranks, sizes, hbuf, hoff, r_root):
    """Recompute H_k = H_{k-1} ×_{level k} F[i] for levels low..ndim-2."""
    ndim = levels.shape[0]
    for k in range(low, ndim - 1):
        m = levels[k]
        rm = ranks[m]
        row = flat[offsets[m] + coords[m, cell] * rm:][:rm]
        width = sizes[k]
        parent_width = sizes[k - 1]
        for a in range(r_root):
            dst = hbuf[hoff[k] + a * width:][:width]
            dst[:] = 0.0
            for r in range(rm):
                f = row[r]
                src = hbuf[hoff[k - 1] + a * parent_width + r * width:][:width]
                for j in range(width):
                    dst[j] += f * src[j]


@njit(cache=True, fastmath=FAST)
def _leaf_vector(cell, coords, levels, flat, offsets, ranks, hbuf, hoff, r_root, v):
    """v = H_{ndim-2} · F_leaf[i_leaf] (length r_root)."""
    ndim = levels.shape[0]
    leaf = levels[ndim - 1]
    r_leaf = ranks[leaf]
    frow = flat[offsets[leaf] + coords[leaf, cell] * r_leaf:][:r_leaf]
    for a in range(r_root):
        h = hbuf[hoff[ndim - 2] + a * r_leaf:][:r_leaf]
        s = 0.0
        for r in range(r_leaf):
            s += h[r] * frow[r]
        v[a] = s


@njit(cache=True)
def _hbuf_layout(levels, sizes, r_root, depth):
    """Offsets of H_depth .. H_{ndim-2} (each r_root × L_k) in one buffer, and its length."""
    ndim = levels.shape[0]
    hoff = np.zeros(ndim, dtype=np.int64)
    total = 0
    for k in range(depth, ndim - 1):
        hoff[k] = total
        total += r_root * sizes[k]
    return hoff, total


@njit(parallel=True, cache=True, fastmath=FAST)
def _evaluate_kernel(coords, perm, breaks, levels, flat, offsets, ranks, sizes, chunks, table, table_sizes, out):
    root = levels[0]
    r_root = ranks[root]
    depth = table_sizes.shape[0]
    width = sizes[depth]
    hoff, total = _hbuf_layout(levels, sizes, 1, depth)  # the root row is contracted into H_depth
    for ch in prange(chunks.shape[0] - 1):
        start = chunks[ch]
        stop = chunks[ch + 1]
        hbuf = np.zeros(total, dtype=table.dtype)
        top = hbuf[:width]
        v = np.zeros(1, dtype=table.dtype)
        for p in range(start, stop):
            cell = perm[p]
            b = breaks[p] if p > start else 0
            if b <= depth:
                f = flat[offsets[root] + coords[root, cell] * r_root:][:r_root]
                entry = table[_combination(cell, coords, levels, table_sizes)]
                top[:] = 0.0
                for a in range(r_root):
                    g = entry[a * width:][:width]
                    for j in range(width):
                        top[j] += f[a] * g[j]
            _descend(max(b, depth + 1), cell, coords, levels, flat, offsets, ranks, sizes, hbuf, hoff, 1)
            _leaf_vector(cell, coords, levels, flat, offsets, ranks, hbuf, hoff, 1, v)
            out[cell] = v[0]


def evaluate(tree: FiberTree, coords: np.ndarray, core: np.ndarray, factors, shape: tuple[int, ...]) -> np.ndarray:
    """Model values ``x̂_e = G ×_1 F_1[i_1(e)] ... ×_N F_N[i_N(e)]`` at every stored cell.

    Parameters
    ----------
    tree : FiberTree
    coords : ndarray of shape (ndim, nnz), int32
    core : ndarray of shape (R_1, ..., R_N)
    factors : sequence of ndarray of shape (I_n, R_n)
    shape : tuple of int
        Mode sizes (the table needs the sizes of the first tree levels).

    Returns
    -------
    ndarray of shape (nnz,), float64
    """
    flat, offsets, ranks, sizes = pack_factors(tree, factors, np.float64)
    table, table_sizes = prefix_table(tree, shape, core, factors)
    out = np.zeros(coords.shape[1])
    run_kernel(_evaluate_kernel, tree, coords, tree.perm, tree.breaks, tree.levels, flat, offsets, ranks, sizes,
               tree.chunks, table, table_sizes, out)
    return out


@njit(cache=True)
def _finish_row(row, first, last, ch, a_acc, b_acc, base_matrix, out, edge_a, edge_b):
    r_root = b_acc.shape[0]
    for a in range(r_root):
        for d in range(a):
            a_acc[d, a] = a_acc[a, d]
    if row == first or row == last:
        slot = 0 if row == first else 1
        for a in range(r_root):
            edge_b[ch, slot, a] += b_acc[a]
            for c in range(r_root):
                edge_a[ch, slot, a, c] += a_acc[a, c]
    else:
        out[row, :] = np.linalg.solve(base_matrix + a_acc, b_acc)
    a_acc[:, :] = 0.0
    b_acc[:] = 0.0


@njit(parallel=True, cache=True, fastmath=FAST)
def _rows_kernel(coords, preference, confidence, w0, perm, breaks, levels, flat, offsets, ranks, sizes, chunks,
                 table, table_sizes, base_matrix, out, edge_a, edge_b, edge_rows):
    root = levels[0]
    r_root = ranks[root]
    depth = table_sizes.shape[0]
    hoff, total = _hbuf_layout(levels, sizes, r_root, depth)
    for ch in prange(chunks.shape[0] - 1):
        start, stop, first, last = chunk_roots(ch, chunks, coords, root, perm, edge_rows)
        hbuf = np.zeros(total, dtype=table.dtype)
        top = hbuf[:table.shape[1]]
        v = np.zeros(r_root, dtype=table.dtype)
        a_acc = np.zeros((r_root, r_root), dtype=base_matrix.dtype)
        b_acc = np.zeros(r_root, dtype=base_matrix.dtype)
        row = first
        for p in range(start, stop):
            cell = perm[p]
            b = breaks[p] if p > start else 0
            if b == 0 and p > start:
                _finish_row(row, first, last, ch, a_acc, b_acc, base_matrix, out, edge_a, edge_b)
                row = coords[root, cell]
            if b <= depth:
                top[:] = table[_combination(cell, coords, levels, table_sizes)]
            _descend(max(b, depth + 1), cell, coords, levels, flat, offsets, ranks, sizes, hbuf, hoff, r_root)
            _leaf_vector(cell, coords, levels, flat, offsets, ranks, hbuf, hoff, r_root, v)
            w = confidence[cell]
            c = w - w0
            wp = w * preference[cell]
            for a in range(r_root):
                b_acc[a] += wp * v[a]
                cv = c * v[a]
                for d in range(a + 1):
                    a_acc[a, d] += cv * v[d]
        _finish_row(row, first, last, ch, a_acc, b_acc, base_matrix, out, edge_a, edge_b)


def implicit_rows(tree: FiberTree, coords: np.ndarray, preference: np.ndarray, confidence: np.ndarray, w0: float,
                  core: np.ndarray, factors, base_matrix: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    """Solve the weighted row systems of the root mode, every other block fixed.

    For root row ``i``: ``(base_matrix + Σ_e (w_e − w0) v_e v_eᵀ) u_i = Σ_e w_e p_e v_e``
    over its stored cells ``e``, with ``v_e = G ×_{m ≠ root} F_m[i_m(e)]``. Rows
    without stored cells get ``base_matrix⁻¹ · 0 = 0``.

    Parameters
    ----------
    tree : FiberTree
    coords : ndarray of shape (ndim, nnz), int32
    preference, confidence : ndarray of shape (nnz,), float64
    w0 : float
    core : ndarray of shape (R_1, ..., R_N)
    factors : sequence of ndarray of shape (I_n, R_n); the root's entry is unused
    base_matrix : ndarray of shape (R_root, R_root), float64
        The all-cells part plus regularization, ``w0 · G_(n) (⊗ F_mᵀF_m) G_(n)ᵀ + reg·I``.
    shape : tuple of int
        Mode sizes; ``shape[root]`` rows are solved.

    Returns
    -------
    ndarray of shape (shape[root], R_root), float64
    """
    root = tree.root
    r_root = core.shape[root]
    flat, offsets, ranks, sizes = pack_factors(tree, factors, np.float64)
    table, table_sizes = prefix_table(tree, shape, core, factors)
    base_matrix = np.ascontiguousarray(base_matrix, dtype=np.float64)
    out = np.zeros((shape[root], r_root))
    n_chunks = tree.chunks.shape[0] - 1
    if n_chunks == 0:
        return out
    edge_a = np.zeros((n_chunks, 2, r_root, r_root))
    edge_b = np.zeros((n_chunks, 2, r_root))
    edge_rows = np.zeros((n_chunks, 2), dtype=np.int64)
    run_kernel(_rows_kernel, tree, coords, preference, confidence, float(w0), tree.perm, tree.breaks, tree.levels,
               flat, offsets, ranks, sizes, tree.chunks, table, table_sizes, base_matrix, out, edge_a, edge_b,
               edge_rows)
    rows, inverse = np.unique(edge_rows.ravel(), return_inverse=True)
    acc_a = np.zeros((rows.size, r_root, r_root))
    acc_b = np.zeros((rows.size, r_root))
    np.add.at(acc_a, inverse, edge_a.reshape(-1, r_root, r_root))
    np.add.at(acc_b, inverse, edge_b.reshape(-1, r_root))
    out[rows] = np.linalg.solve(base_matrix[None] + acc_a, acc_b[..., None])[..., 0]
    return out
