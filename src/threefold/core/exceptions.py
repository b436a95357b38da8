"""Warnings and errors of threefold."""

from __future__ import annotations

__all__ = ["ConvergenceWarning"]


class ConvergenceWarning(UserWarning):
    """An iterative fit stopped at its sweep cap before meeting its tolerance."""
