"""Position propensities under the position-based model."""

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from threefold.data.propensity import PropensityWarning, estimate_position_propensity, pbm_posteriors


def test_posteriors_match_worked_values():
    # methods.md section 6 (Wang et al., WSDM 2018): theta = 0.5, gamma = 0.4 -> 0.375 and 0.25.
    examined, relevant = pbm_posteriors(0.5, 0.4)
    assert_allclose([examined, relevant], [0.375, 0.25], rtol=1e-12)


def randomized_log(theta: np.ndarray, n_requests: int, n_items: int, seed: int) -> pd.DataFrame:
    """Planted-truth test data (invented): lists of random items in random order, clicks = examined and relevant."""
    rng = np.random.default_rng(seed)
    length = theta.size
    gamma = rng.beta(2.0, 4.0, n_items)
    items = np.argsort(rng.random((n_requests, n_items)), axis=1)[:, :length]
    positions = np.tile(np.arange(1, length + 1), (n_requests, 1))
    clicks = rng.random((n_requests, length)) < theta[positions - 1] * gamma[items]
    request = np.repeat(np.arange(n_requests), length).astype(str)
    shown = pd.DataFrame({"request_id": request, "item_id": items.ravel().astype(str), "position": positions.ravel(), "event": "impression"})
    return pd.concat([shown, shown[clicks.ravel()].assign(event="click")], ignore_index=True)


def test_planted_examination_ratios_are_recovered():
    # planted-truth test: 25,000 lists of 8 -> 200,000 impressions; ratios within +-0.03 (issue target).
    theta = np.array([0.95, 0.7, 0.52, 0.4, 0.31, 0.25, 0.2, 0.16])
    estimate = estimate_position_propensity(randomized_log(theta, 25_000, 300, seed=11))
    assert estimate.converged
    assert estimate.impressions.sum() == 200_000
    assert_allclose(estimate.ratios, theta / theta[0], atol=0.03)


def test_warns_without_position_variation():
    # Every item always shown at the same slot: theta and gamma cannot be told apart.
    log = pd.DataFrame({
        "request_id": np.repeat(np.arange(200), 2).astype(str), "item_id": np.tile(["a", "b"], 200),
        "position": np.tile([1, 2], 200), "event": "impression",
    })
    log = pd.concat([log, log.iloc[::7].assign(event="click")])
    with pytest.warns(PropensityWarning, match="poorly identified"):
        estimate_position_propensity(log)


def test_needs_positions():
    with pytest.raises(KeyError, match=r"need the column\(s\) \['position'\]"):
        estimate_position_propensity(pd.DataFrame({"event": [], "request_id": [], "item_id": []}))


def test_planted_examination_is_recovered_on_the_demo_site_with_an_unpersonalized_policy():
    # planted-truth test on the demo simulator: an editor-ranked list (policy_taste_weight = 0) with
    # randomized swaps of position 1; >= 200,000 impressions; ratios within +-0.03 (issue target).
    # With the default personalized policy the per-item relevance key is confounded (an item sits higher
    # for visitors who like it); docs/feedback.md explains how to choose the relevance key.
    from threefold.demo.simulate import ScenarioParameters, simulate_site

    params = ScenarioParameters.scaled(240_000, policy_taste_weight=0.0)
    site = simulate_site(params, random_state=5)
    estimate = estimate_position_propensity(site.events)
    assert estimate.impressions.sum() >= 200_000
    planted = site.examination / site.examination[0]
    print("estimated", estimate.ratios.round(3), "planted", planted.round(3))
    assert_allclose(estimate.ratios, planted, atol=0.03)
