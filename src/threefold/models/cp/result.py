"""The result of a CP fit: validated container, scoring interface, per-sweep history.

A :class:`CPResult` is what :func:`threefold.models.cp.model.fit_cp` returns and what every
consumer of a CP model reads: evaluation and batch scoring through the
:class:`~threefold.core.scoring.Scorer` interface, explanations through
:meth:`CPResult.score_terms`, fold-in and warm starts through
:meth:`CPResult.unnormalized_factors`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from threefold.core.checks import check_choice
from threefold.models.cp import als, kernels
from threefold.core.scoring import Scorer, ScoreTerms, check_queries
from threefold.models.base import FactorResultMixin, RowPosterior, mode_position, solve_posterior
from threefold.models.cp.structure import Structure
from threefold.models.fitloop import STOP_REASONS, SweepRecord
from threefold.core.vocabulary import Vocabulary

__all__ = ["SweepRecord", "CPResult", "FactorResultMixin", "STOP_REASONS", "mode_position"]  # shared names re-exported

@dataclass(frozen=True, eq=False)
class CPResult(FactorResultMixin, Scorer):
    """A fitted CP model: ``x̂ = Σ_r weights[r] · Π_n factors[n][i_n, r]``.

    Components are normalized (every column a mode owns has unit norm; the
    others are the constant 1) and sorted by decreasing weight within each
    structure term. Validated at construction.

    Parameters
    ----------
    weights : ndarray of shape (R,), float64
        λ: product of each component's column norms.
    factors : tuple of ndarray of shape (I_n, R), float32 or float64
    column_norms : ndarray of shape (ndim, R), float64
        The norms the columns had at the end of fitting (1 where a mode does
        not own a column). With regularization the split of scale across modes
        matters, so fold-in and warm starts rebuild the fitted factors from
        them (:meth:`unnormalized_factors`).
    structure : Structure
    mode_names : tuple of str
    vocabularies : tuple of Vocabulary or None
    history : tuple of SweepRecord
        Sweep 0 (initial state) first.
    stop_reason : {"converged", "max_sweeps", "callback"}
    w0, reg : float
        The weight of cells not stored and the regularization it was fitted with.
    """

    weights: np.ndarray
    factors: tuple[np.ndarray, ...]
    column_norms: np.ndarray
    structure: Structure
    mode_names: tuple[str, ...]
    vocabularies: tuple[Vocabulary | None, ...]
    history: tuple[SweepRecord, ...]
    stop_reason: str
    w0: float
    reg: float

    def __post_init__(self) -> None:
        factors = tuple(np.asarray(f) for f in self.factors)
        object.__setattr__(self, "factors", factors)
        rank = self.structure.rank
        ndim = len(self.mode_names)
        if ndim < 2 or len(factors) != ndim or len(self.vocabularies) != ndim:
            raise ValueError(
                f"CPResult needs one factor and one vocabulary per mode for {ndim} modes "
                f"(at least 2); got {len(factors)} factors and {len(self.vocabularies)} vocabularies."
            )
        weights = np.asarray(self.weights, dtype=np.float64)
        if weights.shape != (rank,) or not np.all(np.isfinite(weights)) or np.any(weights < 0):
            raise ValueError(f"weights must be {rank} finite non-negative values, got shape {weights.shape}.")
        object.__setattr__(self, "weights", weights)
        norms = np.asarray(self.column_norms, dtype=np.float64)
        if norms.shape != (ndim, rank):
            raise ValueError(f"column_norms must have shape ({ndim}, {rank}), got {norms.shape}.")
        object.__setattr__(self, "column_norms", norms)
        mask = self.structure.active_mask(self.mode_names)
        for n, (name, factor) in enumerate(zip(self.mode_names, factors)):
            if factor.ndim != 2 or factor.shape[1] != rank or factor.dtype not in (np.float32, np.float64):
                raise ValueError(
                    f"Factor of mode {name!r} must be a float32 or float64 array of shape (I, {rank}), "
                    f"got {factor.dtype} {factor.shape}."
                )
            if not np.all(factor[:, ~mask[n]] == 1):
                raise ValueError(f"Factor of mode {name!r} must hold 1 in the columns its mode does not use.")
            vocab = self.vocabularies[n]
            if vocab is not None and len(vocab) != factor.shape[0]:
                raise ValueError(
                    f"Factor of mode {name!r} has {factor.shape[0]} rows but its vocabulary {len(vocab)} labels."
                )
        check_choice("stop_reason", self.stop_reason, STOP_REASONS, owner="CPResult")

    # ------------------------------------------------------------------ summary
    @property
    def shape(self) -> tuple[int, ...]:
        """Mode sizes (user, item, context...)."""
        return tuple(f.shape[0] for f in self.factors)

    @property
    def rank(self) -> int:
        """Number of components."""
        return self.weights.shape[0]

    def unnormalized_factors(self) -> list[np.ndarray]:
        """The factors as fitted (columns times their norms), for warm starts and fold-in."""
        return [(f * self.column_norms[n]).astype(f.dtype) for n, f in enumerate(self.factors)]

    def to_tensorly(self):
        """The model as a ``tensorly.cp_tensor.CPTensor`` (float64)."""
        from tensorly.cp_tensor import CPTensor

        return CPTensor((self.weights.copy(), [f.astype(np.float64) for f in self.factors]))

    def predict(self, coords: np.ndarray) -> np.ndarray:
        """Model values at given cells.

        Parameters
        ----------
        coords : array-like of shape (ndim, n), int

        Returns
        -------
        ndarray of shape (n,), float64
        """
        coords = np.asarray(coords, dtype=np.int64).reshape(len(self.factors), -1)
        out = np.empty(coords.shape[1])
        for lo in range(0, coords.shape[1], 2**16):  # bounded memory: 65,536 cells × R at a time
            rows = np.tile(self.weights, (min(2**16, coords.shape[1] - lo), 1))
            for n, f in enumerate(self.factors):
                rows *= f[coords[n, lo : lo + 2**16]]
            out[lo : lo + 2**16] = rows.sum(axis=1)
        return out

    # ------------------------------------------------------------------ scoring interface
    def query_matrix(self, users: np.ndarray, contexts: np.ndarray | None = None) -> np.ndarray:
        """ndarray of shape (q, R), float64: ``λ ⊙ user row ⊙ context rows`` per query."""
        users, contexts = check_queries(users, contexts, self.shape)
        q = self.weights * self.factors[0][users]
        for j in range(contexts.shape[1]):
            q *= self.factors[2 + j][contexts[:, j]]
        return q

    def item_matrix(self) -> np.ndarray:
        """ndarray of shape (n_items, R): the item factor."""
        return self.factors[1]

    def score_terms(self, user: int, context, item: int) -> ScoreTerms:
        """One term per component (labels ``"user*item #0"``, ...), summing to the score."""
        context = np.asarray(context, dtype=np.int64).reshape(1, -1)
        q = self.query_matrix(np.array([user]), context if context.size else None)[0]
        if not 0 <= item < self.shape[1]:
            raise IndexError(f"item index must lie in [0, {self.shape[1]}), got {item}.")
        return ScoreTerms(labels=self.structure.component_labels(), values=q * self.factors[1][item])

    supports_fold_in = True

    def file_contents(self) -> tuple[str, dict[str, np.ndarray], dict]:
        """``(model type, arrays, metadata)`` this result adds to a model file (:mod:`threefold.models.model_io`)."""
        return "cp", {"weights": self.weights, "column_norms": self.column_norms}, {"structure": str(self.structure)}

    @classmethod
    def from_file_contents(cls, meta: dict, arrays: dict, common: dict) -> "CPResult":
        return cls(weights=arrays["weights"], column_norms=arrays["column_norms"],
                   structure=Structure.parse(meta["structure"], rank=1), **common)

    def reason_groups(self) -> tuple[tuple[str, ...], np.ndarray]:
        """One reason per structure term, named by the modes it spans (``"user*item*daypart"``)."""
        names = ["*".join(term.modes) for term in self.structure.terms]
        labels = tuple(name if names.count(name) == 1 else f"{name} ({j + 1})" for j, name in enumerate(names))
        return labels, self.structure.component_terms().astype(np.int64)

    def owned_columns(self, mode: int) -> np.ndarray:
        """ndarray of shape (R,), bool: the components whose term spans ``mode``."""
        return self.structure.active_mask(self.mode_names)[mode]

    def fold_in(self, tensor, mode: int | str, *, n_threads: int | None = None) -> np.ndarray:
        """Rows for new users, items or context levels, solved from their own cells.

        Every other factor stays fixed and the weighting is the training one, so
        each row is the exact solution of its row system (methods.md section 8;
        Hu, Koren & Volinsky, ICDM 2008, generalized to tensors and structures).
        All rows are solved in one parallel batch.

        Parameters
        ----------
        tensor : SparseTensor
            The new rows' cells: mode ``mode`` indexes the new rows ``0 .. n_new - 1``;
            every other mode has the model's size and mode names, and ``w0`` is the
            model's.
        mode : int or str
        n_threads : int or None

        Returns
        -------
        ndarray of shape (n_new, R), the model's dtype
            In the model's normalized coordinates (ready for :meth:`CPResult.with_rows`);
            a row with no cells is zero in a plain CP.
        """
        n, problem = self._fold_problem(tensor, mode, n_threads)
        with kernels.threads(n_threads):
            als.update_mode(problem, n, 0)
        rows = problem.factor(n).copy()
        cols = np.flatnonzero(self.structure.active_mask(self.mode_names)[n])
        norms = self.column_norms[n, cols]
        rows[:, cols] = np.where(norms > 0, rows[:, cols] / np.where(norms > 0, norms, 1.0), 0.0)
        return rows

    def _fold_problem(self, tensor, mode, n_threads):
        """Checks of a fold-in tensor and its ALS problem with mode ``n`` zeroed (the rows to solve)."""
        n = mode_position(self.mode_names, mode)
        if tensor.mode_names != self.mode_names:
            raise ValueError(f"fold_in: the tensor's modes {tensor.mode_names} differ from the model's {self.mode_names}.")
        for m, name in enumerate(self.mode_names):
            if m != n and tensor.shape[m] != self.shape[m]:
                raise ValueError(
                    f"fold_in: mode {name!r} has {tensor.shape[m]} rows in the tensor but {self.shape[m]} in the model."
                )
        if tensor.w0 != self.w0:
            raise ValueError(f"fold_in: the tensor's w0={tensor.w0:g} differs from the model's w0={self.w0:g}.")
        dtype = self.factors[0].dtype
        factors = self.unnormalized_factors()
        factors[n] = np.zeros((tensor.shape[n], self.rank), dtype=dtype)
        active = self.structure.active_mask(self.mode_names)
        with kernels.threads(n_threads):
            problem = als.make_problem(tensor.astype(dtype), factors, active, reg=self.reg, update_modes=(n,))
        return n, problem

    def row_posterior(self, tensor, mode: int | str, *, prior: np.ndarray | None = None, covariance: bool = True,
                      n_threads: int | None = None, chunk_rows: int = 2048) -> RowPosterior:
        """The fold-in of :meth:`fold_in` with each row's covariance, optionally around a prior mean.

        Each row solves ``M_i x_i = b_i + reg·μ_i`` with ``M_i`` its regularized
        weighted normal-equation matrix (every other factor fixed; Hu, Koren &
        Volinsky, ICDM 2008), and ``M_i⁻¹`` is returned beside it. Without a prior
        the rows equal :meth:`fold_in`'s (the same systems, solved by another routine).

        Parameters
        ----------
        tensor : SparseTensor
            As in :meth:`fold_in`.
        mode : int or str
        prior : ndarray of shape (n_new, R) or None
            Prior means in the model's normalized coordinates (e.g. a row's
            previous value, or its prediction from catalog metadata); None: zero.
        covariance : bool, default=True
            False: the rows only (``covariance`` None), without the inverses.
        chunk_rows : int, default=2048
            Rows whose ``k × k`` systems are formed at once (bounds memory).

        Returns
        -------
        RowPosterior
            Rows and covariances in the model's normalized coordinates.
        """
        n, problem = self._fold_problem(tensor, mode, n_threads)
        active, inactive, base, rhs0 = als.row_system_terms(problem, n)
        norms = self.column_norms[n, active]
        scale = np.where(norms > 0, norms, 1.0)
        n_rows = tensor.shape[n]
        rows = np.ones((n_rows, self.rank), dtype=self.factors[0].dtype)
        covariances = np.zeros((n_rows, active.size, active.size)) if covariance else None
        indptr = problem.cells[n].indptr
        for start in range(0, n_rows, chunk_rows):
            stop = min(start + chunk_rows, n_rows)
            blocks = als.cell_blocks(indptr[start:stop + 1], als.BLOCK_CELLS)
            with kernels.threads(n_threads):
                systems, rights = als.row_systems(problem, n, blocks, stop - start, active, inactive, base, rhs0)
            mean = None if prior is None else np.asarray(prior, np.float64)[start:stop][:, active] * norms
            x, cov = solve_posterior(systems, rights, reg=self.reg, prior=mean, covariance=covariance)
            rows[start:stop, active] = np.where(norms > 0, x / scale, 0.0)
            if covariance:
                covariances[start:stop] = cov / np.outer(scale, scale)
        return RowPosterior(rows=rows, columns=active, covariance=covariances)
