"""List policies: guardrails, repetition, diversity, pins (threefold.ranking.policies, policy_spec, history)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_array_equal

from threefold.ranking.history import id_hashes, read_history
from threefold.ranking.policies import PIN_BASE, apply_policies, compile_policies
from threefold.ranking.policy_spec import PolicyError, read_policies

# A hand-made catalog of six items (invented ids), used by the hand-worked cases below.
CATALOG = pd.DataFrame({
    "item_id": ["s1", "s2", "s3", "s4", "s5", "s6"],
    "topic": ["civic", "civic", "civic", "sport", "arts", "sport"],
    "tone": ["grave", "upbeat", "grave", "upbeat", "grave", "upbeat"],
    "kind": ["article", "article", "audio", "clip", "article", "audio"],
})


def _apply(rules: dict, pools, scores, *, levels=None, users=None, k=3, history=None, factors=None, pin_live=None):
    """Run the rules on pools of catalog ids (best score first); return the lists as ids ('<pin>' kept as id)."""
    tables = compile_policies(read_policies(rules), CATALOG, model_items=CATALOG["item_id"], history=history)
    pools = np.asarray(pools, dtype=object)
    q, p = pools.shape
    universe = tables.positions(pools.ravel()).reshape(q, p)
    codes = universe.copy()  # model rows = catalog rows here
    users = np.asarray(users if users is not None else ["u1"] * q, dtype=object)
    entries, counts = apply_policies(
        tables, universe=universe, codes=codes, valid=np.ones((q, p), bool), scores=np.asarray(scores, float),
        item_hash=id_hashes(pools.ravel()).reshape(q, p), request_levels=levels or {},
        user_hash=id_hashes(users), lengths=np.full(q, k), item_factors=factors, pin_live=pin_live)
    pins = [item for item, _ in tables.policies.pins]
    out = [[pools[i, e] if e >= 0 else pins[PIN_BASE - e] for e in row if e != -1] for i, row in enumerate(entries)]
    return out, counts


def test_mmr_with_lambda_one_keeps_the_relevance_order():
    # Definition (Carbonell & Goldstein, SIGIR 1998): with λ = 1 the similarity term vanishes.
    lists, _ = _apply({"diversity": {"mmr": 1.0, "similarity": "topic"}}, [["s1", "s2", "s3", "s4"]],
                      [[0.9, 0.8, 0.7, 0.1]], k=4)
    assert lists == [["s1", "s2", "s3", "s4"]]


def test_mmr_with_lambda_zero_picks_the_item_least_similar_to_the_first():
    # Definition (Carbonell & Goldstein 1998), worked by hand: the first pick is the most relevant (s1, civic);
    # with λ = 0 the next is the least similar to it: s4 (sport, similarity 0) before the civic s2, s3 (1).
    # Then max-similarity to {s1, s4} is 1 for every civic item: ties go to the higher relevance (s2).
    lists, counts = _apply({"diversity": {"mmr": 0.0, "similarity": "topic"}}, [["s1", "s2", "s3", "s4"]],
                           [[0.9, 0.8, 0.7, 0.1]], k=3)
    assert lists == [["s1", "s4", "s2"]]
    assert counts.rules["diversity: mmr"] == {"requests": 1, "removed": 0, "moved": 1}


def test_mmr_factor_similarity_is_the_cosine_of_item_factors():
    # Hand case: s2's factor row is parallel to s1's (cosine 1), s3's orthogonal (cosine 0); λ = 0.5, relevance
    # min-max scaled over the pool (s1 1.0, s2 0.5, s3 0.0): after s1, s2 gains 0.5·0.5 − 0.5·1 = −0.25 and
    # s3 gains 0.5·0 − 0.5·0 = 0, so s3 comes second.
    factors = np.zeros((6, 2))
    factors[0], factors[1], factors[2] = [1.0, 0.0], [2.0, 0.0], [0.0, 1.0]
    lists, _ = _apply({"diversity": {"mmr": 0.5}}, [["s1", "s2", "s3"]], [[3.0, 2.0, 1.0]], factors=factors)
    assert lists == [["s1", "s3", "s2"]]


def test_mmr_takes_a_negative_cosine_as_it_is():
    # Worked by hand (definition, Carbonell & Goldstein 1998): s2 points away from s1 (cosine -1), s3 is
    # orthogonal (0). Scores 3, 1, 2.5 scale to s1 1, s2 0, s3 0.75; λ = 0.5: after s1, s2 gains
    # 0.5·0 − 0.5·(−1) = 0.5 and s3 gains 0.5·0.75 − 0 = 0.375, so s2 is second (a max clamped at 0 would give s3).
    factors = np.zeros((6, 2))
    factors[0], factors[1], factors[2] = [1.0, 0.0], [-1.0, 0.0], [0.0, 1.0]
    lists, _ = _apply({"diversity": {"mmr": 0.5}}, [["s1", "s3", "s2"]], [[3.0, 2.5, 1.0]], factors=factors)
    assert lists == [["s1", "s2", "s3"]]


def test_max_per_keeps_at_most_m_items_of_one_level():
    lists, counts = _apply({"diversity": {"max_per": {"column": "topic", "items": 1}}},
                           [["s1", "s2", "s3", "s4", "s6", "s5"]], [[6, 5, 4, 3, 2, 1]], k=4)
    assert lists == [["s1", "s4", "s5"]]  # civic once, sport once, arts once: the pool runs out at 3
    assert counts.rules["diversity: max_per"]["requests"] == 1


def test_guardrail_excludes_only_in_matching_requests():
    rules = {"guardrail": [{"name": "no upbeat beside grave", "when": {"page_tone": ["grave"]},
                            "items": {"tone": ["upbeat"]}}]}
    pools = [["s1", "s2", "s3", "s4"]] * 2
    lists, counts = _apply(rules, pools, [[4, 3, 2, 1]] * 2, levels={"page_tone": np.array(["grave", "light"])})
    assert lists == [["s1", "s3"], ["s1", "s2", "s3"]]
    assert counts.rules["guardrail 'no upbeat beside grave'"] == {"requests": 1, "removed": 2, "moved": 0}


def test_demote_moves_an_item_down_by_its_places():
    rules = {"guardrail": [{"name": "clips later at night", "when": {"daypart": ["night"]}, "items": {"kind": ["clip"]},
                            "action": "demote", "places": 2}]}
    lists, counts = _apply(rules, [["s4", "s1", "s2", "s3"]], [[4, 3, 2, 1]], levels={"daypart": np.array(["night"])},
                           k=4)
    assert lists == [["s1", "s2", "s4", "s3"]]
    assert counts.rules["guardrail 'clips later at night'"]["moved"] == 1


def test_block_and_pins():
    rules = {"block": ["s2"], "pins": [{"item": "s5", "slot": 1}, {"item": "s2", "slot": 2}]}
    lists, counts = _apply(rules, [["s1", "s2", "s3", "s5"]], [[4, 3, 2, 1]], k=3)
    assert lists == [["s5", "s1", "s3"]]  # s5 pinned first (and not repeated); the blocked s2 never pinned
    assert counts.rules["block"]["removed"] == 1 and "pin 's2'" not in counts.rules
    later, _ = _apply(rules, [["s1", "s3"]], [[2, 1]], k=3, pin_live=np.array([[False, True]]))
    assert later == [["s1", "s3"]]  # s5 not live at this request


def test_a_pin_never_overrides_an_exclude_guardrail():
    rules = {"pins": [{"item": "s4", "slot": 1}],
             "guardrail": [{"when": {"page_tone": ["grave"]}, "items": {"tone": ["upbeat"]}}]}
    lists, _ = _apply(rules, [["s1", "s3"], ["s1", "s3"]], [[2, 1], [2, 1]],
                      levels={"page_tone": np.array(["grave", "calm"])})
    assert lists == [["s1", "s3"], ["s4", "s1", "s3"]]


def test_repetition_from_a_history_log(tmp_path):
    # Hand-counted log: u1 clicked s1 (an article) and s3 (audio, re-consumable); s2 was shown to u1 three
    # times within the last 7 days without a click (capped at 3); s6 (audio) was shown three times but clicked
    # once (not capped, and re-consumable); s5 was shown three times, but two of them are older than 7 days
    # before the last event.
    day = 86_400
    t = 1_800_000_000
    rows = [("u1", "s1", t, "click"), ("u1", "s3", t, "click")]
    rows += [("u1", "s2", t - i * 3600, "impression") for i in range(3)]
    rows += [("u1", "s6", t - i * 3600, "impression") for i in range(3)] + [("u1", "s6", t, "click")]
    rows += [("u1", "s5", t - 8 * day - i, "impression") for i in range(2)] + [("u1", "s5", t, "impression")]
    # s4 was shown twice; the third row is an exact repeat of the first (a logging retry), counted once: not capped
    rows += [("u1", "s4", t - 3600, "impression"), ("u1", "s4", t - 7200, "impression"),
             ("u1", "s4", t - 3600, "impression")]
    log = pd.DataFrame(rows, columns=["user_id", "item_id", "timestamp", "event"])
    log["timestamp"] = pd.to_datetime(log["timestamp"], unit="s", utc=True).astype(str)
    log.to_csv(tmp_path / "history.csv", index=False)
    history = read_history(tmp_path / "history.csv", cap_shown=3, cap_days=7, chunk_rows=4)
    whole = read_history(tmp_path / "history.csv", cap_shown=3, cap_days=7)  # chunking changes nothing
    assert_array_equal(history.clicked, whole.clicked)
    assert_array_equal(history.ignored, whole.ignored)
    assert history.clicked.size == 3 and history.ignored.size == 1 and history.rows == len(log)
    assert history.skipped == 1  # the repeated impression
    rules = {"repetition": {"consumed": True, "reconsumable": {"kind": ["audio"]}, "cap": {"shown": 3, "days": 7}}}
    pools = [["s1", "s2", "s3", "s6", "s5"]] * 2
    lists, counts = _apply(rules, pools, [[5, 4, 3, 2, 1]] * 2, users=["u1", "u2"], history=history, k=5)
    assert lists == [["s3", "s6", "s5"], ["s1", "s2", "s3", "s6", "s5"]]
    assert counts.rules["repetition: consumed"] == {"requests": 1, "removed": 1, "moved": 0}
    assert counts.rules["repetition: cap"] == {"requests": 1, "removed": 1, "moved": 0}


def test_repetition_needs_the_history():
    with pytest.raises(PolicyError, match=r"needs the history log"):
        compile_policies(read_policies({"repetition": {"consumed": True}}), CATALOG)


@pytest.mark.parametrize("rules, message", [
    ({"guardrails": []}, r"unknown key\(s\) \['guardrails'\]"),
    ({"guardrail": [{"items": {"colour": ["red"]}}]}, r"names the column 'colour', which the catalog does not have"),
    ({"guardrail": [{"items": {"tone": ["light"]}}]}, r"names level\(s\) \['light'\] of column 'tone'"),
    ({"guardrail": [{"items": {"tone": ["grave"]}, "action": "hide"}]}, r"guardrail\[0\].action: expected one of"),
    ({"guardrail": [{"items": {"tone": ["grave"]}, "action": "demote"}]}, r"guardrail\[0\].places: expected an integer"),
    ({"diversity": {"mmr": 1.5}}, r"diversity.mmr: expected λ in \[0, 1\]"),
    ({"pins": [{"item": "s1", "slot": 1}, {"item": "s2", "slot": 1}]}, r"two pins share a slot"),
    ({"diversity": {"max_per": {"column": "section", "items": 2}}}, r"names the column 'section'"),
])
def test_bad_rules_are_refused_before_any_data(rules, message):
    with pytest.raises(PolicyError, match=message):
        compile_policies(read_policies(rules), CATALOG)


def test_a_policy_file_names_itself_in_errors(tmp_path):
    path = tmp_path / "rules.toml"
    path.write_text("[diversity]\nmmr = 'high'\n")
    with pytest.raises(PolicyError, match=r"rules.toml: diversity.mmr"):
        read_policies(path)


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_an_excluded_item_never_gets_through(data):
    # Property (common practice for guardrails): whatever the pools, scores, pins and other rules, no request
    # whose page tone is grave lists an upbeat item.
    q = data.draw(st.integers(1, 6))
    p = data.draw(st.integers(1, 6))
    ids = CATALOG["item_id"].tolist()
    pools = [data.draw(st.permutations(ids))[:p] for _ in range(q)]
    scores = np.sort(np.array(data.draw(st.lists(st.floats(-5, 5), min_size=q * p, max_size=q * p))).reshape(q, p),
                     axis=1)[:, ::-1]
    tones = np.array(data.draw(st.lists(st.sampled_from(["grave", "calm"]), min_size=q, max_size=q)), dtype=object)
    pin = data.draw(st.sampled_from(ids))
    rules = {"pins": [{"item": pin, "slot": data.draw(st.integers(1, 3))}],
             "guardrail": [{"when": {"page_tone": ["grave"]}, "items": {"tone": ["upbeat"]}}],
             "diversity": {"mmr": data.draw(st.sampled_from([0.0, 0.5, 1.0])), "similarity": "topic"}}
    lists, _ = _apply(rules, pools, scores, levels={"page_tone": tones}, k=data.draw(st.integers(1, 6)))
    upbeat = set(CATALOG.loc[CATALOG["tone"] == "upbeat", "item_id"])
    for tone, items in zip(tones, lists):
        assert len(items) == len(set(items))
        if tone == "grave":
            assert not upbeat & set(items)


def test_demo_catalog_columns_are_not_built_in():
    # Rules name the user's own columns: the same rule on another column name works the same way.
    renamed = CATALOG.rename(columns={"tone": "mood"})
    tables = compile_policies(read_policies({"guardrail": [{"items": {"mood": ["upbeat"]}}]}), renamed)
    assert_array_equal(tables.item_match((("mood", ("upbeat",)),), np.arange(6)),
                       [False, True, False, True, False, True])
