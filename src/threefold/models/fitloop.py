"""The one fit loop of every factor model: sweeps, stop rules, the callback, the convergence warning.

A fit function hands :func:`run_sweeps` a ``sweep()`` that updates its factors
once and returns ``(loss, fit)``, and a ``state()`` that gives the callback a
read-only view of the model; the loop records a :class:`SweepRecord` per sweep
and stops on convergence, on the cap, or when the callback says so.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass
from typing import Callable

import numpy as np

from threefold.core.exceptions import ConvergenceWarning

__all__ = ["SweepRecord", "STOP_REASONS", "run_sweeps"]

STOP_REASONS = ("converged", "max_sweeps", "callback")


@dataclass(frozen=True)
class SweepRecord:
    """Progress after one sweep (sweep 0 is the initial state).

    Attributes
    ----------
    sweep : int
    loss : float
        The full objective, regularization included.
    fit : float
        Weighted relative fit ``1 − sqrt(Σ w (p − x̂)² / Σ w p²)``.
    seconds : float
        Wall time of this sweep (of the initialization for sweep 0).
    """

    sweep: int
    loss: float
    fit: float
    seconds: float


def run_sweeps(sweep: Callable[[], tuple[float, float]], first: SweepRecord, *, max_sweeps: int, tol: float,
               loss_floor: float, callback, state: Callable[[], object], owner: str) -> tuple[list[SweepRecord], str]:
    """Run sweeps until convergence, the cap, or the callback says stop.

    Parameters
    ----------
    sweep : callable
        Does one sweep; returns ``(loss, fit)``.
    first : SweepRecord
        The initial state (sweep 0).
    max_sweeps, tol : int, float
        Stop when ``|Δ loss| / max(|previous loss|, loss_floor) < tol`` (never with ``tol = 0``).
    loss_floor : float
        Keeps the relative change finite near an exact fit.
    callback : callable or None
        ``callback(record, state())``; True stops.
    state : callable
        The callback's second argument (read-only views of the model).
    owner : str
        Named in the warning.

    Returns
    -------
    history : list of SweepRecord
    stop_reason : {"converged", "max_sweeps", "callback"}

    Warns
    -----
    ConvergenceWarning
        When ``tol > 0`` and ``max_sweeps`` sweeps did not reach it.
    """
    history = [first]
    stop_reason = "max_sweeps"
    for number in range(1, max_sweeps + 1):
        start = time.perf_counter()
        loss, fit = sweep()
        record = SweepRecord(number, loss, fit, time.perf_counter() - start)
        history.append(record)
        if callback is not None and callback(record, state()):
            stop_reason = "callback"
            break
        change = abs(history[-2].loss - loss) / max(abs(history[-2].loss), loss_floor, np.finfo(float).tiny)
        if tol > 0 and change < tol:
            stop_reason = "converged"
            break
    if stop_reason == "max_sweeps" and tol > 0:
        warnings.warn(f"{owner} stopped after max_sweeps={max_sweeps} sweeps before the relative loss change fell "
                      f"below tol={tol:g}; raise max_sweeps or tol.", ConvergenceWarning, stacklevel=3)
    return history, stop_reason
