"""The data steps every pipeline shares: load a dataset, prepare a stage's tensor, make an estimator.

:func:`load_dataset`, :func:`prepare_stage` and :func:`make_estimator` know
nothing of MLflow; ``train`` (:mod:`threefold.pipeline.experiment`), the sweep
workers (:mod:`threefold.pipeline.sweep`) and structure selection
(:mod:`threefold.pipeline.select`) call them.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import pandas as pd

from threefold.models.registry import FACTOR_METHODS, model_class
from threefold.pipeline.config import ConfigError, ExperimentConfig

__all__ = ["Dataset", "StageData", "TruthSource", "load_dataset", "prepare_stage", "build_options", "make_estimator",
           "with_seeds"]


@dataclass(eq=False)
class Dataset:
    """The loaded input: events, the items catalog and their fingerprint."""

    events: pd.DataFrame
    items: pd.DataFrame | None
    fingerprint: dict
    warnings: list = field(default_factory=list)
    true_relevance: object = None  # f(requests, item_ids) on a simulated site, else None


@dataclass(eq=False)
class StageData:
    """One stage of the split with its training tensor."""

    stage: object
    tensor: object
    build_report: object
    contexts: list
    build_options: dict


#: ``truth(events_path)``: the true relevance ``f(requests, item_ids)`` of a simulated log, or None.
TruthSource = Callable[[str], Callable | None]


def load_dataset(config: ExperimentConfig, truth: TruthSource | None = None) -> Dataset:
    """Load the events (and catalog) of ``[data]`` and fingerprint the files.

    ``truth`` gives the true relevance of a simulated log (the command line
    passes :func:`threefold.demo.simulate.site_truth`); the pipeline itself
    never imports the demo.
    """
    from threefold.data.events import load_items
    from threefold.pipeline.prepare import read_log
    from threefold.tracking.runlog import dataset_fingerprint

    data = config["data"]
    _check_files(config)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        events, _ = read_log(data["events"], errors=data["errors"], items=data["items"], timezone=data["timezone"],
                             hash_user_ids_salt=data["hash_user_ids_salt"],
                             drop_activity_outliers=data["drop_activity_outliers"],
                             allow=data["allow"])
        items = load_items(data["items"], timezone=data["timezone"]) if data["items"] else None
    _check_cutoff(config, events)
    fingerprint = dataset_fingerprint({"events": data["events"], "items": data["items"]}, events, items)
    return Dataset(events=events, items=items, fingerprint=fingerprint, warnings=[str(w.message) for w in caught],
                   true_relevance=truth(data["events"]) if truth is not None else None)


def _check_files(config: ExperimentConfig) -> None:
    """The files of ``[data]`` exist and the log has the columns ``[build] contexts`` read (before any row is read)."""
    from threefold.data._logreader import open_source
    from threefold.ranking.recommender import raw_columns

    data = config["data"]
    for key in ("events", "items"):
        if data[key] is not None and not Path(data[key]).exists():
            raise ConfigError(f"{config.source}: [data] {key} = {data[key]!r}: no such file or folder.")
    columns = open_source(data["events"]).columns
    needed = dict.fromkeys(c for spec in config.contexts() for c in raw_columns(spec))
    missing = [c for c in needed if c not in columns]
    if missing:
        raise ConfigError(f"{config.source}: [build] contexts read the column(s) {missing}, which {data['events']} "
                          f"does not have; its columns are {columns}.")


def _check_cutoff(config: ExperimentConfig, events: pd.DataFrame) -> None:
    """The ``[split] cutoff`` falls inside the log's time range (else no window has events)."""
    from threefold.data._report import iso_utc
    from threefold.data.timestamps import to_epoch_seconds

    times = events["timestamp"].to_numpy()
    cutoff = to_epoch_seconds(config["split"]["cutoff"], "cutoff")
    first, last = int(times.min()), int(times.max())
    if not first < cutoff <= last:
        raise ConfigError(f"{config.source}: [split] cutoff {iso_utc(cutoff)} is outside the log's time range "
                          f"({iso_utc(first)} to {iso_utc(last)}); the training events are those before it and the "
                          "test window starts at it, so choose a time inside the range.")


def prepare_stage(config: ExperimentConfig, dataset: Dataset, stage_name: str) -> StageData:
    """Split the events and build the training tensor of the ``"validation"`` or ``"test"`` stage."""
    from threefold.evaluation.splits import temporal_split

    split_cfg = config["split"]
    if stage_name == "validation" and split_cfg["validation_window"] is None:
        raise ValueError(f"{config.source}: selecting on the validation window needs [split] validation_window "
                         "(e.g. \"24h\"); model selection on the test window is refused.")
    split = temporal_split(dataset.events, split_cfg["cutoff"],
                           validation_window=split_cfg["validation_window"] or "24h",
                           test_window=split_cfg["test_window"])
    stage = split.selection_stage() if stage_name == "validation" else split.final_stage()
    contexts = config.contexts()
    options = build_options(config, stage.train)
    tensor, report = stage.train_tensor(contexts, **options)
    return StageData(stage=stage, tensor=tensor, build_report=report, contexts=contexts, build_options=options)


def build_options(config: ExperimentConfig, events: pd.DataFrame) -> dict:
    """The ``build_tensor`` options of ``[build]`` and ``[weighting]``, propensities estimated from ``events``."""
    from threefold.pipeline.prepare import tensor_options

    build = config["build"]
    options, _ = tensor_options(events, weighting=config.weighting(), negatives=build["negatives"],
                                dtype=build["dtype"], drop_duplicates=build["drop_duplicates"],
                                position_propensity=build["position_propensity"],
                                propensity_clip=build["propensity_clip"])
    return options


def with_seeds(config: ExperimentConfig, draw: Callable[[], int]) -> tuple[ExperimentConfig, dict[str, int]]:
    """The config with a ``random_state`` for every model that takes one and has none, and the seeds given.

    A run is reproducible by default: the seed is drawn once (``draw()``), logged
    with the run's params like any other, and printed, so that setting it in the
    config reproduces the run.
    """
    seeds = {name: int(draw()) for name, spec in config.models.items()
             if "random_state" in spec and spec["random_state"] is None}
    if not seeds:
        return config, seeds
    return config.with_overrides({f"models.{name}.random_state": seed for name, seed in seeds.items()}), seeds


def make_estimator(spec: dict, callback: Callable | None = None):
    """The estimator of a ``[models.NAME]`` table (``method`` and parameters)."""
    params = {k: (tuple(v) if isinstance(v, list) else v) for k, v in spec.items() if k != "method"}
    if spec["method"] in FACTOR_METHODS:
        params["callback"] = callback
    return model_class(spec["method"])(**params)
