"""What every factor result shares: the fit summary, growing a mode, naming modes.

Both :class:`threefold.models.cp.result.CPResult` and
:class:`threefold.models.tucker.result.TuckerResult` mix this in.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Callable, Sequence

import numpy as np

from threefold.core.params import ParamModel
from threefold.core.scoring import FittedScorer
from threefold.core.vocabulary import Vocabulary

__all__ = ["FactorEstimator", "FactorResultMixin", "RowPosterior", "mode_position", "solve_posterior"]


class FactorEstimator(ParamModel, FittedScorer):
    """An estimator around a fit function: parameters from its table, fitted state ending in ``_``.

    A subclass names its fit function (``_fit_function``), its parameter table
    (``params``, the fit function's keyword parameters; checked by a test) and
    the result attributes it exposes as ``<name>_`` (``_result_attributes``).
    """

    _fit_function: Callable
    _result_attributes: tuple[str, ...] = ("factors", "history", "n_sweeps", "converged")

    def fit(self, tensor) -> "FactorEstimator":
        """Fit to a tensor; returns self."""
        result = type(self)._fit_function(tensor, **self.get_params())
        self.result_ = result
        for name in type(self)._result_attributes:
            setattr(self, f"{name}_", getattr(result, name))
        return self


class FactorResultMixin:
    """What CP and Tucker results share: the fit summary of a ``history`` of
    :class:`SweepRecord` (sweep 0 being the initial state) with a ``stop_reason``,
    and growing a mode's ``factors`` and ``vocabularies`` (a frozen dataclass)."""

    def with_rows(self, mode: int | str, rows: np.ndarray, labels: Sequence[str] | None = None):
        """The model with rows appended to one mode (e.g. folded-in newcomers).

        Parameters
        ----------
        mode : int or str
        rows : ndarray of shape (n_new, n_columns of that mode's factor)
            As returned by the model's fold-in.
        labels : sequence of str, optional
            Their labels; required when the mode has a vocabulary.
        """
        n = mode_position(self.mode_names, mode)
        factors = list(self.factors)
        factors[n] = np.concatenate([factors[n], np.asarray(rows, dtype=factors[n].dtype)], axis=0)
        vocabularies = list(self.vocabularies)
        if vocabularies[n] is not None:
            if labels is None or len(labels) != len(rows):
                raise ValueError(f"Mode {self.mode_names[n]!r} has a vocabulary: give one label per new row.")
            vocabularies[n] = Vocabulary(vocabularies[n].labels + tuple(labels), name=vocabularies[n].name)
        return replace(self, factors=tuple(factors), vocabularies=tuple(vocabularies))

    @property
    def n_sweeps(self) -> int:
        """Sweeps run (the initial state not counted)."""
        return len(self.history) - 1

    @property
    def converged(self) -> bool:
        """True when the relative loss change fell below ``tol``."""
        return self.stop_reason == "converged"

    @property
    def loss(self) -> float:
        """Final loss."""
        return self.history[-1].loss

    @property
    def fit(self) -> float:
        """Final relative fit (weighted for implicit models)."""
        return self.history[-1].fit


@dataclass(frozen=True)
class RowPosterior:
    """Rows solved with their normal-equation matrices, from :meth:`row_posterior` of a result.

    Attributes
    ----------
    rows : ndarray of shape (n, R)
        In the model's coordinates (ready for ``with_rows``).
    columns : ndarray of shape (k,), int64
        The columns the solve owns (all of them in Tucker; the structure's in CP).
    covariance : ndarray of shape (n, k, k), float64, or None
        ``M_i⁻¹`` of each row's regularized weighted system ``M_i`` in the same
        coordinates: the posterior covariance of the row under the Gaussian
        reading of ridge least squares (unit noise), used for exploration.
        None when the caller asked for the rows only.
    """

    rows: np.ndarray
    columns: np.ndarray
    covariance: np.ndarray | None


def solve_posterior(systems: np.ndarray, rights: np.ndarray, *, reg: float,
                    prior: np.ndarray | None = None,
                    covariance: bool = True) -> tuple[np.ndarray, np.ndarray | None]:
    """Solve ``M_i x_i = b_i + reg·μ_i`` for every row and invert every ``M_i``.

    With ``prior`` (``μ``) the ridge term ``reg·‖x − μ‖²`` pulls the row toward
    ``μ`` instead of zero: the normal equations gain ``reg·μ`` on the right side
    only, ``M`` already holds ``reg·I``.

    Parameters
    ----------
    systems : ndarray of shape (n, k, k), float64, symmetric positive definite
    rights : ndarray of shape (n, k), float64
    reg : float
    prior : ndarray of shape (n, k) or None
    covariance : bool, default=True
        False: solve only, skip the inverses (about a third of the work).

    Returns
    -------
    x : ndarray of shape (n, k), float64
    covariance : ndarray of shape (n, k, k), float64, or None when not asked for
    """
    if prior is not None:
        rights = rights + reg * np.asarray(prior, dtype=np.float64)
    if systems.shape[0] == 0:
        return np.zeros(rights.shape), (np.zeros(systems.shape) if covariance else None)
    if not covariance:
        return np.linalg.solve(systems, rights[..., None])[..., 0], None
    inverse = np.linalg.inv(systems)
    inverse = 0.5 * (inverse + np.swapaxes(inverse, 1, 2))
    return np.einsum("nij,nj->ni", inverse, rights), inverse


def mode_position(mode_names: Sequence[str], mode: int | str) -> int:
    """Position of a mode given by name or (possibly negative) position."""
    if isinstance(mode, str):
        if mode not in mode_names:
            raise KeyError(f"No mode named {mode!r}; modes are {tuple(mode_names)}.")
        return list(mode_names).index(mode)
    if isinstance(mode, bool) or not isinstance(mode, (int, np.integer)) or not -len(mode_names) <= mode < len(mode_names):
        raise IndexError(f"Mode {mode!r} out of range for a {len(mode_names)}-way model.")
    return int(mode) % len(mode_names)
