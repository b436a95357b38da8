"""Specifications of ``structure = "auto"``: the family, the refusals, and planted-truth checks.

The planted-truth tests simulate invented sites (``threefold.demo.simulate``) whose
context effects are stated below, and compare the chosen model with MF by the
simulator's true relevance on the test window (seeded planted-truth tests).
"""

from __future__ import annotations

import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest

from threefold.demo.simulate import ScenarioParameters, simulate_site, site_truth, write_site
from threefold.pipeline.config import ConfigError, parse_config
from threefold.pipeline.experiment import fit_and_evaluate
from threefold.pipeline.select import candidate_structures, select_structure
from threefold.pipeline.stages import load_dataset, prepare_stage

# Planted effects, in log-odds of the click probability given examination:
FLAT = dict(shifter_share=0.0, shift_strength=0.0, audio_commute_boost=0.0, long_clip_evening_boost=0.0,
            tone_match=0.0, context_jitter_sd=0.0)  # context does not matter at all
STRONG = dict(  # an invented second site: 6 dayparts, 4 devices, 4 tones, strong three-way effects
    site_name="Brackenridge Evening Post", timezone="America/Chicago", start="2026-04-06T00:00:00",
    topics=("council", "river", "schools", "farms", "arts", "teams", "weather", "roads"),
    tones=("somber", "plain", "warm", "playful"), tone_shares=(0.25, 0.35, 0.25, 0.15),
    devices=("mobile", "desktop", "tablet", "tv"), device_shares=(0.5, 0.25, 0.15, 0.1),
    daypart_labels=("dawn", "morning", "midday", "afternoon", "evening", "night"),
    daypart_starts=(5, 7, 11, 14, 18, 22), daypart_shares=(0.08, 0.2, 0.2, 0.17, 0.25, 0.1),
    shifter_share=0.85, shift_strength=2.5, audio_commute_boost=3.0, long_clip_evening_boost=2.5, tone_match=2.0)
N_EVENTS = 200_000


def _config(site, log_dir: Path, **select):
    p = site.params
    end = int(site.events["timestamp"].max())
    base = {"method": "cp", "rank": 16, "reg": 0.1, "max_sweeps": 10, "random_state": 1}
    return parse_config({
        "data": {"events": str(log_dir / "events.parquet"), "items": str(log_dir / "items.parquet"),
                 "timezone": p.timezone},
        "build": {"contexts": ["daypart", "device", "page_tone"], "daypart_starts": [float(x) for x in p.daypart_starts],
                  "daypart_labels": list(p.daypart_labels)},
        "weighting": {"w0": 0.1},
        "split": {"cutoff": end - 2 * 86_400, "validation_window": "48h"},
        "evaluation": {"ks": [10], "metrics": ["ndcg", "ndcg_true"], "n_resamples": 200},
        "select": select,
        "models": {"mf": {**base, "structure": "user*item:16"}, "auto": {**base, "structure": "auto"}},
    }, source="test")


def _run(planted: dict, seed: int, n_events: int) -> tuple[str, float]:
    """(chosen candidate, true-relevance NDCG@10 of the chosen model / MF's - 1 on the test window)."""
    warnings.simplefilter("ignore")
    site = simulate_site(ScenarioParameters.scaled(n_events, seed=seed, **planted))
    with tempfile.TemporaryDirectory() as tmp:
        log_dir = write_site(site, Path(tmp) / "site")
        config = _config(site, log_dir)
        dataset = load_dataset(config, truth=site_truth)
        selection = select_structure(config, dataset, "auto", echo=lambda line: None, show_progress=False)
        if selection.chosen == "mf":
            return "mf", 0.0
        final = config.with_overrides({"models.auto.structure": selection.structure})
        data = prepare_stage(final, dataset, "test")
        truth = {m: fit_and_evaluate(final, data, dataset, m, with_baseline=False).evaluation.value(m, "ndcg_true", 10)
                 for m in ("mf", "auto")}
        return selection.chosen, truth["auto"] / truth["mf"] - 1.0


def test_the_family_for_three_context_modes():
    family = candidate_structures(["daypart", "device", "page_tone"], 16, [2])
    assert family["mf"] == "user*item:16"
    assert family["mf+device:2"] == "user*item:16 + user*item*device:2"
    assert family["mf+all:2"] == "user*item:16 + user*item*daypart*device*page_tone:2"
    assert family["mf+item×ctx:2"] == "user*item:16 + item*daypart:2 + item*device:2 + item*page_tone:2"
    assert family["mf+item×ctx+pairs:2"].endswith("item*daypart*device:2 + item*daypart*page_tone:2 + item*device*page_tone:2")
    assert len(family) == 7 and list(candidate_structures([], 8, [2, 4])) == ["mf"]


def test_selection_refuses_the_true_metric_and_needs_a_validation_window(tmp_path):
    site = simulate_site(ScenarioParameters.scaled(3_000, seed=1))
    log_dir = write_site(site, tmp_path / "site")
    config = _config(site, log_dir, metric="ndcg_true")
    with pytest.raises(ValueError, match=r"metric = \"ndcg_true\" is refused: true relevance exists only on simulated"):
        select_structure(config, load_dataset(config), "auto", echo=lambda line: None)
    raw = config.sections | {"split": {"cutoff": config["split"]["cutoff"]}}
    with pytest.raises(ConfigError, match=r"structure = \"auto\" is chosen on the validation window; set \[split\]"):
        parse_config(raw, source="test")


@pytest.fixture(scope="module")
def flat_runs():
    return [_run(FLAT, seed, 40_000) for seed in range(1, 11)]


@pytest.fixture(scope="module")
def strong_runs():
    return [_run(STRONG, seed, N_EVENTS) for seed in range(1, 4)]


def test_auto_keeps_mf_where_context_does_not_matter(flat_runs):
    """Planted truth: no context effect at all (FLAT); MF in at least 9 of 10 seeds."""
    assert sum(chosen == "mf" for chosen, _ in flat_runs) >= 9, flat_runs


def test_auto_finds_a_context_structure_where_context_matters(strong_runs):
    """Planted truth: strong three-way effects (STRONG); a context structure beating MF's true NDCG@10 by 10%.

    The issue asks for +10% in at least 9 of 10 seeds; the study (docs/models.md,
    section 9) measured it on 10 seeds. CI checks the first 3 seeds, each of which
    must reach +10%.
    """
    assert all(chosen != "mf" and gain >= 0.10 for chosen, gain in strong_runs), strong_runs


def test_auto_finds_the_planted_context_of_the_demo_site():
    """Planted truth: the demo site as `threefold demo` simulates it (its effects stated in
    threefold.demo.simulate), 200,000 rows at the demo's seed 7: a context structure 10% above MF
    (the study measured +10.7% at this seed, +10.5% to +13.3% on seeds 3-7)."""
    chosen, gain = _run({}, 7, N_EVENTS)
    assert chosen != "mf" and gain >= 0.10, (chosen, gain)


def test_holm_adjustment_worked_by_hand():
    """Holm (1979) step-down, worked by hand: p = (0.01, 0.04, 0.03, 0.005) with m = 4 sorts to
    0.005, 0.01, 0.03, 0.04 -> 4·0.005 = 0.02, 3·0.01 = 0.03, 2·0.03 = 0.06, max(1·0.04, 0.06) = 0.06."""
    from numpy.testing import assert_allclose

    from threefold.pipeline.select import holm_adjusted

    assert_allclose(holm_adjusted([0.01, 0.04, 0.03, 0.005]), [0.03, 0.06, 0.06, 0.02], rtol=1e-12)
    got = holm_adjusted([float("nan"), 0.5, 0.4])
    assert_allclose(got[1:], [0.8, 0.8])
    assert np.isnan(got[0])


def test_a_candidate_wins_only_with_the_adjusted_test():
    """An interval above zero is not enough when the Holm-adjusted p-value is not below 0.05 (common practice
    for many comparisons against one control)."""
    import pandas as pd

    from threefold.pipeline.select import _winner, judged

    table = pd.DataFrame({"candidate": ["mf", "a", "b", "c"], "structure": ["s0", "s1", "s2", "s3"],
                          "value": [0.5, 0.51, 0.52, 0.53], "mean_difference": [np.nan, 0.01, 0.02, 0.03],
                          "low": [np.nan, 0.001, 0.002, -0.01], "high": [np.nan, 0.02, 0.03, 0.06],
                          "p_value": [np.nan, 0.04, 0.01, 0.2]})
    out = judged(table)
    assert out["wins"].tolist() == [False, False, True, False]  # a: 0.04·2 = 0.08 after b's 0.01·3 = 0.03
    assert _winner(table) == "b"
    assert _winner(table.assign(p_value=[np.nan, 0.04, 0.03, 0.2])) == "mf"


def test_candidates_start_from_the_fitted_mf_columns():
    """Warm start: the first R' user and item columns are MF's fitted (unnormalized) columns, the rest small."""
    from threefold.pipeline.select import warm_start

    from _tracking import tiny_cp

    mf, _ = tiny_cp(seed=1, structure="user*item:3")
    tensor_shape = mf.shape
    class _Shape:  # only the shape of the selection tensor is read
        shape = tensor_shape
    init = warm_start(mf, "user*item:2 + item*device:1", _Shape(), 3, random_state=0)
    fitted = mf.unnormalized_factors()
    from numpy.testing import assert_allclose

    assert_allclose(init[0][:, :2], fitted[0][:, :2])
    assert_allclose(init[1][:, :2], fitted[1][:, :2])
    assert init[1].shape == (tensor_shape[1], 3) and 0 <= init[3][:, 2].min() and init[3][:, 2].max() < 0.1
    assert warm_start(mf, "item*device:2 + user*item:2", _Shape(), 3, random_state=0) is None
    assert warm_start(mf, "user*item:5", _Shape(), 3, random_state=0) is None  # more columns than MF has


def test_candidates_fitted_on_dask_workers_give_the_same_selection(tmp_path):
    """The same candidates fitted in a Dask worker process (a real local cluster) and here: the same table."""
    import pandas as pd

    from threefold.pipeline.cluster import dask_client

    site = simulate_site(ScenarioParameters.scaled(6_000, seed=3, **STRONG))
    log_dir = write_site(site, tmp_path / "site")
    config = _config(site, log_dir, context_ranks=[2])
    dataset = load_dataset(config)
    here = select_structure(config, dataset, "auto", echo=lambda line: None, show_progress=False)
    with dask_client(workers=1) as client:
        there = select_structure(config, dataset, "auto", echo=lambda line: None, show_progress=False, client=client)
    pd.testing.assert_frame_equal(here.table, there.table)
    assert here.structure == there.structure


def test_dask_client_refuses_both_and_neither():
    from threefold.pipeline.cluster import dask_client

    with pytest.raises(ValueError, match=r"Give workers= \(a local Dask cluster\) or scheduler= \(a running one\), not both"):
        with dask_client(workers=1, scheduler="tcp://127.0.0.1:9"):
            pass
    with pytest.raises(ValueError, match=r"or scheduler= \(a running one\)\.$"):
        with dask_client():
            pass
