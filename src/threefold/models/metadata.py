"""Item factor rows from catalog attributes: a ridge map for items without events.

A new story has no events, so a factor model has no row for it. The
attribute-to-factor mapping (Gantner, Drumond, Freudenthaler, Rendle &
Schmidt-Thieme, "Learning attribute-to-feature mappings for cold-start
recommendations", ICDM 2010) learns a linear map from item attributes to the
item factor rows of the known items and predicts a row for a new item from its
attributes alone.

Attributes (:class:`AttributeEncoder`): each categorical column becomes one
indicator per level seen in training (a level not seen, or a blank, is all
zeros); each numeric column is standardized with the known items' mean and
standard deviation (a blank is the mean, 0). Text columns are out of scope.

The map (:func:`fit_metadata_map`) is ridge regression with an unpenalized
intercept, for every factor column at once::

    (W, b) = argmin  Σ_i ‖v_i − (x_i W + b)‖² + α ‖W‖²_F

solved in closed form on centred data: ``W = (X̃ᵀX̃ + αI)⁻¹ X̃ᵀṼ``,
``b = mean(V) − mean(X) W`` (the same estimator as
``sklearn.linear_model.Ridge(alpha, fit_intercept=True)``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

#: Catalog columns that are live times, never attributes.
CATALOG_TIME_COLUMNS = ("published_at", "expires_at")

__all__ = ["CATALOG_TIME_COLUMNS", "AttributeEncoder", "MetadataMap", "fit_encoder", "fit_metadata_map"]


@dataclass(frozen=True)
class AttributeEncoder:
    """How catalog columns become a design matrix.

    Attributes
    ----------
    categorical : dict of str to tuple of str
        Column -> its levels in training, sorted (one indicator each).
    numeric : dict of str to (float, float)
        Column -> (mean, standard deviation) of the training items.
    """

    categorical: dict
    numeric: dict

    @property
    def feature_names(self) -> list[str]:
        return ([f"{c}={level}" for c, levels in self.categorical.items() for level in levels]
                + list(self.numeric))

    def transform(self, catalog: pd.DataFrame) -> np.ndarray:
        """Design matrix of shape (n_items, n_features), float64; see the module docstring for blanks."""
        missing = [c for c in [*self.categorical, *self.numeric] if c not in catalog.columns]
        if missing:
            raise ValueError(f"The catalog lacks the attribute column(s) {missing} the map was fitted on; "
                             f"it has {list(catalog.columns)}.")
        blocks = []
        for column, levels in self.categorical.items():
            values = catalog[column].astype("string").str.strip()
            blocks.append(np.stack([(values == level).fillna(False).to_numpy(dtype=np.float64) for level in levels],
                                   axis=1))
        for column, (mean, std) in self.numeric.items():
            values = pd.to_numeric(catalog[column], errors="coerce").to_numpy(dtype=np.float64)
            blocks.append(np.nan_to_num((values - mean) / std, nan=0.0)[:, None])
        return np.hstack(blocks) if blocks else np.zeros((len(catalog), 0))

    def to_dict(self) -> dict:
        return {"categorical": {c: list(v) for c, v in self.categorical.items()},
                "numeric": {c: [float(m), float(s)] for c, (m, s) in self.numeric.items()}}

    @classmethod
    def from_dict(cls, data: dict) -> "AttributeEncoder":
        return cls(categorical={c: tuple(v) for c, v in data["categorical"].items()},
                   numeric={c: (float(v[0]), float(v[1])) for c, v in data["numeric"].items()})


def fit_encoder(catalog: pd.DataFrame, columns: list[str] | None = None, *, id_column: str = "item_id",
                max_levels: int = 200) -> AttributeEncoder:
    """The encoder of ``columns`` (default: every column but the id, the live times and datetime columns).

    String, boolean and categorical columns are categorical; numeric columns are
    numeric. A categorical column with more than ``max_levels`` levels (free
    text, ids) is refused when named, skipped when not.
    """
    named = columns is not None
    skipped = {id_column, *CATALOG_TIME_COLUMNS}
    columns = [c for c in catalog.columns if c not in skipped] if columns is None else list(columns)
    missing = [c for c in columns if c not in catalog.columns]
    if missing:
        raise ValueError(f"The catalog has no column(s) {missing}; it has {list(catalog.columns)}.")
    categorical, numeric = {}, {}
    for column in columns:
        series = catalog[column]
        if pd.api.types.is_datetime64_any_dtype(series):
            continue
        if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series):
            values = series.to_numpy(dtype=np.float64)
            finite = values[np.isfinite(values)]
            std = float(finite.std()) if finite.size else 0.0
            numeric[column] = (float(finite.mean()) if finite.size else 0.0, std if std > 0 else 1.0)
            continue
        levels = sorted(set(series.dropna().astype(str).str.strip()) - {""})
        if len(levels) > max_levels:
            if named:
                raise ValueError(f"Catalog column {column!r} has {len(levels):,} distinct values (more than "
                                 f"{max_levels}): free text or ids are not attributes.")
            continue
        if levels:
            categorical[column] = tuple(levels)
    if not categorical and not numeric:
        raise ValueError(f"No usable attribute column among {columns}.")
    return AttributeEncoder(categorical=categorical, numeric=numeric)


@dataclass(frozen=True)
class MetadataMap:
    """A fitted attribute-to-factor map: ``rows = encoder.transform(catalog) @ coef + intercept``.

    Attributes
    ----------
    encoder : AttributeEncoder
    coef : ndarray of shape (n_features, R), float64
    intercept : ndarray of shape (R,), float64
    alpha : float
    """

    encoder: AttributeEncoder
    coef: np.ndarray
    intercept: np.ndarray
    alpha: float

    def predict(self, catalog: pd.DataFrame) -> np.ndarray:
        """Predicted item rows, shape (n_items, R), float64."""
        return self.encoder.transform(catalog) @ self.coef + self.intercept


def fit_metadata_map(catalog: pd.DataFrame, item_rows: np.ndarray, *, alpha: float = 1.0,
                     columns: list[str] | None = None) -> MetadataMap:
    """Ridge map from the attributes of known items to their factor rows (Gantner et al. 2010).

    Parameters
    ----------
    catalog : DataFrame
        One row per known item, in the order of ``item_rows``.
    item_rows : ndarray of shape (n_items, R)
        Their item factor rows (e.g. ``result.item_matrix()``).
    alpha : float, default=1.0
        Ridge penalty (> 0).
    columns : list of str, optional
        Attribute columns (default: see :func:`fit_encoder`).
    """
    rows = np.asarray(item_rows, dtype=np.float64)
    if rows.ndim != 2 or rows.shape[0] != len(catalog):
        raise ValueError(f"item_rows must have one row per catalog item ({len(catalog)}), got shape {rows.shape}.")
    if not np.isfinite(alpha) or alpha <= 0:
        raise ValueError(f"alpha must be a positive number, got {alpha!r}.")
    encoder = fit_encoder(catalog, columns)
    x = encoder.transform(catalog)
    x_mean, v_mean = x.mean(axis=0), rows.mean(axis=0)
    xc, vc = x - x_mean, rows - v_mean
    coef = np.linalg.solve(xc.T @ xc + alpha * np.eye(x.shape[1]), xc.T @ vc)
    return MetadataMap(encoder=encoder, coef=coef, intercept=v_mean - x_mean @ coef, alpha=float(alpha))
