"""Warnings and errors of threefold."""

from __future__ import annotations

__all__ = ["ConvergenceWarning", "InputRowsError"]


class ConvergenceWarning(UserWarning):
    """An iterative fit stopped at its sweep cap before meeting its tolerance."""


class InputRowsError(ValueError):
    """Bad values in some rows of one column of an input table.

    Raised where a table is checked (requests, candidates); a caller that knows
    the file and where the table started in it re-raises with :meth:`located`,
    so the message names file, column and rows.

    Parameters
    ----------
    column : str
    rows : array-like of int
        0-based positions of the offending rows in the checked table.
    problem : str
        What is wrong, e.g. ``"not a timestamp"``.
    examples : sequence, optional
        A few offending values, shown in the message.
    """

    _SHOWN = 5

    def __init__(self, column: str, rows, problem: str, examples=()):
        self.column = column
        self.rows = [int(r) for r in rows]
        self.problem = problem
        self.examples = list(examples)[: self._SHOWN]
        super().__init__(self.describe())

    def describe(self, source: str = "the requests", first_row: int = 1) -> str:
        """The message, with rows as 1-based data rows counted from ``first_row``."""
        numbers = [first_row + r for r in self.rows[: self._SHOWN]]
        more = f" and {len(self.rows) - self._SHOWN} more" if len(self.rows) > self._SHOWN else ""
        shown = f" (e.g. {', '.join(repr(v) for v in self.examples)})" if self.examples else ""
        return (f"{source}: column {self.column!r}: {self.problem} in {len(self.rows)} row(s): "
                f"data row(s) {', '.join(map(str, numbers))}{more}{shown}.")

    def located(self, source: str, first_row: int) -> "InputRowsError":
        """The same error, its message naming ``source`` and rows counted from ``first_row``."""
        error = InputRowsError(self.column, self.rows, self.problem, self.examples)
        error.args = (self.describe(source, first_row),)
        return error
