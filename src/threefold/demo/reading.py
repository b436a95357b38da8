"""The demo's plain-words reading of its comparison table: which metric to trust on this log, and why.

Written from the figures of the run itself (never canned numbers), for a
reader who has just seen popularity win on click metrics and a context model
win on true relevance.
"""

from __future__ import annotations

__all__ = ["plain_reading"]


def _best(runs, key: str):
    scored = [(run.metrics.get(key), run.name) for run in runs if run.metrics.get(key) is not None]
    return max(scored) if scored else (None, None)


def _paired(runs, model: str, baseline: str, metric: str, k: int):
    """(difference, low, high) of ``model`` against ``baseline`` from the paired comparisons, or None."""
    for run in runs:
        c = run.comparisons
        if run.name != model or c is None or c.empty:
            continue
        row = c[(c["model"] == model) & (c["baseline"] == baseline) & (c["metric"] == metric) & (c["k"] == k)]
        if not row.empty:
            r = row.iloc[0]
            return float(r["mean_difference"]), float(r["low"]), float(r["high"])
    return None


def plain_reading(report, k: int = 10, baseline: str = "mf") -> list[str]:
    """Lines that say, in plain words, what the comparison of a simulated log shows.

    Parameters
    ----------
    report : TrainReport
        Of a config with ``recall``, ``ndcg`` and ``ndcg_true`` at ``k`` and a
        context-free ``baseline`` model.
    """
    clicks, clicks_leader = _best(report.runs, f"ndcg_at_{k}")
    truth, truth_leader = _best(report.runs, f"ndcg_true_at_{k}")
    if truth is None or clicks is None:
        return []
    lines = ["   reading the table in plain words:",
             f"   - On the logged clicks (recall, ndcg) {clicks_leader} leads (ndcg@{k} {clicks:.3f}). Those clicks "
             "were collected under the site's own ranking, which ignores context and put popular items most "
             "often and highest: an item "
             "gets clicks where it is shown (presentation bias), so click metrics on a log favour whatever "
             "resembles the ranking that produced it."]
    lines.append(f"   - The simulator also knows how relevant every item truly was (ndcg_true, only for simulated "
                 f"data): there {truth_leader} leads (ndcg_true@{k} {truth:.3f}). On this log, trust ndcg_true; on a "
                 "real log, which has no such column, use the position-debiased estimates "
                 "(docs/evaluation.md) and confirm with an online test.")
    context = [run.name for run in report.runs if run.name not in (baseline, "popularity", "random")]
    for name in context:
        gain = _paired(report.runs, name, baseline, "ndcg_true", k)
        if gain is None:
            continue
        diff, low, high = gain
        verdict = ("pays" if low > 0 else "costs" if high < 0 else "shows no measurable difference")
        lines.append(f"   - Context {verdict} for {name}: {diff:+.4f} ndcg_true@{k} over {baseline} (the context-free "
                     f"baseline), 95% interval [{low:+.4f}, {high:+.4f}], paired per reader.")
    return lines
