"""Metadata enrichment (threefold.explain.enrichment) against scipy and the Benjamini–Hochberg paper."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy.stats import fisher_exact

from threefold.explain.enrichment import categorical_columns, component_label, enrichment


def _catalog():
    # invented catalog with column names unlike the demo's (labels come from whatever columns exist)
    return pd.DataFrame({
        "item_id": [f"e{i}" for i in range(12)],
        "genre": ["jazz"] * 4 + ["folk"] * 4 + ["talk"] * 4,
        "length": ["short", "long"] * 6,
        "rating": np.linspace(0, 1, 12),  # a float measurement: not a category
    })


def test_the_p_value_is_fishers_exact_test_one_sided():
    """scipy.stats.fisher_exact(alternative="greater") on the 2 x 2 table equals the hypergeometric upper tail."""
    catalog = _catalog()
    top = np.array([0, 1, 2, 5])  # three of the four jazz items, one folk
    table = enrichment(top, catalog).table
    jazz = table[(table["column"] == "genre") & (table["level"] == "jazz")].iloc[0]
    _, expected = fisher_exact([[3, 1], [1, 7]], alternative="greater")
    assert_allclose(jazz["p_value"], expected, rtol=1e-12)
    assert jazz["in_top"] == 3 and jazz["top_size"] == 4 and jazz["in_catalog"] == 4
    assert_allclose(jazz["ratio"], (3 / 4) / (4 / 12))


def _bh_reference(p):
    """Slow Benjamini–Hochberg step-up adjusted p-values: q_(i) = min over j >= i of p_(j) m / j."""
    p = np.asarray(p, dtype=float)
    m = p.size
    order = np.argsort(p)
    q = np.empty(m)
    for rank, idx in enumerate(order, start=1):
        q[idx] = min(1.0, min(p[order[j - 1]] * m / j for j in range(rank, m + 1)))
    return q


def test_q_values_follow_benjamini_hochberg():
    """Benjamini & Hochberg (1995), section 4 example of 15 p-values (recalled from memory): at q = 0.05 the
    step-up procedure rejects the four smallest; the slow reference reproduces it, and the module's q-values
    equal the reference on a real enrichment table."""
    paper = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262,
             0.5719, 0.6528, 0.7590, 1.0000]
    assert (_bh_reference(paper) < 0.05).sum() == 4
    table = enrichment(np.array([0, 1, 2, 5, 7]), _catalog()).table
    assert_allclose(table["q_value"], _bh_reference(table["p_value"]), rtol=1e-12)


def test_a_planted_component_gets_its_label_and_noise_gets_none():
    """Seeded planted truth: a top set of only long jazz pieces is labelled by both; a spread-out set by nothing."""
    rng = np.random.default_rng(0)
    catalog = pd.DataFrame({"item_id": [f"e{i}" for i in range(200)],
                            "genre": rng.choice(["jazz", "folk", "talk", "news"], 200),
                            "length": rng.choice(["short", "long"], 200)})
    planted = np.flatnonzero((catalog["genre"] == "jazz") & (catalog["length"] == "long"))[:20]
    result = enrichment(planted, catalog)
    assert result.label() in ("genre=jazz · length=long", "length=long · genre=jazz")
    spread = rng.choice(200, 20, replace=False)
    assert enrichment(spread, catalog).label() == "no enriched attribute"


def test_categorical_columns_skip_ids_measurements_and_constants():
    catalog = _catalog().assign(site="one")
    assert categorical_columns(catalog) == ["genre", "length"]


def test_unknown_columns_and_positions_are_refused():
    with pytest.raises(ValueError, match=r"the catalog has no column\(s\) \['tone'\]"):
        enrichment(np.array([0]), _catalog(), ["tone"])
    with pytest.raises(ValueError, match=r"item positions must lie in \[0, 12\)"):
        enrichment(np.array([12]), _catalog())


def test_label_takes_one_level_per_column():
    table = pd.DataFrame({"column": ["a", "a", "b"], "level": ["x", "y", "z"], "enriched": [True, True, True]})
    assert component_label(table) == "a=x · b=z"
