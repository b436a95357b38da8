"""The evaluation harness: shared candidates, tie rule, tables against slow references, rolling, SNIPS."""

import warnings

import numpy as np
import pandas as pd
import pytest

from threefold.models.baselines import PopularityBaseline, RandomBaseline, context_free_mf
from threefold.data.build import build_tensor
from threefold.data.context import ColumnContext, Daypart
from threefold.models.cp.model import CPModel, fold_in
from threefold.evaluation.click_estimates import paired_comparison
from threefold.demo.simulate import simulator_relevance
from threefold.evaluation.harness import evaluate, evaluate_stage, select_best
from threefold.core.scoring import Ranker
from threefold.evaluation.rankers import ScorerRanker
from threefold.evaluation.metrics import ranking_metrics
from threefold.evaluation.queries import build_queries
from threefold.evaluation.rolling import rolling_schedule
from threefold.demo.simulate import ScenarioParameters, simulate_site, true_relevance, daypart_of
from threefold.evaluation.splits import temporal_split
from threefold.core.vocabulary import Vocabulary

DAY = 86_400


@pytest.fixture(scope="module")
def world():
    """A small simulated site, its final stage, contexts and two fitted factor models."""
    site = simulate_site(ScenarioParameters.scaled(30_000, days=6), random_state=5)
    cutoff = int(site.events["timestamp"].min()) + 4 * DAY
    split = temporal_split(site.events, cutoff, validation_window="1D", test_window="1D")
    p = site.params
    contexts = [Daypart(timezone=p.timezone, starts=p.daypart_starts, labels=p.daypart_labels), ColumnContext("device")]
    final = split.final_stage()
    tensor, _ = final.train_tensor(contexts)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cp = CPModel(rank=6, max_sweeps=6, tol=0.0, random_state=0).fit(tensor)
        mf = context_free_mf(rank=6, max_sweeps=6, tol=0.0, random_state=0).fit(tensor)
    queries = build_queries(final.evaluate, contexts, candidates="eligible", catalog=site.items,
                            item_vocabulary=tensor.vocabularies[1], history=final.train)
    return {"site": site, "split": split, "stage": final, "contexts": contexts, "tensor": tensor, "cp": cp, "mf": mf,
            "queries": queries}


class _ConstantRanker(Ranker):
    """Gives every item the same score (a ranker with no information)."""

    def bind(self, queries):
        return lambda rows, items=None: np.zeros((np.arange(len(queries))[rows].size,
                                                  queries.n_items if items is None else len(items)))


class _HidesItems(Ranker):
    """Gives -inf to every item but the first: it does not rank all the candidates."""

    def bind(self, queries):
        def score(rows, items=None):
            out = np.zeros((np.arange(len(queries))[rows].size, queries.n_items if items is None else len(items)))
            out[:, 1:] = -np.inf
            return out
        return score


def test_all_models_rank_exactly_the_shared_candidates(world):
    queries = world["queries"]
    models = {"cp": world["cp"], "random": RandomBaseline(random_state=1)}
    result = evaluate(models, queries, ks=(3, 10), n_resamples=20, sensitivity_users=0)
    mask = queries.candidates.mask(np.arange(len(queries)))
    for name, ranked in result.ranked.items():
        valid = ranked >= 0
        np.testing.assert_array_equal(valid.sum(axis=1), np.minimum(mask.sum(axis=1), 10))
        assert mask[np.nonzero(valid)[0], ranked[valid]].all()
        assert len(set(map(tuple, np.sort(np.where(valid, ranked, -1), axis=1)))) > 1
    with pytest.raises(AssertionError, match="did not rank exactly the shared candidates"):
        evaluate({"cp": world["cp"], "hides": _HidesItems()}, queries, ks=(3,), n_resamples=20, sensitivity_users=0)


def test_ties_are_broken_by_item_index(world):
    queries = world["queries"]
    result = evaluate({"constant": _ConstantRanker()}, queries, ks=(5,), n_resamples=20, sensitivity_users=0)
    mask = queries.candidates.mask(np.arange(len(queries)))
    for j in range(0, len(queries), 7):
        np.testing.assert_array_equal(result.ranked["constant"][j], np.flatnonzero(mask[j])[:5])
    # the universe puts training items first, in their vocabulary order
    assert queries.items.labels[:len(world["tensor"].vocabularies[1])] == world["tensor"].vocabularies[1].labels


def test_scorer_ranker_scores_like_the_model_and_by_the_shared_rule_for_strangers(world):
    """Known ids score as the model does; unknown items get the zero row, unknown users the mean trained user row
    (the rule of threefold.core.resolve, the same as serving's)."""
    cp, queries, tensor = world["cp"], world["queries"], world["tensor"]
    bound = ScorerRanker(cp).bind(queries)
    scores = bound(np.arange(len(queries)))
    users = tensor.vocabularies[0].encode(queries.users, policy="drop").codes
    items = tensor.vocabularies[1].encode(np.asarray(queries.items.labels, dtype=object), policy="drop").codes
    contexts = np.column_stack([v.encode(queries.contexts[v.name], policy="unknown").codes for v in tensor.vocabularies[2:]])
    user_factor = cp.result_.factors[0]
    trained = np.any(user_factor != 0, axis=1)  # a user with no training cells has a zero row: unknown too
    known = np.flatnonzero((users >= 0) & trained[np.maximum(users, 0)])
    assert known.size and known.size < len(queries) and (items < 0).any()
    expected = cp.score(users[known], contexts[known], items[items >= 0])
    np.testing.assert_allclose(scores[np.ix_(known, np.flatnonzero(items >= 0))], expected, rtol=1e-5, atol=1e-6)
    np.testing.assert_array_equal(scores[:, items < 0], 0.0)
    mean_user = user_factor[trained].mean(axis=0, keepdims=True)
    with_mean = cp.result_.with_rows(0, mean_user, labels=["<mean user>"])
    strangers = np.setdiff1d(np.arange(len(queries)), known)
    assert strangers.size
    expected = with_mean.score(np.full(strangers.size, cp.shape[0]), contexts[strangers], items[items >= 0])
    np.testing.assert_allclose(scores[np.ix_(strangers, np.flatnonzero(items >= 0))], expected, rtol=1e-5, atol=1e-6)


def test_table_matches_slow_references(world):
    queries, stage = world["queries"], world["stage"]
    models = {"cp": world["cp"], "mf": world["mf"]}
    result = evaluate(models, queries, ks=(3, 10), baseline="mf", training_events=stage.train,
                      catalog=world["site"].items, n_resamples=100, sensitivity_users=20)
    users = pd.Series(queries.users)
    for name in models:
        metrics = ranking_metrics(result.ranked[name], queries.relevant, (3, 10))
        ndcg = pd.Series(metrics.ndcg[:, 1])
        row = result.table.query("model == @name and metric == 'ndcg' and k == 10 and breakdown == 'all'").iloc[0]
        np.testing.assert_allclose(row["value"], ndcg.mean(), rtol=1e-12)  # micro mean over queries
        assert row["low"] <= row["value"] <= row["high"] and row["n_users"] == users.nunique()
        for level, mean in ndcg.groupby(queries.contexts["device"].to_numpy()).mean().items():
            np.testing.assert_allclose(result.value(name, "ndcg", 10, "device", level), mean, rtol=1e-12)
    # paired comparison on per-user means (slow reference with pandas)
    per_user = {n: pd.Series(ranking_metrics(result.ranked[n], queries.relevant, (10,)).recall[:, 0]).groupby(users).mean()
                for n in models}
    reference = paired_comparison(per_user["cp"].to_numpy(), per_user["mf"].to_numpy(), n_resamples=100, random_state=0)
    row = result.comparisons.query("metric == 'recall' and k == 10").iloc[0]
    np.testing.assert_allclose([row["mean_difference"], row["p_value"], row["effect_size"]],
                               [reference.mean_difference, reference.p_value, reference.effect_size], rtol=1e-12)
    # share of clicks on users / items unseen in training, and the breakdown rows
    rel = queries.relevant.tocoo()
    new_item = ~np.isin(np.asarray(queries.items.labels)[rel.col], stage.train["item_id"].unique())
    np.testing.assert_allclose(result.cold_share["new_item"], new_item.mean())
    for breakdown in ("user_activity", "item_age", "training_status", "daypart", "context_sensitivity"):
        assert (result.table["breakdown"] == breakdown).any(), breakdown
    for metric in ("coverage", "gini", "ild_topic", "ild_latent", "novelty", "jaccard", "kendall"):
        assert np.isfinite(result.table.loc[result.table["metric"] == metric, "value"]).all(), metric
    assert "paired comparison with mf" in result.to_text()


def test_ndcg_against_the_simulators_true_relevance(world):
    site, queries = world["site"], world["queries"]
    result = evaluate({"random": RandomBaseline(random_state=3)}, queries, ks=(5,),
                      true_relevance=simulator_relevance(site.truth), n_resamples=20, sensitivity_users=0)
    mask = queries.candidates.mask(np.arange(len(queries)))
    values = []
    for j in range(len(queries)):  # slow reference: one query at a time, from the definition
        items = np.asarray(queries.items.labels)[np.flatnonzero(mask[j])]
        request = queries.requests.iloc[j]
        contexts = {"daypart": daypart_of([request["timestamp"]], site.truth)[0], "device": request["device"],
                    "page_tone": request["page_tone"]}
        gamma = dict(zip(items, true_relevance(site.truth, request["user_id"], items, contexts)))
        ranked = np.asarray(queries.items.labels)[result.ranked["random"][j]]
        dcg = sum(gamma[i] / np.log2(r + 2) for r, i in enumerate(ranked))
        ideal = sum(g / np.log2(r + 2) for r, g in enumerate(sorted(gamma.values(), reverse=True)[:5]))
        values.append(dcg / ideal)
    np.testing.assert_allclose(result.value("random", "ndcg_true", 5), np.mean(values), rtol=1e-10)


def test_rolling_folds_in_newcomers_from_events_before_each_step_only(world):
    stage, queries, cp, contexts = world["stage"], world["queries"], world["cp"], world["contexts"]
    schedule, report = rolling_schedule(stage, queries, {"cp": cp}, contexts, step="2h")
    assert report["steps"] == len(schedule) > 1 and report["folded_items"] > 0
    rows, rankers = next((r, m) for r, m in schedule[1:] if m["cp"] is not cp)
    refreshed = rankers["cp"]
    new_items = [label for label in refreshed.vocabularies[1].labels if label not in cp.result_.vocabularies[1]]
    step_start = stage.start + (queries.times[rows[0]] - stage.start) // 7200 * 7200
    before = stage.evaluate[stage.evaluate["timestamp"] < step_start]
    vocabs = list(cp.result_.vocabularies)
    vocabs[1] = Vocabulary(tuple(sorted(new_items)), name="item")
    tensor, _ = build_tensor(before, contexts, vocabularies=vocabs, unseen_ids="drop")
    expected = fold_in(cp.result_, tensor, "item")
    got = refreshed.factors[1][len(cp.result_.vocabularies[1]):len(cp.result_.vocabularies[1]) + len(new_items)]
    np.testing.assert_allclose(got, expected, rtol=1e-5, atol=1e-6)


def test_rolling_protocol_ranks_new_items_better_than_a_frozen_model(world):
    """Planted-truth test: fold-in lets the model rank items published after the cutoff."""
    options = dict(ks=(10,), n_resamples=20, sensitivity_users=0, catalog=world["site"].items)
    models = {"cp": world["cp"]}
    static = evaluate_stage(world["stage"], models, world["contexts"], protocol="static", **options)
    rolling = evaluate_stage(world["stage"], models, world["contexts"], protocol="rolling", step="1h", **options)
    assert rolling.report["folded_items"] > 0 and rolling.cold_share == static.cold_share
    assert static.cold_share["new_item"] > 0.2
    new = {r.report["protocol"]: r.value("cp", "recall", 10, "training_status", "new item") for r in (static, rolling)}
    print("recall@10 of clicks on new items:", new)
    assert new["rolling"] > new["static"]


def test_model_selection_uses_the_validation_window_only(world):
    split = temporal_split(world["site"].events, world["stage"].start, validation_window="1D", test_window="12h")
    selection = split.selection_stage()
    tensor, _ = selection.train_tensor(world["contexts"])
    candidates = {f"rank{r}": CPModel(rank=r, max_sweeps=3, tol=0.0, random_state=0).fit(tensor) for r in (2, 6)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        validation = evaluate_stage(selection, {**candidates, "popularity": PopularityBaseline()}, world["contexts"],
                                    protocol="static", ks=(10,), n_resamples=20, sensitivity_users=0)
    assert validation.stage == "validation"
    best = select_best(validation, "ndcg", 10, candidates=list(candidates))
    assert best == max(candidates, key=lambda n: validation.value(n, "ndcg", 10))
    test = evaluate_stage(split.final_stage(), {"popularity": PopularityBaseline()}, protocol="static", ks=(10,),
                          n_resamples=20, sensitivity_users=0)
    with pytest.raises(ValueError, match="validation results only"):
        select_best([validation, test])
    with pytest.raises(ValueError, match="Selecting on the test window is refused"):
        select_best(validation, select_on="test")


def test_harness_input_errors(world):
    queries = world["queries"]
    with pytest.raises(ValueError, match="the baseline must be one of them"):
        evaluate({"cp": world["cp"]}, queries, baseline="popularity")
    with pytest.raises(ValueError, match="cover every query exactly once"):
        evaluate({"cp": world["cp"]}, queries, schedule=[(np.arange(3), {"cp": world["cp"]})])
    with pytest.raises(ValueError, match="The query set is empty"):
        evaluate({"cp": world["cp"]}, queries.take(np.arange(0)))
    with pytest.raises(TypeError, match="give a fitted threefold model"):
        evaluate({"x": object()}, queries)
    with pytest.raises(ValueError, match="candidates='shown' needs impressions"):
        build_queries(world["stage"].evaluate.drop(columns="request_id"), candidates="shown")


def test_snips_is_closer_to_the_true_click_through_than_naive():
    """Planted-truth test (10 seeds, candidates = the lists actually shown, propensities from the training log):
    the SNIPS estimate of a new ranking's click-through is closer to the true value than the naive one."""
    closer = 0
    for seed in range(10):
        site = simulate_site(ScenarioParameters.scaled(120_000, days=8), random_state=seed)
        cutoff = int(site.events["timestamp"].min()) + 5 * DAY
        stage = temporal_split(site.events, cutoff, validation_window="1D").final_stage()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            result = evaluate_stage(stage, {"popularity": PopularityBaseline(window="24h")}, candidates="shown",
                                    protocol="static", ks=(5,), true_relevance=simulator_relevance(site.truth),
                                    n_resamples=20, sensitivity_users=0)
        values = {e: result.value("popularity", f"click_through_{e}", 5) for e in ("naive", "snips", "true")}
        print(f"seed {seed}: true {values['true']:.4f}  naive {values['naive']:.4f}  SNIPS {values['snips']:.4f}")
        closer += abs(values["snips"] - values["true"]) < abs(values["naive"] - values["true"])
    assert closer >= 8
