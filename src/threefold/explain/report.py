"""The factor-inspection report: one self-contained HTML file, a terminal summary and JSON.

:func:`build_report` gathers what :mod:`~threefold.explain.factors`,
:mod:`~threefold.explain.diagnostics` and :mod:`~threefold.explain.compare`
compute into a :class:`Report`; :meth:`Report.write` draws every figure with
matplotlib (Agg, no display needed), embeds them as PNG in ``report.html``
(so the one file can be mailed to an editor) and writes ``report.json`` and
``summary.txt`` beside it. Every figure has a title, axis labels and a one-line
reading in plain words under it.

Sections, in order: what each context mode adds (the context-gain table, when
the model's run has one); the factors (strength, label, context loadings, top
items and users); the context modes (factor heatmaps and which levels behave
alike); Tucker core slices; model diagnostics (core consistency, stability);
context comparisons.
"""

from __future__ import annotations

import base64
import html
import io
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from threefold.explain.diagnostics import level_similarity
from threefold.explain.factors import Factor, core_slices, factor_summaries, is_tucker

__all__ = ["Report", "build_report", "Stability"]


@dataclass(frozen=True)
class Stability:
    """Factor match scores of refits against the model (:func:`threefold.explain.diagnostics.factor_match_score`).

    Attributes
    ----------
    seeds : dict of int to float
        Refit with another seed on the same tensor -> score over every mode.
    halves : tuple of float
        Fits on two disjoint halves of the users -> score over the non-user modes.
    corcondia : float or None
        Core consistency of the model's specification on the tensor (plain CP only).
    """

    seeds: dict
    halves: tuple
    corcondia: float | None = None


@dataclass
class Report:
    """Everything the report shows; see :func:`build_report`."""

    title: str
    result: object
    factors: list
    level_names: dict
    item_labels: np.ndarray
    user_labels: np.ndarray
    catalog: pd.DataFrame | None = None
    gain: object | None = None
    stability: Stability | None = None
    comparisons: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    ranks: pd.DataFrame | None = None

    # ------------------------------------------------------------------ words
    def factor_reading(self, f: Factor) -> str:
        peaks = f.peak_levels(self.level_names)
        where = ", ".join(f"{levels} ({mode})" for mode, levels in peaks.items())
        what = f.enrichment.label() if f.enrichment is not None else "no catalog given"
        head = f"{self._factor_name(f)} ({_percent(f.share)} of the model's energy)"
        if where:
            head += f" is switched on by {where}"
        return f"{head}; its top items have in common: {what}."

    def _factor_name(self, f: Factor) -> str:
        return f"component {f.index} [{f.term}]" if not is_tucker(self.result) else f"item column {f.index}"

    def to_text(self) -> str:
        lines = [self.title, "=" * len(self.title)]
        if self.gain is not None:
            lines += ["", self.gain.to_text()]
        lines += ["", "factors, strongest first:"]
        for f in self.factors:
            lines.append(f"  {self.factor_reading(f)}")
            lines.append("    top items: " + ", ".join(str(self.item_labels[i]) for i in f.top_items[:5]))
        for mode, (cosine, _) in self._similarities().items():
            pair = _closest_pair(cosine)
            if pair is not None:
                a, b = pair
                names = self.level_names[mode]
                lines.append(f"  {mode}: the levels {names[a]!r} and {names[b]!r} behave most alike "
                             f"(cosine {cosine[a, b]:.2f})")
        if self.stability is not None:
            lines += ["", self._stability_text()]
        if self.ranks is not None and len(self.ranks):
            best = self.ranks.loc[self.ranks["value"].idxmax()]
            lines += ["", f"sweep trials: the best validation {best['metric']} {best['value']:.4f} at rank "
                          f"{int(best['rank'])} (ranks tried: {', '.join(map(str, sorted(self.ranks['rank'].unique())))})"]
        for comparison in self.comparisons:
            lines += ["", comparison.to_text(self.item_labels)]
        for note in self.notes:
            lines.append(f"note: {note}")
        return "\n".join(lines)

    def _stability_text(self) -> str:
        s = self.stability
        parts = []
        if s.corcondia is not None:
            parts.append(f"core consistency (CORCONDIA) {s.corcondia:.1f}")
        if s.seeds:
            parts.append("factor match with refits on other seeds " + ", ".join(f"{v:.2f}" for v in s.seeds.values()))
        if s.halves:
            parts.append("between two halves of the users " + ", ".join(f"{v:.2f}" for v in s.halves))
        return "stability: " + "; ".join(parts) if parts else "stability: not measured"

    def to_dict(self) -> dict:
        out = {"title": self.title, "factors": [], "levels": {m: list(map(str, v)) for m, v in self.level_names.items()},
               "notes": list(self.notes)}
        for f in self.factors:
            out["factors"].append({
                "index": f.index, "term": f.term, "strength": f.strength, "share": f.share, "label": f.label,
                "reading": self.factor_reading(f),
                "loadings": {m: np.asarray(v, dtype=float).tolist() for m, v in f.loadings.items()},
                "top_items": [str(self.item_labels[i]) for i in f.top_items],
                "top_users": [str(self.user_labels[u]) for u in f.top_users],
                "enrichment": (json.loads(f.enrichment.table[f.enrichment.table["enriched"]].to_json(orient="records"))
                               if f.enrichment is not None else None)})
        out["level_similarity"] = {m: c.tolist() for m, (c, _) in self._similarities().items()}
        if self.gain is not None:
            out["context_gain"] = self.gain.to_dict()
        if self.stability is not None:
            out["stability"] = {"seeds": {str(k): v for k, v in self.stability.seeds.items()},
                                "halves": list(self.stability.halves), "corcondia": self.stability.corcondia}
        if self.ranks is not None:
            out["ranks"] = json.loads(self.ranks.to_json(orient="records"))
        out["comparisons"] = [{**c.summary(), "movers": json.loads(c.movers.assign(
            item=[str(self.item_labels[i]) for i in c.movers["item"]]).to_json(orient="records")),
            "drivers": json.loads(c.drivers.to_json(orient="records"))} for c in self.comparisons]
        return out

    def _similarities(self) -> dict:
        names = list(self.result.mode_names)
        out = {}
        for n in range(2, len(names)):
            factor = np.asarray(self.result.factors[n], dtype=np.float64)
            varying = ~np.all(factor == factor[:1], axis=0)  # CP columns a mode does not own are constant
            if factor.shape[0] >= 2 and varying.any():
                out[names[n]] = level_similarity(factor[:, varying])
        return out

    # ------------------------------------------------------------------ files
    def write(self, out: str | Path) -> Path:
        """Write ``report.html``, ``report.json`` and ``summary.txt`` into ``out``; returns the HTML path."""
        out = Path(out)
        out.mkdir(parents=True, exist_ok=True)
        (out / "report.json").write_text(json.dumps(self.to_dict(), indent=2, default=float))
        (out / "summary.txt").write_text(self.to_text() + "\n")
        path = out / "report.html"
        path.write_text(_html(self), encoding="utf-8")
        return path


def build_report(result, *, title: str = "factor report", catalog: pd.DataFrame | None = None, n_top: int = 10,
                 gain=None, stability: Stability | None = None, comparisons=(), notes=(),
                 ranks: pd.DataFrame | None = None) -> Report:
    """Assemble a :class:`Report` for a fitted CP or Tucker result.

    Parameters
    ----------
    result : CPResult or TuckerResult
    catalog : DataFrame, optional
        The item catalog (``item_id`` and any attribute columns); aligned here to
        the model's item order. Items the catalog lacks have blank attributes.
    n_top : int, default=10
    gain : ContextGain, optional
    stability : Stability, optional
    comparisons : sequence of ContextComparison
    notes : sequence of str
        Shown at the end (e.g. why a section is missing).
    ranks : DataFrame, optional
        ``rank, metric, value, fit[, trials]`` of sweep trials of this model
        (:func:`threefold.pipeline.explain.rank_trials`): the validation metric
        and the training fit against rank.
    """
    item_labels = np.asarray(result.vocabularies[1].labels if result.vocabularies[1] is not None
                             else np.arange(result.shape[1]).astype(str), dtype=object)
    user_labels = np.asarray(result.vocabularies[0].labels if result.vocabularies[0] is not None
                             else np.arange(result.shape[0]).astype(str), dtype=object)
    aligned = None
    if catalog is not None:
        if "item_id" not in catalog.columns:
            raise ValueError(f"the catalog has no item_id column; it has {list(catalog.columns)}.")
        aligned = (catalog.assign(item_id=catalog["item_id"].astype(str)).drop_duplicates("item_id")
                   .set_index("item_id").reindex(item_labels.astype(str)).reset_index())
    names = list(result.mode_names)
    level_names = {}
    for n in range(2, len(names)):
        vocab = result.vocabularies[n]
        level_names[names[n]] = list(vocab.labels) if vocab is not None else [str(i) for i in range(result.shape[n])]
    factors = factor_summaries(result, aligned, n_top=n_top)
    return Report(title=title, result=result, factors=factors, level_names=level_names, item_labels=item_labels,
                  user_labels=user_labels, catalog=aligned, gain=gain, stability=stability,
                  comparisons=list(comparisons), notes=list(notes), ranks=ranks)


def _percent(share: float) -> str:
    """A share as a percentage with two significant digits (``"0.042%"``, ``"12%"``)."""
    return f"{100 * share:.2g}%"


def _closest_pair(cosine: np.ndarray):
    if cosine.shape[0] < 2:
        return None
    masked = cosine - 3 * np.eye(cosine.shape[0])
    a, b = np.unravel_index(int(np.argmax(masked)), masked.shape)
    return (min(a, b), max(a, b))


# ---------------------------------------------------------------------- figures
def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _png(fig) -> str:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110)
    _plt().close(fig)
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _figure(title: str, png: str, reading: str) -> str:
    return (f'<figure><img alt="{html.escape(title)}" title="{html.escape(title)}" src="data:image/png;base64,{png}">'
            f"<figcaption>{html.escape(reading)}</figcaption></figure>")


def _shares_figure(report: Report) -> str:
    plt = _plt()
    factors = report.factors
    fig, ax = plt.subplots(figsize=(max(4.0, 0.35 * len(factors) + 1.5), 3.0))
    ax.bar([str(f.index) for f in factors], [100 * f.share for f in factors], color="#4c72b0")
    ax.set_xlabel("component" if not is_tucker(report.result) else "item column")
    ax.set_ylabel("share of energy (%)")
    title = "Strength of each factor"
    ax.set_title(title, fontsize=10)
    fig.tight_layout()
    top = factors[0]
    return _figure(title, _png(fig), f"The strongest factor is {report._factor_name(top)} with "
                                     f"{_percent(top.share)} of the model's energy.")


def _loadings_figure(report: Report, f: Factor) -> str | None:
    if not f.loadings:
        return None
    plt = _plt()
    modes = list(f.loadings)
    fig, axes = plt.subplots(1, len(modes), figsize=(2.6 * len(modes) + 0.8, 2.6), squeeze=False)
    for ax, mode in zip(axes[0], modes):
        ax.bar([str(x) for x in report.level_names[mode]], f.loadings[mode], color="#dd8452")
        ax.set_xlabel(mode)
        ax.set_ylabel("loading")
        ax.tick_params(axis="x", labelrotation=45)
    title = f"Context loadings of {report._factor_name(f)}"
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return _figure(title, _png(fig), report.factor_reading(f))


def _heatmap_figure(report: Report, mode: str) -> str:
    plt = _plt()
    n = list(report.result.mode_names).index(mode)
    factor = np.asarray(report.result.factors[n], dtype=np.float64)
    varying = np.flatnonzero(~np.all(factor == factor[:1], axis=0))
    shown = factor[:, varying]
    fig, ax = plt.subplots(figsize=(max(3.5, 0.3 * varying.size + 2), 0.35 * factor.shape[0] + 1.4))
    image = ax.imshow(shown, aspect="auto", cmap="RdBu_r", vmin=-np.abs(shown).max(), vmax=np.abs(shown).max())
    ax.set_yticks(range(factor.shape[0]), [str(x) for x in report.level_names[mode]])
    ax.set_xticks(range(varying.size), [str(c) for c in varying], fontsize=7)
    ax.set_xlabel("component" if not is_tucker(report.result) else "factor column")
    ax.set_ylabel(f"{mode} level")
    fig.colorbar(image, ax=ax, label="loading")
    title = f"The {mode} factor"
    ax.set_title(title, fontsize=10)
    fig.tight_layout()
    column = varying[int(np.argmax(np.abs(shown).max(axis=0)))] if varying.size else 0
    level = report.level_names[mode][int(np.argmax(np.abs(factor[:, column])))]
    return _figure(title, _png(fig), f"The largest {mode} loading is level {level!r} on column {column}.")


def _dendrogram_figure(report: Report, mode: str, cosine: np.ndarray, tree) -> str | None:
    if tree is None or float(np.max(tree[:, 2])) <= 1e-12:  # no levels, or all levels load alike: no tree to draw
        return None
    from scipy.cluster.hierarchy import dendrogram

    plt = _plt()
    fig, ax = plt.subplots(figsize=(4.2, 2.8))
    dendrogram(tree, labels=[str(x) for x in report.level_names[mode]], ax=ax, color_threshold=0)
    ax.set_ylabel("1 − cosine")
    ax.set_xlabel(f"{mode} level")
    title = f"Which {mode} levels behave alike"
    ax.set_title(title, fontsize=10)
    fig.tight_layout()
    a, b = _closest_pair(cosine)
    names = report.level_names[mode]
    return _figure(title, _png(fig), f"{names[a]!r} and {names[b]!r} are the most alike (cosine {cosine[a, b]:.2f}); "
                                     "levels that join low in the tree could share a level.")


def _core_figure(report: Report, mode: str) -> str:
    plt = _plt()
    n = list(report.result.mode_names).index(mode)
    slices = core_slices(report.result, n)
    levels = report.level_names[mode]
    fig, axes = plt.subplots(1, len(levels), figsize=(2.2 * len(levels) + 0.6, 2.6), squeeze=False)
    bound = np.abs(slices).max() or 1.0
    for ax, level, s in zip(axes[0], levels, slices):
        ax.imshow(s, cmap="RdBu_r", vmin=-bound, vmax=bound)
        ax.set_title(str(level), fontsize=9)
        ax.set_xlabel("item column")
        ax.set_ylabel("user column")
    title = f"Core slices by {mode}"
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    spread = [float(np.abs(s - slices.mean(axis=0)).sum()) for s in slices]
    return _figure(title, _png(fig), f"The user × item interaction differs most from the average at {mode} "
                                     f"{levels[int(np.argmax(spread))]!r}.")


def _ranks_figure(report: Report) -> str:
    plt = _plt()
    r = report.ranks.sort_values("rank")
    fig, left = plt.subplots(figsize=(4.8, 3.0))
    left.plot(r["rank"], r["value"], marker="o", color="#4c72b0")
    left.set_xlabel("rank")
    left.set_ylabel(f"validation {r['metric'].iloc[0]}", color="#4c72b0")
    right = left.twinx()
    right.plot(r["rank"], r["fit"], marker="s", color="#c44e52")
    right.set_ylabel("training fit", color="#c44e52")
    title = "Validation metric and fit against rank (sweep trials)"
    left.set_title(title, fontsize=10)
    fig.tight_layout()
    best = r.loc[r["value"].idxmax()]
    return _figure(title, _png(fig), f"The validation metric peaks at rank {int(best['rank'])}; beyond it the fit "
                                     "still rises while ranking does not, a sign of components that model noise.")


def _drivers_figure(report: Report, comparison) -> str:
    plt = _plt()
    d = comparison.drivers.sort_values("share", ascending=False).head(12)
    fig, ax = plt.subplots(figsize=(5.0, 3.0))
    ax.bar([str(x) for x in d["label"]], 100 * d["share"], color="#55a868")
    ax.set_ylabel("share of the score change (%)")
    ax.set_xlabel("factor column")
    ax.tick_params(axis="x", labelrotation=60, labelsize=7)
    title = f"What drives {comparison.label_a} → {comparison.label_b}"
    ax.set_title(title, fontsize=10)
    fig.tight_layout()
    top = d.iloc[0] if len(d) else None
    reading = (f"{top['label']} carries {100 * top['share']:.0f}% of the change in scores." if top is not None
               else "Nothing changes.")
    return _figure(title, _png(fig), reading)


# ---------------------------------------------------------------------- HTML
_CSS = """body{font-family:system-ui,sans-serif;max-width:1100px;margin:2em auto;color:#222;line-height:1.4}
h1{font-size:1.5em}h2{font-size:1.2em;border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:2em}
table{border-collapse:collapse;font-size:.85em;margin:.5em 0}td,th{border:1px solid #ddd;padding:.2em .5em}
th{background:#f3f3f3}figure{margin:1em 0}figcaption{font-size:.9em;color:#444}img{max-width:100%}
.note{color:#555;font-size:.9em}pre{background:#f7f7f7;padding:.6em;overflow-x:auto}"""


def _table(frame: pd.DataFrame) -> str:
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in frame.columns)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(_cell(v))}</td>" for v in row) + "</tr>"
                   for row in frame.itertuples(index=False))
    return f"<table><tr>{head}</tr>{body}</table>"


def _cell(value) -> str:
    """Table cell text: floats to 4 significant digits, NaN and None blank."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return ""
    return f"{value:.4g}" if isinstance(value, float) else str(value)


def _html(report: Report) -> str:
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{html.escape(report.title)}</title>"
             f"<style>{_CSS}</style></head><body><h1>{html.escape(report.title)}</h1>"]
    parts.append("<h2>What each context mode adds</h2>")
    if report.gain is not None:
        buffer = io.BytesIO()
        report.gain.figure(buffer)
        png = base64.b64encode(buffer.getvalue()).decode("ascii")
        parts.append(f"<pre>{html.escape(report.gain.to_text())}</pre>")
        parts.append(_figure(f"What each context mode adds: {report.gain.model}", png,
                             "Each bar: the metric with the mode's levels averaged out, against the full model "
                             "(paired per user, 95% interval)."))
    else:
        parts.append("<p class=\"note\">No context-gain report is recorded for this model "
                     "(threefold gain CONFIG --model NAME writes one).</p>")
    parts.append("<h2>The factors</h2>")
    parts.append(_shares_figure(report))
    overview = pd.DataFrame([{"factor": f.index, "term": f.term, "share %": round(100 * f.share, 2), "label": f.label}
                             for f in report.factors])
    parts.append(_table(overview))
    catalog = report.catalog
    for f in report.factors:
        parts.append(f"<h3>{html.escape(report._factor_name(f))}</h3><p>{html.escape(report.factor_reading(f))}</p>")
        figure = _loadings_figure(report, f)
        if figure:
            parts.append(figure)
        top = pd.DataFrame({"item_id": [str(report.item_labels[i]) for i in f.top_items], "loading": f.item_values})
        if catalog is not None:
            extra = catalog.iloc[f.top_items].drop(columns=["item_id"]).reset_index(drop=True)
            top = pd.concat([top, extra], axis=1)
        parts.append(_table(top))
        if f.top_users.size:
            parts.append("<p>Top users: " + html.escape(", ".join(str(report.user_labels[u]) for u in f.top_users))
                         + "</p>")
    parts.append("<h2>The context modes</h2>")
    for mode, (cosine, tree) in report._similarities().items():
        parts.append(_heatmap_figure(report, mode))
        figure = _dendrogram_figure(report, mode, cosine, tree)
        if figure:
            parts.append(figure)
    if is_tucker(report.result):
        parts.append("<h2>Tucker core slices</h2>")
        for mode in report.level_names:
            parts.append(_core_figure(report, mode))
    parts.append("<h2>Model diagnostics</h2>")
    parts.append(f"<p>{html.escape(report._stability_text())}</p>" if report.stability is not None else
                 "<p class=\"note\">Stability and core consistency need the training tensor (--tensor).</p>")
    if report.ranks is not None and len(report.ranks):
        parts.append(_ranks_figure(report))
        parts.append(_table(report.ranks))
    if report.comparisons:
        parts.append("<h2>Context comparisons</h2>")
        for c in report.comparisons:
            parts.append(f"<pre>{html.escape(c.to_text(report.item_labels))}</pre>")
            parts.append(_drivers_figure(report, c))
            movers = c.movers.assign(item=[str(report.item_labels[i]) for i in c.movers["item"]])
            parts.append(_table(movers))
    for note in report.notes:
        parts.append(f"<p class=\"note\">{html.escape(note)}</p>")
    parts.append("</body></html>")
    return "\n".join(parts)
