"""Item rows from catalog attributes (threefold.models.metadata) against scikit-learn's Ridge."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from sklearn.linear_model import Ridge

from threefold.models.metadata import AttributeEncoder, fit_encoder, fit_metadata_map


def _catalog(n=40, seed=0):
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"item_id": [f"x{i}" for i in range(n)],
                         "shelf": rng.choice(["north", "south", "east"], n),
                         "length_minutes": rng.gamma(2.0, 3.0, n),
                         "published_at": pd.date_range("2026-01-01", periods=n, freq="h")})


def test_the_map_equals_sklearn_ridge_on_the_same_design():
    """sklearn.linear_model.Ridge(alpha, fit_intercept=True) (reference library) on the encoder's design matrix."""
    catalog = _catalog()
    rows = np.random.default_rng(1).standard_normal((len(catalog), 5))
    fitted = fit_metadata_map(catalog, rows, alpha=0.7)
    x = fitted.encoder.transform(catalog)
    reference = Ridge(alpha=0.7, fit_intercept=True).fit(x, rows)
    assert_allclose(fitted.coef, reference.coef_.T, rtol=1e-9, atol=1e-12)
    assert_allclose(fitted.intercept, reference.intercept_, rtol=1e-9, atol=1e-12)
    assert_allclose(fitted.predict(catalog), reference.predict(x), rtol=1e-9, atol=1e-12)


def test_the_encoder_one_hots_categories_and_standardizes_numbers():
    """Indicators per training level; numbers as z-scores of the training items (definitions)."""
    catalog = _catalog()
    encoder = fit_encoder(catalog)
    assert encoder.feature_names == ["shelf=east", "shelf=north", "shelf=south", "length_minutes"]
    x = encoder.transform(catalog)
    assert_allclose(x[:, :3].sum(axis=1), 1.0)
    assert_allclose(x[:, 3].mean(), 0.0, atol=1e-12)
    assert_allclose(x[:, 3].std(), 1.0, rtol=1e-12)
    new = pd.DataFrame({"item_id": ["n1", "n2"], "shelf": ["attic", None], "length_minutes": [np.nan, 6.0],
                        "published_at": pd.Timestamp("2026-02-01")})
    unseen = encoder.transform(new)
    assert_allclose(unseen[:, :3], 0.0)  # a level never seen, and a blank: no indicator
    assert unseen[0, 3] == 0.0  # a blank number is the mean
    assert AttributeEncoder.from_dict(encoder.to_dict()) == encoder


def test_a_planted_linear_map_is_recovered():
    """Seeded planted truth: rows that are an exact linear function of the attributes are predicted for new items."""
    catalog = _catalog(200, seed=3)
    encoder = fit_encoder(catalog)
    truth = np.random.default_rng(4).standard_normal((len(encoder.feature_names), 3))
    rows = encoder.transform(catalog) @ truth + 0.5
    fitted = fit_metadata_map(catalog, rows, alpha=1e-8)
    new = _catalog(10, seed=9)
    assert_allclose(fitted.predict(new), encoder.transform(new) @ truth + 0.5, atol=1e-5)


def test_bad_inputs_are_refused_with_the_cause():
    catalog = _catalog()
    with pytest.raises(ValueError, match=r"item_rows must have one row per catalog item \(40\), got shape \(3, 2\)"):
        fit_metadata_map(catalog, np.zeros((3, 2)))
    with pytest.raises(ValueError, match="alpha must be a positive number, got 0"):
        fit_metadata_map(catalog, np.zeros((40, 2)), alpha=0)
    with pytest.raises(ValueError, match=r"The catalog has no column\(s\) \['tone'\]"):
        fit_encoder(catalog, ["tone"])
    with pytest.raises(ValueError, match=r"Catalog column 'item_id' has 40 distinct values \(more than 10\)"):
        fit_encoder(catalog, ["item_id"], max_levels=10)
    fitted = fit_metadata_map(catalog, np.zeros((40, 2)))
    with pytest.raises(ValueError, match=r"lacks the attribute column\(s\) \['shelf'\]"):
        fitted.predict(catalog.drop(columns=["shelf"]))
