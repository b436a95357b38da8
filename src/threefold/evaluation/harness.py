"""The offline evaluation harness: every model ranks the same candidates of the same queries.

:func:`evaluate` takes fitted models (anything implementing
:class:`threefold.core.scoring.Scorer`, or a baseline of :mod:`threefold.models.baselines`)
and a :class:`~threefold.evaluation.queries.QuerySet`, scores blocks of queries (``Q Vᵀ + b``
for factor models), masks the candidates, takes the top K with the shared
tie rule (lower item index first) and reports, in a tidy DataFrame:

* accuracy at each K: recall, precision, ndcg, map, mrr, hit_rate (and
  ``ndcg_true`` against a simulator's true relevance), with percentile
  bootstrap 95% intervals over users, and a paired comparison (bootstrap and
  Wilcoxon signed-rank) of each model with a chosen baseline;
* breakdowns by each context mode's level, by user activity (training clicks;
  ``cold (<=2)``), by item age at the request and by training status of the
  clicked user and item (``recall`` per clicked item, and the share of clicks);
* beyond accuracy: coverage, gini, ild_topic, ild_latent, novelty,
  context-sensitivity (jaccard, kendall) and temporal_diversity;
* click-through of each ranking, naive, IPS and SNIPS, from the logged clicks
  and the position propensities (``click_through_true`` on simulated data).

:func:`evaluate_stage` is the usual entry point: it builds the queries of a
:class:`~threefold.evaluation.splits.Stage` against the training vocabulary, fits the
baselines on the stage's events, and runs the rolling protocol
(:mod:`threefold.evaluation.rolling`) or the static one. ``docs/evaluation.md`` defines
every metric.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields, replace
from typing import Callable, Mapping, Sequence

import numpy as np
import pandas as pd

from threefold.evaluation import _breakdowns as parts

from threefold.evaluation import _tables as tables
from threefold.core.checks import check_choice, check_int, check_number
from threefold.data.context import ContextSpec
from threefold.evaluation.metrics import graded_ndcg, ranking_metrics
from threefold.evaluation.policy_lists import aspect_codes, policy_variants
from threefold.evaluation.set_metrics import alpha_ideal_dcg, alpha_ndcg, expected_clicks
from threefold.ranking.policy_spec import ListPolicies
from threefold.evaluation.queries import QuerySet, build_queries
from threefold.core.scoring import Scorer
from threefold.evaluation.rankers import as_ranker
from threefold.evaluation.splits import Stage, check_selection
from threefold.core.vocabulary import Vocabulary

__all__ = ["EvaluationOptions", "EvaluationResult", "evaluate", "evaluate_stage", "select_best", "ACCURACY_METRICS"]

#: Accuracy metrics of :class:`threefold.evaluation.metrics.RankingMetrics`, by their report name.
ACCURACY_METRICS = {"recall": "recall", "precision": "precision", "ndcg": "ndcg", "map": "average_precision",
                    "mrr": "reciprocal_rank", "hit_rate": "hit_rate"}
_BLOCK_CELLS = 1 << 22


@dataclass(frozen=True, eq=False)
class EvaluationResult:
    """Everything one evaluation computed.

    Attributes
    ----------
    stage : {"validation", "test"}
    table : DataFrame
        Tidy rows: model, metric, k, value, low, high, breakdown, level, n_users.
    comparisons : DataFrame
        Paired comparison with the baseline: model, baseline, metric, k,
        mean_difference, low, high, p_value, effect_size, n_users.
    cold_share : dict
        Share of the evaluated clicks on users / items unseen at training time.
    ranked : dict of str to ndarray of shape (q, max(ks)), int64
        Every model's top-K item indices per query (the query set's universe).
    report : dict
    """

    stage: str
    table: pd.DataFrame
    comparisons: pd.DataFrame
    cold_share: dict
    ranked: dict
    report: dict = field(default_factory=dict)

    def value(self, model: str, metric: str, k: int | None = None, breakdown: str = "all", level: str = "all") -> float:
        """One value of the table."""
        t = self.table
        sel = (t["model"] == model) & (t["metric"] == metric) & (t["breakdown"] == breakdown) & (t["level"] == level)
        sel &= t["k"].isna() if k is None else (t["k"] == k)
        if sel.sum() != 1:
            raise KeyError(f"No single row for model={model!r}, metric={metric!r}, k={k}, {breakdown}={level!r}.")
        return float(t.loc[sel, "value"].iloc[0])

    def to_text(self) -> str:
        """A readable summary: overall accuracy with intervals, the comparisons, the cold share."""
        lines = [f"stage: {self.stage}   queries: {self.report.get('queries')}   users: {self.report.get('users')}",
                 tables.text_table(self.table)]
        c = self.comparisons
        c = c[c["metric"].isin(("recall", "ndcg", "ndcg_true", "alpha_ndcg", "alpha_ndcg_true"))
              & (c["k"] == c["k"].max())]
        if not c.empty:
            against = ", ".join(dict.fromkeys(c["baseline"]))  # the baseline, and each model with the list policies
            lines.append(f"paired comparison with {against} (per-user means, all K in .comparisons):")
            lines.append(c.to_string(index=False, float_format=lambda x: f"{x:.4g}"))
        for name, rules in self.report.get("policies", {}).items():
            lines.append(f"what each list policy did for {name!r}:")
            lines += [f"  {rule}: fired in {row['requests']:,} queries, removed {row['removed']:,}, moved {row['moved']:,}"
                      for rule, row in rules.items()]
        if self.cold_share:
            lines.append("clicks unseen at training: " + ", ".join(f"{k} {v:.1%}" if isinstance(v, float) else f"{k} {v}"
                                                                   for k, v in self.cold_share.items()))
        return "\n".join(lines)


def _check_schedule(schedule, n_queries: int, names: set) -> list:
    seen = np.zeros(n_queries, dtype=np.int64)
    for rows, rankers in schedule:
        if set(rankers) != names:
            raise ValueError(f"Every schedule step must rank the same models {sorted(names)}, got {sorted(rankers)}.")
        np.add.at(seen, np.asarray(rows, dtype=np.int64), 1)
    if not np.all(seen == 1):
        raise ValueError("The schedule must cover every query exactly once.")
    return [(np.asarray(rows, dtype=np.int64), {n: as_ranker(m) for n, m in rankers.items()}) for rows, rankers in schedule]


def _binder(schedule, queries: QuerySet):
    """Bind each step's rankers: shared rankers once to all queries, others to their step's queries."""
    uses: dict[int, int] = {}
    for _, rankers in schedule:
        for r in rankers.values():
            uses[id(r)] = uses.get(id(r), 0) + 1
    cache: dict[int, object] = {}

    def bound(rows: np.ndarray, ranker) -> tuple[object, np.ndarray | None]:
        if uses[id(ranker)] > 1:
            if id(ranker) not in cache:
                cache[id(ranker)] = ranker.bind(queries)
            return cache[id(ranker)], None
        return ranker.bind(queries.take(rows)), rows

    return bound


def _truth_block(true_relevance: Callable, queries: QuerySet, rows: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Dense (b, n_items) true relevance of every candidate of the block; 0 elsewhere."""
    b, item = np.nonzero(mask)
    requests = queries.requests.iloc[rows[b]].reset_index(drop=True)
    labels = np.asarray(queries.items.labels, dtype=object)[item]
    out = np.zeros(mask.shape)
    out[b, item] = np.asarray(true_relevance(requests, labels), dtype=np.float64)
    return out


def _true_gain(ranked: np.ndarray, gamma: np.ndarray, ratios: np.ndarray, ks: tuple[int, ...]) -> np.ndarray:
    """Σ_{r <= K} γ(ranked item r) · θ̃_r per query, shape (b, len(ks))."""
    kmax = ranked.shape[1]
    g = np.where(ranked >= 0, np.take_along_axis(gamma, np.maximum(ranked, 0), axis=1), 0.0)
    g = g * tables.ratio_at(ratios, np.arange(1, kmax + 1))
    return np.cumsum(g, axis=1)[:, np.asarray(ks) - 1]


@dataclass(frozen=True)
class EvaluationOptions:
    """How to evaluate: every setting of :func:`evaluate` and :func:`evaluate_stage`, defaults in one place.

    The config's ``[evaluation]`` section and the command line take their
    defaults from here.

    Attributes
    ----------
    stage : {"validation", "test"}, default="test"
        Recorded on the result; model selection accepts validation results only.
    ks : tuple of int, default=(3, 5, 10)
        List lengths (the sizes of typical media modules; common practice).
    baseline : str or None
        Name of the model every other model is compared with (paired, per user).
    candidates : {"eligible", "shown"}, default="eligible"
        What each query ranks (:func:`threefold.evaluation.queries.build_queries`).
    protocol : {"rolling", "static"}, default="rolling"
        ``"rolling"`` folds in new users and items before each step; ``"static"``
        ranks with the trained models only.
    step : int or str, default="1h"
        Step of the rolling protocol.
    propensity_clip : float, default=10.0
        Largest inverse-propensity weight.
    activity_bins : tuple of float, default=(2, 20)
        Upper edges of the user-activity levels in training clicks (the first is "cold").
    age_bins_hours : tuple of float, default=(1, 6, 24)
        Upper edges of the item-age levels.
    similarity_model : str or None
        Factor model whose item vectors define ``ild_latent`` (default: the first factor model).
    sensitivity_users : int, default=200
        Users sampled for context sensitivity (their first query, every level of each mode).
    n_resamples : int, default=1000
        Bootstrap resamples of every interval.
    random_state : int, default=0
    aspect : str or None
        Catalog column whose levels are the aspects of ``alpha_ndcg`` (α = 0.5,
        Clarke et al. 2008); None: the column the list policies diversify on,
        if any (``max_per``, or a catalog ``similarity``).
    policy_ablation : bool, default=False
        With list policies, also measure every rule alone (``"NAME + only
        RULE"``), each paired with ``NAME``: what each rule costs and buys.
    """

    stage: str = "test"
    ks: tuple[int, ...] = (3, 5, 10)
    baseline: str | None = None
    candidates: str = "eligible"
    protocol: str = "rolling"
    step: int | str = "1h"
    propensity_clip: float = 10.0
    activity_bins: tuple[float, ...] = (2, 20)
    age_bins_hours: tuple[float, ...] = (1, 6, 24)
    similarity_model: str | None = None
    sensitivity_users: int = 200
    n_resamples: int = 1000
    random_state: int = 0
    aspect: str | None = None
    policy_ablation: bool = False

    def __post_init__(self) -> None:
        owner = "EvaluationOptions"
        check_choice("stage", self.stage, ("validation", "test"), owner=owner)
        ks = (self.ks,) if np.isscalar(self.ks) else self.ks
        object.__setattr__(self, "ks", tuple(sorted({check_int("k", k, low=1, owner=owner) for k in ks})))
        check_choice("candidates", self.candidates, ("eligible", "shown"), owner=owner)
        check_choice("protocol", self.protocol, ("rolling", "static"), owner=owner)
        object.__setattr__(self, "propensity_clip", check_number("propensity_clip", self.propensity_clip, low=1.0,
                                                                 owner=owner))
        check_int("sensitivity_users", self.sensitivity_users, low=0, owner=owner)
        check_int("n_resamples", self.n_resamples, low=1, owner=owner)
        check_int("random_state", self.random_state, low=0, owner=owner)
        object.__setattr__(self, "activity_bins", tuple(self.activity_bins))
        object.__setattr__(self, "age_bins_hours", tuple(self.age_bins_hours))

    @classmethod
    def with_settings(cls, options: "EvaluationOptions | None", settings: Mapping[str, object]) -> "EvaluationOptions":
        """``options`` (default: the defaults) with some fields set by name; unknown names are refused."""
        names = [f.name for f in fields(cls)]
        unknown = [key for key in settings if key not in names]
        if unknown:
            raise TypeError(f"Unknown evaluation setting(s) {unknown}; the settings are the fields of "
                            f"EvaluationOptions: {', '.join(names)}.")
        return replace(options or cls(), **settings)


@dataclass
class _Ranked:
    """What ranking every query with every model produced (the input of the metric tables)."""

    lists: dict
    truth_ndcg: dict | None
    true_gain: dict
    true_mass: np.ndarray
    ever: np.ndarray
    item_factors: np.ndarray | None
    set_values: dict = field(default_factory=dict)  # name -> metric -> (q, len(ks)): alpha_ndcg, expected_clicks


def _alpha_ideals(ks, clicked, gamma, aspect) -> dict:
    """The ideal α-DCG of a block per (relevance, K): one greedy ideal for every model and policy variant."""
    if aspect is None:
        return {}
    out = {("clicked", k): alpha_ideal_dcg(clicked, aspect, k=k, alpha=0.5) for k in ks}
    if gamma is not None:
        out.update({("true", k): alpha_ideal_dcg(gamma, aspect, k=k, alpha=0.5) for k in ks})
    return out


def _set_values(store: dict, q: int, ks, sel, result, clicked, gamma, aspect, ratios, ideals: dict) -> None:
    """α-NDCG and expected clicks of a block's lists (:mod:`threefold.evaluation.set_metrics`) into ``store``."""
    def put(metric, j, values):
        store.setdefault(metric, np.full((q, len(ks)), np.nan))[sel, j] = values

    theta = None
    if ratios is not None:  # examination relative to the first slot, the last known ratio beyond the estimate
        theta = np.concatenate([ratios, np.full(max(0, max(ks) - ratios.size), ratios[-1] if ratios.size else 1.0)])
    for j, k in enumerate(ks):
        if aspect is not None:
            put("alpha_ndcg", j, alpha_ndcg(result, clicked, aspect, k=k, alpha=0.5, ideal=ideals[("clicked", k)]))
            if gamma is not None:  # a request holds one or two clicks: the set shows best against the truth
                put("alpha_ndcg_true", j, alpha_ndcg(result, gamma, aspect, k=k, alpha=0.5, ideal=ideals[("true", k)]))
        if theta is not None:
            put("expected_clicks", j, expected_clicks(result[:, :k], clicked, theta))
            if gamma is not None:
                put("expected_clicks_true", j, expected_clicks(result[:, :k], gamma, theta))


def _rank_everything(rankers: dict, queries: QuerySet, schedule: list, ks: tuple[int, ...], ratios,
                     true_relevance, similarity_model: str | None, variants: Sequence = (),
                     aspect: np.ndarray | None = None) -> _Ranked:
    """Top-K lists of every query by every model (and after each policy variant), block by block, and the gains.

    ``variants``: (name suffix, :class:`EvaluationPolicies`) of :func:`policy_variants`.
    """
    q, kmax, n_items = len(queries), max(ks), queries.n_items
    sim_name = similarity_model or next((n for n, r in rankers.items() if isinstance(r.fitted(), Scorer)), None)
    names = list(rankers) + [n + suffix for suffix, _ in variants for n in rankers]
    ranked = {n: np.full((q, kmax), -1, dtype=np.int64) for n in names}
    truth_ndcg = {n: np.full((q, len(ks)), np.nan) for n in names} if true_relevance else None
    true_gain = {n: np.zeros((q, len(ks))) for n in names}
    sets = {n: {} for n in names}
    with_sets = aspect is not None or (bool(variants) and ratios is not None)
    pool_width = max([kmax] + [v.pool for _, v in variants])
    true_mass = np.zeros(q)
    ever = np.zeros(n_items, dtype=bool)
    sim_factors = None
    bound = _binder(schedule, queries)
    block = max(1, _BLOCK_CELLS // max(n_items, 1))
    for rows, step_rankers in schedule:
        fns = {n: bound(rows, r) for n, r in step_rankers.items()}
        factors = getattr(fns[sim_name][0], "item_factors", None) if sim_name in fns else None
        for _, v in variants:
            if factors is None and v.tables.policies.mmr < 1.0 and v.tables.policies.similarity == "factors":
                raise ValueError(f"{v.tables.policies.source}: MMR with similarity = \"factors\" needs a factor "
                                 "model in the evaluation (or similarity = a catalog column).")
        for start in range(0, rows.size, block):
            sel = rows[start:start + block]
            mask = queries.candidates.mask(sel)
            ever |= mask.any(axis=0)
            gamma = _truth_block(true_relevance, queries, sel, mask) if true_relevance else None
            if gamma is not None:
                true_mass[sel] = gamma.sum(axis=1)
            clicked = (queries.relevant[sel].toarray() > 0).astype(np.float64) if with_sets else None
            ideals = _alpha_ideals(ks, clicked, gamma, aspect) if with_sets else {}
            for name, (fn, own_rows) in fns.items():
                local = sel if own_rows is None else np.arange(start, start + sel.size)
                if not variants:
                    lists = {name: parts.rank_block(fn, local, mask, kmax, name)}
                else:  # the first K of the pool are the model's own list, its first P each variant's pool
                    pool, pool_scores = parts.rank_block(fn, local, mask, pool_width, name, with_scores=True)
                    lists = {name: pool[:, :kmax]}
                    for suffix, v in variants:
                        lists[name + suffix] = v.lists(name + suffix, pool[:, :v.pool], pool_scores[:, :v.pool], sel,
                                                       queries.times, factors, kmax)
                for reported, result in lists.items():
                    ranked[reported][sel] = result
                    if gamma is not None:
                        truth_ndcg[reported][sel] = graded_ndcg(result, gamma, ks)
                        if ratios is not None:
                            true_gain[reported][sel] = _true_gain(result, gamma, ratios, ks)
                    if with_sets:
                        _set_values(sets[reported], q, ks, sel, result, clicked, gamma, aspect, ratios, ideals)
        if factors is not None:
            sim_factors = factors.copy() if sim_factors is None else np.where(np.any(factors != 0, axis=1)[:, None], factors, sim_factors)
    return _Ranked(ranked, truth_ndcg, true_gain, true_mass, ever, sim_factors, sets)


def _model_rows(name: str, ranked: _Ranked, queries: QuerySet, opts: EvaluationOptions, groups, pair_groups,
                pairs, users, n_users, context_rows, catalog, training_events, ratios, true_relevance,
                boot: dict) -> tuple[list[dict], dict]:
    """Every table row of one model, and its per-query accuracy arrays (for the paired comparisons)."""
    ks = opts.ks
    rows_out: list[dict] = []
    metrics = ranking_metrics(ranked.lists[name], queries.relevant, ks)
    arrays = {m: getattr(metrics, attr) for m, attr in ACCURACY_METRICS.items()}
    if ranked.truth_ndcg is not None:
        arrays["ndcg_true"] = ranked.truth_ndcg[name]
    arrays.update(ranked.set_values.get(name, {}))
    for breakdown, level, mask in groups:
        for metric, values in arrays.items():
            for j, k in enumerate(ks):
                v = values[:, j] if mask is None else np.where(mask, values[:, j], np.nan)
                rows_out.append(tables.row(name, metric, k, tables.interval(v, users, n_users, **boot), breakdown, level))
    pair_query, pair_item = pairs
    rank = tables.rank_of(ranked.lists[name], pair_query, pair_item)
    for breakdown, level, mask in pair_groups:
        for k in ks:
            hit = np.where(mask, ((rank >= 1) & (rank <= k)).astype(np.float64), np.nan)
            rows_out.append(tables.row(name, "recall", k, tables.interval(hit, users[pair_query], n_users, **boot),
                                       breakdown, level))
    rows_out += parts.beyond_rows(name, ranked.lists[name], queries, ks, users, n_users, ranked.ever, catalog,
                                  training_events, ranked.item_factors, boot)
    if ratios is not None:
        rows_out += tables.click_rows(name, ranked.lists[name], queries, users, n_users, ratios, ks,
                                      opts.propensity_clip, **boot)
        if true_relevance is not None and queries.candidates.kind == "shown":
            for j, k in enumerate(ks):
                stats = tables.interval(ranked.true_gain[name][:, j], users, n_users, denominators=ranked.true_mass,
                                        **boot)
                rows_out.append(tables.row(name, "click_through_true", k, stats))
    rows_out += [r for r in context_rows if r["model"] == name]
    return rows_out, arrays


def _comparisons(per_query: dict, pairs: list[tuple[str, str, bool]], ks, users, n_users, boot: dict) -> list[dict]:
    """Paired comparison of each (model, baseline, largest K only) triple, per metric and K (metrics both have)."""
    out = []
    for name, baseline, last_only in pairs:
        for metric, values in per_query[name].items():
            if metric not in per_query[baseline]:
                continue
            for j, k in enumerate(ks):
                if last_only and j < len(ks) - 1:
                    continue
                result = tables.compare(values[:, j], per_query[baseline][metric][:, j], users, n_users, **boot)
                if result is not None:
                    out.append({"model": name, "baseline": baseline, "metric": metric, "k": k, **result})
    return out


def evaluate(
    models: Mapping[str, object],
    queries: QuerySet,
    options: EvaluationOptions | None = None,
    *,
    training_events: pd.DataFrame | None = None,
    catalog: pd.DataFrame | None = None,
    propensity=None,
    true_relevance: Callable[[pd.DataFrame, np.ndarray], np.ndarray] | None = None,
    schedule: Sequence[tuple[np.ndarray, Mapping[str, object]]] | None = None,
    policies: ListPolicies | None = None,
    **settings,
) -> EvaluationResult:
    """Rank the queries with every model and compute the metrics, intervals and comparisons.

    Parameters
    ----------
    models : mapping of str to Ranker
        Fitted factor models and baselines.
    queries : QuerySet
    options : EvaluationOptions or None
        How to evaluate (default: :class:`EvaluationOptions` ()).
    training_events : DataFrame or None
        The stage's training events: user activity, novelty, training status.
    catalog : DataFrame or None
        Items catalog: ``topic`` (intra-list diversity by topic), ``published_at`` (item age).
    propensity : PositionPropensity or ndarray of shape (n_positions,) or None
        Examination ratios θ_k/θ_1 (from the training events) for the click estimates.
    true_relevance : callable or None
        ``f(requests, item_ids) -> γ``, shape (n,): the true relevance of each
        (request row, item) pair on simulated data (e.g.
        :func:`threefold.demo.simulate.simulator_relevance`).
    schedule : sequence of (rows, models) or None
        Which models rank which queries (the rolling protocol's steps); default
        every model ranks every query.
    policies : ListPolicies or None
        List policies: every model is also reported after them, as
        ``"NAME + policies"``, paired with itself (:mod:`threefold.evaluation.policy_lists`);
        what each rule did is in ``report["policies"]``.
    **settings
        Fields of :class:`EvaluationOptions` to set on ``options`` (``ks=(5, 10)``, ...).

    Returns
    -------
    EvaluationResult
    """
    opts = EvaluationOptions.with_settings(options, settings)
    rankers = {str(name): as_ranker(m) for name, m in models.items()}
    if not rankers or (opts.baseline is not None and opts.baseline not in rankers):
        raise ValueError(f"Give at least one model; the baseline must be one of them (got {opts.baseline!r}, "
                         f"{list(rankers)}).")
    if len(queries) == 0:
        raise ValueError("The query set is empty: no request of the window has a clicked candidate.")
    q = len(queries)
    schedule = _check_schedule(schedule or [(np.arange(q), rankers)], q, set(rankers))
    ratios = None if propensity is None else np.asarray(getattr(propensity, "ratios", propensity), dtype=np.float64)
    skipped = None
    if policies is not None and policies.mmr < 1.0 and policies.similarity == "factors" and not any(
            isinstance(r.fitted(), Scorer) for r in rankers.values()):
        policies, skipped = None, ("MMR with similarity = \"factors\" needs a factor model among the evaluated "
                                   "ones; none is, so no list was measured after the policies")
    variants = [] if policies is None else policy_variants(policies, queries, catalog, training_events, max(opts.ks),
                                                           each_rule=opts.policy_ablation)
    aspect_column = opts.aspect or (policies.aspect_column() if policies is not None else None)
    aspect = None if aspect_column is None else aspect_codes(aspect_column, queries, catalog)
    ranked = _rank_everything(rankers, queries, schedule, opts.ks, ratios, true_relevance, opts.similarity_model,
                              variants, aspect)
    names = list(ranked.lists)

    users, _ = pd.factorize(queries.users)
    users = users.astype(np.int64)
    n_users = int(users.max()) + 1
    boot = {"n_resamples": opts.n_resamples, "random_state": opts.random_state}
    groups = parts.query_groups(queries, training_events, opts.activity_bins)
    pair_groups, cold_share = parts.pair_groups(queries, training_events, catalog, opts.age_bins_hours)
    pairs = tables.relevant_pairs(queries)
    context_rows = parts.sensitivity_rows(schedule, queries, opts.ks, users, n_users, opts.sensitivity_users, boot)
    rows_out: list[dict] = []
    per_query: dict[str, dict[str, np.ndarray]] = {}
    for name in names:
        ablated = any(name.endswith(suffix) for suffix, _ in variants[1:])  # a rule alone: overall rows only
        rows, per_query[name] = _model_rows(name, ranked, queries, opts, groups[:1] if ablated else groups,
                                            [] if ablated else pair_groups, pairs, users, n_users, context_rows,
                                            catalog, training_events, ratios, true_relevance, boot)
        rows_out += rows
    if cold_share:
        for level in ("new_user", "new_item", "new_user_or_item"):
            stats = (cold_share[level], np.nan, np.nan, n_users)
            rows_out += [tables.row(n, "click_share", None, stats, "training_status", level) for n in names]
    compared = [(n, opts.baseline, False) for n in rankers if opts.baseline is not None and n != opts.baseline]
    compared += [(n + suffix, n, i > 0) for i, (suffix, _) in enumerate(variants) for n in rankers]  # with / without
    comparisons = _comparisons(per_query, compared, opts.ks, users, n_users, boot)
    table = pd.DataFrame(rows_out, columns=tables.ROW_COLUMNS)
    table["k"] = table["k"].astype("Int64")
    report = {**queries.report, "queries": q, "users": n_users, "steps": len(schedule),
              "candidate_items": int(ranked.ever.sum())}
    if variants:
        report["policies"] = {n: counts.rules for _, v in variants for n, counts in v.counts.items()}
        report["policy_pool"] = variants[0][1].pool
    if skipped:
        report["policies_skipped"] = skipped
    return EvaluationResult(stage=opts.stage, table=table,
                            comparisons=pd.DataFrame(comparisons, columns=tables.COMPARISON_COLUMNS),
                            cold_share=cold_share, ranked=ranked.lists, report=report)


def evaluate_stage(
    stage: Stage,
    models: Mapping[str, object],
    contexts: Sequence[ContextSpec] = (),
    options: EvaluationOptions | None = None,
    *,
    catalog: pd.DataFrame | None = None,
    build_options: Mapping | None = None,
    propensity="estimate",
    true_relevance: Callable[[pd.DataFrame, np.ndarray], np.ndarray] | None = None,
    policies: ListPolicies | None = None,
    **settings,
) -> EvaluationResult:
    """Evaluate fitted models on one stage of a split.

    Builds the stage's queries against the training item vocabulary, fits the
    baselines (rankers that learn from events) on the stage's events (each
    request counts only earlier clicks), estimates the position propensities
    from the training events, and runs :func:`evaluate` under the chosen protocol.

    Parameters
    ----------
    stage : Stage
        From :meth:`EventSplit.selection_stage` or :meth:`EventSplit.final_stage`.
    models : mapping of str to Ranker
        Factor models fitted on ``stage.train_tensor(contexts, **build_options)``, and baselines.
    contexts : sequence of ContextSpec
        The context modes of the models' tensors.
    options : EvaluationOptions or None
        How to evaluate; ``candidates``, ``protocol`` and ``step`` act here,
        the rest in :func:`evaluate`. ``stage`` is always the stage's name.
    catalog : DataFrame or None
    build_options : mapping or None
        Options the training tensor was built with (its weighting is needed for fold-in).
    propensity : "estimate", PositionPropensity, ndarray or None, default="estimate"
        ``"estimate"``: from the training events when they hold positions and
        request ids (else no click estimates).
    true_relevance : callable or None
        See :func:`evaluate`.
    policies : ListPolicies or None
        See :func:`evaluate` (repetition reads the stage's training events).
    **settings
        Fields of :class:`EvaluationOptions` to set on ``options``.

    Returns
    -------
    EvaluationResult
    """
    opts = replace(EvaluationOptions.with_settings(options, settings), stage=stage.name)
    from threefold.data.propensity import estimate_position_propensity
    from threefold.evaluation.rolling import rolling_schedule

    items = Vocabulary.from_values(stage.train["item_id"].dropna().astype(str), name="item")
    queries = build_queries(stage.evaluate, contexts, candidates=opts.candidates, catalog=catalog, item_vocabulary=items,
                            history=stage.train)
    history = pd.concat([stage.train, stage.evaluate], ignore_index=True)
    for model in models.values():
        if as_ranker(model).learns_from_events:
            model.fit(history, contexts)
    if isinstance(propensity, str):
        check_choice("propensity", propensity, ("estimate",), owner="evaluate_stage")
        needed = {"event", "position", "request_id"}
        propensity = estimate_position_propensity(stage.train) if needed <= set(stage.train.columns) else None
    schedule, extra = None, {"protocol": opts.protocol}
    if opts.protocol == "rolling":
        schedule, rolling_report = rolling_schedule(stage, queries, models, contexts, step=opts.step,
                                                    build_options=build_options)
        extra.update(rolling_report)
    result = evaluate(models, queries, opts, training_events=stage.train, catalog=catalog, propensity=propensity,
                      true_relevance=true_relevance, schedule=schedule, policies=policies)
    result.report.update(extra, dropped_straddling_requests=stage.dropped_requests)
    return result


def select_best(results: "EvaluationResult | Sequence[EvaluationResult]", metric: str = "ndcg", k: int = 10, *,
                candidates: Sequence[str] | None = None, select_on: str = "validation") -> str:
    """The model with the highest overall ``metric@k``, chosen on validation results only.

    Parameters
    ----------
    results : EvaluationResult or sequence of EvaluationResult
        Results of the validation stage (e.g. one per sweep trial); model
        names must be unique across them.
    metric : str, default="ndcg"
    k : int, default=10
    candidates : sequence of str or None
        The models to choose from (default: every model, baselines included).
    select_on : str, default="validation"
        Anything else is refused (:func:`threefold.evaluation.splits.check_selection`).

    Returns
    -------
    str
        The best model's name; ties go to the first in order.
    """
    results = [results] if isinstance(results, EvaluationResult) else list(results)
    check_selection([r.stage for r in results], select_on=select_on)
    values: dict[str, float] = {}
    for result in results:
        for name in result.ranked:
            if candidates is None or name in candidates:
                if name in values:
                    raise ValueError(f"Model name {name!r} appears in several results; give unique names.")
                values[name] = result.value(name, metric, k)
    if not values:
        raise ValueError(f"No candidate model in the results (candidates={candidates!r}).")
    order = list(values)
    return max(order, key=lambda name: (np.nan_to_num(values[name], nan=-np.inf), -order.index(name)))
