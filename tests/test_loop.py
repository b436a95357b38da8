"""The closed loop: refresh policies replayed against the demo simulator's true click model.

The site, its clicks and the expected orderings below are planted truth (the
invented demo scenario, seeded); the NDCG the loop reports is checked against
scikit-learn's ``ndcg_score`` (Järvelin & Kekäläinen 2002, the gain-over-ideal
definition scikit-learn implements).
"""

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from sklearn.metrics import ndcg_score

from threefold.demo.loop import K, _live, _relevance, _true_ndcg, closed_loop
from threefold.demo.simulate import ScenarioParameters, simulate_site

POLICIES = ("stale", "retrain", "hourly", "hourly+metadata", "oracle")


@pytest.fixture(scope="module")
def site():
    return simulate_site(ScenarioParameters.scaled(40_000, days=4), random_state=5)


@pytest.fixture(scope="module")
def loops(site):
    run = dict(train_days=2, hours=36, rank=16, policies=POLICIES, echo=lambda line: None, show_progress=False)
    shared = closed_loop(site, shared_traffic=True, **run).table.set_index("policy")
    pure = closed_loop(site, shared_traffic=False, **run).table.set_index("policy")
    return shared, pure


def test_true_ndcg_matches_scikit_learn_on_the_live_pool(site):
    # Source: sklearn.metrics.ndcg_score with y_true = γ of every live item, y_score = a descending score on the
    # listed items (the list order) and 0 elsewhere, k = 10; ties in y_score are averaged by scikit-learn, so the
    # unlisted items get scores below every listed one and the list is full (10 items).
    events = site.events
    start = int(events["timestamp"].min()) // 3600 * 3600 + 50 * 3600
    batch = events[(events["timestamp"] >= start) & (events["timestamp"] < start + 3600)].drop_duplicates("request_id")
    batch = batch.head(5).reset_index(drop=True)
    pool = _live(site.truth, start)
    rng = np.random.default_rng(0)
    lists = np.stack([rng.choice(pool, K, replace=False) for _ in range(len(batch))])
    ours = _true_ndcg(site.truth, batch, _relevance(site.truth, batch, lists), pool)
    gamma = _relevance(site.truth, batch, np.broadcast_to(pool, (len(batch), pool.size)))
    for i in range(len(batch)):
        score = np.zeros(pool.size)
        score[np.searchsorted(pool, lists[i])] = np.arange(K, 0, -1)
        assert_allclose(ours[i], ndcg_score(gamma[i][None], score[None], k=K), rtol=1e-12)


def test_the_oracle_is_ideal_by_construction(loops):
    shared, pure = loops
    assert_allclose(shared.loc["oracle", "ndcg_true_at_10"], 1.0, rtol=1e-12)  # definition of the ideal list
    assert shared.loc["oracle", "clicks_per_1000"] > shared.loc["hourly", "clicks_per_1000"]


def test_hourly_refresh_beats_the_stale_model_beside_the_site_traffic(loops):
    # Planted truth (seeded demo site): new stories get events from the site's other modules, and the hourly
    # refresh folds them in; the stale model scores them 0. Measured 0.5253 vs 0.5492 here (seed 5, 36 h).
    shared, _ = loops
    assert shared.loc["hourly", "ndcg_true_at_10"] > shared.loc["stale", "ndcg_true_at_10"] + 0.01
    assert shared.loc["hourly", "clicks_per_1000"] > shared.loc["stale", "clicks_per_1000"]


def test_hourly_refresh_closes_most_of_the_gap_to_a_full_retrain_every_hour(loops):
    # Planted truth: the refresh folds in the same events a full retrain refits on; it keeps the trained
    # factors fixed, so it falls short of the retrain. Measured here (40,000 rows, rank 16, 36 h): stale 0.5253,
    # retrain 0.5962, hourly 0.5492, a third of the gap; at the loop's defaults (100,000 rows) 85% (docs/refresh.md).
    shared, _ = loops
    stale, hourly, retrain = (shared.loc[p, "ndcg_true_at_10"] for p in ("stale", "hourly", "retrain"))
    assert retrain > stale + 0.03
    assert (hourly - stale) / (retrain - stale) > 0.25


def test_in_a_pure_loop_only_metadata_rows_escape_the_cold_start_trap(loops):
    # Planted truth: a policy that learns only from its own lists never shows an item it scores 0, so the hourly
    # refresh stays where the stale model is; rows predicted from catalog attributes get new items shown.
    _, pure = loops
    assert abs(pure.loc["hourly", "ndcg_true_at_10"] - pure.loc["stale", "ndcg_true_at_10"]) < 0.005
    assert pure.loc["hourly+metadata", "ndcg_true_at_10"] > pure.loc["hourly", "ndcg_true_at_10"]


def test_every_policy_sees_the_same_requests(loops):
    shared, pure = loops
    assert shared["requests"].nunique() == 1 and (shared["requests"] == pure["requests"]).all()
    assert_allclose(shared.loc["stale", "ndcg_true_at_10"], pure.loc["stale", "ndcg_true_at_10"], rtol=0)


def test_bad_arguments_are_clear_errors(site):
    with pytest.raises(ValueError, match=r"Unknown policies \['weekly'\]"):
        closed_loop(site, train_days=2, hours=2, policies=("weekly",))
    with pytest.raises(ValueError, match="48 h cannot be replayed"):
        closed_loop(site, train_days=3, hours=48, policies=("stale",))


def test_the_loop_command_prints_the_table_as_json(tmp_path):
    out = tmp_path / "loop.csv"
    result = subprocess.run([sys.executable, "-m", "threefold.cli", "loop", "--events", "12000", "--days", "2",
                             "--train-days", "1", "--hours", "4", "--rank", "4", "--policy", "stale",
                             "--policy", "popularity", "--json", "--out", str(out)], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    table = json.loads(result.stdout)
    assert [row["policy"] for row in table] == ["stale", "popularity"]
    assert pd.read_csv(out)["policy"].tolist() == ["stale", "popularity"]
    bad = subprocess.run([sys.executable, "-m", "threefold.cli", "loop", "--days", "2", "--train-days", "2"],
                         capture_output=True, text=True)
    assert bad.returncode == 1 and "--train-days must lie between 0 and --days (2)" in bad.stderr
