"""Exposure-aware implicit feedback: from raw cell evidence to preference and confidence.

Every stored tensor cell (user, item, context levels) keeps its raw evidence
(:class:`CellEvidence`): how often it was clicked, the total dwell, how often it
was shown and skipped, and when it was last seen. A :class:`FeedbackWeighting`
turns that evidence into a preference ``p`` and a confidence ``w`` per cell, so a
sweep over ``alpha``, ``w0``, ``w_skip`` or the decay never re-reads the log.

The math (see ``docs/feedback.md`` for a hand-worked table):

* click evidence:  ``W_click = 1 + alpha * f(x)`` when the cell has clicks, else 0,
  with ``x`` the click count or the total dwell and ``f`` one of ``log1p``,
  ``linear``, ``none`` (Hu, Koren & Volinsky, ICDM 2008);
* skip evidence:   ``W_skip = w_skip * skips`` (each skip is an explicit
  negative with preference 0);
* combined:        ``w = (W_click + W_skip) * d``,  ``p = W_click / (W_click + W_skip)``,
  with ``d = 2 ** (-(t_ref - last_seen) / half_life)`` when a decay is set, else 1;
* cells never shown are not stored and carry the global weight ``w0`` with ``p = 0``.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace
from typing import Literal

import numpy as np

from threefold.core.checks import check_choice, check_number

__all__ = ["CellEvidence", "FeedbackWeighting", "cell_weights"]

Transform = Literal["log1p", "linear", "none"]
Signal = Literal["clicks", "dwell"]
#: What ``w0`` weighs: each unshown cell, or each (user, item) pair over its context cells.
W0_SCOPES = ("cell", "pair")


@dataclass(frozen=True, eq=False)
class CellEvidence:
    """Raw per-cell evidence, aligned with a tensor's stored cells.

    Attributes
    ----------
    clicks : ndarray of shape (nnz,), float32
        Number of clicks (consumptions); fractional when clicks were weighted by
        inverse position propensity at build time.
    dwell : ndarray of shape (nnz,), float32
        Total dwell seconds over the cell's clicks (0 when unknown).
    skips : ndarray of shape (nnz,), float32
        Number of exposures that count as negatives (see the ``negatives`` rule
        of :func:`threefold.data.build.build_tensor`).
    last_seen : ndarray of shape (nnz,), uint32
        Seconds from ``time_origin`` to the cell's last event.
    time_origin : int
        Epoch seconds (UTC) that ``last_seen`` counts from.
    """

    clicks: np.ndarray
    dwell: np.ndarray
    skips: np.ndarray
    last_seen: np.ndarray
    time_origin: int

    def __post_init__(self) -> None:
        n = self.clicks.shape[0]
        for name in ("clicks", "dwell", "skips", "last_seen"):
            arr = getattr(self, name)
            if arr.ndim != 1 or arr.shape[0] != n:
                raise ValueError(
                    f"CellEvidence.{name} must have shape ({n},), got {arr.shape}."
                )
        if n and not np.all((self.clicks > 0) | (self.skips > 0)):
            raise ValueError("CellEvidence holds a cell with neither clicks nor skips.")

    @property
    def nbytes(self) -> int:
        """Bytes held by the evidence arrays."""
        return sum(getattr(self, n).nbytes for n in ("clicks", "dwell", "skips", "last_seen"))

    def take(self, index: np.ndarray) -> "CellEvidence":
        """Evidence of the cells selected by ``index`` (boolean mask or positions)."""
        return CellEvidence(
            clicks=self.clicks[index],
            dwell=self.dwell[index],
            skips=self.skips[index],
            last_seen=self.last_seen[index],
            time_origin=self.time_origin,
        )


@dataclass(frozen=True)
class FeedbackWeighting:
    """How raw evidence becomes preference and confidence.

    Parameters
    ----------
    alpha : float, default=10.0
        Scale of the click confidence ``1 + alpha * f(x)``; in [0, inf).
    transform : {"log1p", "linear", "none"}, default="log1p"
        ``f``: ``log1p(x)``, ``x``, or constant 0 (every clicked cell gets 1).
    signal : {"clicks", "dwell"}, default="clicks"
        ``x``: the click count, or the total dwell in seconds.
    w_skip : float, default=2.0
        Confidence of each exposure that counts as a negative; in [0, inf).
    w0 : float, default=0.1
        Weight of the cells that were never shown (not stored); in [0, inf).
    w0_scope : {"cell", "pair"}, default="cell"
        What ``w0`` weighs: every unshown cell (``"cell"``), or every (user,
        item) pair, spread evenly over its context cells (``"pair"``: each
        unshown cell weighs ``w0 / Π_{c >= 2} I_c``). With ``"pair"`` the
        unshown mass stays that of a two-way model whatever the context modes;
        a tensor resolves it to the per-cell weight when it is built
        (:meth:`per_cell`).
    half_life_hours : float or None, default=None
        Time decay of a cell's confidence by the age of its last event at
        ``reference_time``; ``None`` disables decay.
    reference_time : int or None, default=None
        Epoch seconds at which ages are measured; defaults to the newest event.
    """

    alpha: float = 10.0
    transform: Transform = "log1p"
    signal: Signal = "clicks"
    w_skip: float = 2.0
    w0: float = 0.1
    w0_scope: str = "cell"
    half_life_hours: float | None = None
    reference_time: int | None = None

    def __post_init__(self) -> None:
        check_number("alpha", self.alpha, low=0.0, owner="FeedbackWeighting")
        check_choice("transform", self.transform, ("log1p", "linear", "none"), owner="FeedbackWeighting")
        check_choice("signal", self.signal, ("clicks", "dwell"), owner="FeedbackWeighting")
        check_number("w_skip", self.w_skip, low=0.0, owner="FeedbackWeighting")
        check_number("w0", self.w0, low=0.0, owner="FeedbackWeighting")
        check_choice("w0_scope", self.w0_scope, W0_SCOPES, owner="FeedbackWeighting")
        if self.half_life_hours is not None:
            check_number("half_life_hours", self.half_life_hours, low=0.0, low_open=True, owner="FeedbackWeighting")

    def to_dict(self) -> dict:
        """Plain dict of the parameters (JSON-serializable)."""
        return asdict(self)

    def per_cell(self, shape: tuple[int, ...]) -> "FeedbackWeighting":
        """The same weighting with ``w0`` per cell of a tensor of ``shape`` (user, item, context...)."""
        if self.w0_scope == "cell":
            return self
        context_cells = float(np.prod([int(s) for s in shape[2:]], dtype=np.float64)) if len(shape) > 2 else 1.0
        return replace(self, w0=self.w0 / max(context_cells, 1.0), w0_scope="cell")


def cell_weights(
    evidence: CellEvidence, weighting: FeedbackWeighting, dtype: np.dtype | type = np.float32
) -> tuple[np.ndarray, np.ndarray]:
    """Preference and confidence of every stored cell.

    Parameters
    ----------
    evidence : CellEvidence
        Raw evidence of ``nnz`` cells.
    weighting : FeedbackWeighting
    dtype : numpy dtype, default=float32

    Returns
    -------
    preference : ndarray of shape (nnz,), dtype
        ``W_click / (W_click + W_skip)``, in [0, 1].
    confidence : ndarray of shape (nnz,), dtype
        ``(W_click + W_skip) * decay``; strictly positive unless ``w_skip = 0``
        and the cell has only skips (then 0: the cell is ignored).
    """
    x = evidence.clicks if weighting.signal == "clicks" else evidence.dwell
    x = x.astype(np.float64)
    if weighting.transform == "log1p":
        fx = np.log1p(x)
    elif weighting.transform == "linear":
        fx = x
    else:
        fx = np.zeros_like(x)
    w_click = np.where(evidence.clicks > 0, 1.0 + weighting.alpha * fx, 0.0)
    w_skip = weighting.w_skip * evidence.skips.astype(np.float64)
    total = w_click + w_skip
    with np.errstate(invalid="ignore", divide="ignore"):
        preference = np.where(total > 0, w_click / np.where(total > 0, total, 1.0), 0.0)
    if weighting.half_life_hours is not None:
        last = evidence.time_origin + evidence.last_seen.astype(np.int64)
        ref = weighting.reference_time if weighting.reference_time is not None else int(last.max(initial=evidence.time_origin))
        age_hours = np.maximum(ref - last, 0) / 3600.0
        total = total * np.exp2(-age_hours / weighting.half_life_hours)
    return preference.astype(dtype), total.astype(dtype)
