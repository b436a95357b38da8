"""List policies in the evaluation: each model is measured again after the rules, paired with itself.

The data are a small simulated site (invented, seeded; the demo simulator),
the model a CP fitted on it. The outside references are definitions: ranking
is the sort by score with the lower item index first on ties (common
practice), written here as a slow loop over every candidate; the paired
comparison is the per-user difference of the two lists' values.
"""

from __future__ import annotations

import tomllib
import warnings

import numpy as np
import pandas as pd
import pytest

from threefold.data.context import ColumnContext, Daypart
from threefold.demo.simulate import ScenarioParameters, simulate_site, simulator_relevance
from threefold.evaluation.harness import evaluate, evaluate_stage
from threefold.evaluation.policy_lists import SUFFIX
from threefold.evaluation.queries import build_queries
from threefold.evaluation.rankers import as_ranker
from threefold.evaluation.set_metrics import alpha_ndcg
from threefold.evaluation.splits import temporal_split
from threefold.models.baselines import PopularityBaseline
from threefold.models.cp.model import CPModel
from threefold.pipeline.config import ConfigError, load_config
from threefold.pipeline.experiment import ModelRun, TrainReport, summary_text
from threefold.ranking.policy_spec import read_policies

from _tracking import ROOT

DAY = 86_400
OPTIONS = dict(ks=(5,), n_resamples=50, sensitivity_users=0, protocol="static")


@pytest.fixture(scope="module")
def world():
    site = simulate_site(ScenarioParameters.scaled(30_000, days=6), random_state=5)
    cutoff = int(site.events["timestamp"].min()) + 4 * DAY
    stage = temporal_split(site.events, cutoff, validation_window="1D", test_window="1D").final_stage()
    p = site.params
    contexts = [Daypart(timezone=p.timezone, starts=p.daypart_starts, labels=p.daypart_labels), ColumnContext("device")]
    tensor, _ = stage.train_tensor(contexts)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cp = CPModel(rank=6, max_sweeps=6, tol=0.0, random_state=0).fit(tensor)
    queries = build_queries(stage.evaluate, contexts, candidates="eligible", catalog=site.items,
                            item_vocabulary=tensor.vocabularies[1], history=stage.train)
    return {"site": site, "stage": stage, "contexts": contexts, "cp": cp, "queries": queries}


def _slow_top(scores_row: np.ndarray, candidates: np.ndarray, k: int, banned: set) -> list[int]:
    """Sort by score, lower index first on ties, skipping banned items (the definition, as a loop)."""
    items = [int(i) for i in np.flatnonzero(candidates) if int(i) not in banned]
    items.sort(key=lambda i: (-scores_row[i], i))
    return items[:k]


def test_the_model_itself_is_measured_exactly_as_without_policies(world):
    models = {"cp": world["cp"]}
    rules = read_policies({"diversity": {"mmr": 0.5, "similarity": "factors"}})
    plain = evaluate(models, world["queries"], catalog=world["site"].items, **OPTIONS)
    ruled = evaluate(models, world["queries"], catalog=world["site"].items, policies=rules, **OPTIONS)
    np.testing.assert_array_equal(ruled.ranked["cp"], plain.ranked["cp"])  # the pool's first K is the model's list
    mine = ruled.table[ruled.table["model"] == "cp"].reset_index(drop=True)
    pd.testing.assert_frame_equal(mine[plain.table.columns], plain.table.reset_index(drop=True))
    assert (ruled.table["model"] == "cp" + SUFFIX).any()
    moved = ruled.report["policies"]["cp" + SUFFIX]["diversity: mmr"]["moved"]
    assert moved > 0
    assert "what each list policy did for 'cp + policies':\n  diversity: mmr: fired in " in ruled.to_text()
    assert f"moved {moved:,}" in ruled.to_text()


def test_a_block_list_gives_the_full_sort_without_the_blocked_items(world):
    queries, cp = world["queries"], world["cp"]
    items = list(queries.items.labels)
    popular = pd.Series(np.asarray(queries.relevant.sum(axis=0)).ravel()).nlargest(2).index
    blocked = {items[i] for i in popular}
    result = evaluate({"cp": cp}, queries, policies=read_policies({"block": sorted(blocked)}), **OPTIONS)
    lists = result.ranked["cp" + SUFFIX]
    banned = {items.index(b) for b in blocked}
    holds = np.flatnonzero(np.isin(result.ranked["cp"], list(banned)).any(axis=1))
    assert holds.size  # the model's own lists do hold blocked items: those are the rows that test the rule
    rows = np.concatenate([holds[:40], np.arange(20)])
    scores = np.asarray(as_ranker(cp).bind(queries)(rows, None), np.float64)
    mask = queries.candidates.mask(rows)
    for j, r in enumerate(rows):
        expected = _slow_top(scores[j], mask[j], 5, banned)
        assert [int(i) for i in lists[r] if i >= 0] == expected, r
    assert result.report["policies"]["cp" + SUFFIX]["block"]["removed"] > 0


def test_an_exclude_guardrail_never_lets_an_item_through_and_the_difference_is_paired_per_user(world):
    site, queries = world["site"], world["queries"]
    rules = read_policies({"guardrail": [{"name": "no upbeat on grave pages", "when": {"page_tone": ["grave"]},
                                          "items": {"tone": ["upbeat"]}}], "diversity": {"max_per": {
                                              "column": "topic", "items": 2}}})
    result = evaluate({"cp": world["cp"]}, queries, catalog=site.items, policies=rules, **OPTIONS)
    lists = result.ranked["cp" + SUFFIX]
    tone = site.items.set_index("item_id")["tone"].reindex(list(queries.items.labels)).to_numpy()
    grave = queries.requests["page_tone"].to_numpy() == "grave"
    listed = lists >= 0
    assert grave.any() and not (tone[np.maximum(lists, 0)] == "upbeat")[grave[:, None] & listed].any()
    topic = site.items.set_index("item_id")["topic"].reindex(list(queries.items.labels)).to_numpy()
    for row in lists[:200]:
        assert pd.Series(topic[row[row >= 0]]).value_counts().max() <= 2
    # α-NDCG rows are the set measure of the lists (topic aspects), and the paired difference is per user
    aspect = pd.factorize(pd.Series(topic), sort=True)[0]
    clicked = (queries.relevant.toarray() > 0).astype(float)
    values = {n: alpha_ndcg(result.ranked[n], clicked, aspect, k=5) for n in ("cp", "cp" + SUFFIX)}
    users = pd.Series(queries.users)
    per_user = {n: pd.Series(v).groupby(users).mean() for n, v in values.items()}
    expected = float((per_user["cp" + SUFFIX] - per_user["cp"]).mean())
    row = result.comparisons[(result.comparisons["model"] == "cp" + SUFFIX) & (result.comparisons["metric"]
                                                                               == "alpha_ndcg")]
    np.testing.assert_allclose(row["mean_difference"].iloc[0], expected, rtol=1e-9, atol=1e-12)
    assert row["baseline"].iloc[0] == "cp"


def test_repetition_reads_the_training_events_and_popularity_alone_is_not_diversified_on_factors(world):
    rules = read_policies({"repetition": {"consumed": True}, "diversity": {"mmr": 0.8, "similarity": "factors"}})
    result = evaluate_stage(world["stage"], {"cp": world["cp"], "popularity": PopularityBaseline()},
                            world["contexts"], catalog=world["site"].items, policies=rules, **OPTIONS)
    consumed = result.report["policies"]["popularity" + SUFFIX]["repetition: consumed"]
    assert consumed["removed"] > 0  # items each user clicked in training left the lists
    alone = evaluate_stage(world["stage"], {"popularity": PopularityBaseline()}, world["contexts"],
                           catalog=world["site"].items, policies=rules, **OPTIONS)
    assert "needs a factor model" in alone.report["policies_skipped"]
    assert not alone.table["model"].str.endswith(SUFFIX).any()


def test_the_config_section_is_checked_on_load(tmp_path):
    text = (ROOT / "experiments" / "quillfen-courier.toml").read_text()
    config = load_config(ROOT / "experiments" / "quillfen-courier.toml")
    assert config.policies().max_per == 3 and config.policies().consumed
    bad = text.replace('mmr = 0.8', 'mmr = 1.8')
    (tmp_path / "bad.toml").write_text(bad.replace("../data_samples", str(ROOT / "data_samples")))
    with pytest.raises(ConfigError, match=r"bad.toml: \[policies\].*mmr"):
        load_config(tmp_path / "bad.toml")
    raw = tomllib.loads(text)
    assert "policies" in raw  # the example config shows the section


def test_the_summary_shows_each_model_with_and_without_the_policies():
    comparisons = pd.DataFrame({"model": ["cp + policies"], "baseline": ["cp"], "metric": ["ndcg"], "k": [10],
                                "mean_difference": [-0.0123], "low": [-0.02], "high": [-0.004], "p_value": [0.003]})
    runs = [ModelRun("cp", "r1", {"ndcg_at_10": 0.2, "with_policies_ndcg_at_10": 0.19}, None, 1.0,
                     comparisons=comparisons)]
    text = summary_text(TrainReport("p", runs, pd.DataFrame(), ["ndcg_at_10"], []))
    assert "with the list policies of [policies] (paired per user with the same model without them):" in text
    assert "cp: ndcg_at_10 0.2000 -> 0.1900  -0.0123 [-0.0200, -0.0040], p = 0.003" in text


def test_alpha_ndcg_true_is_the_set_measure_against_the_simulators_relevance(world):
    site, queries = world["site"], world["queries"]
    rules = read_policies({"diversity": {"max_per": {"column": "topic", "items": 1}}})
    truth = simulator_relevance(site.truth)
    result = evaluate({"cp": world["cp"]}, queries, catalog=site.items, policies=rules, true_relevance=truth,
                      **OPTIONS)
    labels = np.asarray(queries.items.labels, dtype=object)
    mask = queries.candidates.mask(np.arange(len(queries)))
    gamma = np.zeros(mask.shape)  # γ of every candidate, 0 elsewhere, computed row by row here
    for r in range(len(queries)):
        items = np.flatnonzero(mask[r])
        request = queries.requests.iloc[[r] * items.size].reset_index(drop=True)
        gamma[r, items] = truth(request, labels[items])
    topic = site.items.set_index("item_id")["topic"].reindex(list(labels)).to_numpy()
    aspect = pd.factorize(pd.Series(topic), sort=True)[0]
    users = pd.Series(queries.users)
    per_user = {n: pd.Series(alpha_ndcg(result.ranked[n], gamma, aspect, k=5)).groupby(users).mean()
                for n in ("cp", "cp" + SUFFIX)}
    c = result.comparisons
    row = c[(c["model"] == "cp" + SUFFIX) & (c["metric"] == "alpha_ndcg_true")]
    np.testing.assert_allclose(row["mean_difference"].iloc[0], float((per_user["cp" + SUFFIX] - per_user["cp"]).mean()),
                               rtol=1e-9, atol=1e-12)


def test_each_rule_alone_is_the_evaluation_with_that_rule_only(world):
    site, queries = world["site"], world["queries"]
    table = {"guardrail": [{"name": "grave", "when": {"page_tone": ["grave"]}, "items": {"tone": ["upbeat"]}}],
             "diversity": {"mmr": 0.7, "similarity": "factors", "max_per": {"column": "topic", "items": 2}}}
    both = evaluate({"cp": world["cp"]}, queries, catalog=site.items, policies=read_policies(table),
                    policy_ablation=True, **OPTIONS)
    alone = evaluate({"cp": world["cp"]}, queries, catalog=site.items,
                     policies=read_policies({"diversity": table["diversity"]}), **OPTIONS)
    np.testing.assert_array_equal(both.ranked["cp + only diversity"], alone.ranked["cp" + SUFFIX])
    assert set(both.ranked) == {"cp", "cp" + SUFFIX, "cp + only guardrail 'grave'", "cp + only diversity"}
    c = both.comparisons
    assert set(c.loc[c["model"] == "cp + only guardrail 'grave'", "baseline"]) == {"cp"}
    assert set(both.report["policies"]["cp + only guardrail 'grave'"]) == {"guardrail 'grave'"}


def test_the_summary_shows_what_each_rule_alone_changes():
    comparisons = pd.DataFrame({"model": ["cp + only diversity", "cp + only diversity"], "baseline": ["cp", "cp"],
                                "metric": ["ndcg", "alpha_ndcg"], "k": [10, 10], "mean_difference": [-0.01, 0.02],
                                "low": [-0.02, 0.01], "high": [-0.001, 0.03], "p_value": [0.01, 0.001]})
    runs = [ModelRun("cp", "r1", {"ndcg_at_10": 0.2}, None, 1.0, comparisons=comparisons)]
    text = summary_text(TrainReport("p", runs, pd.DataFrame(), ["ndcg_at_10"], []))
    assert "each rule alone (paired per user with the model without rules):" in text
    assert "cp, diversity alone: ndcg_at_10 -0.0100 [-0.0200, -0.0010]; alpha_ndcg_at_10 +0.0200 [+0.0100, +0.0300]" in text
