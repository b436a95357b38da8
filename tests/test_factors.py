"""Factor summaries (threefold.explain.factors): strengths, orientation, loadings, Tucker core slices."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import tensorly as tl
from numpy.testing import assert_allclose

from threefold.core.tensor import SparseTensor
from threefold.explain.factors import core_slices, factor_summaries
from threefold.models.tucker.hooi import fit_hooi

from _tracking import tiny_cp


def _dense(weights, factors):
    return tl.cp_to_tensor((np.asarray(weights, dtype=np.float64), [np.asarray(f, dtype=np.float64) for f in factors]))


def test_cp_summaries_keep_the_model_and_orient_items_up():
    """Orientation changes no score (tensorly's reconstruction before and after, reference library); each strength
    is the Frobenius norm of that one component's full tensor (tensorly.cp_to_tensor of the component alone) and
    the shares sum to 1; loadings are the context columns the term spans."""
    result, _ = tiny_cp(seed=3, structure="user*item:2 + item*device:1 + user*item*daypart:2")
    summaries = factor_summaries(result, n_top=3)
    from threefold.explain.factors import _oriented_cp

    weights, factors = _oriented_cp(result)
    assert_allclose(_dense(weights, factors), _dense(result.weights, result.factors), atol=1e-12)
    assert_allclose(sum(f.share for f in summaries), 1.0)
    for f in summaries:
        alone = _dense(result.weights[[f.index]], [col[:, [f.index]] for col in result.factors])
        assert_allclose(f.strength, np.linalg.norm(alone), rtol=1e-9)
    for f in summaries:
        assert factors[1][f.top_items[0], f.index] == factors[1][:, f.index].max() >= 0
        expected = {"user*item": set(), "item*device": {"device"}, "user*item*daypart": {"daypart"}}[f.term]
        assert set(f.loadings) == expected
        assert (f.top_users.size == 0) == (f.term == "item*device")


def test_labels_name_peak_levels_and_catalog_levels():
    """Seeded planted truth: a component whose item column loads on the 'audio' items and whose daypart column
    peaks at level 2 is labelled by both."""
    result, _ = tiny_cp(seed=3, structure="user*item*daypart:1")
    n_items = result.shape[1]
    kinds = np.array(["text"] * n_items, dtype=object)
    top = factor_summaries(result, n_top=4)[0].top_items
    kinds[top] = "audio"
    catalog = pd.DataFrame({"item_id": result.vocabularies[1].labels, "kind": kinds,
                            "flavour": ["a", "b"] * (n_items // 2) + ["a"] * (n_items % 2)})
    summary = factor_summaries(result, catalog, n_top=4)[0]
    assert "kind=audio" in summary.label
    daypart = summary.loadings["daypart"]
    top_level = summary.level_names["daypart"][int(np.argmax(daypart))]
    assert top_level in summary.peak_levels()["daypart"].split("/") and f"daypart: {top_level}" in summary.label


def test_the_unknown_level_never_names_a_peak():
    """The vocabulary's level for missing values (threefold.core.vocabulary.UNKNOWN) holds few events: a large
    loading there is not what switches a factor on."""
    from threefold.explain.factors import Factor

    f = Factor(index=0, term="item*device", strength=1.0, share=1.0,
               loadings={"device": np.array([0.1, 0.2, 0.9, 0.15])},
               level_names={"device": ["mobile", "desktop", "unknown", "tablet"]})
    assert f.peak_levels() == {"device": "desktop"}
    assert Factor(index=0, term="t", strength=1.0, share=1.0, loadings={"device": np.array([0.1, 0.2, 0.9, 0.15])}
                  ).peak_levels() == {"device": "2"}


def test_tucker_shares_and_core_slices_match_tensorly():
    """Core energy shares of item columns sum to 1; Q_u · S_l · V_iᵀ equals tensorly.tucker_to_tensor at level l
    averaged over the other context mode's levels (multilinearity; reference library)."""
    rng = np.random.default_rng(4)
    data = rng.random((8, 7, 3, 2)) * (rng.random((8, 7, 3, 2)) < 0.5)
    result = fit_hooi(SparseTensor.from_dense(data), rank=(3, 3, 2, 2), random_state=0)
    summaries = factor_summaries(result, n_top=2)
    assert_allclose(sum(f.share for f in summaries), 1.0)
    dense = tl.tucker_to_tensor((result.core.astype(np.float64), [f.astype(np.float64) for f in result.factors]))
    slices = core_slices(result, 2)
    u, v = np.asarray(result.factors[0], dtype=np.float64), np.asarray(result.factors[1], dtype=np.float64)
    for level in range(3):
        assert_allclose(u @ slices[level] @ v.T, dense[:, :, level, :].mean(axis=2), atol=1e-10)
    with pytest.raises(ValueError, match=r"mode must be a context mode in \[2, 4\), got 1"):
        core_slices(result, 1)


def test_bad_arguments_are_refused():
    result, _ = tiny_cp(seed=3)
    with pytest.raises(ValueError, match="n_top must be at least 1, got 0"):
        factor_summaries(result, n_top=0)
    with pytest.raises(ValueError, match="core_slices needs a Tucker model"):
        core_slices(result, 2)
