"""Model-level diagnostics of a CP model: core consistency, factor match, level similarity.

Pure functions over factor matrices; the report (:mod:`threefold.explain.report`)
draws and words them.

* :func:`core_consistency`: CORCONDIA (Bro & Kiers, "A new efficient method for
  determining the number of components in PARAFAC models", J. Chemometrics 17,
  2003). The least-squares Tucker core ``G`` of the data given the CP factors
  is compared with the superdiagonal core the CP model assumes::

      G = X ×_1 A_1⁺ ×_2 A_2⁺ … ×_N A_N⁺          (A_n⁺ the pseudo-inverse)
      CC = 100 · (1 − Σ (g − t)² / Σ t²)          t = superdiagonal ones

  The model's weights are absorbed into the first factor, so ``t`` is the
  superdiagonal of ones. 100 means the data are trilinear at this rank; values
  well below (or negative) mean some components model noise or interactions.
* :func:`factor_match_score`: the factor match score (Tomasi & Bro, "A
  comparison of algorithms for fitting the PARAFAC model", Comput. Stat. Data
  Anal. 50, 2006): components of two models are paired one to one (Hungarian
  assignment, :func:`scipy.optimize.linear_sum_assignment`) to maximize the
  mean over pairs of the product over modes of the absolute cosine between
  their columns. 1 means the same components up to order, sign and scale.
* :func:`level_similarity`: cosine between the rows of a context factor (one row
  per level), and the average-linkage dendrogram of ``1 - cosine``
  (:func:`scipy.cluster.hierarchy.linkage`): levels that behave alike.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

__all__ = ["core_consistency", "factor_match_score", "level_similarity", "congruence"]


def core_consistency(data, factors: Sequence[np.ndarray], weights: np.ndarray | None = None) -> float:
    """CORCONDIA of CP factors against data, in percent (Bro & Kiers 2003).

    Parameters
    ----------
    data : ndarray of shape (I_1, ..., I_N), or SparseTensor
        The data the model was fitted to. A :class:`~threefold.core.tensor.SparseTensor`
        is never densified: its largest mode is contracted first from the sparse
        unfolding, so the largest intermediate has ``R × prod(other sizes)`` cells.
    factors : sequence of N ndarray of shape (I_n, R)
    weights : ndarray of shape (R,), optional
        Absorbed into the first factor.

    Returns
    -------
    float
        100 for a core equal to the superdiagonal; can be negative.
    """
    factors = [np.asarray(f, dtype=np.float64) for f in factors]
    rank = factors[0].shape[1]
    if any(f.ndim != 2 or f.shape[1] != rank for f in factors):
        raise ValueError(f"core_consistency: every factor must be 2-d with {rank} columns; got shapes "
                         f"{[f.shape for f in factors]}.")
    if weights is not None:
        factors[0] = factors[0] * np.asarray(weights, dtype=np.float64)[None, :]
    inverses = [np.linalg.pinv(f) for f in factors]  # (R, I_n)
    shape = tuple(f.shape[0] for f in factors)
    if hasattr(data, "mode_dot"):  # sparse: contract the largest mode from the sparse unfolding first
        if tuple(data.shape) != shape:
            raise ValueError(f"core_consistency: the tensor's shape {tuple(data.shape)} differs from the factors' {shape}.")
        first = int(np.argmax(shape))
        core = data.mode_dot(inverses[first], first)
        rest = [n for n in range(len(shape)) if n != first]
    else:
        core = np.asarray(data, dtype=np.float64)
        if core.shape != shape:
            raise ValueError(f"core_consistency: the data's shape {core.shape} differs from the factors' {shape}.")
        rest = list(range(len(shape)))
    for n in rest:
        core = np.moveaxis(np.tensordot(inverses[n], core, axes=([1], [n])), 0, n)
    target = np.zeros((rank,) * len(shape))
    target[(np.arange(rank),) * len(shape)] = 1.0
    return float(100.0 * (1.0 - np.sum((core - target) ** 2) / rank))


def congruence(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Absolute cosine between every column of ``a`` (I, R) and of ``b`` (I, S): shape (R, S).

    A zero column has congruence 0 with everything.
    """
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if a.shape[0] != b.shape[0]:
        raise ValueError(f"congruence: the factors have {a.shape[0]} and {b.shape[0]} rows.")
    na = np.linalg.norm(a, axis=0)
    nb = np.linalg.norm(b, axis=0)
    na[na == 0] = np.inf
    nb[nb == 0] = np.inf
    return np.abs((a / na).T @ (b / nb))


def factor_match_score(factors_a: Sequence[np.ndarray], factors_b: Sequence[np.ndarray]) -> tuple[float, np.ndarray]:
    """Factor match score of two CP models and the pairing of their components.

    Parameters
    ----------
    factors_a, factors_b : sequence of N ndarray of shape (I_n, R)
        Both models' factors over the same modes and rank (weights need not be
        absorbed: scale does not enter).

    Returns
    -------
    score : float
        In [0, 1]; 1 for the same components up to permutation, sign and scale.
    pairing : ndarray of shape (R,), int64
        ``pairing[r]`` is the component of ``b`` matched to component ``r`` of ``a``.
    """
    from scipy.optimize import linear_sum_assignment

    if len(factors_a) != len(factors_b):
        raise ValueError(f"factor_match_score: the models have {len(factors_a)} and {len(factors_b)} modes.")
    rank = np.asarray(factors_a[0]).shape[1]
    if any(np.asarray(f).shape[1] != rank for f in (*factors_a, *factors_b)):
        raise ValueError("factor_match_score: both models need the same rank in every mode.")
    product = np.ones((rank, rank))
    for a, b in zip(factors_a, factors_b):
        product *= congruence(a, b)
    rows, cols = linear_sum_assignment(product, maximize=True)
    pairing = np.empty(rank, dtype=np.int64)
    pairing[rows] = cols
    return float(product[rows, cols].mean()), pairing


def level_similarity(factor: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """Cosine between the levels of a context mode, and the average-linkage tree of ``1 - cosine``.

    Parameters
    ----------
    factor : ndarray of shape (L, R)
        One row per level (the context factor, or its columns of one term).

    Returns
    -------
    cosine : ndarray of shape (L, L), float64
        A level with an all-zero row has cosine 0 with every other level and 1 with itself.
    linkage : ndarray of shape (L - 1, 4) or None
        :func:`scipy.cluster.hierarchy.linkage` (method ``"average"``) of the
        condensed ``1 - cosine`` distances; None when there are fewer than 2 levels.
    """
    from scipy.cluster.hierarchy import linkage
    from scipy.spatial.distance import squareform

    rows = np.asarray(factor, dtype=np.float64)
    norms = np.linalg.norm(rows, axis=1)
    safe = np.where(norms > 0, norms, 1.0)
    unit = rows / safe[:, None]
    cosine = np.clip(unit @ unit.T, -1.0, 1.0)
    np.fill_diagonal(cosine, 1.0)
    if rows.shape[0] < 2:
        return cosine, None
    distance = np.clip(1.0 - cosine, 0.0, 2.0)
    np.fill_diagonal(distance, 0.0)
    distance = (distance + distance.T) / 2.0
    return cosine, linkage(squareform(distance, checks=False), method="average")
