"""The train pipeline: config -> data -> tensor -> fitted models -> evaluation -> logged runs.

:func:`train` is what ``threefold train CONFIG`` runs. One parent run holds the
config, the dataset fingerprint and the combined evaluation table; each model
gets a child run with the flattened config as params (its own parameters as
``model.*``), per-sweep loss and fit as step metrics, final metrics with their
interval bounds (``ndcg_at_10``, ``ndcg_at_10_low``, ``ndcg_at_10_high``),
wall time and peak memory, the metrics tables as CSV, plots, and the model
itself as an MLflow pyfunc model written as code (see :mod:`threefold.tracking.pyfunc`).

The data and fitting steps (:func:`load_dataset`, :func:`prepare_stage`,
:func:`fit_and_evaluate`) know nothing of MLflow; the sweep workers of
:mod:`threefold.pipeline.sweep` call them too.
"""

from __future__ import annotations

import secrets
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from threefold.core.progress import progress
from threefold.evaluation.policy_lists import SUFFIX as POLICY_SUFFIX
from threefold.models.registry import FACTOR_METHODS, param_table
from threefold.pipeline.config import ExperimentConfig
from threefold.pipeline.select import auto_models, select_and_log
from threefold.core.text import text_table
from threefold.pipeline.stages import (
    Dataset, StageData, TruthSource, load_dataset, make_estimator, prepare_stage, with_seeds,
)
from threefold.core.scoring import Scorer

#: Prefix of a run's metrics measured on its lists after the config's ``[policies]``.
POLICY_PREFIX = "with_policies_"

__all__ = ["Dataset", "StageData", "FitOutcome", "ModelRun", "TrainReport", "load_dataset", "prepare_stage",
           "make_estimator", "fit_and_evaluate", "train", "key_metric_names", "TruthSource"]

@dataclass(eq=False)
class FitOutcome:
    """A fitted model and its evaluation."""

    name: str
    estimator: object
    evaluation: object
    seconds: float
    peak_memory_mb: float

    @property
    def history(self) -> tuple:
        return tuple(getattr(self.estimator, "history_", ()))


def fit_and_evaluate(config: ExperimentConfig, data: StageData, dataset: Dataset, name: str, *,
                     callback: Callable | None = None, with_baseline: bool = True,
                     fitted_baseline=None, with_policies: bool = True) -> FitOutcome:
    """Fit the model ``name`` on the stage's tensor and evaluate it (with the baseline beside it).

    With ``with_policies`` and a ``[policies]`` table, the evaluation also
    measures every model's lists after the rules (``"NAME + policies"``).

    Factor models are fitted here; event baselines (popularity, random) are
    fitted by the evaluation on the stage's events, as of each request. A
    factor model as the baseline (e.g. ``baseline = "mf"``) is fitted here too,
    unless ``fitted_baseline`` (its estimator, already fitted on this stage's
    tensor) is given.
    """
    from threefold.evaluation.harness import evaluate_stage
    from threefold.pipeline.config import evaluation_options

    spec = config.models[name]
    started = time.perf_counter()
    estimator = make_estimator(spec, callback)
    if spec["method"] in FACTOR_METHODS:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", category=UserWarning)  # convergence is recorded in the history
            estimator.fit(data.tensor)
    seconds = time.perf_counter() - started
    models = {name: estimator}
    baseline = config["evaluation"]["baseline"]
    if with_baseline and baseline is not None and baseline != name:
        base_spec = config.models[baseline]
        if base_spec["method"] in FACTOR_METHODS:
            if fitted_baseline is None:
                fitted_baseline = make_estimator(base_spec)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", category=UserWarning)
                    fitted_baseline.fit(data.tensor)
            models[baseline] = fitted_baseline
        else:
            models[baseline] = make_estimator(base_spec)
    options = evaluation_options(config, baseline=baseline if baseline in models and len(models) > 1 else None)
    evaluation = evaluate_stage(data.stage, models, data.contexts, options, catalog=dataset.items,
                                build_options=data.build_options, true_relevance=dataset.true_relevance,
                                policies=config.policies() if with_policies else None)
    from threefold.tracking.runlog import peak_memory_mb

    return FitOutcome(name=name, estimator=estimator, evaluation=evaluation, seconds=seconds,
                      peak_memory_mb=peak_memory_mb())


def check_config_policies(config: ExperimentConfig, dataset: Dataset) -> None:
    """The ``[policies]`` rules against the catalog, before any model is fitted (a config error otherwise found late).

    Raises
    ------
    PolicyError
        A rule naming a catalog column or level the items file does not have.
    """
    from threefold.ranking.policy_spec import check_policies_against_catalog

    policies = config.policies()
    if policies is not None:
        build = config["build"]
        levels = {"daypart": tuple(build["daypart_labels"])} if "daypart" in build["contexts"] else None
        check_policies_against_catalog(policies, dataset.items, config["data"]["items"] or "the catalog (no items file)",
                                       levels)


def key_metric_names(config: ExperimentConfig) -> list[str]:
    """The metrics a summary shows: each of ``[evaluation] metrics`` at the largest K."""
    k = max(config["evaluation"]["ks"])
    return [f"{m}_at_{k}" for m in config["evaluation"]["metrics"]]


def serving_metadata(config: ExperimentConfig) -> dict:
    """What a served model needs to derive its context levels from request columns."""
    build = config["build"]
    return {"contexts": list(build["contexts"]), "timezone": config["data"]["timezone"],
            "daypart_starts": list(build["daypart_starts"]), "daypart_labels": list(build["daypart_labels"])}


def model_params(config: ExperimentConfig, name: str) -> dict:
    """Params of a model's child run: the config without ``[models]``, plus ``model.*``."""
    flat = config.flat(exclude=("sweep", "models"))
    flat.update({"model.name": name, **{f"model.{k}": v for k, v in config.models[name].items()}})
    return flat


# ---------------------------------------------------------------------- logging
@dataclass
class ModelRun:
    """One logged model: its child run, metrics and model URI (None for baselines)."""

    name: str
    run_id: str
    metrics: dict
    model_uri: str | None
    seconds: float
    comparisons: pd.DataFrame | None = None  # paired with the config's baseline (model, metric, k, mean_difference, ...)


@dataclass
class TrainReport:
    """What :func:`train` logged."""

    parent_run_id: str
    runs: list
    table: pd.DataFrame
    key_metrics: list
    reaped: list
    finals: list = None  # with final=True: one ModelRun per factor model refitted on every event


def log_pyfunc_model(store, result, config: ExperimentConfig, dataset: Dataset, data: StageData, name: str) -> str:
    """Log ``result`` as a pyfunc model of the active run, with the live interval of every item; returns its URI."""
    from threefold.tracking.pyfunc import log_pyfunc
    from threefold.evaluation.queries import catalog_times

    from threefold.pipeline.prepare import options_to_json

    published, expires = catalog_times(result.vocabularies[1], dataset.items, data.stage.train)
    serving = {**serving_metadata(config), "build": options_to_json(data.build_options),
               "trained_until": int(data.stage.start)}
    return log_pyfunc(store, result, serving, published=published, expires=expires,
                      parameters=config.models[name], training_fingerprint=dataset.fingerprint)


def log_outcome(store, run_id: str, outcome: FitOutcome, config: ExperimentConfig) -> dict:
    """Log a fitted model's metrics, tables and plots to its run; returns the overall metrics."""
    from threefold.tracking.runlog import context_levels_figure, log_metrics, loss_curve_figure, overall_metrics

    table = outcome.evaluation.table
    metrics = overall_metrics(table, outcome.name)
    ruled = overall_metrics(table, outcome.name + POLICY_SUFFIX)  # the same lists after [policies]
    metrics.update({f"{POLICY_PREFIX}{key}": value for key, value in ruled.items()})
    extra = {"wall_seconds": outcome.seconds, "peak_memory_mb": outcome.peak_memory_mb}
    if outcome.history:
        extra.update(n_sweeps=len(outcome.history) - 1, final_loss=outcome.history[-1].loss,
                     final_fit=outcome.history[-1].fit)
    log_metrics(store, run_id, {**metrics, **extra})
    client = store.client
    own = table["model"].isin([outcome.name, outcome.name + POLICY_SUFFIX])
    store.call(client.log_text, run_id, table[own].to_csv(index=False), "evaluation/metrics.csv")
    if not outcome.evaluation.comparisons.empty:
        store.call(client.log_text, run_id, outcome.evaluation.comparisons.to_csv(index=False),
                   "evaluation/comparisons.csv")
    store.call(client.log_dict, run_id, _jsonable(outcome.evaluation.report), "evaluation/report.json")
    figures = []
    if outcome.history:
        figures.append((loss_curve_figure(outcome.history, outcome.name), "plots/loss_curve.png"))
    k = max(config["evaluation"]["ks"])
    fig = context_levels_figure(table, config["evaluation"]["metrics"][-1], k, list(dict.fromkeys(table["model"])),
                                [c for c in outcome.evaluation.table["breakdown"].unique()
                                 if c in {s for s in config["build"]["contexts"]}])
    if fig is not None:
        figures.append((fig, "plots/metrics_by_context_level.png"))
    import matplotlib.pyplot as plt

    for figure, path in figures:
        store.call(client.log_figure, run_id, figure, path)
        plt.close(figure)
    return {**metrics, **extra}


def _jsonable(value):
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    return value if isinstance(value, (str, int, float, bool, type(None))) else str(value)


def _log_context_gain(store, run_id: str, config: ExperimentConfig, data, dataset, result, name: str, echo) -> None:
    """The context-gain report of a chosen model, as text, JSON and a figure of its run."""
    import tempfile

    from threefold.pipeline.context_report import gain_report

    select = config["select"]
    report = gain_report(config, data, dataset, result, name, metric=select["metric"], k=select["k"])
    echo(report.to_text().replace("\n", "\n  "))
    store.call(store.client.log_text, run_id, report.to_text(), "context_gain/report.txt")
    store.call(store.client.log_dict, run_id, report.to_dict(), "context_gain/report.json")
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "context_gain.png"
        report.figure(path)
        store.call(store.client.log_artifact, run_id, str(path), "context_gain")


def _default_sweeps(method: str) -> int | None:
    """The ``max_sweeps`` default of a model method (None for models fitted without sweeps)."""
    table = param_table(method)
    return table["max_sweeps"].default if "max_sweeps" in table else None


def train(config: ExperimentConfig, store, *, echo: Callable[[str], None] = print,
          truth: TruthSource | None = None, final: bool = False) -> TrainReport:
    """Fit, evaluate and log every model of ``config``; see the module docstring.

    Parameters
    ----------
    config : ExperimentConfig
    store : threefold.tracking.store.RunStore
    echo : callable, default=print
        Receives progress lines.
    final : bool, default=False
        After the evaluation, refit every factor model (with the structure
        selection chose) on every event of the log and log it as the deployable
        model: a child run ``NAME final`` tagged ``threefold.kind = final`` and
        ``threefold.evaluated_run`` (the run whose figures describe it), its
        training cutoff the end of the log, so ``threefold refresh`` folds in
        whatever comes next.

    Returns
    -------
    TrainReport
    """
    from threefold.tracking.runlog import SweepLogger, environment_tags, log_metrics, log_params
    from threefold.tracking.store import cleanup_line

    reaped = store.reap_stale_runs()
    for run_id, reason in reaped:
        echo(cleanup_line(run_id, reason))
    config, seeds = with_seeds(config, lambda: secrets.randbelow(2**31))
    for name, seed in seeds.items():
        echo(f"models.{name}: no random_state given; drew {seed} (logged with the run; set "
             f"random_state = {seed} in [models.{name}] to reproduce it)")
    dataset = load_dataset(config, truth)
    for message in dataset.warnings:
        echo(f"warning: {message}")
    check_config_policies(config, dataset)
    stage_name = config["evaluation"]["stage"]
    experiment_id = store.experiment_id(config["experiment"]["name"])
    keys = key_metric_names(config)
    tags = {**config["experiment"]["tags"], **environment_tags(), "threefold.data_sha256": dataset.fingerprint["sha256"],
            "threefold.config_sha256": config.fingerprint(), "threefold.key_metrics": ",".join(keys),
            "threefold.stage": stage_name}
    runs, tables, estimators = [], [], {}
    with store.run(experiment_id, run_name=f"train {Path(config.source).stem}",
                   tags={**tags, "threefold.kind": "train"}) as parent_id:
        log_params(store, parent_id, config.flat())
        store.call(store.client.log_text, parent_id, config.to_toml(), "config.toml")
        store.call(store.client.log_dict, parent_id, dataset.fingerprint, "dataset.json")
        auto = auto_models(config)
        if auto:  # structure = "auto": chosen on the validation window, logged as child runs
            config, _ = select_and_log(config, store, dataset=dataset, echo=echo, parent_id=parent_id)
        data = prepare_stage(config, dataset, stage_name)
        store.call(store.client.log_dict, parent_id, data.build_report.to_dict(), "build_report.json")
        log_metrics(store, parent_id, {"tensor_cells": data.tensor.nnz, "events_rows": len(dataset.events)})
        echo(f"{stage_name} stage: {len(data.stage.train):,} training events, {len(data.stage.evaluate):,} evaluated; "
             f"tensor {data.tensor}")
        for name in config.models:
            with store.run(experiment_id, run_name=name, nested=True,
                           tags={**tags, "threefold.kind": "model", "threefold.model": name}) as run_id:
                log_params(store, run_id, model_params(config, name))
                logger = SweepLogger(store, run_id)
                sweeps = config.models[name].get("max_sweeps", _default_sweeps(config.models[name]["method"]))
                with progress(sweeps, f"fit {name}", "sweeps") as bar:
                    def on_sweep(record, model=None, logger=logger, bar=bar):
                        logger(record, model)
                        bar.update(1)

                    outcome = fit_and_evaluate(config, data, dataset, name, callback=on_sweep,
                                               fitted_baseline=estimators.get(config["evaluation"]["baseline"]))
                estimators[name] = outcome.estimator
                logger.log_history(outcome.history)
                metrics = log_outcome(store, run_id, outcome, config)
                result = getattr(outcome.estimator, "result_", None)
                uri = log_pyfunc_model(store, result, config, dataset, data, name) if isinstance(result, Scorer) else None
                if uri is not None:
                    store.call(store.client.set_tag, run_id, "threefold.model_uri", uri)
                if name in auto and any(result.owned_columns(m).any() for m in range(2, len(data.tensor.mode_names))):
                    _log_context_gain(store, run_id, config, data, dataset, result, name, echo)
            runs.append(ModelRun(name=name, run_id=run_id, metrics=metrics, model_uri=uri, seconds=outcome.seconds,
                                 comparisons=outcome.evaluation.comparisons))
            table = outcome.evaluation.table
            tables.append(table[table["model"] == name])
            echo(f"  {name}: " + "  ".join(_interval_text(metrics, m) for m in keys) + f"  ({outcome.seconds:.1f} s)")
        combined = pd.concat(tables, ignore_index=True)
        store.call(store.client.log_text, parent_id, combined.to_csv(index=False), "evaluation/metrics.csv")
        finals = _fit_final(config, store, dataset, data, runs, experiment_id, tags, echo) if final else None
    return TrainReport(parent_run_id=parent_id, runs=runs, table=combined, key_metrics=keys, reaped=reaped,
                       finals=finals)


def _fit_final(config, store, dataset, data, runs, experiment_id, tags, echo) -> list:
    """Refit the factor models on every event and log them as deployable child runs (see :func:`train`)."""
    from threefold.data.build import build_tensor
    from threefold.evaluation.queries import catalog_times
    from threefold.pipeline.prepare import options_to_json
    from threefold.pipeline.stages import build_options
    from threefold.tracking.pyfunc import log_pyfunc
    from threefold.tracking.runlog import log_metrics, log_params

    events = dataset.events
    options = build_options(config, events)
    tensor, _ = build_tensor(events, data.contexts, **options)
    end = int(events["timestamp"].max()) + 1
    echo(f"final fit on every event ({len(events):,} rows, up to the end of the log): tensor {tensor}")
    serving = {**serving_metadata(config), "build": options_to_json(options), "trained_until": end}
    finals = []
    for run in runs:
        if run.model_uri is None:
            continue
        spec = config.models[run.name]
        with store.run(experiment_id, run_name=f"{run.name} final", nested=True,
                       tags={**tags, "threefold.kind": "final", "threefold.model": run.name,
                             "threefold.evaluated_run": run.run_id}) as run_id:
            log_params(store, run_id, model_params(config, run.name))
            started = time.perf_counter()
            sweeps = spec.get("max_sweeps", _default_sweeps(spec["method"]))
            with progress(sweeps, f"final fit {run.name}", "sweeps") as bar:
                estimator = make_estimator(spec, lambda record, model=None: bar.update(1))
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", category=UserWarning)
                    estimator.fit(tensor)
            seconds = time.perf_counter() - started
            result = estimator.result_
            published, expires = catalog_times(result.vocabularies[1], dataset.items, events)
            uri = log_pyfunc(store, result, serving, published=published, expires=expires, parameters=spec,
                             training_fingerprint=dataset.fingerprint)
            store.call(store.client.set_tag, run_id, "threefold.model_uri", uri)
            log_metrics(store, run_id, {"wall_seconds": seconds, "tensor_cells": tensor.nnz})
        finals.append(ModelRun(name=run.name, run_id=run_id, metrics={}, model_uri=uri, seconds=seconds))
        echo(f"  {run.name} final: {uri} ({seconds:.1f} s; evaluated as run {run.run_id})")
    return finals


def _interval_text(metrics: dict, name: str) -> str:
    if name not in metrics:
        return f"{name} -"
    low, high = metrics.get(f"{name}_low"), metrics.get(f"{name}_high")
    bounds = f" [{low:.4f}, {high:.4f}]" if low is not None and high is not None else ""
    return f"{name} {metrics[name]:.4f}{bounds}"


def summary_text(report: TrainReport) -> str:
    """The table ``threefold train`` prints: key metrics with 95% intervals and each model's URI."""
    rows = [[run.name] + [_interval_text(run.metrics, m).split(" ", 1)[1] for m in report.key_metrics]
            + [f"{run.seconds:.1f}", run.model_uri or "-"] for run in report.runs]
    lines = text_table(["model"] + report.key_metrics + ["fit s", "model URI"], rows)
    lines.append(f"parent run {report.parent_run_id}; intervals are 95% percentile bootstrap over users")
    lines += _paired_lines(report)
    lines += _policy_lines(report)
    if report.finals:
        lines.append("deployable models, refitted on every event (the figures above are their evaluated runs'):")
        lines += [f"  {run.name}: run {run.run_id}  {run.model_uri}" for run in report.finals]
    return "\n".join(lines)


def _policy_lines(report: TrainReport) -> list[str]:
    """Per model: each key metric and the set measures with and without [policies], paired per user."""
    out = []
    k = max((int(key.rpartition("_at_")[2]) for key in report.key_metrics if key.rpartition("_at_")[2].isdigit()),
            default=10)
    sets = ("alpha_ndcg", "alpha_ndcg_true", "expected_clicks", "expected_clicks_true")
    keys = list(dict.fromkeys(report.key_metrics + [f"{m}_at_{k}" for m in sets]))
    for run in report.runs:
        c = run.comparisons
        if c is None or c.empty:
            continue
        mine = c[(c["model"] == run.name + POLICY_SUFFIX) & (c["baseline"] == run.name)]
        for key in keys:
            metric, _, at = key.rpartition("_at_")
            row = mine[(mine["metric"] == metric) & (mine["k"] == int(at))]
            if row.empty or key not in run.metrics:
                continue
            r = row.iloc[0]
            out.append(f"  {run.name}: {key} {run.metrics[key]:.4f} -> {run.metrics.get(POLICY_PREFIX + key, float('nan')):.4f}"
                       f"  {r['mean_difference']:+.4f} [{r['low']:+.4f}, {r['high']:+.4f}], p = {r['p_value']:.2g}")
    if out:
        out.insert(0, "with the list policies of [policies] (paired per user with the same model without them):")
    return out + _rule_lines(report, k)


def _rule_lines(report: TrainReport, k: int) -> list[str]:
    """With ``[evaluation] policy_ablation``: per model and rule, what the rule alone changes (paired per user)."""
    out = []
    wanted = [key.rpartition("_at_")[0] for key in report.key_metrics[-1:]] + ["alpha_ndcg_true", "alpha_ndcg"]
    for run in report.runs:
        c = run.comparisons
        if c is None or c.empty:
            continue
        prefix = f"{run.name} + only "
        alone = c[c["model"].str.startswith(prefix) & (c["baseline"] == run.name) & (c["k"] == k)]
        metrics = [m for m in dict.fromkeys(wanted) if m in set(alone["metric"])][:2]
        for model in dict.fromkeys(alone["model"]):
            parts = []
            for metric in metrics:
                r = alone[(alone["model"] == model) & (alone["metric"] == metric)].iloc[0]
                parts.append(f"{metric}_at_{k} {r['mean_difference']:+.4f} [{r['low']:+.4f}, {r['high']:+.4f}]")
            out.append(f"  {run.name}, {model[len(prefix):]} alone: " + "; ".join(parts))
    if out:
        out.insert(0, "each rule alone (paired per user with the model without rules):")
    return out


def _paired_lines(report: TrainReport) -> list[str]:
    """One line per model and key metric: the paired difference with the baseline, its interval and p-value."""
    out = []
    values = {run.name: run.metrics for run in report.runs}
    for run in report.runs:
        c = run.comparisons
        if c is None or c.empty:
            continue
        for key in report.key_metrics:
            metric, _, k = key.rpartition("_at_")
            row = c[(c["model"] == run.name) & (c["metric"] == metric) & (c["k"] == int(k))] if k.isdigit() else c[:0]
            if row.empty:
                continue
            r = row.iloc[0]
            base = values.get(r["baseline"], {}).get(key, float("nan"))
            ratio = run.metrics.get(key, float("nan")) / base - 1.0 if base > 0 else float("nan")
            relative = f" ({100 * ratio:+.1f}% of the means)" if ratio == ratio else ""
            out.append(f"  {run.name} - {r['baseline']}: {key} {r['mean_difference']:+.4f} "
                       f"[{r['low']:+.4f}, {r['high']:+.4f}]{relative}, paired per user, p = {r['p_value']:.2g}")
    if out:
        out.insert(0, "paired with the baseline (Wilcoxon signed-rank p):")
    return out
