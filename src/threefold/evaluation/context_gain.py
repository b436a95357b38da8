"""What each context mode adds: the model against itself with that mode marginalized out.

A factor model's score is multilinear in the rows of every mode, so averaging
the scores of a cell over the levels of context mode ``c`` with weights ``p_l``
(the levels' training frequencies, summing to one) equals scoring with one row,
the weighted mean of that mode's rows::

    Σ_l p_l · x̂(u, i, ..., c = l, ...) = x̂ evaluated at F_c-row  Σ_l p_l F_c[l]

(CP: Harshman 1970 / Carroll & Chang 1970; Tucker: Tucker 1966 — each score is
linear in each factor row). :func:`marginalize_mode` builds that model: every
level of mode ``c`` gets the mean row, so the model ranks as if it did not know
the context of that mode, and nothing else changes. :func:`context_gain`
evaluates the full model and each marginalized one on the same queries; the
paired per-user differences (bootstrap interval, Wilcoxon p-value) are the gain
of each mode: ``daypart adds +6.1% NDCG@10 [4.0, 8.3]``.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

__all__ = ["level_frequencies", "marginalize_mode", "ContextGain", "context_gain"]


def level_frequencies(codes: np.ndarray, n_levels: int) -> np.ndarray:
    """ndarray of shape (n_levels,), float64: share of the training rows at each level (sums to 1).

    Parameters
    ----------
    codes : ndarray of shape (n,), int
        Level index of every training row (event), ``-1`` for rows outside the vocabulary (ignored).
    n_levels : int
    """
    codes = np.asarray(codes, dtype=np.int64)
    counts = np.bincount(codes[codes >= 0], minlength=n_levels).astype(np.float64)[:n_levels]
    if counts.sum() == 0:
        return np.full(n_levels, 1.0 / max(n_levels, 1))
    return counts / counts.sum()


def marginalize_mode(result, mode: int, weights: np.ndarray):
    """The model with every row of ``mode`` replaced by their ``weights``-weighted mean.

    Parameters
    ----------
    result : CPResult or TuckerResult
        A fitted factor model (its ``factors`` tuple is replaced, nothing else).
    mode : int
        A context mode (2, 3, ...).
    weights : ndarray of shape (I_mode,), float
        Non-negative, summing to one (:func:`level_frequencies`).

    Returns
    -------
    The same result type; its score at any cell equals
    ``Σ_l weights[l] · score(cell with mode = l)`` of ``result``.
    """
    if mode < 2 or mode >= len(result.factors):
        raise ValueError(f"mode must be a context mode in [2, {len(result.factors)}), got {mode}.")
    weights = np.asarray(weights, dtype=np.float64)
    factor = np.asarray(result.factors[mode])
    if weights.shape != (factor.shape[0],) or np.any(weights < 0) or not np.isclose(weights.sum(), 1.0):
        raise ValueError(f"weights must be {factor.shape[0]} non-negative shares summing to 1.")
    mean = (weights @ np.asarray(factor, dtype=np.float64)).astype(factor.dtype)
    constant = np.all(factor == factor[:1], axis=0)  # e.g. the ones of CP terms not spanning the mode: kept exactly
    mean[constant] = factor[0, constant]
    factors = list(result.factors)
    factors[mode] = np.broadcast_to(mean, factor.shape).copy()
    return replace(result, factors=tuple(factors))


@dataclass
class ContextGain:
    """Gain of each context mode: the full model against the model with that mode marginalized.

    Attributes
    ----------
    model : str
    metric : str
        E.g. ``"ndcg@10"``.
    full : float
        The full model's metric value.
    table : DataFrame
        One row per context mode: ``mode, marginalized, gain, low, high,
        relative, relative_low, relative_high, p_value, n_users`` — ``gain`` is
        full minus marginalized (paired per user, 95% bootstrap interval);
        ``relative`` is gain / marginalized.
    stage : str
    """

    model: str
    metric: str
    full: float
    table: pd.DataFrame
    stage: str

    def to_text(self) -> str:
        lines = [f"context gain of {self.model!r} on the {self.stage} window ({self.metric} {self.full:.4f}; "
                 "each mode marginalized over its training frequencies, paired per user, 95% intervals):"]
        for row in self.table.itertuples(index=False):
            if not np.isfinite(row.gain):
                lines.append(f"  {row.mode}: not measurable (too few users)")
                continue
            significant = row.low > 0 or row.high < 0
            verdict = "adds" if row.gain > 0 and significant else ("costs" if significant else "adds nothing measurable:")
            lines.append(f"  {row.mode} {verdict} {100 * row.relative:+.1f}% {self.metric} "
                         f"[{100 * row.relative_low:+.1f}, {100 * row.relative_high:+.1f}]  "
                         f"(marginalized {row.marginalized:.4f}, p = {row.p_value:.3g})")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        return {"model": self.model, "metric": self.metric, "full": self.full, "stage": self.stage,
                "modes": self.table.to_dict(orient="records")}

    @classmethod
    def from_dict(cls, data: dict) -> "ContextGain":
        """Inverse of :meth:`to_dict` (e.g. the ``context_gain/report.json`` a run recorded)."""
        return cls(model=data["model"], metric=data["metric"], full=float(data["full"]),
                   table=pd.DataFrame(data["modes"]), stage=data["stage"])

    def figure(self, path) -> None:
        """A bar chart of the relative gains with their intervals, written to ``path`` (PNG path or file object)."""
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        t = self.table
        fig, ax = plt.subplots(figsize=(1.6 + 1.1 * len(t), 3.2))
        values = 100 * t["relative"].to_numpy()
        errors = np.vstack([values - 100 * t["relative_low"].to_numpy(), 100 * t["relative_high"].to_numpy() - values])
        ax.bar(t["mode"], values, yerr=errors, capsize=4, color="#5b7fa3")
        ax.axhline(0, color="black", linewidth=0.8)
        ax.set_ylabel(f"{self.metric} gain (%)")
        ax.set_title(f"What each context mode adds: {self.model}", fontsize=10)
        fig.tight_layout()
        fig.savefig(path, dpi=120)
        plt.close(fig)


def context_gain(evaluate, result, name: str, frequencies: dict[str, np.ndarray], metric: str = "ndcg",
                 k: int = 10) -> ContextGain:
    """Evaluate ``result`` against itself with each context mode marginalized.

    Parameters
    ----------
    evaluate : callable(models: dict, baseline: str) -> EvaluationResult
        Evaluates the given models on one stage with a paired comparison against ``baseline``
        (e.g. :func:`threefold.evaluation.harness.evaluate_stage` with the stage bound).
    result : CPResult or TuckerResult
    name : str
    frequencies : dict of mode name -> ndarray of shape (I_mode,)
        Training frequency of every level of each context mode to marginalize.
    metric : str, default="ndcg"
    k : int, default=10
    """
    modes = list(result.mode_names)
    variants = {name: result}
    for mode_name, weights in frequencies.items():
        variants[f"{name} without {mode_name}"] = marginalize_mode(result, modes.index(mode_name), weights)
    evaluation = evaluate(variants, name)
    full = evaluation.value(name, metric, k)
    c = evaluation.comparisons
    rows = []
    for mode_name in frequencies:
        variant = f"{name} without {mode_name}"
        marginal = evaluation.value(variant, metric, k)
        hit = c[(c["model"] == variant) & (c["metric"] == metric) & (c["k"] == k)]
        if hit.empty:
            rows.append({"mode": mode_name, "marginalized": marginal, "gain": np.nan, "low": np.nan, "high": np.nan,
                         "p_value": np.nan, "n_users": 0})
            continue
        h = hit.iloc[0]  # variant minus full: the gain is its negation
        rows.append({"mode": mode_name, "marginalized": marginal, "gain": 0.0 - h["mean_difference"], "low": 0.0 - h["high"],
                     "high": 0.0 - h["low"], "p_value": h["p_value"], "n_users": int(h["n_users"])})
    table = pd.DataFrame(rows)
    base = table["marginalized"].where(table["marginalized"] > 0)
    for column, source in (("relative", "gain"), ("relative_low", "low"), ("relative_high", "high")):
        table[column] = table[source] / base
    return ContextGain(model=name, metric=f"{metric}@{k}", full=full, table=table, stage=evaluation.stage)
