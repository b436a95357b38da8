"""What each latent factor is: strength, context loadings, top items and users, and a label from the catalog.

* **CP** (plain or structured): one entry per component ``r``. Its strength is
  the Frobenius norm of its rank-one term over the whole tensor,
  ``λ_r · Π_{n not in its term} sqrt(I_n)`` (the columns it owns are unit-norm; a
  mode outside its term contributes a column of ones), and its share is the
  squared strength over the sum of all of them: an item × daypart term counts
  for every user it moves, so it is comparable with a user × item term. Its loadings on a context mode are the column ``F_c[:, r]``, one
  value per level, for the modes its term spans. Components are oriented so that
  the item column's largest absolute entry is positive (flipping the item column
  and one other column of the component together leaves the model unchanged), so
  "top items" are the items the component pushes up.
* **Tucker**: one entry per item-factor column ``j``. Its share is
  ``‖G[:, j, …]‖² / ‖G‖²`` of the core's energy (orthonormal factors, Kolda &
  Bader 2009, section 4); context modes are read from their factor matrices
  and the core slices instead (:func:`core_slices`).

Top users are those whose row of the user factor loads most on the component
(CP) — for Tucker the user factor's columns do not belong to item columns, so
none are listed.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from threefold.core.vocabulary import UNKNOWN
from threefold.explain.enrichment import Enrichment, enrichment

__all__ = ["Factor", "factor_summaries", "core_slices", "is_tucker"]


@dataclass(frozen=True)
class Factor:
    """One CP component or one Tucker item column.

    Attributes
    ----------
    index : int
    term : str
        CP: the structure term (``"user*item*daypart"``); Tucker: ``"item column j"``.
    strength : float
        CP: the norm of the component's rank-one term over the whole tensor; Tucker: ``‖G[:, j, …]‖``.
    share : float
        Share of the model's energy, in [0, 1].
    loadings : dict of str to ndarray
        Context mode -> one loading per level (CP, modes the term spans).
    top_items, top_users : ndarray of int
        Positions in the model's vocabularies, strongest first.
    item_values, user_values : ndarray of float
        Their loadings.
    enrichment : Enrichment or None
        Catalog levels over-represented among the top items (None without a catalog).
    level_names : dict of str to list
        Context mode -> its level labels (the model's vocabularies).
    """

    index: int
    term: str
    strength: float
    share: float
    loadings: dict = field(default_factory=dict)
    top_items: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    item_values: np.ndarray = field(default_factory=lambda: np.zeros(0))
    top_users: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    user_values: np.ndarray = field(default_factory=lambda: np.zeros(0))
    enrichment: Enrichment | None = None
    level_names: dict = field(default_factory=dict)

    @property
    def label(self) -> str:
        """Context levels that switch the factor on, then enriched catalog levels (``"evening · kind=video"``)."""
        parts = [f"{mode}: {levels}" for mode, levels in self.peak_levels().items()]
        if self.enrichment is not None:
            enriched = self.enrichment.label()
            if enriched != "no enriched attribute":
                parts.append(enriched)
        return " · ".join(parts) if parts else "no distinctive context or attribute"

    def peak_levels(self, level_names: dict | None = None) -> dict:
        """Per context mode, the level indices (or names) loading above the mean by one standard deviation.

        With ``level_names``, the level ``"unknown"`` (the vocabulary's level for a
        missing value, :data:`threefold.core.vocabulary.UNKNOWN`) is left out: it
        holds the few events without the value, so its row says little.
        """
        out = {}
        for mode, values in self.loadings.items():
            values = np.asarray(values, dtype=np.float64)
            names = (level_names or self.level_names).get(mode)
            keep = np.array([names is None or str(names[i]) != UNKNOWN for i in range(values.size)])
            kept = values[keep]
            if kept.size < 2 or np.allclose(kept, kept[0]):
                continue
            positions = np.flatnonzero(keep)
            peak = positions[kept > kept.mean() + kept.std()]
            if peak.size == 0:
                peak = np.array([positions[int(np.argmax(kept))]])
            out[mode] = "/".join(str(names[i]) if names is not None else str(i) for i in peak)
        return out


def is_tucker(result) -> bool:
    """True for Tucker results (a ``core``), False for CP (``weights``)."""
    return hasattr(result, "core")


def _oriented_cp(result) -> tuple[np.ndarray, list[np.ndarray]]:
    """(weights, factors) with every component's item column's largest absolute entry positive.

    The item column is flipped with one other column the component owns (the
    product is unchanged); a term over the item mode alone takes the sign into
    its weight instead.
    """
    weights = np.asarray(result.weights, dtype=np.float64).copy()
    factors = [np.asarray(f, dtype=np.float64).copy() for f in result.factors]
    owned = result.structure.active_mask(result.mode_names)
    for r in range(weights.size):
        column = factors[1][:, r]
        if column.size == 0 or column[np.argmax(np.abs(column))] >= 0:
            continue
        factors[1][:, r] *= -1
        partner = next((n for n in range(len(factors)) if n != 1 and owned[n, r]), None)
        if partner is None:
            weights[r] *= -1
        else:
            factors[partner][:, r] *= -1
    return weights, factors


def factor_summaries(result, catalog: pd.DataFrame | None = None, *, n_top: int = 20,
                     columns: list[str] | None = None) -> list[Factor]:
    """One :class:`Factor` per CP component or Tucker item column.

    Parameters
    ----------
    result : CPResult or TuckerResult
    catalog : DataFrame, optional
        One row per item *in the model's item order* (``item_id`` first); its
        categorical columns label the factors (:mod:`threefold.explain.enrichment`).
    n_top : int, default=20
        Top items (and users) per factor.
    columns : list of str, optional
        Catalog columns to test (default: every categorical column).

    Returns
    -------
    list of Factor, strongest first.
    """
    n_top = int(n_top)
    if n_top < 1:
        raise ValueError(f"n_top must be at least 1, got {n_top}.")
    names = list(result.mode_names)
    levels = {names[n]: ([str(x) for x in result.vocabularies[n].labels] if result.vocabularies[n] is not None
                         else [str(i) for i in range(result.shape[n])]) for n in range(2, len(names))}
    out = []
    if is_tucker(result):
        core = np.asarray(result.core, dtype=np.float64)
        total = float(np.sum(core ** 2)) or 1.0
        items = np.asarray(result.factors[1], dtype=np.float64)
        for j in range(items.shape[1]):
            column = items[:, j] * (1.0 if items[np.argmax(np.abs(items[:, j])), j] >= 0 else -1.0)
            energy = float(np.sum(np.take(core, j, axis=1) ** 2))
            top = np.argsort(-column, kind="stable")[:n_top]
            out.append(Factor(index=j, term=f"item column {j}", strength=np.sqrt(energy), share=energy / total,
                              top_items=top, item_values=column[top],
                              enrichment=enrichment(top, catalog, columns) if catalog is not None else None,
                              level_names=levels))
    else:
        weights, factors = _oriented_cp(result)
        owned = result.structure.active_mask(names)
        terms = result.structure.component_terms()
        term_names = ["*".join(t.modes) for t in result.structure.terms]
        sizes = np.asarray(result.shape, dtype=np.float64)
        norms = np.abs(weights) * np.prod(np.where(owned, 1.0, np.sqrt(sizes)[:, None]), axis=0)
        total = float(np.sum(norms ** 2)) or 1.0
        for r in range(weights.size):
            loadings = {names[n]: factors[n][:, r].copy() for n in range(2, len(names)) if owned[n, r]}
            top = np.argsort(-factors[1][:, r], kind="stable")[:n_top]
            users = np.argsort(-factors[0][:, r], kind="stable")[:n_top] if owned[0, r] else np.zeros(0, dtype=np.int64)
            out.append(Factor(index=r, term=term_names[terms[r]], strength=float(norms[r]),
                              share=float(norms[r] ** 2 / total), loadings=loadings, top_items=top,
                              item_values=factors[1][top, r], top_users=users, user_values=factors[0][users, r],
                              enrichment=enrichment(top, catalog, columns) if catalog is not None else None,
                              level_names=levels))
    return sorted(out, key=lambda f: -f.share)


def core_slices(result, mode: int) -> np.ndarray:
    """Tucker: the user × item core seen at every level of one context mode.

    Slice ``l`` is ``G ×_mode F_mode[l]`` with every other context mode contracted
    with the mean of its factor rows (the scoring rule for an unknown level,
    :mod:`threefold.core.resolve`), so that ``Q_u · S_l · V_iᵀ`` with ``Q_u`` the
    user row and ``V_i`` the item row is the score at level ``l``.

    Returns
    -------
    ndarray of shape (I_mode, R_user, R_item), float64
    """
    if not is_tucker(result):
        raise ValueError("core_slices needs a Tucker model (it has a core).")
    ndim = len(result.factors)
    if not 2 <= mode < ndim:
        raise ValueError(f"mode must be a context mode in [2, {ndim}), got {mode}.")
    core = np.asarray(result.core, dtype=np.float64)
    for n in range(ndim - 1, 1, -1):  # contract from the last mode so axis numbers stay valid
        factor = np.asarray(result.factors[n], dtype=np.float64)
        rows = factor if n == mode else factor.mean(axis=0, keepdims=True)
        core = np.tensordot(core, rows, axes=([n], [1]))  # appends the level axis at the end
        core = np.moveaxis(core, -1, n)
    # core now has shape (R_u, R_i, 1, ..., I_mode, ..., 1)
    core = core.reshape(core.shape[0], core.shape[1], -1)
    return np.moveaxis(core, -1, 0)
