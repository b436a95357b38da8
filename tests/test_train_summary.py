"""The summary `threefold train` prints: key metrics, then each model paired with the baseline."""

import pandas as pd

from threefold.pipeline.experiment import ModelRun, TrainReport, summary_text


def test_summary_adds_the_paired_difference_with_the_baseline():
    comparisons = pd.DataFrame({"model": ["ctx"], "baseline": ["mf"], "metric": ["ndcg_true"], "k": [10],
                                "mean_difference": [0.0735], "low": [0.061], "high": [0.086], "p_value": [1e-30]})
    runs = [ModelRun("mf", "r1", {"ndcg_true_at_10": 0.4888}, None, 1.0),
            ModelRun("ctx", "r2", {"ndcg_true_at_10": 0.5623}, None, 1.0, comparisons=comparisons)]
    text = summary_text(TrainReport("p", runs, pd.DataFrame(), ["ndcg_true_at_10"], []))
    assert "paired with the baseline (Wilcoxon signed-rank p):" in text
    # relative change of the means: 0.5623 / 0.4888 - 1 = +15.0% (arithmetic in the test)
    assert "ctx - mf: ndcg_true_at_10 +0.0735 [+0.0610, +0.0860] (+15.0% of the means), paired per user, p = 1e-30" in text
    plain = summary_text(TrainReport("p", runs[:1], pd.DataFrame(), ["ndcg_true_at_10"], []))
    assert "paired" not in plain


def test_the_demo_reading_names_the_leaders_and_the_paired_context_gain():
    # invented figures (not from a run): popularity leads on clicks, cp_context on true relevance
    from types import SimpleNamespace

    from threefold.demo.reading import plain_reading

    gain = pd.DataFrame([{"model": "cp", "baseline": "mf", "metric": "ndcg_true", "k": 10,
                          "mean_difference": 0.05, "low": -0.01, "high": 0.09}])
    runs = [SimpleNamespace(name="popularity", metrics={"ndcg_at_10": 0.20, "ndcg_true_at_10": 0.38}, comparisons=None),
            SimpleNamespace(name="mf", metrics={"ndcg_at_10": 0.16, "ndcg_true_at_10": 0.49}, comparisons=None),
            SimpleNamespace(name="cp", metrics={"ndcg_at_10": 0.15, "ndcg_true_at_10": 0.56}, comparisons=gain)]
    text = "\n".join(plain_reading(SimpleNamespace(runs=runs)))
    assert "popularity leads (ndcg@10 0.200)" in text and "cp leads (ndcg_true@10 0.560)" in text
    assert "Context shows no measurable difference for cp: +0.0500" in text  # the interval spans 0


def test_tables_put_wide_text_last_and_leave_missing_values_blank():
    from threefold.core.text import frame_table

    frame = pd.DataFrame({"candidate": ["mf", "mf+device:4"], "structure": ["user*item:16", "user*item:16 + x"],
                          "value": [0.12345, 0.2], "low": [float("nan"), 0.1]})
    assert frame_table(frame, last=("structure",)) == [
        "candidate    value   low     structure",
        "mf           0.1235          user*item:16",
        "mf+device:4  0.2000  0.1000  user*item:16 + x",
    ]
