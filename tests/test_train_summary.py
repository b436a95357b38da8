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
