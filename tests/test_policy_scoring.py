"""List policies inside ``threefold score``: the batch job applies the rules exactly as the recommender does.

The model is fitted on invented random clicks (``_tracking.tiny_cp``); the
outside reference is the ranking definition (sort by score, common practice)
written here as a slow loop.
"""

from __future__ import annotations

import json
import subprocess

import numpy as np
import pandas as pd
import pytest

from threefold.models.model_io import save_model
from threefold.pipeline.score import score_requests
from threefold.ranking.history import load_history, read_history, write_history
from threefold.ranking.policies import PolicyCounts, compile_policies
from threefold.ranking.policy_spec import PolicyError, read_policies
from threefold.ranking.recommender import Recommender

from _tracking import SERVING, child_env, threefold_command, tiny_cp

T0 = 1_700_050_000
RULES = """
block = ["i03"]
pins = [{item = "i07", slot = 2}]

[[guardrail]]
name = "no sport on desktops"
when = {device = ["desktop"]}
items = {topic = ["sport"]}

[diversity]
mmr = 0.7
similarity = "factors"
max_per = {column = "topic", items = 2}
"""


@pytest.fixture(scope="module")
def job(tmp_path_factory):
    folder = tmp_path_factory.mktemp("policies")
    result, specs = tiny_cp(seed=4)
    save_model(result, folder / "model", extra={"serving": SERVING})
    rng = np.random.default_rng(0)
    n = 120
    requests = pd.DataFrame({"request_id": [f"r{i:03d}" for i in range(n)],
                             "user_id": rng.choice([f"u{i:02d}" for i in range(24)], n),
                             "timestamp": T0 + rng.integers(0, 86_400, n),
                             "device": rng.choice(["mobile", "desktop"], n)})
    requests.to_csv(folder / "requests.csv", index=False)
    items = [f"i{i:02d}" for i in range(15)]
    catalog = pd.DataFrame({"item_id": items, "topic": [("civic", "sport", "arts")[i % 3] for i in range(15)]})
    catalog.to_csv(folder / "items.csv", index=False)
    (folder / "rules.toml").write_text(RULES)
    return folder, result, specs, requests, catalog


def test_the_job_applies_the_rules_as_the_recommender_does(job, tmp_path):
    folder, result, specs, requests, catalog = job
    out = score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "out", k=5, chunk_rows=50,
                         policies=folder / "rules.toml", items=folder / "items.csv", show_progress=False)
    tables = compile_policies(read_policies(folder / "rules.toml"), catalog, model_items=catalog["item_id"])
    counts = PolicyCounts()
    direct = Recommender(result, specs).recommend(requests, k=5, policies=tables, policy_counts=counts)
    pd.testing.assert_frame_equal(out.reset_index(drop=True), direct.reset_index(drop=True), check_dtype=False)
    manifest = json.loads((tmp_path / "out" / "_manifest.json").read_text())
    assert manifest["policies"] == counts.rules  # summed over the 3 parts = one call over everything
    assert not out["item_id"].eq("i03").any()
    sport = set(catalog.loc[catalog["topic"] == "sport", "item_id"])
    desktop = out["request_id"].isin(requests.loc[requests["device"] == "desktop", "request_id"])
    assert not out.loc[desktop, "item_id"].isin(sport).any()
    assert (out.loc[out["pinned"], ["item_id", "rank"]].drop_duplicates().values.tolist() == [["i07", 2]])
    topics = out.merge(catalog, on="item_id").groupby(["request_id", "topic"]).size()
    assert topics.max() <= 2 + 1  # the cap, plus a pin that overrides it


def test_a_block_list_alone_is_the_full_sort_without_the_blocked_items(job, tmp_path):
    folder, result, specs, requests, catalog = job
    scorer = Recommender(result, specs)
    tables = compile_policies(read_policies({"block": ["i00", "i05"]}), catalog)
    blocked = scorer.recommend(requests, k=4, policies=tables)
    full = scorer.recommend(requests, k=15)
    for request_id, rows in full.groupby("request_id", sort=False):
        scores = dict(zip(rows["item_id"], rows["score"]))  # every item's score for this request
        expected = sorted((i for i in scores if i not in {"i00", "i05"}), key=lambda i: (-scores[i], i))[:4]
        assert blocked.loc[blocked["request_id"] == request_id, "item_id"].tolist() == expected


def test_a_rule_on_an_unknown_column_fails_before_any_request_is_read(job, tmp_path):
    folder, *_ = job
    (tmp_path / "bad.toml").write_text('[[guardrail]]\nitems = {section = ["sport"]}\n')
    with pytest.raises(PolicyError, match=r"bad.toml: guardrail 'guardrail 1' names the column 'section'"):
        score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "out", policies=tmp_path / "bad.toml",
                       items=folder / "items.csv", show_progress=False)
    assert not list((tmp_path / "out" / "_staging").glob("requests-*"))


def test_a_guardrail_on_a_missing_request_column_is_refused(job):
    folder, result, specs, requests, catalog = job
    tables = compile_policies(read_policies({"guardrail": [{"when": {"page_tone": ["grave"]},
                                                            "items": {"topic": ["sport"]}}]}), catalog)
    with pytest.raises(ValueError, match=r"conditions on 'page_tone', which is neither a column of the requests"):
        Recommender(result, specs).recommend(requests, k=3, policies=tables)


def test_policies_and_exploration_are_refused_together(job, tmp_path):
    folder, *_ = job
    with pytest.raises(ValueError, match=r"Exploration and list policies cannot be combined yet"):
        score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "out", policies=folder / "rules.toml",
                       items=folder / "items.csv", explore=0.5, show_progress=False)


def test_the_command_line_prints_what_each_rule_did(job, tmp_path):
    folder, *_ = job
    result = subprocess.run(threefold_command("score", str(folder / "model"), "--requests", str(folder / "requests.csv"),
                                              "--out", str(tmp_path / "lists"), "--policies", str(folder / "rules.toml"),
                                              "--items", str(folder / "items.csv")),
                            capture_output=True, text=True, env=child_env(), cwd=tmp_path, timeout=300)
    assert result.returncode == 0, result.stderr[-2000:]
    assert "list policies:" in result.stdout and "block" in result.stdout
    assert "guardrail 'no sport on desktops'" in result.stdout


REPEAT_RULES = """
[repetition]
consumed = true
cap = {shown = 2, days = 3}
"""


def _history_log(folder, requests):
    """Invented clicks and impressions of the requests' users before T0 (a seeded log, not a reference)."""
    rng = np.random.default_rng(9)
    n = 400
    log = pd.DataFrame({"user_id": rng.choice(requests["user_id"].unique(), n),
                        "item_id": rng.choice([f"i{i:02d}" for i in range(15)], n),
                        "timestamp": T0 - rng.integers(0, 5 * 86_400, n),
                        "event": rng.choice(["impression", "click"], n, p=[0.7, 0.3])})
    log.to_csv(folder / "history.csv", index=False)
    (folder / "repeat.toml").write_text(REPEAT_RULES)
    return folder / "history.csv", folder / "repeat.toml"


def test_a_history_digest_scores_as_the_log_it_was_made_from(job, tmp_path):
    folder, *_, requests, catalog = job
    log, rules = _history_log(tmp_path, requests)
    made = subprocess.run(threefold_command("history", str(log), "--policies", str(rules), "--out",
                                            str(tmp_path / "history.npz")),
                          capture_output=True, text=True, env=child_env(), cwd=tmp_path, timeout=300)
    assert made.returncode == 0, made.stderr[-2000:]
    assert "400 rows (0 skipped)" in made.stdout and "clicked pairs" in made.stdout
    digest, read = load_history(tmp_path / "history.npz"), read_history(log, cap_shown=2, cap_days=3)
    for name in ("clicked", "ignored", "as_of", "rows", "cap_shown", "cap_days"):
        np.testing.assert_array_equal(getattr(digest, name), getattr(read, name), err_msg=name)
    from_log = score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "a", k=5, policies=rules,
                              history=log, show_progress=False)
    from_digest = score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "b", k=5, policies=rules,
                                 history=tmp_path / "history.npz", show_progress=False)
    pd.testing.assert_frame_equal(from_log, from_digest)
    counts = json.loads((tmp_path / "b" / "_manifest.json").read_text())["policies"]
    assert counts["repetition: consumed"]["removed"] > 0  # the digest did remove consumed items


def test_a_digest_made_for_another_cap_is_refused(job, tmp_path):
    folder, *_, requests, catalog = job
    log, rules = _history_log(tmp_path, requests)
    write_history(read_history(log, cap_shown=3, cap_days=3), tmp_path / "h.npz")
    with pytest.raises(PolicyError, match=r"h.npz: this history digest was made for a cap of 3 impressions in 3 "
                                          r"days, the rules of .*repeat.toml ask for a cap of 2 impressions in 3 days"):
        score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "out", policies=rules,
                       history=tmp_path / "h.npz", show_progress=False)
    np.savez(tmp_path / "other.npz", x=np.zeros(3))
    with pytest.raises(ValueError, match=r"other.npz: not a history digest of threefold history"):
        load_history(tmp_path / "other.npz")
