"""Baselines: popularity as of each request time, the random ranker, context-free MF."""

import numpy as np
import pandas as pd
import pytest

from threefold.models.baselines import PopularityBaseline, RandomBaseline, context_free_mf, hash_uniform, window_counts
from threefold.data.context import ColumnContext
from threefold.models.cp.model import CPModel
from threefold.evaluation.queries import build_queries

T0 = 1_770_000_000


def _slow_window_counts(event_times, event_keys, n_keys, query_times, window):
    """Slow reference: one query at a time, every event checked."""
    out = np.zeros((query_times.size, n_keys), dtype=np.int64)
    for j, t in enumerate(query_times):
        for e, key in zip(event_times, event_keys):
            if e < t and (window is None or t - window <= e):
                out[j, key] += 1
    return out


@pytest.mark.parametrize("window", [None, 50, 1])
def test_window_counts_matches_a_slow_reference(window):
    rng = np.random.default_rng(0)
    event_times = np.sort(rng.integers(0, 300, size=400))
    event_keys = rng.integers(0, 7, size=400)
    query_times = rng.integers(0, 320, size=60)
    query_times[:3] = event_times[[0, 10, 20]]  # events exactly at the request time must not count
    got = window_counts(event_times, event_keys, 7, query_times, window)
    np.testing.assert_array_equal(got, _slow_window_counts(event_times, event_keys, 7, query_times, window))


def _clicks_log(rng, n=300):
    times = np.sort(T0 + rng.integers(0, 20_000, size=n))
    return pd.DataFrame({
        "request_id": [f"r{i}" for i in range(n)],
        "user_id": rng.choice(["u1", "u2", "u3", "u4"], size=n),
        "item_id": rng.choice([f"i{j}" for j in range(12)], size=n),
        "event": "click",
        "timestamp": times,
        "device": rng.choice(["mobile", "desktop"], size=n),
    })


def test_popularity_counts_only_clicks_strictly_before_each_request():
    rng = np.random.default_rng(1)
    log = _clicks_log(rng)
    window = 3_000
    queries = build_queries(log.iloc[150:], [ColumnContext("device")], catalog=None, history=log.iloc[:150])
    for modes in ((), ("device",)):
        baseline = PopularityBaseline(window=window, context_modes=modes).fit(log, [ColumnContext("device")])
        scores = baseline.bind(queries)(np.arange(len(queries)))
        # slow reference, one query at a time: clicks in [t - window, t) (same device for context popularity)
        items = np.asarray(queries.items.labels)
        for j in range(len(queries)):
            t = queries.times[j]
            prior = log[(log["timestamp"] < t) & (log["timestamp"] >= t - window)]
            if modes:
                prior = prior[prior["device"] == queries.contexts["device"].iloc[j]]
            expected = prior["item_id"].value_counts().reindex(items, fill_value=0).to_numpy()
            np.testing.assert_array_equal(scores[j], expected)


def test_popularity_never_uses_an_event_at_or_after_the_request():
    rng = np.random.default_rng(2)
    log = _clicks_log(rng)
    queries = build_queries(log.iloc[100:], [ColumnContext("device")], history=log.iloc[:100])
    contexts = [ColumnContext("device")]
    for modes in ((), ("device",)):
        full = PopularityBaseline(window="2h", context_modes=modes).fit(log, contexts).bind(queries)
        for j in range(0, len(queries), 17):
            # the same baseline fitted on a log cut at the request time gives the same list
            cut = log[log["timestamp"] < queries.times[j]]
            alone = PopularityBaseline(window="2h", context_modes=modes).fit(cut, contexts).bind(queries)
            np.testing.assert_array_equal(full(np.array([j])), alone(np.array([j])))
        later = log.assign(timestamp=queries.times.max(), request_id=log["request_id"] + "+late")
        padded = PopularityBaseline(window="2h", context_modes=modes).fit(pd.concat([log, later]), contexts)
        np.testing.assert_array_equal(padded.bind(queries)(np.arange(len(queries))), full(np.arange(len(queries))))


def test_popularity_needs_its_context_specifications():
    with pytest.raises(ValueError, match=r"no context specification for the mode\(s\) \['device'\]"):
        PopularityBaseline(context_modes=("device",)).fit(_clicks_log(np.random.default_rng(3)))


def test_random_baseline_is_deterministic_and_independent_of_blocks():
    log = _clicks_log(np.random.default_rng(4))
    queries = build_queries(log, ())
    bound = RandomBaseline(random_state=7).fit().bind(queries)
    whole = bound(np.arange(len(queries)))
    parts = np.vstack([bound(np.arange(a, min(a + 13, len(queries)))) for a in range(0, len(queries), 13)])
    np.testing.assert_array_equal(whole, parts)
    assert whole.min() >= 0.0 and whole.max() < 1.0
    np.testing.assert_allclose(whole.mean(), 0.5, atol=0.02)  # uniform: mean 1/2 (common practice check)
    assert not np.array_equal(whole, RandomBaseline(random_state=8).fit().bind(queries)(np.arange(len(queries))))
    np.testing.assert_array_equal(hash_uniform(7, queries.index[:5], queries.n_items), whole[:5])


def test_context_free_mf_is_the_cp_engine_with_the_user_item_structure():
    model = context_free_mf(rank=4, reg=0.5)
    assert isinstance(model, CPModel) and model.structure == "user*item" and model.rank == 4
    with pytest.raises(ValueError, match="fixes structure='user\\*item'"):
        context_free_mf(structure="user*item*daypart")
