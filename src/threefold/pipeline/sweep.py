"""Hyperparameter sweeps on Dask: grid or random trials, selected on the validation window only.

``threefold sweep CONFIG`` reads ``[sweep]`` (which model, grid or random
search, the metric to select on) and ``[sweep.space]`` (dotted config keys and
their values or ranges)::

    [sweep]
    model = "cp"
    search = "grid"
    metric = "ndcg"
    k = 10

    [sweep.space]
    "models.cp.rank" = [8, 16]
    "weighting.alpha" = [5.0, 20.0]

Every trial is the config with its overrides, trained on the events before the
validation window and evaluated on it (a config without ``validation_window``
is refused; the test window is never opened). Trials run on Dask workers —
local worker processes by default (``workers``), or an existing scheduler — with
one numba thread per trial. Workers only compute and return results; the
submitting process alone writes to the run store, one child run per trial. A
failing trial is recorded as FAILED with its error and the others go on. A
trial is identified by the SHA-256 of its settings and of the data files, so
rerunning a sweep skips every trial already finished. The best finished trial
by the validation metric is tagged ``threefold.best_trial = "true"``.
"""

from __future__ import annotations

import hashlib
import itertools
import math
import time
import traceback
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from threefold.pipeline.config import ExperimentConfig, parse_config
from threefold.core.progress import progress
from threefold.pipeline.cluster import dask_client
from threefold.evaluation.splits import check_selection

__all__ = ["SweepReport", "trial_overrides", "trial_hash", "run_trial", "sweep"]

TAG_TRIAL_HASH, TAG_BEST = "threefold.trial_hash", "threefold.best_trial"
_CACHE: dict = {}  # per worker process: loaded data and built stages, keyed by their settings


def trial_overrides(config: ExperimentConfig) -> list[dict[str, object]]:
    """The overrides of every trial: the grid's product, or ``n_trials`` random draws.

    Grid search needs lists of values; random search draws each key from its
    list (uniformly) or range (uniform, or log-uniform with ``log = true``;
    integer bounds draw integers), seeded by ``[sweep] random_state``.
    Duplicate draws are kept once.
    """
    sweep_cfg = config["sweep"]
    space = sweep_cfg["space"]
    if not space:
        raise ValueError(f"{config.source}: [sweep.space] declares nothing to search.")
    keys = sorted(space)
    if sweep_cfg["search"] == "grid":
        ranges = [k for k in keys if isinstance(space[k], dict)]
        if ranges:
            raise ValueError(f"{config.source}: grid search needs a list of values for {ranges}; "
                             "use search = \"random\" for ranges.")
        return [dict(zip(keys, values)) for values in itertools.product(*(space[k] for k in keys))]
    if sweep_cfg["n_trials"] is None:
        raise ValueError(f"{config.source}: random search needs [sweep] n_trials.")
    rng = np.random.default_rng(sweep_cfg["random_state"])
    trials, seen = [], set()
    for _ in range(sweep_cfg["n_trials"]):
        trial = {key: _draw(space[key], rng) for key in keys}
        marker = repr(sorted(trial.items()))
        if marker not in seen:
            seen.add(marker)
            trials.append(trial)
    return trials


def _draw(leaf, rng: np.random.Generator):
    if isinstance(leaf, list):
        return leaf[int(rng.integers(len(leaf)))]
    low, high, log = leaf["low"], leaf["high"], leaf["log"]
    if isinstance(low, int) and isinstance(high, int):
        value = math.exp(rng.uniform(math.log(low), math.log(high + 1))) if log else rng.integers(low, high + 1)
        return int(min(high, math.floor(value)))
    return float(math.exp(rng.uniform(math.log(low), math.log(high))) if log else rng.uniform(low, high))


def trial_hash(config: ExperimentConfig, data_sha256: str) -> str:
    """SHA-256 of a trial's settings (:meth:`ExperimentConfig.fingerprint`) and its data files."""
    return hashlib.sha256(f"{config.fingerprint()}\n{data_sha256}".encode()).hexdigest()


# ---------------------------------------------------------------------- worker side
def _stage_data(config: ExperimentConfig, truth=None):
    """Dataset and validation stage of a config, cached per worker process; re-weighted per trial."""
    from dataclasses import replace

    from threefold.pipeline.stages import load_dataset, prepare_stage

    data_key = repr(sorted(config["data"].items()))
    if data_key not in _CACHE:
        _CACHE.clear()
        _CACHE[data_key] = load_dataset(config, truth)
    dataset = _CACHE[data_key]
    stage_key = data_key + repr(sorted(config["split"].items())) + repr(sorted(config["build"].items()))
    if stage_key not in _CACHE:
        _CACHE[stage_key] = prepare_stage(config, dataset, "validation")
    data = _CACHE[stage_key]
    weighting = config.weighting()
    tensor = data.tensor if data.tensor.weighting == weighting else data.tensor.reweighted(weighting)
    return dataset, replace(data, tensor=tensor, build_options={**data.build_options, "weighting": weighting})


def run_trial(sections: dict, source: str, model: str, truth=None) -> dict:
    """Fit and evaluate one trial on the validation stage; runs on a Dask worker.

    Returns a plain dict (never raises): ``status`` ``"finished"`` with
    ``metrics``, ``history``, ``seconds``, ``peak_memory_mb`` and the
    evaluation ``table`` as CSV text, or ``"failed"`` with ``error``.
    """
    from threefold.pipeline.experiment import fit_and_evaluate
    from threefold.tracking.runlog import overall_metrics

    try:
        config = parse_config(sections, source=source)
        if config.models[model].get("n_threads", 0) is None:
            config = config.with_overrides({f"models.{model}.n_threads": 1})  # one numba thread per worker
        dataset, data = _stage_data(config, truth)
        outcome = fit_and_evaluate(config, data, dataset, model, with_baseline=False, with_policies=False)
        table = outcome.evaluation.table
        return {"status": "finished", "stage": outcome.evaluation.stage,
                "metrics": overall_metrics(table, model), "seconds": outcome.seconds,
                "peak_memory_mb": outcome.peak_memory_mb,
                "history": [(r.sweep, r.loss, r.fit, r.seconds) for r in outcome.history],
                "table": table.to_csv(index=False)}
    except Exception as error:  # noqa: BLE001 - a failing trial is a result, not a crash of the sweep
        return {"status": "failed", "error": f"{type(error).__name__}: {error}\n{traceback.format_exc()}"}


# ---------------------------------------------------------------------- submitting side
@dataclass
class SweepReport:
    """What :func:`sweep` did."""

    parent_run_id: str
    trials: pd.DataFrame
    best_run_id: str | None
    metric: str


def _finished_trials(store, experiment_id: str, hashes: list[str]) -> dict[str, object]:
    wanted, found, token = set(hashes), {}, None
    while True:
        page = store.call(store.client.search_runs, [experiment_id],
                          "tags.`threefold.kind` = 'trial' AND attributes.status = 'FINISHED'",
                          max_results=1000, page_token=token)
        for run in page:
            key = run.data.tags.get(TAG_TRIAL_HASH)
            if key in wanted:
                found.setdefault(key, run)
        token = page.token
        if not token:
            return found


def _log_trial(store, experiment_id: str, parent_id: str, trial: dict, result: dict, metric: str) -> str:
    from threefold.pipeline.experiment import model_params
    from threefold.tracking.runlog import log_metrics, log_params

    config, model = trial["config"], trial["model"]
    run_id = store.create_run(experiment_id, run_name=f"trial {trial['index']}", parent_run_id=parent_id,
                              tags={TAG_TRIAL_HASH: trial["hash"], "threefold.kind": "trial", "threefold.stage": "validation",
                                    "threefold.model": model, "threefold.key_metrics": metric})
    log_params(store, run_id, {**model_params(config, model), **{f"trial.{k}": v for k, v in trial["overrides"].items()}})
    if result["status"] != "finished":
        store.finish(run_id, "FAILED", error=result.get("error", "unknown error"))
        return run_id
    for sweep, loss, fit, seconds in result["history"]:
        log_metrics(store, run_id, {"loss": loss, "fit": fit, "sweep_seconds": seconds}, step=int(sweep))
    log_metrics(store, run_id, {**result["metrics"], "wall_seconds": result["seconds"],
                                "peak_memory_mb": result["peak_memory_mb"]})
    store.call(store.client.log_text, run_id, result["table"], "evaluation/metrics.csv")
    store.finish(run_id)
    return run_id


def sweep(config: ExperimentConfig, store, *, workers: int = 2, scheduler: str | None = None,
          echo: Callable[[str], None] = print, truth=None) -> SweepReport:
    """Run the sweep of ``config``; see the module docstring.

    Parameters
    ----------
    config : ExperimentConfig
    store : threefold.tracking.store.RunStore
    workers : int, default=2
        Local Dask worker processes (ignored with ``scheduler``).
    scheduler : str or None
        Address of an existing Dask scheduler (``tcp://host:8786``); its
        workers need threefold installed and the data paths readable.
    echo : callable, default=print
    truth : callable or None
        ``truth(events_path)`` -> true relevance of a simulated log (see
        :data:`threefold.pipeline.experiment.TruthSource`); a module-level
        function, so that Dask workers can receive it.

    Returns
    -------
    SweepReport
    """
    from threefold.core.checks import check_int
    from threefold.pipeline.stages import load_dataset, with_seeds
    from threefold.tracking.runlog import environment_tags, log_metrics, log_params
    from threefold.tracking.store import cleanup_line

    workers = check_int("workers", workers, low=1, owner="sweep")
    sweep_cfg = config["sweep"]
    if config["split"]["validation_window"] is None:
        raise ValueError(f"{config.source}: a sweep selects on the validation window; set [split] validation_window "
                         "(e.g. \"24h\"). Selecting on the test window is refused.")
    check_selection(["validation"], select_on="validation")
    model = sweep_cfg["model"] or next(iter(config.models))
    metric = f"{sweep_cfg['metric']}_at_{sweep_cfg['k']}"
    for run_id, reason in store.reap_stale_runs():
        echo(cleanup_line(run_id, reason))
    config, seeds = with_seeds(config, lambda: sweep_cfg["random_state"] or 0)  # fixed: a rerun resumes its trials
    for name, seed in seeds.items():
        echo(f"models.{name}: no random_state given; every trial uses [sweep] random_state = {seed}")
    dataset = load_dataset(config, truth)
    data_sha = dataset.fingerprint["sha256"]
    trials = []
    for index, overrides in enumerate(trial_overrides(config)):
        trial_config = config.with_overrides(overrides)
        trials.append({"index": index, "overrides": overrides, "config": trial_config, "model": model,
                       "hash": trial_hash(trial_config, data_sha)})
    experiment_id = store.experiment_id(config["experiment"]["name"])
    done = _finished_trials(store, experiment_id, [t["hash"] for t in trials])
    todo = [t for t in trials if t["hash"] not in done]
    echo(f"sweep of {model!r}: {len(trials)} trials, {len(done)} already finished, {len(todo)} to run; "
         f"selecting on validation {metric}")
    tags = {**config["experiment"]["tags"], **environment_tags(), "threefold.kind": "sweep", "threefold.stage": "validation",
            "threefold.data_sha256": data_sha, "threefold.key_metrics": f"best_{metric}"}
    rows = []
    with store.run(experiment_id, run_name=f"sweep {Path(config.source).stem}", tags=tags) as parent_id:
        log_params(store, parent_id, {**config.flat(), **{f"sweep.{k}": v for k, v in sweep_cfg.items()}})
        store.call(store.client.log_text, parent_id, config.to_toml(), "config.toml")
        store.call(store.client.log_dict, parent_id, dataset.fingerprint, "dataset.json")
        for trial in trials:
            if trial["hash"] in done:
                run = done[trial["hash"]]
                rows.append({"trial": trial["index"], "run_id": run.info.run_id, "status": "FINISHED (earlier)",
                             metric: run.data.metrics.get(metric), **trial["overrides"]})
        if todo:
            rows += _run_trials(store, experiment_id, parent_id, todo, metric, workers, scheduler, echo, truth)
        table = pd.DataFrame(rows).sort_values("trial", kind="stable").reset_index(drop=True)
        finished = table[table["status"].str.startswith("FINISHED") & table[metric].notna()]
        best = None
        if len(finished):
            best_row = finished.loc[finished[metric].astype(float).idxmax()]
            best = str(best_row["run_id"])
            store.call(store.client.set_tag, best, TAG_BEST, "true")
            store.call(store.client.set_tag, parent_id, "threefold.best_run_id", best)
            log_metrics(store, parent_id, {f"best_{metric}": float(best_row[metric]),
                                           "trials_failed": int((table["status"] == "FAILED").sum())})
        store.call(store.client.log_text, parent_id, table.to_csv(index=False), "trials.csv")
    return SweepReport(parent_run_id=parent_id, trials=table, best_run_id=best, metric=metric)


def _run_trials(store, experiment_id, parent_id, todo, metric, workers, scheduler, echo, truth) -> list[dict]:
    from dask.distributed import as_completed

    rows = []
    with dask_client(workers if scheduler is None else None, scheduler, owner="sweep") as client:
        futures = {client.submit(run_trial, t["config"].sections, t["config"].source, t["model"], truth, pure=False): t
                   for t in todo}
        started = time.perf_counter()
        bar = progress(len(todo), "sweep", "trials")
        for future in as_completed(futures):
            bar.update(1)
            trial = futures[future]
            try:
                result = future.result()
            except Exception as error:  # noqa: BLE001 - a lost worker fails its trial, not the sweep
                result = {"status": "failed", "error": f"{type(error).__name__}: {error}"}
            run_id = _log_trial(store, experiment_id, parent_id, trial, result, metric)
            value = result.get("metrics", {}).get(metric)
            status = "FINISHED" if result["status"] == "finished" else "FAILED"
            rows.append({"trial": trial["index"], "run_id": run_id, "status": status, metric: value, **trial["overrides"]})
            shown = f"{value:.4f}" if value is not None else result.get("error", "").splitlines()[0][:120]
            echo(f"  trial {trial['index']} {status.lower()} after {time.perf_counter() - started:.0f} s: "
                 f"{trial['overrides']} -> {shown}")
        bar.close()
    return rows
