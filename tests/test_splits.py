"""Splits: windows, straddling requests, the guard rails of model selection, and leakage."""

import pandas as pd
import pytest

from threefold.data.context import ColumnContext
from threefold.models.cp.model import CPModel
from threefold.evaluation.harness import evaluate
from threefold.evaluation.rankers import ScorerRanker
from threefold.evaluation.queries import build_queries
from threefold.demo.simulate import ScenarioParameters, simulate_site
from threefold.evaluation.splits import check_selection, last_n_split, temporal_split, to_epoch_seconds, to_seconds

DAY = 86_400
T0 = 1_770_000_000


def _log() -> pd.DataFrame:
    """Six requests of two users; r4 straddles the cutoff T0 + 3 days (impression before, click after)."""
    rows = [
        ("r1", "u1", "a", "impression", T0 + 10), ("r1", "u1", "a", "click", T0 + 20),
        ("r2", "u2", "b", "impression", T0 + DAY), ("r2", "u2", "b", "click", T0 + DAY + 5),
        ("r3", "u1", "b", "impression", T0 + 2 * DAY + 100), ("r3", "u1", "b", "click", T0 + 2 * DAY + 110),
        ("r4", "u2", "c", "impression", T0 + 3 * DAY - 5), ("r4", "u2", "c", "click", T0 + 3 * DAY + 5),
        ("r5", "u1", "d", "impression", T0 + 3 * DAY + 50), ("r5", "u1", "d", "click", T0 + 3 * DAY + 60),
        ("r6", "u3", "e", "impression", T0 + 4 * DAY), ("r6", "u3", "e", "click", T0 + 4 * DAY + 1),
    ]
    frame = pd.DataFrame(rows, columns=["request_id", "user_id", "item_id", "event", "timestamp"])
    frame["position"] = 1
    return frame


def test_temporal_split_windows_and_straddling_requests():
    events = _log()
    split = temporal_split(events, T0 + 3 * DAY, validation_window="1D")
    selection = split.selection_stage()
    assert selection.name == "validation" and selection.start == T0 + 2 * DAY and selection.end == T0 + 3 * DAY
    assert selection.train["timestamp"].max() < T0 + 2 * DAY
    assert sorted(selection.evaluate["request_id"].unique()) == ["r3"]  # r4 straddles the cutoff
    assert selection.dropped_requests == 1
    final = split.final_stage()
    assert final.train["timestamp"].max() < T0 + 3 * DAY
    assert sorted(final.evaluate["request_id"].unique()) == ["r5", "r6"]
    assert final.dropped_requests == 1
    # the straddling request's impression happened before the cutoff: it may train, its click may not
    r4 = final.train[final.train["request_id"] == "r4"]
    assert list(r4["event"]) == ["impression"]


def test_test_window_length_and_time_formats():
    events = _log()
    split = temporal_split(events, "2026-02-05T02:40:00+00:00", validation_window=DAY, test_window="1D")
    final = split.final_stage()
    assert final.start == to_epoch_seconds("2026-02-05T02:40:00+00:00") == T0 + 3 * DAY
    assert final.end == T0 + 4 * DAY
    assert sorted(final.evaluate["request_id"].unique()) == ["r5"]
    assert to_seconds("2h") == 7200
    with pytest.raises(ValueError, match="has no UTC offset"):
        temporal_split(events, "2026-02-05T02:40:00")
    with pytest.raises(ValueError, match="must be a positive duration"):
        temporal_split(events, T0 + 3 * DAY, validation_window="-1h")
    with pytest.raises(ValueError, match="has no training events"):
        temporal_split(events, T0, validation_window="1h")


def test_selection_is_closed_once_the_test_is_opened():
    split = temporal_split(_log(), T0 + 3 * DAY, validation_window="1D")
    split.selection_stage()
    split.final_stage()
    assert split.test_opened
    with pytest.raises(RuntimeError, match="already opened"):
        split.selection_stage()


def test_check_selection_refuses_the_test_window():
    check_selection(["validation", "validation"])
    with pytest.raises(ValueError, match="Selecting on the test window is refused"):
        check_selection(["validation"], select_on="test")
    with pytest.raises(ValueError, match=r"validation results only; got results of stage\(s\) \['test'\]"):
        check_selection(["validation", "test"])
    with pytest.raises(ValueError, match="The 'select_on' parameter"):
        check_selection(["validation"], select_on="train")


def test_training_tensor_refuses_outside_vocabularies():
    final = temporal_split(_log(), T0 + 3 * DAY, validation_window="1D").final_stage()
    tensor, _ = final.train_tensor()
    assert set(tensor.vocabularies[1].labels) == {"a", "b", "c"}  # d and e are first seen after the cutoff
    with pytest.raises(ValueError, match="do not pass 'vocabularies'"):
        final.train_tensor(vocabularies=tensor.vocabularies)
    test_tensor, report = final.evaluation_tensor((), tensor.vocabularies)
    assert test_tensor.vocabularies[1] is tensor.vocabularies[1]
    # the clicks of r5 (item d) and r6 (user u3); their impressions are no evidence under skip-above
    assert report.dropped == {"unseen user_id": 1, "unseen item_id": 1}


def test_last_n_split_holds_out_each_users_last_requests():
    rows = []
    for u, n_requests in (("u1", 4), ("u2", 2)):
        for r in range(n_requests):
            t = T0 + r * 1000 + (0 if u == "u1" else 1)
            rows += [(f"{u}-{r}", u, f"i{r}", "impression", t), (f"{u}-{r}", u, f"i{r}", "click", t + 1)]
    events = pd.DataFrame(rows, columns=["request_id", "user_id", "item_id", "event", "timestamp"])
    split = last_n_split(events, n=1, validation_n=1)
    selection = split.selection_stage()
    assert sorted(selection.evaluate["request_id"].unique()) == ["u1-2"]
    assert set(selection.train["request_id"]) == {"u1-0", "u1-1", "u2-0", "u2-1"}  # u2 has too few requests
    final = split.final_stage()
    assert sorted(final.evaluate["request_id"].unique()) == ["u1-3"]
    assert set(final.train["request_id"]) == {"u1-0", "u1-1", "u1-2", "u2-0", "u2-1"}


def test_leakage_moved_test_clicks_score_higher_and_the_honest_split_never_sees_them():
    """Planted-truth test: a log whose test clicks are moved before the cutoff must look better."""
    site = simulate_site(ScenarioParameters.scaled(30_000, days=6), random_state=11)
    events = site.events
    cutoff = int(events["timestamp"].min()) + 4 * DAY
    final = temporal_split(events, cutoff, validation_window="1D", test_window="1D").final_stage()
    contexts = [ColumnContext("device")]
    honest, _ = final.train_tensor(contexts)

    clicks = final.evaluate[final.evaluate["event"] == "click"]
    leaked = clicks.assign(timestamp=cutoff - 1)
    leaky_train = pd.concat([final.train, leaked], ignore_index=True)
    leaky, _ = temporal_split(pd.concat([leaky_train, final.evaluate]), cutoff, validation_window="1D").final_stage().train_tensor(contexts)

    # the honest split never sees a test click, and knows no item first seen after the cutoff
    key = ["request_id", "item_id", "event", "timestamp"]
    assert final.train.merge(clicks[key], on=key).empty
    first_seen = events.groupby("item_id")["timestamp"].min()
    late = set(first_seen[first_seen >= cutoff].index)
    assert late and not late & set(honest.vocabularies[1].labels)
    assert late & set(leaky.vocabularies[1].labels)

    params = dict(rank=8, reg=0.1, max_sweeps=8, tol=0.0, random_state=0)
    models = {"honest": ScorerRanker(CPModel(**params).fit(honest)), "leaky": ScorerRanker(CPModel(**params).fit(leaky))}
    queries = build_queries(final.evaluate, contexts, candidates="eligible", catalog=site.items,
                            item_vocabulary=honest.vocabularies[1], history=final.train)
    result = evaluate(models, queries, ks=(10,), n_resamples=50, sensitivity_users=0)
    ndcg = {m: result.value(m, "ndcg", 10) for m in models}
    print("NDCG@10 honest vs leaky:", ndcg)
    assert ndcg["leaky"] > ndcg["honest"]
