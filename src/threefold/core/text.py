"""Plain-text tables for the terminal: one layout for every table a command prints."""

from __future__ import annotations

from typing import Sequence

__all__ = ["text_table", "frame_table"]


def text_table(header: Sequence[str], rows: Sequence[Sequence[object]]) -> list[str]:
    """Lines of a table: columns left-aligned, padded to their widest cell, two spaces apart, no trailing blanks."""
    cells = [[str(c) for c in header]] + [[str(c) for c in row] for row in rows]
    widths = [max(len(row[i]) for row in cells) for i in range(len(header))]
    return ["  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip() for row in cells]


def frame_table(frame, digits: int = 4, last: Sequence[str] = ()) -> list[str]:
    """:func:`text_table` of a DataFrame: floats with ``digits`` decimals, missing values blank.

    Columns named in ``last`` (wide text such as a structure) are moved to the
    right, so that they never push the figures apart.
    """
    import pandas as pd

    columns = [c for c in frame.columns if c not in last] + [c for c in last if c in frame.columns]

    def cell(value) -> str:
        if value is None or (isinstance(value, float) and pd.isna(value)):
            return ""
        if isinstance(value, float):
            return f"{value:.{digits}f}"
        return str(value)

    rows = [[cell(v) for v in record] for record in frame[columns].itertuples(index=False, name=None)]
    return text_table(columns, rows)
