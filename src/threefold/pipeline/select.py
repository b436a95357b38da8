"""Choosing a CP structure on the validation window: ``structure = "auto"`` and ``threefold select``.

A context model is worth its extra terms only if it ranks better than
context-free MF on data it has not seen. :func:`select_structure` fits a
documented family of structures on the selection stage's training tensor,
evaluates them all on the validation window against the family's MF (the same
queries, a paired comparison per user), and keeps MF unless a context
structure wins with stated confidence: the 95% paired bootstrap interval of
the difference lies above zero and the Wilcoxon signed-rank p-value,
Holm-adjusted for the number of candidates (Holm 1979), is below 0.05. The
winner is a structure string like any other: ``train`` fits it as the model.

The family, for context modes ``c_1 .. c_n``, MF rank ``R`` (the model's
``rank``) and each context rank ``r`` of ``[select] context_ranks``::

    mf                     user*item:R
    mf+<c>:r               user*item:R + user*item*<c>:r                 one per context mode
    mf+all:r               user*item:R + user*item*c_1*...*c_n:r         every context mode at once
    mf+item×ctx:r          user*item:R + item*c_1:r + ... + item*c_n:r    item-by-context terms
    mf+item×ctx+pairs:r    the above + item*c_i*c_j:r for every pair      item-by-context-pair terms
    <user>&<item>          second round: the context terms of the best user-level candidate
                           (mf+<c>, mf+all) and of the best item-level one, together
    split+<best>:r         the winner with user*item:(R - r) (same total rank)

Candidates are compared on ``[select] candidates`` (default ``"shown"``: each
validation request ranks the list it was shown, so a model is not rewarded for
guessing what the logging policy showed; ``"eligible"`` ranks every live item).

Every candidate shares the model's other parameters (``reg``, ``max_sweeps``,
``random_state``...). Selecting on ``ndcg_true`` is refused: true relevance
exists only on simulated sites, and choosing by it would not be possible on a
real one.
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd

from threefold.core.progress import progress
from threefold.pipeline.config import AUTO, ExperimentConfig

__all__ = ["candidate_structures", "select_structure", "Selection", "auto_models"]


def candidate_structures(contexts: list[str], rank: int, context_ranks) -> dict[str, str]:
    """Name -> structure of the first round of the family; see the module docstring."""
    family = {"mf": f"user*item:{rank}"}
    mf = f"user*item:{rank}"
    pairs = [(a, b) for i, a in enumerate(contexts) for b in contexts[i + 1:]]
    for r in context_ranks:
        for c in contexts:
            family[f"mf+{c}:{r}"] = f"{mf} + user*item*{c}:{r}"
        if len(contexts) > 1:
            family[f"mf+all:{r}"] = f"{mf} + user*item*{'*'.join(contexts)}:{r}"
        if contexts:
            family[f"mf+item×ctx:{r}"] = f"{mf} + " + " + ".join(f"item*{c}:{r}" for c in contexts)
        if pairs:
            family[f"mf+item×ctx+pairs:{r}"] = (f"{mf} + " + " + ".join(f"item*{c}:{r}" for c in contexts) + " + "
                                                + " + ".join(f"item*{a}*{b}:{r}" for a, b in pairs))
    return family


def _combined(family: dict, table: pd.DataFrame) -> dict:
    """Second round: the context terms of the best user-level and the best item-level candidate together."""
    ranked = table[table["candidate"] != "mf"].sort_values("value", ascending=False)["candidate"].tolist()
    user_level = next((n for n in ranked if not n.startswith("mf+item")), None)
    item_level = next((n for n in ranked if n.startswith("mf+item")), None)
    if user_level is None or item_level is None:
        return {}
    head = family["mf"]
    terms = family[user_level].removeprefix(head) + family[item_level].removeprefix(head)
    return {f"{user_level}&{item_level.removeprefix('mf+')}": head + terms}


def _split(structure: str, rank: int, r: int) -> str | None:
    """The same structure with the MF term at ``rank - r`` (None when nothing would be left)."""
    if rank - r < 1:
        return None
    head = f"user*item:{rank}"
    return structure.replace(head, f"user*item:{rank - r}", 1) if structure.startswith(head) else None


def auto_models(config: ExperimentConfig) -> list[str]:
    """The CP models of a config whose ``structure`` is ``"auto"``."""
    return [n for n, s in config.models.items() if s["method"] == "cp" and s.get("structure") == AUTO]


@dataclass
class Selection:
    """The outcome of :func:`select_structure`.

    Attributes
    ----------
    model : str
        The config's model name.
    chosen : str
        Candidate name of the winner (``"mf"`` when no context structure wins).
    structure : str
        The winner's structure string.
    table : DataFrame
        One row per candidate: ``candidate, structure, value, mean_difference,
        low, high, p_value, p_holm, wins`` (difference and interval against ``mf``;
        see :func:`judged`).
    metric : str
        E.g. ``"ndcg@10"`` on the validation window.
    evaluation : EvaluationResult
        The first round's evaluation (every first-round candidate; later rounds are
        evaluated with ``mf`` only, since each comparison is paired with ``mf``).
    """

    model: str
    chosen: str
    structure: str
    table: pd.DataFrame
    metric: str
    evaluation: object = field(repr=False, default=None)

    def to_text(self) -> str:
        from threefold.core.text import frame_table

        lines = [f"structure selection for [models.{self.model}] on the validation window ({self.metric}, "
                 f"paired with mf, 95% bootstrap intervals):",
                 *frame_table(self.table, last=("structure",)),
                 f"chosen: {self.chosen}  ({self.structure})"]
        if self.chosen == "mf":
            lines.append("no context structure beat mf with 95% confidence (interval above zero and Holm-adjusted "
                         "p < 0.05): context-free MF is kept.")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        return {"model": self.model, "chosen": self.chosen, "structure": self.structure, "metric": self.metric,
                "candidates": json.loads(self.table.to_json(orient="records"))}


def select_structure(config: ExperimentConfig, dataset, model: str, *, data=None,
                     echo: Callable[[str], None] = print, show_progress: bool = True, client=None) -> Selection:
    """Choose the structure of the ``"auto"`` CP model ``model`` on the validation window.

    Parameters
    ----------
    config : ExperimentConfig
    dataset : threefold.pipeline.experiment.Dataset
    model : str
        A ``[models.NAME]`` with ``method = "cp"`` and ``structure = "auto"``.
    data : StageData or None
        The validation stage (prepared here when None).
    client : dask.distributed.Client or None
        Fit the candidates on its workers (:func:`threefold.pipeline.cluster.dask_client`);
        ranking the validation window stays in this process.

    Returns
    -------
    Selection
    """
    from threefold.evaluation.harness import evaluate_stage
    from threefold.pipeline.config import evaluation_options
    from threefold.pipeline.stages import prepare_stage

    select = config["select"]
    if select["metric"] == "ndcg_true":
        raise ValueError(f"{config.source}: [select] metric = \"ndcg_true\" is refused: true relevance exists only on "
                         "simulated sites; select on an observed metric (ndcg, recall, ...).")
    spec = config.models[model]
    if spec["method"] != "cp" or spec.get("structure") != AUTO:
        raise ValueError(f"[models.{model}] is not a CP model with structure = \"auto\".")
    data = data if data is not None else prepare_stage(config, dataset, "validation")
    contexts = list(data.tensor.mode_names[2:])
    family: dict[str, str] = {}
    fitted: dict = {}
    tables: list[pd.DataFrame] = []

    def add(candidates: dict):
        """Fit new candidates, rank them with mf on the validation window, append their rows."""
        new = _fit_all(candidates, spec, data.tensor, show_progress, mf=fitted.get("mf"), client=client)
        models = {**({"mf": fitted["mf"]} if "mf" in fitted else {}), **new}  # paired with mf: others not needed
        evaluation = _evaluate(models, config, data, dataset, evaluate_stage, evaluation_options)
        fitted.update(new)
        family.update(candidates)
        tables.append(_table(candidates, evaluation, select))
        return evaluation

    first = add(candidate_structures(contexts, int(spec["rank"]), select["context_ranks"]))
    combined = _combined(family, pd.concat(tables, ignore_index=True))
    if combined:
        add(combined)
    best = _winner(pd.concat(tables, ignore_index=True))
    if best != "mf":  # the rank split of the winner, same total rank as mf
        splits = {f"split+{best}:{r}": s for r in select["context_ranks"]
                  if (s := _split(family[best], int(spec["rank"]), r)) is not None and s not in family.values()}
        if splits:
            add(splits)
            best = _winner(pd.concat(tables, ignore_index=True))
    table = judged(pd.concat(tables, ignore_index=True))
    selection = Selection(model=model, chosen=best, structure=family[best], table=table,
                          metric=f"{select['metric']}@{select['k']}", evaluation=first)
    echo(selection.to_text())
    return selection


def warm_start(mf_result, structure: str, tensor, rank: int, random_state) -> list[np.ndarray] | None:
    """Initial factors of a candidate: the fitted MF term, small random context columns.

    Every candidate of the family starts with ``user*item:R'`` (``R' <= R``, the
    MF rank), so its first ``R'`` user and item columns start at MF's fitted
    columns of largest weight; the other columns start uniform on [0, 0.1) (one
    tenth of the ``"random"`` start, so the MF scores are barely disturbed before
    the first sweep). With ``tol`` the candidate may stop earlier; with the
    defaults (10 sweeps, none converging to ``tol``) the warm start changed
    neither the fit time nor the choice measurably (docs/models.md, section 9).
    Returns None when the structure does not begin with a user-item term of at
    most MF's rank (the candidate then starts as configured).

    Parameters
    ----------
    mf_result : CPResult
        The family's fitted MF (structure ``user*item:R``).
    structure : str
    tensor : SparseTensor
        The selection stage's training tensor (only its ``shape`` is read).
    rank : int
        Rank of terms written without ``:rank``.
    random_state : int, Generator or None
        The candidate's ``random_state``.

    Returns
    -------
    list of ndarray of shape (I_n, R_candidate), float64, or None
    """
    from threefold.models.cp.structure import Structure

    parsed = Structure.parse(structure, rank)
    head = parsed.terms[0]
    if set(head.modes) != {"user", "item"} or head.rank > mf_result.weights.shape[0]:
        return None
    rng = np.random.default_rng(random_state)
    mf = mf_result.unnormalized_factors()
    factors = [0.1 * rng.random((size, parsed.rank)) for size in tensor.shape]
    for n in (0, 1):
        factors[n][: mf[n].shape[0], : head.rank] = mf[n][:, : head.rank]
    return factors


def fit_candidate(params: dict, tensor):
    """Fit one candidate (a ``[models.NAME]`` table with its structure and start); runs here or on a Dask worker."""
    from threefold.pipeline.stages import make_estimator

    estimator = make_estimator(params)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=UserWarning)  # convergence is in the history
        estimator.fit(tensor)
    return estimator


def _fit_all(family: dict, spec: dict, tensor, show_progress: bool, mf=None, client=None) -> dict:
    """Fit every candidate; the others are warm-started from the family's fitted MF (``mf``, or fitted first).

    With a Dask ``client`` the candidates after MF run on its workers (the tensor
    is sent to each worker once); the fits are the same as here.
    """
    fitted = {}
    with progress(len(family), "select", "candidates", enabled=show_progress) as bar:
        if "mf" in family:  # first, here: the others start from it
            fitted["mf"] = fit_candidate({**spec, "structure": family["mf"]}, tensor)
            bar.update(1)
        base = fitted.get("mf", mf)
        todo = {}
        for name, structure in family.items():
            if name == "mf":
                continue
            params = {**spec, "structure": structure}
            if base is not None and spec.get("init", "random") == "random":
                init = warm_start(base.result_, structure, tensor, int(spec["rank"]), spec.get("random_state"))
                if init is not None:
                    params["init"] = init
            todo[name] = params
        if client is None:
            for name, params in todo.items():
                fitted[name] = fit_candidate(params, tensor)
                bar.update(1)
        elif todo:
            from distributed import as_completed

            shared = client.scatter(tensor, broadcast=True)
            futures = {client.submit(fit_candidate, params, shared, pure=False): name for name, params in todo.items()}
            for future in as_completed(futures):
                fitted[futures[future]] = future.result()
                bar.update(1)
    return {name: fitted[name] for name in family}


def _evaluate(fitted: dict, config, data, dataset, evaluate_stage, evaluation_options):
    """Rank the validation window with ``fitted``; only the selection's K, no context-sensitivity sample."""
    select = config["select"]
    options = evaluation_options(config, baseline="mf", stage="validation", candidates=select["candidates"],
                                 ks=(select["k"],), sensitivity_users=0)
    return evaluate_stage(data.stage, fitted, data.contexts, options, catalog=dataset.items,
                          build_options=data.build_options, true_relevance=dataset.true_relevance)


def _table(family: dict, evaluation, select: dict) -> pd.DataFrame:
    metric, k = select["metric"], select["k"]
    comparisons = evaluation.comparisons
    rows = []
    for name, structure in family.items():
        row = {"candidate": name, "structure": structure, "value": evaluation.value(name, metric, k)}
        if name != "mf":
            c = comparisons[(comparisons["model"] == name) & (comparisons["metric"] == metric) & (comparisons["k"] == k)]
            if len(c):
                c = c.iloc[0]
                row.update(mean_difference=c["mean_difference"], low=c["low"], high=c["high"], p_value=c["p_value"])
        rows.append(row)
    table = pd.DataFrame(rows)
    for column in ("mean_difference", "low", "high", "p_value"):
        if column not in table:
            table[column] = np.nan
    return table


def holm_adjusted(p_values: np.ndarray) -> np.ndarray:
    """Holm's step-down adjusted p-values (Holm, "A simple sequentially rejective multiple test procedure",
    Scand. J. Statist. 6, 1979): ``p_adj_(i) = max_{j <= i} min(1, (m - j + 1) p_(j))``; NaN stays NaN."""
    p = np.asarray(p_values, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    known = np.flatnonzero(~np.isnan(p))
    m = known.size
    if m == 0:
        return out
    order = known[np.argsort(p[known], kind="stable")]
    adjusted = np.minimum(1.0, (m - np.arange(m)) * p[order])
    out[order] = np.maximum.accumulate(adjusted)
    return out


def judged(table: pd.DataFrame, alpha: float = 0.05) -> pd.DataFrame:
    """``table`` with ``p_holm`` (over every candidate compared with mf) and ``wins``.

    A candidate wins when its 95% bootstrap interval of the paired difference
    lies above zero *and* its Wilcoxon p-value, Holm-adjusted for the number of
    candidates compared, is below ``alpha``: with a dozen candidates, one of
    them clears an unadjusted interval by chance on a site where context does
    not matter (measured: docs/models.md, section 9).
    """
    out = table.copy()
    out["p_holm"] = holm_adjusted(out["p_value"].to_numpy(dtype=np.float64))
    out["wins"] = (out["low"] > 0) & (out["p_holm"] < alpha)
    return out


def _winner(table: pd.DataFrame) -> str:
    """The candidate with the largest mean difference among the winners of :func:`judged`; else mf."""
    table = judged(table)
    winners = table[table["wins"]]
    if winners.empty:
        return "mf"
    return str(winners.sort_values(["mean_difference", "candidate"], ascending=[False, True])["candidate"].iloc[0])


def log_selection(store, experiment_id: str, parent_id: str, selection: Selection, tags: dict) -> None:
    """One child run per candidate under ``parent_id`` (its structure, validation value and paired difference)."""
    from threefold.tracking.runlog import log_metrics, log_params

    for row in selection.table.to_dict(orient="records"):
        with store.run(experiment_id, run_name=f"{selection.model}/{row['candidate']}", nested=True,
                       tags={**tags, "threefold.kind": "select-candidate", "threefold.model": selection.model,
                             "threefold.chosen": str(row["candidate"] == selection.chosen).lower()}) as run_id:
            log_params(store, run_id, {"candidate": row["candidate"], "structure": row["structure"]})
            metric = selection.metric.replace("@", "_at_")
            log_metrics(store, run_id, {metric: row["value"], f"{metric}_minus_mf": row["mean_difference"],
                                        f"{metric}_minus_mf_low": row["low"], f"{metric}_minus_mf_high": row["high"],
                                        "p_value": row["p_value"], "p_holm": row["p_holm"]})
    store.call(store.client.log_dict, parent_id, selection.to_dict(), f"selection/{selection.model}.json")
    store.call(store.client.set_tag, parent_id, f"threefold.selected.{selection.model}", selection.structure)


def select_and_log(config: ExperimentConfig, store, *, dataset=None, truth=None, models=None,
                   echo: Callable[[str], None] = print, parent_id: str | None = None,
                   client=None) -> tuple[ExperimentConfig, list]:
    """Resolve every ``"auto"`` model of ``config`` and log the candidates; return the resolved config and selections.

    With ``parent_id`` the candidates are logged under that run (``train``);
    otherwise under a new ``select`` parent run (``threefold select``).
    """
    from threefold.pipeline.stages import load_dataset, prepare_stage
    from threefold.tracking.runlog import environment_tags

    names = list(models) if models else auto_models(config)
    unknown = [n for n in names if n not in auto_models(config)]
    if unknown:
        raise ValueError(f"{config.source}: {unknown} are not CP models with structure = \"auto\"; "
                         f"those are {auto_models(config)}.")
    if not names:
        return config, []
    dataset = dataset if dataset is not None else load_dataset(config, truth)
    data = prepare_stage(config, dataset, "validation")
    experiment_id = store.experiment_id(config["experiment"]["name"])
    tags = {**config["experiment"]["tags"], **environment_tags(), "threefold.config_sha256": config.fingerprint()}
    selections = []

    def run_all(parent: str) -> None:
        for name in names:
            selection = select_structure(config, dataset, name, data=data, echo=echo, client=client)
            log_selection(store, experiment_id, parent, selection, tags)
            selections.append(selection)

    if parent_id is not None:
        run_all(parent_id)
    else:
        from pathlib import Path

        with store.run(experiment_id, run_name=f"select {Path(config.source).stem}",
                       tags={**tags, "threefold.kind": "select"}) as parent:
            store.call(store.client.log_text, parent, config.to_toml(), "config.toml")
            run_all(parent)
    resolved = config.with_overrides({f"models.{s.model}.structure": s.structure for s in selections})
    return resolved, selections
