"""Alternating least squares on the implicit all-cells loss, linear in the stored cells.

The loss of a CP model (any structure) on a :class:`~threefold.core.tensor.SparseTensor`::

    L = Σ_all cells w·(p − x̂)²  +  reg · Σ_n ‖F_n[:, A_n]‖²

with ``w = w0`` and ``p = 0`` on every cell not stored and ``A_n`` the columns
mode ``n`` owns (the other columns are the constant 1). One *mode update*
replaces every row of one mode by the minimizer of ``L`` with the other modes
fixed — exactly (Cholesky) or by a few warm-started CG steps — using the iTALS
decomposition of the all-cells sums (Hidasi & Tikk, ECML-PKDD 2012;
arXiv:1309.7611): ``w0`` times the Hadamard product of the other modes' Gram
matrices, plus corrections at stored cells only. See :mod:`threefold.models.cp.kernels`.

This module holds the state of one fit (:class:`Problem`) and the pure steps on
it; :mod:`threefold.models.cp.model` drives the sweeps.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numba
import numpy as np

from threefold.models.cp import kernels
from threefold.core.tensor import SparseTensor

__all__ = ["Problem", "make_problem", "update_mode", "row_system_terms", "row_systems", "cell_blocks", "loss_and_fit",
           "BLOCK_CELLS", "BUFFER_CELLS"]

#: A mode whose rows hold at least this many cells on average is updated by
#: blocked matrix products (:func:`threefold.models.cp.kernels.block_systems`); blocks
#: hold at most this many cells.
BLOCK_CELLS = 8192
#: Cells a row-parallel update gathers at once (and keeps between CG steps).
BUFFER_CELLS = 2048


@dataclass
class ModeCells:
    """A mode's stored cells grouped by row, with the other modes' global rows.

    Attributes
    ----------
    indptr : ndarray of shape (I_n + 1,), int64
    other : ndarray of shape (ndim - 1, nnz), int32
        Stacked-factor row of each other mode, per cell (grouped order).
    c : ndarray of shape (nnz,), float dtype
        ``w − w0`` per cell.
    wp : ndarray of shape (nnz,), float dtype
        ``w·p`` per cell.
    chunk_bounds : ndarray of shape (n_chunks + 1,), int64
        Row ranges of roughly equal cost, for the row-parallel kernel.
    blocks : tuple of three ndarray, or None
        ``(starts, stops, rows)`` of the cell blocks when the mode is updated by
        blocked matrix products, else None.
    """

    indptr: np.ndarray
    other: np.ndarray
    c: np.ndarray
    wp: np.ndarray
    chunk_bounds: np.ndarray
    blocks: tuple[np.ndarray, np.ndarray, np.ndarray] | None


@dataclass
class Problem:
    """State of one fit: stacked factors, structure mask, weights and cell layouts.

    Attributes
    ----------
    F : ndarray of shape (sum(shape), R), float32 or float64
        Stacked factors; mode ``n`` is ``F[offsets[n]:offsets[n + 1]]``.
    offsets : ndarray of shape (ndim + 1,), int64
    active : ndarray of shape (ndim, R), bool
        Columns each mode owns; the others hold the constant 1.
    w0, reg : float
    coords : ndarray of shape (ndim, nnz), int32
    p, w : ndarray of shape (nnz,)
        Preference and confidence of the stored cells.
    cells : list of ModeCells or None
        One layout per mode that is updated.
    grams : list of ndarray of shape (R, R), float64
        ``F_nᵀ F_n`` of every mode, kept current by :func:`update_mode`.
    sum_p2, sum_wp2 : float
        ``Σ p²`` and ``Σ w p²`` over stored cells.
    """

    F: np.ndarray
    offsets: np.ndarray
    active: np.ndarray
    w0: float
    reg: float
    coords: np.ndarray
    p: np.ndarray
    w: np.ndarray
    cells: list
    grams: list = field(default_factory=list)
    sum_p2: float = 0.0
    sum_wp2: float = 0.0

    def factor(self, n: int) -> np.ndarray:
        """View of mode ``n``'s factor, shape (I_n, R)."""
        return self.F[self.offsets[n] : self.offsets[n + 1]]


def make_problem(
    tensor: SparseTensor,
    factors: list[np.ndarray],
    active: np.ndarray,
    *,
    reg: float,
    update_modes: tuple[int, ...],
    block_cells: int = BLOCK_CELLS,
) -> Problem:
    """Stack the factors and lay out the cells of every mode that will be updated.

    Parameters
    ----------
    tensor : SparseTensor
    factors : list of ndarray of shape (I_n, R)
        Initial factors in the fit dtype; columns outside ``active`` are set to 1.
    active : ndarray of shape (ndim, R), bool
    reg : float
    update_modes : tuple of int
        Modes that will be updated (their cells are laid out).
    block_cells : int
        Threshold and block size of the blocked update (see :data:`BLOCK_CELLS`).
    """
    dtype = factors[0].dtype
    sizes = [f.shape[0] for f in factors]
    offsets = np.zeros(len(sizes) + 1, dtype=np.int64)
    np.cumsum(sizes, out=offsets[1:])
    F = np.ascontiguousarray(np.concatenate(factors, axis=0), dtype=dtype)
    for n in range(len(sizes)):
        F[offsets[n] : offsets[n + 1], ~active[n]] = 1.0
    p, w = (np.ascontiguousarray(a, dtype=dtype) for a in tensor.weights())
    cells = [None] * tensor.ndim
    for n in update_modes:
        cells[n] = _mode_cells(tensor, n, offsets, p, w, int(active[n].sum()), block_cells)
    problem = Problem(
        F=F, offsets=offsets, active=active, w0=float(tensor.w0), reg=float(reg),
        coords=tensor.coords, p=p, w=w, cells=cells,
        sum_p2=float(np.dot(p.astype(np.float64), p)),
        sum_wp2=float(np.dot(w.astype(np.float64) * p, p)),
    )
    problem.grams = [_gram(problem.factor(n)) for n in range(tensor.ndim)]
    return problem


def _gram(factor: np.ndarray) -> np.ndarray:
    f = factor.astype(np.float64, copy=False)
    return f.T @ f


def _mode_cells(
    tensor: SparseTensor, n: int, offsets: np.ndarray, p: np.ndarray, w: np.ndarray, k: int, block_cells: int
) -> ModeCells:
    order, indptr = tensor.mode_order(n)
    others = [m for m in range(tensor.ndim) if m != n]
    other = np.empty((len(others), tensor.nnz), dtype=np.int32)
    for j, m in enumerate(others):
        np.add(tensor.coords[m][order], offsets[m], out=other[j], casting="unsafe")
    w_sorted = w[order]
    c = w_sorted - np.asarray(tensor.w0, dtype=w.dtype)
    wp = w_sorted * p[order]
    counts = np.diff(indptr)
    blocks = None
    if counts.size and counts.mean() >= block_cells:
        blocks = cell_blocks(indptr, block_cells)
    n_chunks = min(counts.size, 16 * numba.get_num_threads())
    cost = np.cumsum(counts + k, dtype=np.float64)
    cuts = np.searchsorted(cost, np.linspace(0.0, cost[-1], n_chunks + 1)[1:-1], side="right")
    chunk_bounds = np.unique(np.concatenate(([0], cuts, [counts.size]))).astype(np.int64)
    return ModeCells(indptr=indptr, other=other, c=c, wp=wp, chunk_bounds=chunk_bounds, blocks=blocks)


def cell_blocks(indptr: np.ndarray, block_cells: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cut every row's cell range into blocks of at most ``block_cells`` cells."""
    counts = np.diff(indptr)
    per_row = -(-counts // block_cells)
    rows = np.repeat(np.arange(counts.size, dtype=np.int64), per_row)
    first = np.repeat(np.cumsum(per_row) - per_row, per_row)
    starts = indptr[rows] + (np.arange(rows.size) - first) * block_cells
    stops = np.minimum(starts + block_cells, indptr[rows + 1])
    return starts.astype(np.int64), stops.astype(np.int64), rows


def row_system_terms(problem: Problem, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The all-cells parts of mode ``n``'s row systems.

    Returns
    -------
    active, inactive : ndarray of int64
        Columns mode ``n`` owns, and its columns fixed at 1.
    base : ndarray of shape (k, k), float64
        ``w0·H[A, A] + reg·I`` with ``H`` the Hadamard product of the other
        modes' Gram matrices (``H = Σ v vᵀ`` over every cell of a slice).
    rhs0 : ndarray of shape (k,), float64
        ``−w0·H[A, Ā]·1``: the fixed columns' predictions moved to the right side.
    """
    hadamard = np.ones_like(problem.grams[0])
    for m, gram in enumerate(problem.grams):
        if m != n:
            hadamard *= gram
    active = np.flatnonzero(problem.active[n]).astype(np.int64)
    inactive = np.flatnonzero(~problem.active[n]).astype(np.int64)
    base = problem.w0 * hadamard[np.ix_(active, active)] + problem.reg * np.eye(active.size)
    rhs0 = -problem.w0 * hadamard[np.ix_(active, inactive)].sum(axis=1)
    return active, inactive, base, rhs0


def row_systems(problem: Problem, n: int, blocks: tuple[np.ndarray, np.ndarray, np.ndarray], n_rows: int,
                active: np.ndarray, inactive: np.ndarray, base: np.ndarray, rhs0: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    """The full row systems ``M_i x_i = b_i`` of mode ``n`` (the rows of ``blocks``), formed explicitly.

    ``M_i = base + Σ_e c_e v_e v_eᵀ`` and ``b_i = rhs0 + Σ_e (wp_e − c_e off_e) v_e``
    over row ``i``'s stored cells (the normal equations of the implicit loss
    with every other factor fixed; Hu, Koren & Volinsky, ICDM 2008). Used by
    the blocked update and by fold-ins that need the matrices themselves
    (a prior mean, a posterior covariance).

    Parameters
    ----------
    problem : Problem
    n : int
    blocks : (starts, stops, block_rows)
        Cell blocks of mode ``n`` (:func:`cell_blocks`), ``block_rows`` counted from 0.
    n_rows : int
    active, inactive, base, rhs0
        From :func:`row_system_terms`.

    Returns
    -------
    systems : ndarray of shape (n_rows, k, k), float64
    rights : ndarray of shape (n_rows, k), float64
    """
    starts, stops, block_rows = blocks
    grams = np.empty((starts.size, active.size, active.size))
    rhs = np.empty((starts.size, active.size))
    cells = problem.cells[n]
    kernels.block_systems(problem.F, cells.other, cells.c, cells.wp, starts, stops, active, inactive, grams, rhs)
    systems = np.broadcast_to(base, (n_rows,) + base.shape).copy()
    rights = np.broadcast_to(rhs0, (n_rows, rhs0.size)).copy()
    np.add.at(systems, block_rows, grams)
    np.add.at(rights, block_rows, rhs)
    return systems, rights


def update_mode(problem: Problem, n: int, cg_steps: int = 0) -> None:
    """Replace every row of mode ``n`` (in place) by its row-system solution.

    Parameters
    ----------
    problem : Problem
    n : int
        Mode to update; its cells must be laid out.
    cg_steps : int, default=0
        0 for exact solves; otherwise warm-started CG steps per row. Modes
        updated by blocked products are always solved exactly (their few
        ``k × k`` systems cost nothing next to accumulating them).
    """
    cells = problem.cells[n]
    active, inactive, base, rhs0 = row_system_terms(problem, n)
    if active.size == 0:
        return
    if cells.blocks is None:
        kernels.solve_rows(
            problem.F, problem.offsets[n], cells.indptr, cells.other, cells.c, cells.wp,
            active, inactive, base, rhs0, cells.chunk_bounds, int(cg_steps), BUFFER_CELLS,
        )
    else:
        rows = np.arange(cells.indptr.size - 1, dtype=np.int64)
        systems, rights = row_systems(problem, n, cells.blocks, rows.size, active, inactive, base, rhs0)
        kernels.solve_systems(systems, rights, problem.F, problem.offsets[n] + rows, active)
    problem.grams[n] = _gram(problem.factor(n))


def loss_and_fit(problem: Problem) -> tuple[float, float]:
    """Loss over all cells and the weighted relative fit, from stored cells and Grams.

    ``Σ_all w (p − x̂)² = w0·(Σ p² − 2 Σ p x̂ + 1ᵀ(⊛_n F_nᵀF_n)1) + Σ_stored (w − w0)(p − x̂)²``;
    the fit is ``1 − sqrt(that / Σ_stored w p²)``, which with ``w ≡ 1`` is the usual
    ``1 − ‖X − X̂‖ / ‖X‖`` (tensorly's fit).

    Returns
    -------
    loss : float
        Including ``reg · Σ_n ‖F_n[:, A_n]‖²``.
    fit : float
        NaN when no stored cell has positive ``w·p``.
    """
    n_chunks = max(1, min(problem.p.size // 4096, 256))  # fixed by nnz: sums never depend on threads
    sums = kernels.stored_sums(problem.F, problem.coords, problem.offsets, problem.p, problem.w, problem.w0, n_chunks)
    s_px, s_err = sums.sum(axis=0)
    all_cells = np.ones_like(problem.grams[0])
    for gram in problem.grams:
        all_cells *= gram
    data = problem.w0 * (problem.sum_p2 - 2.0 * s_px + all_cells.sum()) + s_err
    penalty = sum(float(np.diag(g)[problem.active[n]].sum()) for n, g in enumerate(problem.grams))
    loss = data + problem.reg * penalty
    fit = 1.0 - np.sqrt(max(data, 0.0) / problem.sum_wp2) if problem.sum_wp2 > 0 else float("nan")
    return float(loss), float(fit)
