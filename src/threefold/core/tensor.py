"""The shared object of threefold: an exposure-aware sparse N-way tensor in COO form.

A :class:`SparseTensor` stores only the observed cells (shown or clicked) of a
user × item × context tensor. Every cell that is not stored has preference 0 and
the global weight ``w0``; models never materialize those cells.

Storage per stored cell, for a 4-way tensor built from a log in float32: four
int32 indices (16 bytes) plus the raw evidence (clicks, dwell, skips: float32;
last event: uint32; 16 bytes) = 32 bytes. Preference and confidence are computed
from the evidence and the tensor's :class:`~threefold.core.feedback.FeedbackWeighting`
when asked for (8 bytes per cell while a model fits). A tensor built from
explicit values (tests, dense data sets) stores preference and confidence
directly instead.

Unfolding convention
--------------------
:meth:`SparseTensor.unfold` follows Kolda & Bader (SIAM Review 51(3), 2009,
section 2.4) by default: in the mode-n unfolding, column ``j`` of cell
``(i_1, ..., i_N)`` is ``sum_{k != n} i_k * prod_{m < k, m != n} I_m`` (earlier
modes vary fastest; numpy ``order='F'``). ``ordering="tensorly"`` gives the
convention of ``tensorly.unfold`` (later modes vary fastest; C order).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Literal, Sequence

import numpy as np
import scipy.sparse as sp

from threefold.core.feedback import CellEvidence, FeedbackWeighting, cell_weights
from threefold.core.vocabulary import Vocabulary

__all__ = ["SparseTensor", "DENSE_CELL_LIMIT"]

#: Largest number of cells :meth:`SparseTensor.to_dense` will allocate by default.
DENSE_CELL_LIMIT = 50_000_000


@dataclass(frozen=True, eq=False)
class SparseTensor:
    """Sparse N-way tensor of stored cells with preference, confidence and evidence.

    Build one from a log with :func:`threefold.data.build.build_tensor`, or from
    arrays with :meth:`from_arrays`.

    Parameters
    ----------
    coords : ndarray of shape (ndim, nnz), int32
        Index of each stored cell in each mode. Cells are unique.
    shape : tuple of int
        Size of each mode.
    mode_names : tuple of str
        One name per mode, e.g. ``("user", "item", "daypart")``.
    vocabularies : tuple of Vocabulary or None
        Labels of each mode's indices (``None`` for unlabeled modes).
    evidence : CellEvidence or None
        Raw evidence per cell; when given, preference and confidence are
        computed from it with ``weighting``.
    weighting : FeedbackWeighting
        Turns evidence into preference and confidence; its ``w0`` is the weight
        of every cell not stored.
    dtype : numpy dtype, float32 or float64
        Floating type of preference and confidence.
    stored_preference, stored_confidence : ndarray of shape (nnz,) or None
        Explicit values, used when there is no evidence.
    """

    coords: np.ndarray
    shape: tuple[int, ...]
    mode_names: tuple[str, ...]
    vocabularies: tuple[Vocabulary | None, ...]
    weighting: FeedbackWeighting = field(default_factory=FeedbackWeighting)
    evidence: CellEvidence | None = None
    dtype: np.dtype = field(default=np.dtype(np.float32))
    stored_preference: np.ndarray | None = None
    stored_confidence: np.ndarray | None = None
    _orders: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        dtype = np.dtype(self.dtype)
        if dtype not in (np.float32, np.float64):
            raise ValueError(f"SparseTensor dtype must be float32 or float64, got {dtype}.")
        object.__setattr__(self, "dtype", dtype)
        shape = tuple(int(s) for s in self.shape)
        object.__setattr__(self, "shape", shape)
        object.__setattr__(self, "weighting", self.weighting.per_cell(shape))  # w0 per cell from here on
        coords = np.ascontiguousarray(self.coords, dtype=np.int32)
        if coords.ndim != 2 or coords.shape[0] != len(shape):
            raise ValueError(
                f"coords must have shape (ndim={len(shape)}, nnz), got {self.coords.shape}."
            )
        object.__setattr__(self, "coords", coords)
        if len(self.mode_names) != len(shape):
            raise ValueError(f"Got {len(self.mode_names)} mode names for {len(shape)} modes.")
        if len(set(self.mode_names)) != len(self.mode_names):
            raise ValueError(f"Mode names must be unique, got {self.mode_names}.")
        if len(self.vocabularies) != len(shape):
            raise ValueError(f"Got {len(self.vocabularies)} vocabularies for {len(shape)} modes.")
        for n, (size, vocab) in enumerate(zip(shape, self.vocabularies)):
            if size < 1:
                raise ValueError(f"Mode {self.mode_names[n]!r} has size {size}; every mode needs at least one index.")
            if vocab is not None and len(vocab) != size:
                raise ValueError(
                    f"Mode {self.mode_names[n]!r} has size {size} but its vocabulary has {len(vocab)} labels."
                )
            if coords.shape[1] and (coords[n].min() < 0 or coords[n].max() >= size):
                raise ValueError(
                    f"coords of mode {self.mode_names[n]!r} must lie in [0, {size}), "
                    f"got [{coords[n].min()}, {coords[n].max()}]."
                )
        nnz = coords.shape[1]
        if self.evidence is None:
            if self.stored_preference is None or self.stored_confidence is None:
                raise ValueError("A SparseTensor needs either evidence or stored preference and confidence.")
            for name in ("stored_preference", "stored_confidence"):
                arr = np.ascontiguousarray(getattr(self, name), dtype=dtype)
                if arr.shape != (nnz,):
                    raise ValueError(f"{name} must have shape ({nnz},), got {arr.shape}.")
                if not np.all(np.isfinite(arr)):
                    raise ValueError(f"{name} holds non-finite values.")
                object.__setattr__(self, name, arr)
            if np.any(self.stored_confidence < 0):
                raise ValueError("stored_confidence must be non-negative.")
        elif self.evidence.clicks.shape[0] != nnz:
            raise ValueError(f"evidence covers {self.evidence.clicks.shape[0]} cells, coords {nnz}.")

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_arrays(
        cls,
        coords: np.ndarray,
        values: np.ndarray,
        shape: Sequence[int],
        *,
        confidence: np.ndarray | None = None,
        w0: float = 1.0,
        mode_names: Sequence[str] | None = None,
        vocabularies: Sequence[Vocabulary | None] | None = None,
        dtype: np.dtype | type = np.float64,
    ) -> "SparseTensor":
        """Tensor from explicit cell values (no log evidence).

        Parameters
        ----------
        coords : array-like of shape (ndim, nnz), int
            Unique cell coordinates.
        values : array-like of shape (nnz,)
            Preference of each stored cell (any real values).
        shape : sequence of int
        confidence : array-like of shape (nnz,) or None
            Weight of each stored cell; default 1.
        w0 : float, default=1.0
            Weight of every cell not stored.
        mode_names : sequence of str, default ``("mode0", "mode1", ...)``
        vocabularies : sequence of Vocabulary or None
        dtype : float32 or float64, default float64
        """
        coords = np.asarray(coords)
        ndim = len(shape)
        names = tuple(mode_names) if mode_names is not None else tuple(f"mode{n}" for n in range(ndim))
        vocabs = tuple(vocabularies) if vocabularies is not None else (None,) * ndim
        if np.dtype(dtype) not in (np.float32, np.float64):
            raise ValueError(f"SparseTensor dtype must be float32 or float64, got {np.dtype(dtype)}.")
        values = np.asarray(values, dtype=dtype)
        conf = np.ones_like(values) if confidence is None else np.asarray(confidence, dtype=dtype)
        tensor = cls(
            coords=coords,
            shape=tuple(shape),
            mode_names=names,
            vocabularies=vocabs,
            weighting=FeedbackWeighting(w0=w0),
            dtype=np.dtype(dtype),
            stored_preference=values,
            stored_confidence=conf,
        )
        flat = np.ravel_multi_index(tuple(tensor.coords.astype(np.int64)), tensor.shape)
        if np.unique(flat).size != flat.size:
            raise ValueError("coords hold duplicate cells; aggregate them before building a tensor.")
        return tensor

    @classmethod
    def from_dense(cls, array: np.ndarray, *, mode_names: Sequence[str] | None = None, w0: float = 1.0) -> "SparseTensor":
        """Tensor of the nonzero cells of a dense array (values as preference, confidence 1)."""
        array = np.asarray(array)
        coords = np.array(np.nonzero(array), dtype=np.int32).reshape(array.ndim, -1)
        dtype = array.dtype if array.dtype in (np.float32, np.float64) else np.float64
        return cls.from_arrays(coords, array[tuple(coords)], array.shape, w0=w0, mode_names=mode_names, dtype=dtype)

    # ------------------------------------------------------------------ values
    @property
    def ndim(self) -> int:
        """Number of modes."""
        return len(self.shape)

    @property
    def nnz(self) -> int:
        """Number of stored cells."""
        return int(self.coords.shape[1])

    @property
    def w0(self) -> float:
        """Weight of every cell that is not stored."""
        return self.weighting.w0

    @property
    def preference(self) -> np.ndarray:
        """ndarray of shape (nnz,), ``dtype``: preference ``p`` of each stored cell."""
        if self.evidence is None:
            return self.stored_preference
        return cell_weights(self.evidence, self.weighting, self.dtype)[0]

    @property
    def confidence(self) -> np.ndarray:
        """ndarray of shape (nnz,), ``dtype``: confidence ``w`` of each stored cell."""
        if self.evidence is None:
            return self.stored_confidence
        return cell_weights(self.evidence, self.weighting, self.dtype)[1]

    def weights(self) -> tuple[np.ndarray, np.ndarray]:
        """``(preference, confidence)`` computed in one pass; see :func:`cell_weights`."""
        if self.evidence is None:
            return self.stored_preference, self.stored_confidence
        return cell_weights(self.evidence, self.weighting, self.dtype)

    @property
    def nbytes(self) -> int:
        """Bytes held per the storage contract (coords + evidence or stored values)."""
        total = self.coords.nbytes
        if self.evidence is not None:
            total += self.evidence.nbytes
        else:
            total += self.stored_preference.nbytes + self.stored_confidence.nbytes
        return total

    def reweighted(self, weighting: FeedbackWeighting) -> "SparseTensor":
        """The same cells under another weighting (needs evidence; shares arrays)."""
        if self.evidence is None:
            raise ValueError("This tensor has no raw evidence to re-weight; build it from a log.")
        return replace(self, weighting=weighting)

    def astype(self, dtype: np.dtype | type) -> "SparseTensor":
        """The same tensor with float32 or float64 preference and confidence."""
        if self.evidence is not None:
            return replace(self, dtype=np.dtype(dtype))
        return replace(
            self,
            dtype=np.dtype(dtype),
            stored_preference=self.stored_preference.astype(dtype),
            stored_confidence=self.stored_confidence.astype(dtype),
        )

    def take(self, index: np.ndarray) -> "SparseTensor":
        """Tensor of the stored cells selected by ``index`` (mask or positions); same shape."""
        if self.evidence is not None:
            return replace(self, coords=self.coords[:, index], evidence=self.evidence.take(index))
        return replace(
            self,
            coords=self.coords[:, index],
            stored_preference=self.stored_preference[index],
            stored_confidence=self.stored_confidence[index],
        )

    def mode_index(self, mode: int | str) -> int:
        """Position of a mode given by position or name."""
        if isinstance(mode, str):
            try:
                return self.mode_names.index(mode)
            except ValueError:
                raise KeyError(f"No mode named {mode!r}; modes are {self.mode_names}.") from None
        if not -self.ndim <= mode < self.ndim:
            raise IndexError(f"Mode {mode} out of range for a {self.ndim}-way tensor.")
        return mode % self.ndim

    # ------------------------------------------------------------------ orderings
    def mode_order(self, mode: int | str) -> tuple[np.ndarray, np.ndarray]:
        """Stored cells grouped by their index in one mode (built once, then cached).

        Returns
        -------
        order : ndarray of shape (nnz,), int64
            Cell positions sorted (stably) by their index in ``mode``.
        indptr : ndarray of shape (shape[mode] + 1,), int64
            Cells of row ``i`` are ``order[indptr[i]:indptr[i + 1]]``.
        """
        n = self.mode_index(mode)
        if n not in self._orders:
            keys = self.coords[n]
            order = np.argsort(keys, kind="stable").astype(np.int64)
            counts = np.bincount(keys, minlength=self.shape[n])
            indptr = np.zeros(self.shape[n] + 1, dtype=np.int64)
            np.cumsum(counts, out=indptr[1:])
            self._orders[n] = (order, indptr)
        return self._orders[n]

    # ------------------------------------------------------------------ algebra
    def norm(self) -> float:
        """Frobenius norm of the preference values (cells not stored are 0)."""
        p = self.preference.astype(np.float64)
        return float(np.sqrt(p @ p))

    def unfold(self, mode: int | str, ordering: Literal["kolda", "tensorly"] = "kolda") -> sp.csr_matrix:
        """Mode-n unfolding of the preference values as a sparse matrix.

        Parameters
        ----------
        mode : int or str
        ordering : {"kolda", "tensorly"}, default="kolda"
            Column order; see the module docstring.

        Returns
        -------
        scipy.sparse.csr_matrix of shape (shape[mode], prod(other sizes)), dtype
        """
        n = self.mode_index(mode)
        others = [m for m in range(self.ndim) if m != n]
        if ordering == "tensorly":
            others = others[::-1]
        elif ordering != "kolda":
            raise ValueError(f"ordering must be 'kolda' or 'tensorly', got {ordering!r}.")
        col = np.zeros(self.nnz, dtype=np.int64)
        stride = 1
        for m in others:  # the first listed mode varies fastest
            col += self.coords[m].astype(np.int64) * stride
            stride *= self.shape[m]
        return sp.csr_matrix((self.preference, (self.coords[n], col)), shape=(self.shape[n], stride))

    def mode_dot(self, matrix: np.ndarray, mode: int | str, max_cells: int = DENSE_CELL_LIMIT) -> np.ndarray:
        """Dense n-mode product ``X ×_n U`` (Kolda & Bader 2009, section 2.5).

        Parameters
        ----------
        matrix : ndarray of shape (J, shape[mode])
        mode : int or str
        max_cells : int
            Refuse results with more cells than this.

        Returns
        -------
        ndarray with ``shape[mode]`` replaced by J, float64
        """
        n = self.mode_index(mode)
        matrix = np.asarray(matrix, dtype=np.float64)
        if matrix.ndim != 2 or matrix.shape[1] != self.shape[n]:
            raise ValueError(
                f"matrix must have shape (J, {self.shape[n]}) for mode {self.mode_names[n]!r}, got {matrix.shape}."
            )
        out_shape = self.shape[:n] + (matrix.shape[0],) + self.shape[n + 1 :]
        _check_cells(out_shape, max_cells)
        # Y_(n) = U X_(n), computed in the C-ordered ("tensorly") unfolding, then folded back.
        unfolded = self.unfold(n, ordering="tensorly")
        y = np.asarray((unfolded.T @ matrix.T).T)
        moved = y.reshape((matrix.shape[0],) + tuple(s for m, s in enumerate(self.shape) if m != n))
        return np.moveaxis(moved, 0, n)

    def to_dense(self, max_cells: int = DENSE_CELL_LIMIT) -> np.ndarray:
        """Dense array of the preference values; refuses tensors above ``max_cells`` cells."""
        _check_cells(self.shape, max_cells)
        out = np.zeros(self.shape, dtype=self.dtype)
        out[tuple(self.coords)] = self.preference
        return out

    def to_tensorly(self, max_cells: int = DENSE_CELL_LIMIT):
        """Dense ``tensorly`` tensor of the preference values (small shapes only)."""
        import tensorly as tl

        return tl.tensor(self.to_dense(max_cells=max_cells))

    def dense_confidence(self, max_cells: int = DENSE_CELL_LIMIT) -> np.ndarray:
        """Dense array of every cell's weight (``w0`` where not stored); small shapes only."""
        _check_cells(self.shape, max_cells)
        out = np.full(self.shape, self.w0, dtype=self.dtype)
        out[tuple(self.coords)] = self.confidence
        return out

    def __repr__(self) -> str:
        dims = " × ".join(f"{name}:{size}" for name, size in zip(self.mode_names, self.shape))
        return f"SparseTensor({dims}, nnz={self.nnz}, dtype={self.dtype.name})"


def _check_cells(shape: Sequence[int], max_cells: int) -> None:
    cells = int(np.prod([int(s) for s in shape], dtype=object))
    if cells > max_cells:
        raise MemoryError(
            f"A dense array of shape {tuple(shape)} has {cells:,} cells, above the limit of {max_cells:,}; "
            "work on the sparse tensor instead, or raise max_cells knowingly."
        )
