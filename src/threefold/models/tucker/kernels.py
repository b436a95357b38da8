"""Compiled kernels of the Tucker models: sparse tensor-times-matrix chains over a fiber tree.

Every kernel walks the stored cells of a :class:`FiberTree`: the cells sorted
lexicographically by a *root* mode followed by the other modes in increasing
size (the largest mode is the leaf level). Cells that share an index prefix form
a node, so work that depends only on a prefix is done once per node instead of
once per cell (the compressed sparse fiber layout of Smith & Karypis, "Tensor-
matrix products with a compressed sparse tensor", IA3 2015, applied to the
Tucker products as in Kaya & Uçar, "High performance parallel algorithms for the
Tucker decomposition of sparse tensors", ICPP 2016).

Two directions of work:

* **bottom-up** (:func:`ttmc`): ``Y[i_root] = sum_e x_e * kron_{levels 1..} F_m[i_m(e)]``,
  the tensor times all factor matrices but the root's. Leaves cost ``R_leaf``
  each, a node at level ``k`` costs ``R_{level k} * prod_{j > k} R_{level j}``.
* **top-down** (:mod:`threefold.models.tucker.rows`): the core contracted with the
  factor rows of a cell's non-root modes, ``v_e = G ×_{m ≠ root} F_m[i_m(e)]``,
  a vector of length ``R_root``; again the prefix contractions are shared.

Column order of ``Y``: C order over the modes ``levels[1:]`` (the first of them
varies slowest). Callers permute the core with ``levels`` to match.

Work is split into chunks of consecutive level-1 nodes and run in parallel over
chunks. A chunk owns the rows strictly between its first and last root; those
two rows go to per-chunk edge buffers that are added serially afterwards, so
no two threads ever write the same row. Memory: the output plus a few small
buffers per chunk, never anything of size nnz × rank.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np
from numba import njit, prange

__all__ = ["FiberTree", "build_fiber_tree", "pack_factors", "ttmc", "ttmc_core", "run_kernel", "chunk_roots", "FAST"]

#: Target number of stored cells per parallel chunk.
CHUNK_CELLS = 32_768
#: Reassociation lets LLVM vectorize the short inner loops; results stay deterministic.
FAST = {"reassoc", "contract"}


@dataclass(frozen=True)
class FiberTree:
    """Stored cells ordered for one root mode.

    Attributes
    ----------
    levels : ndarray of shape (ndim,), int64
        Mode at each tree level; ``levels[0]`` is the root mode, the others in
        increasing size, so the largest mode is the leaf.
    perm : ndarray of shape (nnz,), int32 or int64
        Cell positions in lexicographic order of ``levels``.
    breaks : ndarray of shape (nnz,), int8
        ``breaks[p]`` is the first level at which cell ``perm[p]`` differs from
        cell ``perm[p - 1]`` (0 for a new root; ``breaks[0] = 0``).
    chunks : ndarray of shape (n_chunks + 1,), int64
        Chunk boundaries in ``perm``; each starts a level-1 node.
    """

    levels: np.ndarray
    perm: np.ndarray
    breaks: np.ndarray
    chunks: np.ndarray

    @property
    def root(self) -> int:
        """The root mode."""
        return int(self.levels[0])


def build_fiber_tree(coords: np.ndarray, shape: tuple[int, ...], root: int) -> FiberTree:
    """Sort the stored cells for kernels rooted at mode ``root``.

    Parameters
    ----------
    coords : ndarray of shape (ndim, nnz), int32
    shape : tuple of int
    root : int

    Returns
    -------
    FiberTree
    """
    ndim, nnz = coords.shape
    others = sorted((m for m in range(ndim) if m != root), key=lambda m: (shape[m], m))
    levels = np.array([root] + others, dtype=np.int64)
    index_dtype = np.int32 if nnz < 2**31 - 1 else np.int64
    if np.prod([float(shape[m]) for m in levels]) < 2.0**62:  # one mixed-radix key sorts fastest
        key = np.zeros(nnz, dtype=np.int64)
        for m in levels:
            key *= shape[m]
            key += coords[m]
        perm = np.argsort(key).astype(index_dtype)  # cells are unique, so the order is unique too
        del key
    else:  # np.lexsort sorts by its last key first
        perm = np.lexsort(tuple(coords[m] for m in levels[::-1])).astype(index_dtype)
    breaks = np.full(nnz, ndim - 1, dtype=np.int8)
    for k in range(ndim - 2, -1, -1):
        keys = coords[levels[k]][perm]
        changed = np.flatnonzero(keys[1:] != keys[:-1]) + 1
        breaks[changed] = k
        del keys, changed
    if nnz:
        breaks[0] = 0
    candidates = np.flatnonzero(breaks <= 1)
    n_chunks = max(1, min(nnz // CHUNK_CELLS, 64 * numba.get_num_threads()))
    targets = np.linspace(0, nnz, n_chunks + 1)[:-1]
    starts = np.unique(candidates[np.minimum(np.searchsorted(candidates, targets), candidates.size - 1)]) if nnz else np.zeros(0, np.int64)
    chunks = np.append(starts, nnz).astype(np.int64)
    return FiberTree(levels=levels, perm=perm, breaks=breaks, chunks=chunks)


def pack_factors(tree: FiberTree, factors, dtype) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Concatenate factor matrices into one flat array for the kernels, with the tree's level widths.

    Returns
    -------
    flat : ndarray of shape (sum_n I_n * R_n,), dtype
        Row ``i`` of factor ``m`` is ``flat[offsets[m] + i * ranks[m]:][:ranks[m]]``.
    offsets : ndarray of shape (ndim,), int64
    ranks : ndarray of shape (ndim,), int64
    sizes : ndarray of shape (ndim,), int64
        ``sizes[k] = Π_{j > k} ranks[levels[j]]`` (see :func:`level_sizes`).
    """
    ranks = np.array([f.shape[1] for f in factors], dtype=np.int64)
    counts = np.array([f.size for f in factors], dtype=np.int64)
    offsets = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)
    flat = np.concatenate([np.ascontiguousarray(f, dtype=dtype).ravel() for f in factors])
    return flat, offsets, ranks, level_sizes(tree.levels, ranks)


def level_sizes(levels: np.ndarray, ranks: np.ndarray) -> np.ndarray:
    """``L[k] = prod_{j > k} ranks[levels[j]]`` for k = 0..ndim-1."""
    sizes = np.ones(levels.shape[0], dtype=np.int64)
    for k in range(levels.shape[0] - 2, -1, -1):
        sizes[k] = sizes[k + 1] * ranks[levels[k + 1]]
    return sizes


# ---------------------------------------------------------------------- bottom-up
@njit(cache=True, fastmath=FAST)
def _close_level(k, cell, coords, levels, flat, offsets, ranks, sizes, buf, boff):
    """Fold the open node at level k into its parent: parent += F_m[i] ⊗ child."""
    m = levels[k]
    rm = ranks[m]
    row = flat[offsets[m] + coords[m, cell] * rm:][:rm]
    width = sizes[k]
    child = buf[boff[k]:boff[k] + width]
    parent = buf[boff[k - 1]:boff[k - 1] + rm * width]
    for r in range(rm):
        f = row[r]
        o = r * width
        for j in range(width):
            parent[o + j] += f * child[j]
    child[:] = 0.0


@njit(cache=True)
def chunk_roots(ch, chunks, coords, root, perm, edge_rows):
    """Cell range of chunk ``ch`` and its first and last root rows (recorded in ``edge_rows``)."""
    start = chunks[ch]
    stop = chunks[ch + 1]
    first = coords[root, perm[start]]
    last = coords[root, perm[stop - 1]]
    edge_rows[ch, 0] = first
    edge_rows[ch, 1] = last
    return start, stop, first, last


@njit(cache=True, fastmath=FAST)
def _flush_root(row, first, last, ch, buf, width, out, edge, contract, flat, offsets, ranks, root, core_out):
    top = buf[:width]
    if contract:  # core_out[ch] += F_root[row] ⊗ top: the root row's share of F_rootᵀ Y
        rr = ranks[root]
        frow = flat[offsets[root] + row * rr:][:rr]
        for a in range(rr):
            target = core_out[ch, a]
            f = frow[a]
            for j in range(width):
                target[j] += f * top[j]
    elif row == first:
        target = edge[ch, 0]
        for j in range(width):
            target[j] += top[j]
    elif row == last:
        target = edge[ch, 1]
        for j in range(width):
            target[j] += top[j]
    else:
        out[row, :] = top
    top[:] = 0.0


@njit(parallel=True, cache=True, fastmath=FAST)
def _ttmc_kernel(coords, values, perm, breaks, levels, flat, offsets, ranks, sizes, chunks, out, edge, edge_rows,
                 contract, core_out):
    ndim = levels.shape[0]
    boff = np.zeros(ndim, dtype=np.int64)
    total = 0
    for k in range(ndim - 1):
        boff[k] = total
        total += sizes[k]
    root = levels[0]
    leaf = levels[ndim - 1]
    r_leaf = ranks[leaf]
    width = sizes[0]
    for ch in prange(chunks.shape[0] - 1):
        start, stop, first, last = chunk_roots(ch, chunks, coords, root, perm, edge_rows)
        buf = np.zeros(total, dtype=out.dtype)
        row = first
        prev = perm[start]
        for p in range(start, stop):
            cell = perm[p]
            if p > start:
                b = breaks[p]
                low = b if b > 1 else 1
                for k in range(ndim - 2, low - 1, -1):
                    _close_level(k, prev, coords, levels, flat, offsets, ranks, sizes, buf, boff)
                if b == 0:
                    _flush_root(row, first, last, ch, buf, width, out, edge, contract, flat, offsets, ranks, root,
                                core_out)
                    row = coords[root, cell]
            x = values[cell]
            frow = flat[offsets[leaf] + coords[leaf, cell] * r_leaf:][:r_leaf]
            acc = buf[boff[ndim - 2]:boff[ndim - 2] + r_leaf]
            for r in range(r_leaf):
                acc[r] += x * frow[r]
            prev = cell
        for k in range(ndim - 2, 0, -1):
            _close_level(k, prev, coords, levels, flat, offsets, ranks, sizes, buf, boff)
        _flush_root(row, first, last, ch, buf, width, out, edge, contract, flat, offsets, ranks, root, core_out)


def ttmc(tree: FiberTree, coords: np.ndarray, values: np.ndarray, factors, n_rows: int) -> np.ndarray:
    """Tensor times all factor matrices but the root's, from the stored cells.

    ``Y[i, :] = sum over stored cells e in root row i of values[e] * kron_{m in levels[1:]} F_m[i_m(e), :]``.
    Slow reference (the same result, cost nnz · prod R): ``for e: Y[i_root(e)] += x_e *
    functools.reduce(np.kron, [F_m[i_m(e)] for m in levels[1:]])``.

    Parameters
    ----------
    tree : FiberTree
    coords : ndarray of shape (ndim, nnz), int32
    values : ndarray of shape (nnz,), float32 or float64
    factors : sequence of ndarray of shape (I_m, R_m)
        The root's entry is ignored (only its row count ``n_rows`` matters).
    n_rows : int
        Size of the root mode.

    Returns
    -------
    ndarray of shape (n_rows, prod_{m != root} R_m), dtype of ``values``
        Columns in C order over ``levels[1:]``.
    """
    dtype = values.dtype
    flat, offsets, ranks, sizes = pack_factors(tree, factors, dtype)
    out = np.zeros((n_rows, int(sizes[0])), dtype=dtype)
    n_chunks = tree.chunks.shape[0] - 1
    if n_chunks == 0:
        return out
    edge = np.zeros((n_chunks, 2, int(sizes[0])), dtype=dtype)
    edge_rows = np.zeros((n_chunks, 2), dtype=np.int64)
    run_kernel(_ttmc_kernel, tree, coords, values, tree.perm, tree.breaks, tree.levels, flat, offsets, ranks, sizes,
               tree.chunks, out, edge, edge_rows, False, np.zeros((1, 1, 1), dtype=dtype))
    np.add.at(out, edge_rows[:, 0], edge[:, 0])
    np.add.at(out, edge_rows[:, 1], edge[:, 1])
    return out


def ttmc_core(tree: FiberTree, coords: np.ndarray, values: np.ndarray, factors) -> np.ndarray:
    """The tensor times every factor matrix, transposed: ``F_rootᵀ Y`` without forming ``Y``.

    Equals ``factors[root].T @ ttmc(...)``: each root row's ``Y`` row is folded
    into the result as soon as it is complete, so memory is one
    ``R_root × Π_{m≠root} R_m`` block per chunk instead of ``I_root`` rows.

    Returns
    -------
    ndarray of shape (R_root, prod_{m != root} R_m), dtype of ``values``
        Columns in C order over ``levels[1:]``.
    """
    dtype = values.dtype
    flat, offsets, ranks, sizes = pack_factors(tree, factors, dtype)
    r_root = int(ranks[tree.root])
    n_chunks = tree.chunks.shape[0] - 1
    core_out = np.zeros((max(n_chunks, 1), r_root, int(sizes[0])), dtype=dtype)
    if n_chunks:
        run_kernel(_ttmc_kernel, tree, coords, values, tree.perm, tree.breaks, tree.levels, flat, offsets, ranks,
                   sizes, tree.chunks, np.zeros((1, 1), dtype=dtype), np.zeros((1, 2, 1), dtype=dtype),
                   np.zeros((n_chunks, 2), dtype=np.int64), True, core_out)
    return core_out.sum(axis=0)


def run_kernel(kernel, tree: FiberTree, *args) -> None:
    """Run a parallel kernel; a single chunk runs on the calling thread (no pool wake-up)."""
    if tree.chunks.shape[0] > 2:
        kernel(*args)
        return
    previous = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        kernel(*args)
    finally:
        numba.set_num_threads(previous)
