"""Metadata enrichment of a component's top items: what the items a component favours have in common.

For one component and one categorical catalog column, every level is tested
for over-representation among the component's top ``n`` items with the
one-sided hypergeometric test (the upper tail of
:func:`scipy.stats.hypergeom`, the same p-value as Fisher's exact test with
``alternative="greater"``): with ``M`` catalog items of which ``K`` have the
level, and ``k`` of the top ``n`` having it::

    p = P(X >= k),  X ~ Hypergeom(M, K, n)

The p-values of all tests of a component (every column, every level) are
adjusted together by the Benjamini–Hochberg step-up procedure (Benjamini &
Hochberg, "Controlling the false discovery rate", J. R. Stat. Soc. B 57, 1995;
:func:`scipy.stats.false_discovery_control`). A component's label joins its
enriched levels (adjusted p below ``alpha``), strongest first, e.g.
``"kind=audio · format=long"``.

Columns come from the user's catalog: any column with between 2 and
``max_levels`` distinct values is tested; nothing is named in advance.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["categorical_columns", "enrichment", "component_label", "Enrichment"]

MAX_LEVELS = 30


def categorical_columns(catalog: pd.DataFrame, *, id_column: str = "item_id", max_levels: int = MAX_LEVELS) -> list[str]:
    """Catalog columns worth testing: 2 to ``max_levels`` distinct non-blank values, not the id, not times."""
    out = []
    for column in catalog.columns:
        if column == id_column or pd.api.types.is_datetime64_any_dtype(catalog[column]):
            continue
        if pd.api.types.is_float_dtype(catalog[column]):
            continue  # numeric measurements are not categories
        levels = catalog[column].dropna().astype(str)
        if 2 <= levels.nunique() <= max_levels:
            out.append(column)
    return out


@dataclass(frozen=True)
class Enrichment:
    """Enrichment tests of one item set.

    Attributes
    ----------
    table : DataFrame
        One row per (column, level) present in the catalog: ``column, level,
        in_top, top_size, in_catalog, catalog_size, ratio, p_value, q_value,
        enriched``; sorted by ``q_value`` then ``ratio`` descending.
    """

    table: pd.DataFrame

    def label(self, max_parts: int = 3) -> str:
        """The enriched levels joined by `` · `` (``"no enriched attribute"`` when none)."""
        return component_label(self.table, max_parts=max_parts)


def enrichment(top_items: np.ndarray, catalog: pd.DataFrame, columns: list[str] | None = None, *,
               alpha: float = 0.05) -> Enrichment:
    """Test every level of every column for over-representation among ``top_items``.

    Parameters
    ----------
    top_items : ndarray of int
        Row positions in ``catalog`` of the item set (e.g. a component's top 20).
    catalog : DataFrame
        One row per item of the model, in the model's item order.
    columns : list of str, optional
        Default: :func:`categorical_columns`.
    alpha : float, default=0.05
        False discovery rate of the Benjamini–Hochberg adjustment.

    Returns
    -------
    Enrichment
    """
    from scipy.stats import false_discovery_control, hypergeom

    top_items = np.unique(np.asarray(top_items, dtype=np.int64))
    if top_items.size and (top_items.min() < 0 or top_items.max() >= len(catalog)):
        raise ValueError(f"enrichment: item positions must lie in [0, {len(catalog)}); got {top_items.min()}..{top_items.max()}.")
    columns = categorical_columns(catalog) if columns is None else columns
    missing = [c for c in columns if c not in catalog.columns]
    if missing:
        raise ValueError(f"enrichment: the catalog has no column(s) {missing}; it has {list(catalog.columns)}.")
    rows = []
    for column in columns:
        values = catalog[column].astype("string")
        known = values.notna().to_numpy()
        size = int(known.sum())
        top_known = top_items[known[top_items]]
        for level, count in values[known].value_counts(sort=False).items():
            has = (values == level).fillna(False).to_numpy()
            k = int(has[top_known].sum())
            n = int(top_known.size)
            p = float(hypergeom.sf(k - 1, size, int(count), n)) if n else 1.0
            ratio = (k / n) / (count / size) if n and count else 0.0
            rows.append({"column": column, "level": str(level), "in_top": k, "top_size": n,
                         "in_catalog": int(count), "catalog_size": size, "ratio": ratio, "p_value": p})
    table = pd.DataFrame(rows, columns=["column", "level", "in_top", "top_size", "in_catalog", "catalog_size",
                                        "ratio", "p_value"])
    table["q_value"] = false_discovery_control(table["p_value"].to_numpy(), method="bh") if len(table) else []
    table["enriched"] = (table["q_value"] < alpha) & (table["ratio"] > 1.0)
    table = table.sort_values(["q_value", "ratio"], ascending=[True, False], kind="stable").reset_index(drop=True)
    return Enrichment(table)


def component_label(table: pd.DataFrame, *, max_parts: int = 3) -> str:
    """``"column=level · column=level"`` of the enriched rows, one level per column, strongest first."""
    enriched = table[table["enriched"]]
    parts, seen = [], set()
    for row in enriched.itertuples(index=False):
        if row.column in seen:
            continue
        seen.add(row.column)
        parts.append(f"{row.column}={row.level}")
        if len(parts) == max_parts:
            break
    return " · ".join(parts) if parts else "no enriched attribute"
