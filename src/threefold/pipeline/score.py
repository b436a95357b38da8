"""The batch scoring job: ranked lists with reasons for a file of requests, in this process or on Dask.

:func:`score_requests` is what ``threefold score`` runs: it finds the model
(a folder, a run id, an MLflow model URI), prepares the job folder
(:func:`threefold.ranking.batch.prepare_job`: arguments, staged inputs), computes
the missing parts here or on Dask workers, and writes the manifest last. Every
part is computed by :func:`threefold.ranking.batch.score_part`, whoever runs
it, so a local run and a Dask run write the same bytes.

Dask: ``workers=N`` starts a local cluster of ``N`` single-threaded worker
processes; ``scheduler="tcp://host:8786"`` uses a running cluster, whose
workers must see the output folder and the model folder at the same paths (a
shared file system). An unreachable scheduler is one clear
:class:`SchedulerUnreachable` error.
"""

from __future__ import annotations

import os
import shutil
from contextlib import nullcontext
from pathlib import Path

import pandas as pd

from threefold.core.checks import check_int
from threefold.core.progress import progress
from threefold.ranking.batch import (
    DEFAULT_CHUNK_ROWS, MODEL_COPY, finish_job, job_parts, local_model_folder, prepare_job, read_output, score_part,
)
from threefold.ranking.recommender import DEFAULT_K

from threefold.pipeline.cluster import SchedulerUnreachable, dask_client

__all__ = ["score_requests", "SchedulerUnreachable"]


def _model_folder(model, out: Path, store) -> Path:
    path = Path(model)
    if path.is_dir():  # a local folder: no MLflow import (about a second), unless it is a downloaded MLflow model
        if (path / "MLmodel").is_file():
            from threefold.tracking.pyfunc import check_entry_code

            check_entry_code(path)  # the code MLflow would run on load is this threefold's
        return local_model_folder(path)
    from threefold.tracking.pyfunc import model_folder
    from threefold.tracking.store import open_store

    opened = store if hasattr(store, "client") else open_store(store)
    out.mkdir(parents=True, exist_ok=True)
    return model_folder(model, store=opened, download_to=out / MODEL_COPY)


def score_requests(model, requests, *, out: str | os.PathLike, candidates=None, k: int = DEFAULT_K,
                   explain: str = "none", format: str = "parquet", chunk_rows: int = DEFAULT_CHUNK_ROWS,
                   workers: int | None = None, scheduler: str | None = None, store=None,
                   load: bool = True, show_progress: bool = True, explore=None,
                   explore_slots: int = 1, policies=None, items=None, history=None) -> pd.DataFrame | dict:
    """Rank the items of every request with a saved model; write the parts and the manifest to ``out``.

    Parameters
    ----------
    model : str or path
        A model folder, a run id, or an MLflow model URI (``runs:/<id>/model``,
        ``models:/<name>/<version>``); see :func:`threefold.tracking.pyfunc.model_folder`.
    requests : path or DataFrame
        One row per request (``request_id``, ``user_id``, optional ``timestamp``,
        ``k``, context columns); CSV or Parquet.
    out : path
        The job folder (new, empty, or this same job to resume it).
    candidates : path or DataFrame or None
        Long table ``request_id``, ``item_id``; default: the catalog live at each request's time.
    k : int, default=10
    explain : {"none", "top3", "all"}, default="none"
    format : {"parquet", "csv"}, default="parquet"
    chunk_rows : int, default=50,000
        Requests per part.
    workers : int or None
        Run the parts on a local Dask cluster of this many worker processes.
    scheduler : str or None
        Run the parts on the Dask cluster of this scheduler address.
    store : path, RunStore or None
        The run store for run ids and URIs (default ``./threefold-runs``).
    load : bool, default=True
        Return the output as a DataFrame; False returns the manifest (for outputs too large to hold).
    show_progress : bool, default=True
    explore : None, "off", "thompson" or float BETA, default None
        Exploration of the items a refreshed model barely knows: an upper-confidence
        bonus BETA·sqrt(qᵀΣq) (LinUCB) or a posterior sample (Thompson); off by default.
        The output gains an ``explored`` column (see docs/scoring.md).
    explore_slots : int, default=1
        Most items per list that exploration may bring in.
    policies : path, mapping or None
        List policies (a TOML file; docs/policies.md): guardrails, repetition,
        diversity and pins, applied before the cut to K. The output gains ``pinned``
        and the manifest a ``policies`` table of what each rule did.
    items : path, DataFrame or None
        The items catalog whose columns the rules name.
    history : path or None
        Impression and click log for the repetition rules.

    Returns
    -------
    DataFrame (columns of :meth:`threefold.ranking.recommender.Recommender.output_columns`) or dict (the manifest)

    Raises
    ------
    JobMismatch, InputRowsError, SchedulerUnreachable, ValueError
    """
    if workers is not None and scheduler is not None:
        raise ValueError("Give workers= (a local Dask cluster) or scheduler= (a running one), not both.")
    if workers is not None:
        workers = check_int("workers", workers, low=1, owner="score")
    out = Path(out)
    folder = _model_folder(model, out, store)
    on_dask = workers is not None or scheduler is not None
    with dask_client(workers, scheduler, owner="score") if on_dask else nullcontext() as client:
        with progress(None, "stage", "requests", enabled=show_progress) as bar:
            todo = prepare_job(out, folder, requests, candidates=candidates, k=k, explain=explain, format=format,
                               chunk_rows=chunk_rows, report=bar.update, explore=explore,
                               explore_slots=explore_slots, policies=policies, items=items, history=history)
        if todo:
            counts = job_parts(out)
            with progress(sum(counts), "score", "requests", enabled=show_progress) as bar:
                bar.update(sum(counts) - sum(counts[i] for i in todo))
                if client is None:
                    for index in todo:
                        bar.update(score_part(out, index))
                else:
                    _run_on_dask(client, out, todo, bar)
    manifest = finish_job(out)
    shutil.rmtree(out / MODEL_COPY, ignore_errors=True)
    return read_output(out) if load else manifest


def _run_on_dask(client, out: Path, todo: list[int], bar) -> None:
    """Submit the missing parts to the cluster; count requests as parts finish."""
    from distributed import as_completed

    futures = [client.submit(score_part, str(out.resolve()), index, key=f"threefold-score-part-{index}", pure=False)
               for index in todo]
    for future in as_completed(futures):
        bar.update(future.result())
