"""Diagnostics of fitted CP models.

References
----------
Acar, E., Dunlavy, D. M., Kolda, T. G. & Mørup, M. "Scalable tensor
factorizations for incomplete data", Chemometrics and Intelligent Laboratory
Systems 106(1), 2011 (factor match score, section 5).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from scipy.optimize import linear_sum_assignment

__all__ = ["factor_match_score"]


def factor_match_score(
    true: tuple[np.ndarray, Sequence[np.ndarray]], estimated: tuple[np.ndarray, Sequence[np.ndarray]]
) -> float:
    """Factor match score of an estimated CP model against the true one.

    ``FMS = (1/R) Σ_r (1 − |ξ_r − ξ̂_r| / max(ξ_r, ξ̂_r)) · Π_n |a_rᵀ â_r| / (‖a_r‖ ‖â_r‖)``
    with ``ξ_r = λ_r Π_n ‖a_r⁽ⁿ⁾‖``, components matched one-to-one by the
    Hungarian algorithm (``scipy.optimize.linear_sum_assignment``) to maximize
    the total score (Acar et al. 2011). It is 1 for a permuted, sign-flipped,
    rescaled copy and at most 1 otherwise.

    Parameters
    ----------
    true, estimated : (weights, factors)
        ``weights`` of shape (R,) (or (R̂,)), ``factors`` one array of shape
        (I_n, R) per mode; a ``CPResult`` or tensorly ``CPTensor`` unpacks the same
        way via ``(result.weights, result.factors)``. The estimate may have more
        components than the truth; unmatched ones are ignored.

    Returns
    -------
    float
        Mean over the true components.
    """
    weights, factors = _unpack(true, "true")
    est_weights, est_factors = _unpack(estimated, "estimated")
    if len(factors) != len(est_factors):
        raise ValueError(f"true has {len(factors)} modes, estimated {len(est_factors)}.")
    if est_weights.size < weights.size:
        raise ValueError(f"estimated has {est_weights.size} components, fewer than the {weights.size} true ones.")
    congruence = np.ones((weights.size, est_weights.size))
    xi = np.abs(weights).copy()
    est_xi = np.abs(est_weights).copy()
    for n, (a, b) in enumerate(zip(factors, est_factors)):
        if a.shape[0] != b.shape[0]:
            raise ValueError(f"Mode {n} has {a.shape[0]} rows in true but {b.shape[0]} in estimated.")
        na = np.linalg.norm(a, axis=0)
        nb = np.linalg.norm(b, axis=0)
        xi *= na
        est_xi *= nb
        congruence *= np.abs(a.T @ b) / np.maximum(np.outer(na, nb), np.finfo(float).tiny)
    largest = np.maximum.outer(xi, est_xi)
    penalty = 1.0 - np.abs(np.subtract.outer(xi, est_xi)) / np.where(largest > 0, largest, 1.0)
    scores = penalty * congruence
    rows, cols = linear_sum_assignment(scores, maximize=True)
    return float(scores[rows, cols].sum() / weights.size)


def _unpack(model, name: str) -> tuple[np.ndarray, list[np.ndarray]]:
    try:
        weights, factors = model
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a (weights, factors) pair.") from None
    factors = [np.asarray(f, dtype=np.float64) for f in factors]
    weights = np.ones(factors[0].shape[1]) if weights is None else np.asarray(weights, dtype=np.float64)
    for n, f in enumerate(factors):
        if f.ndim != 2 or f.shape[1] != weights.size:
            raise ValueError(f"{name} factor {n} must have shape (I, {weights.size}), got {f.shape}.")
    return weights, factors
