"""Tucker models of sparse context tensors: the shared result, scoring and core diagnostics.

A Tucker model approximates the user × item × context tensor as
``X̂ = G ×_1 F_1 ×_2 F_2 ... ×_N F_N`` (Tucker, Psychometrika 31, 1966; Kolda &
Bader, SIAM Review 51(3), 2009, section 4): one factor matrix ``F_n`` of shape
``(I_n, R_n)`` per mode and a core ``G`` of shape ``(R_1, ..., R_N)`` in which any
user group can meet any item group under any context level. Context-aware
recommendation with Tucker models: Karatzoglou, Amatriain, Baltrunas & Oliver,
"Multiverse recommendation", RecSys 2010.

Two fits share the :class:`TuckerResult` of this module:
:func:`threefold.hooi.hooi` (orthonormal factors, unweighted least squares on the
zero-filled preference tensor) and :func:`threefold.implicit_tucker.implicit_tucker`
(confidence-weighted least squares over all cells). ``docs/tucker.md`` explains
how to read the core.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple, Sequence

import numpy as np
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg

from threefold._checks import check_int
from threefold.scoring import Scorer, ScoreTerms, check_queries

__all__ = [
    "SweepStats",
    "TuckerResult",
    "TuckerScorer",
    "core_contributions",
    "core_slice",
    "check_tucker_rank",
    "leading_left_vectors",
    "hosvd_factors",
]

#: Modes whose unfolding has at most this many rows or columns use the small Gram matrix.
SMALL_GRAM = 512


class SweepStats(NamedTuple):
    """Figures of one sweep.

    Attributes
    ----------
    sweep : int
        1-based sweep number.
    loss : float
        The objective after the sweep: ``‖X − X̂‖²`` for HOOI, the weighted
        regularized loss for implicit Tucker.
    fit : float
        ``1 − ‖X − X̂‖ / ‖X‖`` (HOOI) or its weighted analogue (implicit Tucker).
    seconds : float
        Wall time of the sweep.
    """

    sweep: int
    loss: float
    fit: float
    seconds: float


@dataclass(frozen=True, eq=False)
class TuckerResult:
    """A fitted Tucker model: core, factors and the per-sweep history.

    Unpacks like a tuple: ``core, factors = result``.

    Parameters
    ----------
    core : ndarray of shape (R_1, ..., R_N), float32 or float64
    factors : tuple of ndarray of shape (I_n, R_n), same dtype as ``core``
    history : tuple of SweepStats
        One record per sweep, in order.
    converged : bool
        Whether the relative loss change fell below the tolerance.
    method : str
        ``"hooi"`` or ``"implicit"``.
    mode_names : tuple of str
    """

    core: np.ndarray
    factors: tuple[np.ndarray, ...]
    history: tuple[SweepStats, ...] = ()
    converged: bool = False
    method: str = "hooi"
    mode_names: tuple[str, ...] | None = None

    def __post_init__(self) -> None:
        core = np.asarray(self.core)
        if core.dtype not in (np.float32, np.float64):
            raise ValueError(f"TuckerResult core must be float32 or float64, got {core.dtype}.")
        factors = tuple(np.asarray(f) for f in self.factors)
        if len(factors) != core.ndim:
            raise ValueError(f"TuckerResult has {len(factors)} factors for a core of {core.ndim} modes.")
        for n, f in enumerate(factors):
            if f.ndim != 2 or f.shape[1] != core.shape[n]:
                raise ValueError(
                    f"Factor {n} must have shape (I_{n}, {core.shape[n]}) to match the core of shape "
                    f"{core.shape}, got {f.shape}."
                )
            if f.dtype != core.dtype:
                raise ValueError(f"Factor {n} has dtype {f.dtype}, the core {core.dtype}.")
        names = tuple(self.mode_names) if self.mode_names is not None else tuple(f"mode{n}" for n in range(core.ndim))
        if len(names) != core.ndim:
            raise ValueError(f"Got {len(names)} mode names for a core of {core.ndim} modes.")
        object.__setattr__(self, "core", core)
        object.__setattr__(self, "factors", factors)
        object.__setattr__(self, "history", tuple(SweepStats(*h) for h in self.history))
        object.__setattr__(self, "mode_names", names)

    def __iter__(self):
        return iter((self.core, self.factors))

    @property
    def shape(self) -> tuple[int, ...]:
        """Mode sizes ``(I_1, ..., I_N)``."""
        return tuple(f.shape[0] for f in self.factors)

    @property
    def rank(self) -> tuple[int, ...]:
        """Core shape ``(R_1, ..., R_N)``."""
        return tuple(self.core.shape)

    @property
    def n_iter(self) -> int:
        """Number of sweeps run."""
        return len(self.history)

    def to_dense(self, max_cells: int = 50_000_000) -> np.ndarray:
        """Dense reconstruction ``G ×_1 F_1 ... ×_N F_N`` (small shapes only)."""
        cells = int(np.prod(self.shape, dtype=object))
        if cells > max_cells:
            raise MemoryError(f"A dense reconstruction of shape {self.shape} has {cells:,} cells, above {max_cells:,}.")
        out = self.core
        for n, f in enumerate(self.factors):
            out = np.moveaxis(np.tensordot(f, out, axes=(1, n)), 0, n)
        return out


def core_contributions(core: np.ndarray, factors: Sequence[np.ndarray], cells: np.ndarray) -> np.ndarray:
    """Per-core-entry contributions to the model value of each cell.

    ``out[c, r_1, ..., r_N] = G[r_1, ..., r_N] · Π_n F_n[cells[c, n], r_n]``, so
    ``out[c].sum()`` is the score of cell ``c``. Memory: ``len(cells) · prod(R)``.

    Parameters
    ----------
    core : ndarray of shape (R_1, ..., R_N)
    factors : sequence of ndarray of shape (I_n, R_n)
    cells : array-like of shape (n_cells, N), int
        One (user, item, context levels...) index tuple per row.

    Returns
    -------
    ndarray of shape (n_cells, R_1, ..., R_N), float64
    """
    cells = np.asarray(cells, dtype=np.int64)
    ndim = core.ndim
    if cells.ndim != 2 or cells.shape[1] != ndim:
        raise ValueError(f"cells must have shape (n_cells, {ndim}), got {cells.shape}.")
    out = np.broadcast_to(np.asarray(core, dtype=np.float64), (cells.shape[0],) + core.shape).copy()
    for n, f in enumerate(factors):
        if cells.size and (cells[:, n].min() < 0 or cells[:, n].max() >= f.shape[0]):
            raise IndexError(f"cell indices of mode {n} must lie in [0, {f.shape[0]}).")
        rows = np.asarray(f, dtype=np.float64)[cells[:, n]]
        out *= rows.reshape((cells.shape[0],) + (1,) * n + (core.shape[n],) + (1,) * (ndim - n - 1))
    return out


def core_slice(result: TuckerResult, levels: dict[int, int]) -> np.ndarray:
    """The core contracted with the factor rows of fixed levels of some modes.

    With every context mode fixed (``levels = {2: evening, 3: mobile}``) this is
    the ``R_user × R_item`` matrix of how strongly each user group meets each
    item group in that context: ``G ×_{m ∈ levels} F_m[level_m]``.

    Parameters
    ----------
    result : TuckerResult
    levels : dict of int to int
        Mode position → level index.

    Returns
    -------
    ndarray with the fixed modes removed, float64
    """
    for mode, level in levels.items():
        if not 0 <= mode < result.core.ndim:
            raise IndexError(f"Mode {mode} out of range for a {result.core.ndim}-way model.")
        size = result.factors[mode].shape[0]
        if not 0 <= int(level) < size:
            raise IndexError(f"Level {level} of mode {mode} must lie in [0, {size}).")
    out = np.asarray(result.core, dtype=np.float64)
    for mode in sorted(levels, reverse=True):  # later modes first keep earlier axis positions valid
        out = np.tensordot(out, result.factors[mode][int(levels[mode])].astype(np.float64), axes=(mode, 0))
    return out


class TuckerScorer(Scorer):
    """The shared scoring interface for a fitted :class:`TuckerResult` in ``result_``.

    ``Q`` is the core contracted with each query's user row and context rows,
    shape ``(q, R_item)``; ``V`` is the item factor. ``score_terms`` labels one
    term per core entry.
    """

    result_: TuckerResult

    def _fitted(self) -> TuckerResult:
        result = getattr(self, "result_", None)
        if result is None:
            raise AttributeError(f"This {type(self).__name__} is not fitted yet; call fit first.")
        return result

    @property
    def shape(self) -> tuple[int, ...]:
        return self._fitted().shape

    def query_matrix(self, users: np.ndarray, contexts: np.ndarray | None = None) -> np.ndarray:
        result = self._fitted()
        users, contexts = check_queries(users, contexts, result.shape)
        core = np.asarray(result.core, dtype=np.float64)
        q = np.tensordot(np.asarray(result.factors[0], dtype=np.float64)[users], core, axes=(1, 0))
        for j in range(contexts.shape[1]):  # q has shape (q, R_item, R_ctx_j, ...)
            rows = np.asarray(result.factors[2 + j], dtype=np.float64)[contexts[:, j]]
            q = np.einsum("qic...,qc->qi...", q, rows)
        return q

    def item_matrix(self) -> np.ndarray:
        return np.asarray(self._fitted().factors[1], dtype=np.float64)

    def score_terms(self, user: int, context, item: int) -> ScoreTerms:
        result = self._fitted()
        users, contexts = check_queries(np.array([user]), np.asarray(context).reshape(1, -1), result.shape)
        if not 0 <= int(item) < result.shape[1]:
            raise IndexError(f"item index must lie in [0, {result.shape[1]}).")
        cell = np.concatenate([users, [int(item)], contexts[0]])[None]
        values = core_contributions(result.core, result.factors, cell)[0]
        labels = tuple(f"core {idx}" for idx in np.ndindex(*result.core.shape))
        return ScoreTerms(labels=labels, values=values.ravel())


def check_tucker_rank(rank: int | Sequence[int], shape: tuple[int, ...], owner: str) -> tuple[int, ...]:
    """Validate a Tucker rank: one int per mode (or one for all), each in [1, I_n]."""
    ranks = (rank,) * len(shape) if np.isscalar(rank) else tuple(rank)
    if len(ranks) != len(shape):
        raise ValueError(f"The 'rank' parameter of {owner} needs one entry per mode ({len(shape)}), got {len(ranks)}.")
    out = []
    for n, (r, size) in enumerate(zip(ranks, shape)):
        check_int("rank", r, low=1, owner=owner)
        if r > size:
            raise ValueError(
                f"The 'rank' parameter of {owner} asks for {r} components in mode {n}, which has only {size} "
                f"indices; each rank must be at most its mode's size."
            )
        out.append(int(r))
    return tuple(out)


def _sign_fix(u: np.ndarray) -> np.ndarray:
    """Make the entry of largest magnitude of each column positive (a deterministic sign)."""
    pick = np.abs(u).argmax(axis=0)
    signs = np.sign(u[pick, np.arange(u.shape[1])])
    signs[signs == 0] = 1.0
    return u * signs


def _complete(u: np.ndarray, rank: int, rng: np.random.Generator) -> np.ndarray:
    """Pad ``u`` with random orthonormal columns orthogonal to it (as many as missing)."""
    missing = rank - u.shape[1]
    if missing <= 0:
        return u[:, :rank]
    extra = rng.random((u.shape[0], missing))
    extra -= u @ (u.T @ extra)
    q, _ = np.linalg.qr(extra)
    return np.hstack([u, q])


def leading_left_vectors(matrix, rank: int, rng: np.random.Generator) -> np.ndarray:
    """Leading ``rank`` left singular vectors of a dense or sparse matrix.

    When both sides exceed :data:`SMALL_GRAM` and ``rank`` is below half the
    smaller side, a truncated sparse SVD (``scipy.sparse.linalg.svds``, ARPACK,
    start vector from ``rng``). Otherwise the eigendecomposition of the smaller
    Gram matrix: ``M Mᵀ`` when ``M`` has fewer rows than columns, else ``Mᵀ M``
    with ``U = orth(M V)``; the Gram is computed sparsely for sparse input. When
    the matrix has fewer than ``rank`` singular vectors, random orthonormal
    columns complete the basis.

    Parameters
    ----------
    matrix : ndarray or scipy.sparse matrix of shape (I, J)
    rank : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of shape (I, rank), float64, orthonormal columns, sorted by singular value
    """
    n_rows, n_cols = matrix.shape
    small = min(n_rows, n_cols)
    if small > SMALL_GRAM and rank < small // 2 and sp.issparse(matrix):
        m = matrix.astype(np.float64)
        u, s, _ = scipy.sparse.linalg.svds(m, k=rank, v0=rng.standard_normal(small), random_state=rng)
        u = u[:, np.argsort(s)[::-1]]
        return _sign_fix(u)
    if sp.issparse(matrix):
        m = matrix.astype(np.float64).tocsr()
        gram = (m @ m.T if n_rows <= n_cols else m.T @ m).toarray()
    else:
        m = np.asarray(matrix, dtype=np.float64)
        gram = m @ m.T if n_rows <= n_cols else m.T @ m
    keep = min(rank, small)
    _, vectors = scipy.linalg.eigh(gram, subset_by_index=(gram.shape[0] - keep, gram.shape[0] - 1))
    vectors = vectors[:, ::-1]
    if n_rows <= n_cols:
        u = vectors
    else:
        u, r = np.linalg.qr(np.asarray(m @ vectors))
        u = u * np.where(np.diag(r) < 0, -1.0, 1.0)
    return _complete(_sign_fix(u), rank, rng)


def compressed_unfolding(coords: np.ndarray, values: np.ndarray, shape: tuple[int, ...], mode: int) -> sp.csr_matrix:
    """Mode-n unfolding restricted to its nonzero columns (same left singular vectors).

    Returns
    -------
    scipy.sparse.csr_matrix of shape (I_n, n_used_columns), float64
    """
    others = [m for m in range(len(shape)) if m != mode]
    if np.prod([float(shape[m]) for m in others]) >= 2.0**62:
        raise ValueError(f"The unfolding of mode {mode} has too many columns to index; shape {shape}.")
    key = np.zeros(coords.shape[1], dtype=np.int64)
    stride = 1
    for m in others:
        key += coords[m].astype(np.int64) * stride
        stride *= shape[m]
    used, column = np.unique(key, return_inverse=True)
    return sp.csr_matrix((values.astype(np.float64), (coords[mode], column)), shape=(shape[mode], used.size))


def hosvd_factors(coords: np.ndarray, values: np.ndarray, shape: tuple[int, ...], rank: tuple[int, ...],
                  rng: np.random.Generator) -> list[np.ndarray]:
    """Truncated HOSVD factors from the sparse unfoldings, never a dense one.

    Factor ``n`` holds the leading ``rank[n]`` left singular vectors of the
    mode-n unfolding (De Lathauwer, De Moor & Vandewalle, SIAM J. Matrix Anal.
    Appl. 21(4), 2000), computed by :func:`leading_left_vectors`.

    Returns
    -------
    list of ndarray of shape (I_n, R_n), float64
    """
    return [
        leading_left_vectors(compressed_unfolding(coords, values, shape, n), rank[n], rng)
        for n in range(len(shape))
    ]
