"""Sweeps: trial generation, selection on the validation window only, Dask workers, idempotent reruns."""

import os

import numpy as np
import pytest

from threefold.pipeline.config import load_config
from threefold.tracking.store import open_store
from threefold.pipeline.sweep import TAG_BEST, TAG_TRIAL_HASH, sweep, trial_hash, trial_overrides

from _tracking import write_config


@pytest.fixture
def small(tmp_path):
    return load_config(write_config(tmp_path))


def test_grid_trials_are_the_product_of_the_lists(small):
    config = small.with_overrides({"sweep.space": {"models.cp.rank": [2, 4], "weighting.alpha": [1.0, 5.0, 20.0]}})
    trials = trial_overrides(config)
    assert len(trials) == 6
    assert {(t["models.cp.rank"], t["weighting.alpha"]) for t in trials} == {(r, a) for r in (2, 4) for a in (1.0, 5.0, 20.0)}
    with pytest.raises(ValueError, match=r"grid search needs a list of values for \['weighting\.w0'\]"):
        trial_overrides(small.with_overrides({"sweep.space": {"weighting.w0": {"low": 0.1, "high": 1.0}}}))
    with pytest.raises(ValueError, match=r"\[sweep\.space\] declares nothing to search"):
        trial_overrides(small)


def test_random_trials_are_seeded_and_stay_in_their_ranges(small):
    space = {"models.cp.rank": {"low": 2, "high": 9}, "weighting.w0": {"low": 0.01, "high": 1.0, "log": True},
             "models.cp.structure": ["user*item", "user*item*device"]}
    config = small.with_overrides({"sweep.space": space, "sweep.search": "random", "sweep.n_trials": 30})
    trials = trial_overrides(config)
    assert trials == trial_overrides(config)  # same seed, same trials
    assert trials != trial_overrides(config.with_overrides({"sweep.random_state": 1}))
    ranks = np.array([t["models.cp.rank"] for t in trials])
    w0 = np.array([t["weighting.w0"] for t in trials])
    assert all(isinstance(t["models.cp.rank"], int) for t in trials) and ranks.min() >= 2 and ranks.max() <= 9
    assert w0.min() >= 0.01 and w0.max() <= 1.0
    assert {t["models.cp.structure"] for t in trials} == {"user*item", "user*item*device"}
    with pytest.raises(ValueError, match=r"random search needs \[sweep\] n_trials"):
        trial_overrides(config.with_overrides({"sweep.n_trials": None}))


def test_trial_hash_follows_settings_and_data_not_bookkeeping(small):
    base = trial_hash(small, "data-a")
    assert trial_hash(small.with_overrides({"experiment.name": "renamed"}), "data-a") == base
    assert trial_hash(small.with_overrides({"weighting.alpha": 3.0}), "data-a") != base
    assert trial_hash(small, "data-b") != base


def test_a_sweep_without_a_validation_window_is_refused(small):
    config = small.with_overrides({"split.validation_window": None, "sweep.space": {"models.cp.rank": [2, 4]}})
    with pytest.raises(ValueError, match=r"a sweep selects on the validation window; set \[split\] validation_window"):
        sweep(config, store=None)  # refused before any store is opened


def test_eight_trials_on_two_dask_workers_failures_recorded_and_reruns_skipped(tmp_path, small):
    """Done-when check: a sweep of 8 trials on 2 local workers; a failing trial does not stop the others."""
    space = {"models.cp.rank": [2, 3], "weighting.alpha": [5.0, 20.0],
             # a context column the log does not have: passes the config (which reads no data), fails at the build
             "build.contexts": [["daypart", "device"], ["daypart", "device", "weather"]]}
    config = small.with_overrides({"sweep.space": space})
    store = open_store(tmp_path / "store")
    messages = []
    report = sweep(config, store, workers=2, echo=messages.append)
    table = report.trials
    assert len(table) == 8 and report.metric == "ndcg_at_5"
    failed = table[table["status"] == "FAILED"]
    assert len(failed) == 4 and all("weather" in str(v) for v in failed["build.contexts"])
    finished = table[table["status"] == "FINISHED"]
    assert len(finished) == 4 and finished["ndcg_at_5"].notna().all()
    runs = {r.info.run_id: r for r in store.client.search_runs(
        [store.experiment_id("tracking-tests")], "tags.`threefold.kind` = 'trial'", max_results=100)}
    assert len(runs) == 8
    for run_id in failed["run_id"]:
        assert runs[run_id].info.status == "FAILED"
        assert "weather" in runs[run_id].data.tags["threefold.error"]
    for run in runs.values():  # only the submitting process wrote to the store
        assert run.data.tags["threefold.pid"] == str(os.getpid())
        assert run.data.tags["mlflow.parentRunId"] == report.parent_run_id
        assert run.data.tags["threefold.stage"] == "validation"
    best = finished.loc[finished["ndcg_at_5"].idxmax(), "run_id"]
    assert report.best_run_id == best and runs[best].data.tags.get(TAG_BEST) == "true"
    assert sum(r.data.tags.get(TAG_BEST) == "true" for r in runs.values()) == 1
    history = store.client.get_metric_history(best, "loss")
    assert sorted(m.step for m in history) == [0, 1, 2]

    rerun = sweep(config.with_overrides({"sweep.space": {**space, "build.contexts": [["daypart", "device"]]}}), store,
                  workers=2, echo=messages.append)
    assert set(rerun.trials["status"]) == {"FINISHED (earlier)"}
    assert set(rerun.trials["run_id"]) == set(finished["run_id"]) and rerun.best_run_id == best
    assert any("4 already finished, 0 to run" in m for m in messages)
    hashes = {r.data.tags[TAG_TRIAL_HASH] for r in runs.values()}
    assert len(hashes) == 8
