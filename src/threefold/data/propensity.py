"""Position propensities: how likely a visitor is to examine each slot of a list.

Under the position-based model (PBM) a shown item is clicked when its slot was
examined and the item is relevant: ``P(click | key d, position k) = theta_k * gamma_d``.
The examination probabilities ``theta_k`` are estimated by expectation
maximization over the impressions of the log (Wang, Golbandi, Bendersky,
Metzler & Najork, "Position Bias Estimation for Unbiased Learning to Rank in
Personal Search", WSDM 2018, section 4; their regression-EM replaces the free
relevance ``gamma_d`` used here by a regression on features).

The model is identified only up to scale (``theta * c`` and ``gamma / c`` give
the same clicks), so results are reported as ratios ``theta_k / theta_1``; and
only when the same relevance key is seen at several positions (randomized swaps
in the logging policy). The estimate is unbiased when, within one relevance key,
the position an item lands in does not depend on its relevance to the visitor;
pick ``relevance_key`` so that this holds as far as possible.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from threefold.core.checks import check_int, check_number
from threefold.data._eventscan import MAX_POSITION

__all__ = [
    "PROPENSITY_COLUMNS",
    "PositionPropensity",
    "PropensityWarning",
    "estimate_position_propensity",
    "pbm_posteriors",
]


#: Columns a log needs for position propensities.
PROPENSITY_COLUMNS = ("event", "position", "request_id", "item_id")


class PropensityWarning(UserWarning):
    """The log cannot identify position propensities well."""


@dataclass(frozen=True)
class PositionPropensity:
    """Estimated examination probability per position.

    Attributes
    ----------
    ratios : ndarray of shape (n_positions,), float64
        ``theta_k / theta_1`` for positions 1..n_positions (``ratios[0] == 1``).
    theta : ndarray of shape (n_positions,), float64
        The EM estimate itself (meaningful only up to scale).
    impressions : ndarray of shape (n_positions,), int64
        Impressions used per position.
    varied_share : float
        Share of impressions whose relevance key was shown at two or more
        positions; the estimate rests on these.
    n_iter : int
    converged : bool
    """

    ratios: np.ndarray
    theta: np.ndarray
    impressions: np.ndarray
    varied_share: float
    n_iter: int
    converged: bool

    def to_dict(self) -> dict:
        return {
            "ratios": self.ratios.tolist(),
            "theta": self.theta.tolist(),
            "impressions": self.impressions.tolist(),
            "varied_share": self.varied_share,
            "n_iter": self.n_iter,
            "converged": self.converged,
        }


def pbm_posteriors(theta: np.ndarray, gamma: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Posteriors of a non-click under the position-based model.

    Parameters
    ----------
    theta, gamma : array-like, broadcastable, float
        Examination and relevance probabilities.

    Returns
    -------
    examined_not_relevant : ndarray
        ``P(E=1, R=0 | no click) = theta (1 - gamma) / (1 - theta gamma)``.
    relevant_not_examined : ndarray
        ``P(E=0, R=1 | no click) = (1 - theta) gamma / (1 - theta gamma)``.
    """
    theta = np.asarray(theta, dtype=np.float64)
    gamma = np.asarray(gamma, dtype=np.float64)
    denom = np.maximum(1.0 - theta * gamma, 1e-12)
    return theta * (1.0 - gamma) / denom, (1.0 - theta) * gamma / denom


def estimate_position_propensity(
    events: pd.DataFrame,
    *,
    relevance_key: Sequence[str] = ("item_id",),
    max_position: int | None = None,
    max_iter: int = 5000,
    tol: float = 1e-7,
    min_varied_share: float = 0.05,
) -> PositionPropensity:
    """Estimate ``theta_k / theta_1`` from the impressions and clicks of a log.

    Parameters
    ----------
    events : DataFrame
        Normalized events with ``event``, ``position``, ``request_id``,
        ``item_id`` and the ``relevance_key`` columns. An impression counts as
        clicked when its request has a click on the same item.
    relevance_key : sequence of str, default=("item_id",)
        Columns whose combination shares one relevance ``gamma``.
    max_position : int, optional
        Ignore impressions below this slot (default: the deepest slot seen).
    max_iter : int, default=5000
    tol : float, default=1e-7
        Stop when no ratio moves by more than ``tol``.
    min_varied_share : float, default=0.05
        Warn (:class:`PropensityWarning`) when fewer impressions than this share
        have a relevance key shown at several positions.

    Returns
    -------
    PositionPropensity
    """
    check_int("max_iter", max_iter, low=1, owner="estimate_position_propensity")
    check_number("tol", tol, low=0.0, owner="estimate_position_propensity")
    needed = ["event", "position", "request_id", "item_id", *relevance_key]
    missing = [c for c in dict.fromkeys(needed) if c not in events.columns]
    if missing:
        raise KeyError(f"Position propensities need the column(s) {missing}.")
    event = events["event"].to_numpy(dtype=object)
    position = pd.to_numeric(events["position"], errors="coerce").to_numpy(dtype=np.float64)
    request = pd.factorize(events["request_id"].astype(object))[0].astype(np.int64)
    item = pd.factorize(events["item_id"].astype(object))[0].astype(np.int64)
    pair = request * (int(item.max(initial=0)) + 1) + item
    is_impression = (event == "impression") & np.isfinite(position) & (position >= 1)
    clicked = np.isin(pair, np.unique(pair[event == "click"]))
    limit = int(position[is_impression].max(initial=0)) if max_position is None else check_int(
        "max_position", max_position, low=1, owner="estimate_position_propensity"
    )
    if limit > MAX_POSITION:
        rows = np.flatnonzero(is_impression & (position > MAX_POSITION))[:5].tolist()
        raise ValueError(f"Column 'position': positions above {MAX_POSITION:,} (rows {rows} of the events, 0-based); "
                         "a list that long is a logging error. Clear or fix those rows, or pass max_position.")
    use = is_impression & (position <= limit)
    if not use.any():
        raise ValueError("The log has no impressions with a position; position propensities cannot be estimated.")

    key = pd.MultiIndex.from_frame(events.loc[use, list(relevance_key)].astype(object)).factorize()[0] if len(relevance_key) > 1 else pd.factorize(events.loc[use, relevance_key[0]].astype(object))[0]
    slot = position[use].astype(np.int64) - 1
    groups = pd.DataFrame({"key": key, "slot": slot, "click": clicked[use].astype(np.float64)})
    agg = groups.groupby(["key", "slot"], sort=False)["click"].agg(["size", "sum"]).reset_index()
    g_key = agg["key"].to_numpy()
    g_slot = agg["slot"].to_numpy()
    n_shown = agg["size"].to_numpy(dtype=np.float64)
    n_click = agg["sum"].to_numpy(dtype=np.float64)
    n_keys = int(g_key.max()) + 1

    positions_per_key = np.bincount(g_key, minlength=n_keys)
    varied_share = float(n_shown[positions_per_key[g_key] >= 2].sum() / n_shown.sum())
    if varied_share < min_varied_share:
        warnings.warn(
            f"Only {varied_share:.1%} of impressions have a relevance key shown at several positions; "
            "position propensities are poorly identified (the log needs position variation, e.g. randomized swaps).",
            PropensityWarning,
            stacklevel=2,
        )

    per_slot = np.bincount(g_slot, weights=n_shown, minlength=limit)
    per_key = np.bincount(g_key, weights=n_shown, minlength=n_keys)
    theta = np.full(limit, 0.5)
    gamma = np.full(n_keys, 0.5)
    ratios = theta / theta[0]
    converged = False
    n_iter = 0
    for n_iter in range(1, max_iter + 1):
        examined, relevant = pbm_posteriors(theta[g_slot], gamma[g_key])
        no_click = n_shown - n_click
        new_theta = np.bincount(g_slot, weights=n_click + no_click * examined, minlength=limit) / np.maximum(per_slot, 1)
        new_gamma = np.bincount(g_key, weights=n_click + no_click * relevant, minlength=n_keys) / np.maximum(per_key, 1)
        theta = np.clip(new_theta, 1e-9, 1.0)
        gamma = np.clip(new_gamma, 1e-9, 1.0 - 1e-9)
        new_ratios = theta / theta[0]
        moved = float(np.max(np.abs(new_ratios - ratios)))
        ratios = new_ratios
        if moved <= tol:
            converged = True
            break
    return PositionPropensity(
        ratios=ratios,
        theta=theta,
        impressions=per_slot.astype(np.int64),
        varied_share=varied_share,
        n_iter=n_iter,
        converged=converged,
    )
