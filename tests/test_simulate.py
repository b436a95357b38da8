"""Tests of the demo scenario generator.

Every test here is a planted-truth test: the data are invented by the simulator
with a fixed seed, and the checks compare the log with the truth that was planted.
"""

from __future__ import annotations

import datetime as dt
import json
import re
import zoneinfo
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from pandas.testing import assert_frame_equal

from threefold.demo.simulate import (
    CONTEXT_COLUMNS,
    ScenarioParameters,
    daypart_of,
    read_site,
    read_truth,
    simulate_site,
    true_relevance,
    write_site,
)

SEED = 7


@pytest.fixture(scope="module")
def site():
    return simulate_site(n_events=60_000, random_state=SEED)


def _contexts_of(events, truth):
    return {"daypart": daypart_of(events["timestamp"].to_numpy(), truth),
            "device": events["device"], "page_tone": events["page_tone"]}


def _grid(truth, user, item):
    """True relevance of one (user, item) at every context combination, shape (dayparts, devices, tones)."""
    levels = [truth.context_levels[c] for c in CONTEXT_COLUMNS]
    cells = np.array(np.meshgrid(*levels, indexing="ij"), dtype=object).reshape(3, -1)
    gamma = true_relevance(truth, user, item, dict(zip(CONTEXT_COLUMNS, cells)))
    return gamma.reshape([len(x) for x in levels])


def _logit(p):
    return np.log(p / (1 - p))


# planted-truth test
def test_same_seed_gives_identical_frames_and_another_seed_does_not():
    a = simulate_site(n_events=5_000, random_state=3)
    b = simulate_site(n_events=5_000, random_state=3)
    assert_frame_equal(a.events, b.events)
    assert_frame_equal(a.items, b.items)
    assert_array_equal(a.truth.user_taste, b.truth.user_taste)
    c = simulate_site(n_events=5_000, random_state=4)
    assert not a.events["item_id"].equals(c.events["item_id"])


# planted-truth test
def test_row_count_reaches_the_target_and_stops_at_that_request(site):
    n_pos = site.params.n_positions
    assert 60_000 <= len(site.events) < 60_000 + 2 * n_pos
    assert site.params.n_events == 60_000 and site.params.seed == SEED
    assert site.params == ScenarioParameters.scaled(60_000, seed=SEED)


# planted-truth test
def test_click_through_by_position_tracks_the_planted_examination_curve(site):
    events, truth = site.events, site.truth
    shown = events[events["event"] == "impression"]
    gamma = true_relevance(truth, shown["user_id"], shown["item_id"], _contexts_of(shown, truth))
    clicked = shown.merge(events.loc[events["event"] == "click", ["request_id", "item_id"]],
                          on=["request_id", "item_id"], how="left", indicator=True)["_merge"].eq("both")
    position = shown["position"].to_numpy() - 1
    clicks = np.bincount(position, weights=clicked.to_numpy())
    gamma_sum = np.bincount(position, weights=gamma)
    theta = truth.examination
    # Under the position-based model E[clicks_k] = theta_k * sum(gamma) over the impressions at k.
    # Tolerance: 4 standard errors of the click count (a sum of Bernoulli draws), so a correct
    # simulator fails a position with probability about 6e-5.
    p = theta[position] * gamma
    se = np.sqrt(np.bincount(position, weights=p * (1 - p))) / gamma_sum
    estimate = clicks / gamma_sum
    assert np.all(np.abs(estimate - theta) <= 4 * se), (estimate, theta, se)
    assert np.all(se < 0.05)  # the test has power: each theta_k is pinned to within 0.2
    # The raw click-through falls with position, as the planted curve does.
    raw = clicks / np.bincount(position)
    assert raw[0] > raw[4] > raw[9]


# planted-truth test
def test_swaps_put_items_at_several_positions(site):
    shown = site.events[site.events["event"] == "impression"]
    positions_per_item = shown.groupby("item_id")["position"].nunique()
    often = shown.groupby("item_id").size() >= 50
    assert (positions_per_item[often] >= 5).mean() > 0.95


# planted-truth test
def test_relevance_matches_a_slow_reference_of_the_documented_formula(site):
    truth = site.truth
    rng = np.random.default_rng(0)
    users = rng.choice(truth.user_ids, 300)
    items = rng.choice(truth.item_ids, 300)
    ctx = {c: rng.choice(truth.context_levels[c], 300) for c in CONTEXT_COLUMNS}
    expected = []
    for n in range(300):
        u = list(truth.user_ids).index(users[n])
        i = list(truth.item_ids).index(items[n])
        d = truth.daypart_labels.index(ctx["daypart"][n])
        v = truth.devices.index(ctx["device"][n])
        t = truth.tones.index(ctx["page_tone"][n])
        topic, kind = truth.item_topic[i], truth.item_kind[i]
        z = truth.intercept + truth.item_quality[i] + truth.user_taste[u, topic]
        z += float(truth.user_latent[u] @ truth.item_latent[i])
        if truth.user_persona[u] >= 0:
            z += truth.user_shift[u] * truth.personas[truth.user_persona[u], d, topic]
        z += truth.kind_context[kind, d, v] + truth.tone_context[t, truth.item_tone[i]]
        if truth.item_long_form[i]:
            z += truth.long_form_context[kind, d]
        expected.append(1 / (1 + np.exp(-z)))
    assert_allclose(true_relevance(truth, users, items, ctx), expected, rtol=1e-12)


# planted-truth test
def test_relevance_of_the_same_pair_differs_across_contexts_as_planted(site):
    truth, items = site.truth, site.items
    steady = truth.user_ids[truth.user_persona < 0][:20]
    shifters = truth.user_ids[truth.user_persona >= 0][:20]
    morning, evening = truth.daypart_labels.index("morning"), truth.daypart_labels.index("evening")
    mobile = truth.devices.index("mobile")
    audio = items.loc[items["kind"] == "audio", "item_id"].to_numpy()[:10]
    long_clips = items.loc[(items["kind"] == "clip") & (items["format"] == "long-form"), "item_id"].to_numpy()[:10]
    short_clips = items.loc[(items["kind"] == "clip") & (items["format"] == "short-form"), "item_id"].to_numpy()[:10]
    for user in steady:
        for item in audio:  # audio peaks on mobile in the morning (commute), for every page tone
            grid = _grid(truth, user, item)
            for t in range(grid.shape[2]):
                assert np.unravel_index(np.argmax(grid[:, :, t]), grid.shape[:2]) == (morning, mobile)
        for long_item, short_item in zip(long_clips, short_clips):  # long-form clips gain in the evening
            lift = [_logit(_grid(truth, user, x)).mean(axis=(1, 2)) for x in (long_item, short_item)]
            assert np.argmax(lift[0]) == evening
            # Planted: boost * (1 - 1/D) plus jitter of sd jitter_sd * sqrt(1 - 1/D); 4 sd allowed.
            gain = (lift[0][evening] - lift[0].mean()) - (lift[1][evening] - lift[1].mean())
            share = 1 - 1 / len(truth.daypart_labels)
            expected = site.params.long_clip_evening_boost * share
            assert 0 < gain and abs(gain - expected) <= 4 * site.params.context_jitter_sd * np.sqrt(share)
        for item in items["item_id"].to_numpy()[:10]:  # reading a page of the same tone helps
            tone = truth.tones.index(items.set_index("item_id").at[item, "tone"])
            by_page_tone = _logit(_grid(truth, user, item)).mean(axis=(0, 1))
            assert np.argmax(by_page_tone) == tone
    # Without a persona, context moves a pair's log-odds the same way for every user ...
    item = items["item_id"].iloc[0]
    moves = np.array([_logit(_grid(truth, u, item)) - _logit(_grid(truth, u, item))[0, 0, 0] for u in steady])
    assert_allclose(moves, np.broadcast_to(moves[0], moves.shape), atol=1e-12)
    # ... and a persona makes some users' favorite topic change with the daypart.
    changed = 0
    for user in shifters:
        u = list(truth.user_ids).index(user)
        taste = truth.user_taste[u] + truth.user_shift[u] * truth.personas[truth.user_persona[u]]
        changed += len(set(np.argmax(taste, axis=1))) > 1
    assert changed >= 5


# planted-truth test
def test_without_planted_context_effects_relevance_ignores_context():
    flat = replace(ScenarioParameters.scaled(2_000, seed=5), audio_commute_boost=0.0, long_clip_evening_boost=0.0,
                   tone_match=0.0, context_jitter_sd=0.0, shifter_share=0.0)
    site = simulate_site(flat)
    for user, item in zip(site.truth.user_ids[:5], site.truth.item_ids[:5]):
        grid = _grid(site.truth, user, item)
        assert_allclose(grid, grid[0, 0, 0], rtol=1e-14)


# planted-truth test
def test_no_item_is_shown_before_publication_or_after_expiry(site):
    merged = site.events.merge(site.items, on="item_id", how="left", validate="many_to_one")
    assert merged["published_at"].notna().all()
    assert (merged["timestamp"] >= merged["published_at"]).all()
    assert (merged["timestamp"] <= merged["expires_at"]).all()
    assert (site.items["published_at"] < site.items["expires_at"]).all()


# planted-truth test
def test_every_click_has_its_impression_and_lists_are_well_formed(site):
    events = site.events
    shown, clicks = events[events["event"] == "impression"], events[events["event"] == "click"]
    key = ["request_id", "item_id", "position", "user_id", "device", "page_tone"]
    matched = clicks.merge(shown[key + ["timestamp"]], on=key, how="left", suffixes=("", "_shown"))
    assert len(matched) == len(clicks) and matched["timestamp_shown"].notna().all()
    assert (matched["timestamp"] >= matched["timestamp_shown"]).all()
    assert (clicks["dwell_seconds"] > 0).all() and shown["dwell_seconds"].isna().all()
    per_request = shown.groupby("request_id").agg(
        n=("position", "size"), top=("position", "max"), items=("item_id", "nunique"),
        users=("user_id", "nunique"), times=("timestamp", "nunique"))
    assert (per_request["top"] == per_request["n"]).all() and (per_request["items"] == per_request["n"]).all()
    assert (per_request[["users", "times"]] == 1).all().all()
    assert shown.groupby("request_id")["position"].min().eq(1).all()
    assert set(events["event"]) == {"impression", "click"}


# planted-truth test
def test_ids_are_zero_padded_strings_that_match_the_catalog(site):
    events, items = site.events, site.items
    for column, pattern in (("user_id", r"u\d{6}"), ("item_id", r"[acp]\d{5}"), ("request_id", r"r\d{7}")):
        assert events[column].dtype == "str"
        assert events[column].str.fullmatch(pattern).all()
    prefix = items["kind"].map({"article": "a", "clip": "c", "audio": "p"})
    assert (items["item_id"].str[0] == prefix).all()
    assert events["request_id"].iloc[0] == "r0000000"


@pytest.mark.parametrize("file_format", ["parquet", "csv"])
def test_write_and_read_round_trip_keeps_frames_ids_and_truth(tmp_path, file_format):
    site = simulate_site(n_events=3_000, random_state=11)
    out = write_site(site, tmp_path / "quillfen", file_format=file_format)
    assert sorted(p.name for p in out.iterdir()) == sorted(
        [f"events.{file_format}", f"items.{file_format}", "scenario.json", "truth.json", "truth.npz"])
    back = read_site(out)
    assert_frame_equal(back.events, site.events)
    assert_frame_equal(back.items, site.items)
    assert back.params == site.params
    if file_format == "csv":
        first = (out / "events.csv").read_text().splitlines()[1]
        assert re.search(r'^"r0000000","\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\+00:00","u\d{6}"', first), first
    truth = read_truth(out)
    shown = site.events
    assert_array_equal(
        true_relevance(truth, shown["user_id"], shown["item_id"], _contexts_of(shown, truth)),
        true_relevance(site.truth, shown["user_id"], shown["item_id"], _contexts_of(shown, site.truth)))
    assert_array_equal(truth.examination, site.examination)


def test_parameters_round_trip_through_json():
    params = ScenarioParameters.scaled(12_345, seed=2, swap_probability=0.5)
    assert ScenarioParameters.from_dict(json.loads(json.dumps(params.to_dict()))) == params
    with pytest.raises(ValueError, match="Unknown ScenarioParameters parameter.*'n_readers'"):
        ScenarioParameters.from_dict({"n_readers": 3})


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"examination": (0.9, 0.5)}, "'examination' parameter of ScenarioParameters must have length 10"),
        ({"examination": (1.2,) + (0.5,) * 9}, r"'examination' parameter .* range \(0, 1\]. Got 1.2"),
        ({"swap_probability": 1.5}, r"'swap_probability' parameter .* range \[0, 1\]"),
        ({"timezone": "Quillfen/Harbor"}, "'timezone' parameter .* IANA zone name"),
        ({"start": "2026-03-23T00:00:00+01:00"}, "'start' parameter .* without offset"),
        ({"daypart_starts": (10, 6, 17, 22)}, "'daypart_starts' parameter .* strictly increasing"),
        ({"devices": ("desktop", "tablet"), "device_shares": (1.0, 1.0)}, "'devices entry' parameter .* 'mobile'"),
        ({"n_users": 0}, r"'n_users' parameter .* range \[1, inf\). Got 0"),
    ],
)
def test_invalid_parameters_are_refused_with_the_parameter_named(change, message):
    with pytest.raises(ValueError, match=message):
        replace(ScenarioParameters(), **change)


def test_true_relevance_refuses_unknown_labels_and_missing_columns(site):
    truth = site.truth
    ctx = {"daypart": "morning", "device": "mobile", "page_tone": "grave"}
    user, item = truth.user_ids[0], truth.item_ids[0]
    assert true_relevance(truth, user, item, ctx).shape == (1,)
    with pytest.raises(ValueError, match=r"1 item_id value\(s\) are not in the scenario, e.g. 'a99999' at row 1"):
        true_relevance(truth, [user, user], [item, "a99999"], ctx)
    with pytest.raises(ValueError, match="1 device value.*'watch' at row 0"):
        true_relevance(truth, user, item, {**ctx, "device": "watch"})
    with pytest.raises(ValueError, match=r"lacks the context column\(s\) \['page_tone'\]"):
        true_relevance(truth, user, item, {"daypart": "morning", "device": "mobile"})


def test_daypart_follows_local_time_across_the_daylight_saving_change():
    params = ScenarioParameters()
    stamps = ["2026-03-28T04:30:00+00:00", "2026-03-28T05:30:00+00:00", "2026-03-29T04:30:00+00:00",
              "2026-03-29T08:59:59+00:00", "2026-03-29T19:00:00+00:00", "2026-03-29T21:00:00+00:00"]
    # Central European summer time starts on the last Sunday of March at 01:00 UTC (EU rule,
    # recalled from memory): 04:30Z is 05:30 local on the 28th and 06:30 local on the 29th.
    expected = ["night", "morning", "morning", "daytime", "evening", "night"]
    assert list(daypart_of(stamps, params)) == expected
    seconds = pd.DatetimeIndex(pd.to_datetime(stamps, utc=True)).as_unit("s").asi8
    assert list(daypart_of(seconds, params)) == expected
    # Second reference: the standard library's zoneinfo, hour by hour.
    zone = zoneinfo.ZoneInfo(params.timezone)
    hours = [dt.datetime.fromtimestamp(int(s), zone).hour for s in seconds]
    assert hours == [5, 6, 6, 10, 21, 23]


# planted-truth test
def test_default_scenario_covers_every_context_level_and_the_time_window(site):
    events, truth = site.events, site.truth
    dayparts = daypart_of(events["timestamp"].to_numpy(), truth)
    assert set(dayparts) == set(truth.daypart_labels)
    assert set(events["device"]) == set(truth.devices) and set(events["page_tone"]) == set(truth.tones)
    window = pd.to_datetime(events["timestamp"].agg(["min", "max"]), unit="s", utc=True).dt.tz_convert(
        site.params.timezone)
    assert window.iloc[0] >= pd.Timestamp("2026-03-23", tz=site.params.timezone)
    assert window.iloc[1] < pd.Timestamp("2026-04-06 00:10", tz=site.params.timezone)


def test_top_k_kernel_matches_a_stable_argsort():
    from threefold.demo._scenario import _top_k_rows

    rng = np.random.default_rng(3)
    scores = rng.standard_normal((50, 40)).astype(np.float32)
    scores[:, 5] = scores[:, 9]  # ties go to the lower column, as in a stable sort of -scores
    for k in (1, 10, 40):
        assert_array_equal(_top_k_rows(scores, k), np.argsort(-scores, axis=1, kind="stable")[:, :k])


def test_packed_sort_key_orders_rows_like_lexsort():
    from threefold.demo._scenario import _packed_key

    rng = np.random.default_rng(4)
    keys = [rng.integers(0, hi, 5_000) for hi in (1_000_000, 40_000, 2, 11)]
    assert_array_equal(np.argsort(_packed_key(*keys), kind="stable"), np.lexsort(keys[::-1]))


def test_a_catalog_that_is_never_live_for_an_hour_is_refused():
    params = ScenarioParameters.scaled(1_000, lifetime_hours=(0.5, 0.5, 0.5), lifetime_sigma=0.0)
    with pytest.raises(ValueError, match="No item is live for a whole hour.*'lifetime_hours'"):
        simulate_site(params)
