"""Specifications of the context-gain report: marginalizing a context mode, checked by brute force.

The reference is a dense reconstruction (tensorly's ``cp_to_tensor`` / ``tucker_to_tensor``,
reference library) averaged over the mode's levels with the training frequencies.
Models are fitted on invented random clicks (``_tracking.tiny_events``).
"""

from __future__ import annotations

import numpy as np
import pytest
import tensorly as tl
from numpy.testing import assert_allclose

from threefold.data.build import build_tensor
from threefold.data.context import parse_context
from threefold.evaluation.context_gain import context_gain, level_frequencies, marginalize_mode
from threefold.models.tucker.hooi import fit_hooi

from _tracking import tiny_cp, tiny_events


def _dense(result):
    if hasattr(result, "core"):
        return tl.tucker_to_tensor((np.asarray(result.core, np.float64), [np.asarray(f, np.float64) for f in result.factors]))
    return tl.cp_to_tensor((np.asarray(result.weights, np.float64), [np.asarray(f, np.float64) for f in result.factors]))


def _models():
    plain, _ = tiny_cp(seed=2, structure=None)
    mixed, _ = tiny_cp(seed=3, structure="user*item:2 + item*device:1 + user*item*daypart:2")
    specs = [parse_context("daypart"), parse_context("device")]
    tensor, _ = build_tensor(tiny_events(5), specs, negatives="none", dtype=np.float64)
    tucker = fit_hooi(tensor, rank=(3, 3, 2, 2), max_sweeps=3, tol=0, random_state=0)
    return {"plain CP": plain, "mixed structure": mixed, "Tucker": tucker}


@pytest.mark.parametrize("kind", ["plain CP", "mixed structure", "Tucker"])
@pytest.mark.parametrize("mode", [2, 3])
def test_marginalized_scores_are_the_frequency_weighted_average_over_levels(kind, mode):
    result = _models()[kind]
    rng = np.random.default_rng(mode)
    weights = rng.dirichlet(np.ones(result.shape[mode]))
    dense = _dense(result)
    expected = np.tensordot(dense, weights, axes=([mode], [0]))  # brute force: Σ_l p_l x̂(..., l, ...)
    got = _dense(marginalize_mode(result, mode, weights))
    for level in range(result.shape[mode]):
        assert_allclose(np.take(got, level, axis=mode), expected, rtol=1e-10, atol=1e-12)


def test_level_frequencies_and_bad_weights():
    assert_allclose(level_frequencies(np.array([0, 0, 2, -1, 2, 2]), 4), [0.4, 0.0, 0.6, 0.0])
    assert_allclose(level_frequencies(np.array([-1]), 2), [0.5, 0.5])
    result = _models()["plain CP"]
    with pytest.raises(ValueError, match="non-negative shares summing to 1"):
        marginalize_mode(result, 2, np.ones(result.shape[2]))
    with pytest.raises(ValueError, match=r"must be a context mode in \[2, 4\)"):
        marginalize_mode(result, 1, np.ones(result.shape[1]) / result.shape[1])


def test_the_report_negates_the_paired_difference_of_each_marginalized_variant():
    """The gain is full minus marginalized: the variants' paired differences with the full model, negated."""
    import pandas as pd

    result = _models()["mixed structure"]
    seen = {}

    class Evaluation:
        stage = "validation"
        values = {"m": 0.5, "m without daypart": 0.4, "m without device": 0.5}
        comparisons = pd.DataFrame([
            {"model": "m without daypart", "metric": "ndcg", "k": 10, "mean_difference": -0.1, "low": -0.15,
             "high": -0.05, "p_value": 0.001, "n_users": 50},
            {"model": "m without device", "metric": "ndcg", "k": 10, "mean_difference": 0.0, "low": -0.02,
             "high": 0.02, "p_value": 0.9, "n_users": 50}])

        def value(self, name, metric, k):
            return self.values[name]

    def evaluate(models, baseline):
        seen.update(models=models, baseline=baseline)
        return Evaluation()

    frequencies = {"daypart": np.full(result.shape[2], 1 / result.shape[2]), "device": np.full(result.shape[3], 1 / result.shape[3])}
    gain = context_gain(evaluate, result, "m", frequencies)
    assert seen["baseline"] == "m" and sorted(seen["models"]) == ["m", "m without daypart", "m without device"]
    row = gain.table.set_index("mode").loc["daypart"]
    assert_allclose([row["gain"], row["low"], row["high"], row["relative"]], [0.1, 0.05, 0.15, 0.25], rtol=1e-12)
    text = gain.to_text()
    assert "daypart adds +25.0% ndcg@10 [+12.5, +37.5]" in text
    assert "device adds nothing measurable: +0.0% ndcg@10" in text
