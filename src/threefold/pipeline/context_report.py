"""The context-gain report of a fitted model on a stage of a config (``threefold gain``, and in ``train``).

Glue between the config's data and :func:`threefold.evaluation.context_gain.context_gain`:
the training frequency of each context level is the share of the stage's
training events at that level (derived by the build's own context code).
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from threefold.evaluation.context_gain import ContextGain, context_gain, level_frequencies
from threefold.pipeline.config import ExperimentConfig

__all__ = ["stage_frequencies", "gain_report", "fit_and_report"]


def stage_frequencies(data) -> dict[str, np.ndarray]:
    """Mode name -> training frequency of each of its levels (the tensor's vocabulary order)."""
    from threefold.data.context import spec_name

    out = {}
    events = data.stage.train
    for spec, vocabulary in zip(data.contexts, data.tensor.vocabularies[2:]):
        labels = spec.labels_for(events).to_numpy(dtype=object)
        codes = vocabulary.encode(labels, policy="drop").codes
        out[spec_name(spec)] = level_frequencies(codes, len(vocabulary))
    return out


def gain_report(config: ExperimentConfig, data, dataset, result, name: str, *, metric: str = "ndcg",
                k: int = 10) -> ContextGain:
    """Context gain of a fitted ``result`` on the stage of ``data`` (its evaluation window), for the modes it uses."""
    from threefold.evaluation.harness import evaluate_stage
    from threefold.pipeline.config import evaluation_options

    def evaluate(models, baseline):
        options = evaluation_options(config, baseline=baseline, stage=data.stage.name)
        return evaluate_stage(data.stage, models, data.contexts, options, catalog=dataset.items,
                              build_options=data.build_options, true_relevance=dataset.true_relevance)

    modes = list(result.mode_names)
    used = {mode: f for mode, f in stage_frequencies(data).items() if result.owned_columns(modes.index(mode)).any()}
    if not used:
        raise ValueError(f"{name!r} has no context terms (structure {getattr(result, 'structure', '')}): "
                         "there is no context gain to report.")
    return context_gain(evaluate, result, name, used, metric=metric, k=k)


def fit_and_report(config: ExperimentConfig, model: str, *, truth=None, stage: str | None = None,
                   echo: Callable[[str], None] = print) -> ContextGain:
    """Fit ``[models.model]`` on a stage of the config and report its context gain (``threefold gain``).

    ``structure = "auto"`` models are resolved on the validation window first.
    """
    import warnings

    from threefold.pipeline.select import auto_models, select_structure
    from threefold.pipeline.stages import load_dataset, make_estimator, prepare_stage

    if model not in config.models:
        raise ValueError(f"{config.source}: no model {model!r}; models are {sorted(config.models)}.")
    dataset = load_dataset(config, truth)
    if model in auto_models(config):
        selection = select_structure(config, dataset, model, echo=echo)
        config = config.with_overrides({f"models.{model}.structure": selection.structure})
    data = prepare_stage(config, dataset, stage or config["evaluation"]["stage"])
    if len(data.tensor.mode_names) < 3:
        raise ValueError(f"{config.source}: [build] contexts is empty: there is no context mode to report on.")
    estimator = make_estimator(config.models[model])
    if not hasattr(estimator, "fit") or config.models[model]["method"] in ("popularity", "random"):
        raise ValueError(f"[models.{model}] is a baseline without context factors; pick a CP or Tucker model.")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=UserWarning)
        estimator.fit(data.tensor)
    select = config["select"]
    return gain_report(config, data, dataset, estimator.fitted(), model, metric=select["metric"], k=select["k"])
