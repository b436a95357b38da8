"""``threefold refresh``: a served model with the events since its training cutoff folded in, as a new model.

:func:`refresh_model` loads a model (folder, run id or MLflow URI), reads the
events through the event reader of training (same time zone, same validation,
``errors="raise"``), keeps the events at or after the model's training cutoff
(``trained_until``, recorded by ``train``; the older ones are counted and
ignored), refreshes the factors with :func:`threefold.models.refresh.refresh_result`
— the code path the evaluation's rolling protocol runs — and writes the result
as a new model folder. With a catalog (``items``) the items without events get
rows predicted from their attributes (a ridge map fitted on the trained items
once, then saved in the model and reused by every later refresh), and the live
interval of every new item comes from the catalog (else its first event).

A model from the run store gets a child run of the model's run recording what
was folded in (rows per mode, events, cells, seconds) and the new model logged
beside it, so ``threefold score <that run>`` scores the refreshed model.

The refreshed model keeps the base fit's ``trained_until``: the next refresh
reads every event since the last *full* fit again (see the module docstring of
:mod:`threefold.models.refresh` for why that makes refreshes compose).
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["RefreshReport", "refresh_model"]


@dataclass
class RefreshReport:
    """What :func:`refresh_model` did."""

    out: Path
    counts: dict
    ignored_events: int
    window: tuple
    seconds: float
    run_id: str | None = None
    model_uri: str | None = None

    def to_text(self) -> str:
        c = self.counts
        lines = [f"refreshed model written to {self.out}",
                 f"  events since the training cutoff: {c['events']:,} ({self.ignored_events:,} older ignored)",
                 f"  items: {c['new']['item']:,} new, {c['resolved']['item']:,} re-solved, "
                 f"{c['from_metadata']:,} from metadata",
                 f"  users: {c['new']['user']:,} new, {c['resolved']['user']:,} re-solved",
                 f"  {self.seconds:.1f} s"]
        if self.run_id:
            lines.append(f"  run {self.run_id} (model {self.model_uri})")
        return "\n".join(lines)


def refresh_model(model: str | os.PathLike, events: str | os.PathLike | pd.DataFrame, out: str | os.PathLike, *,
                  items: str | os.PathLike | pd.DataFrame | None = None, update_known: bool = False,
                  metadata_prior: bool = False, metadata_alpha: float = 1.0, store=None,
                  errors: str = "raise", allow=()) -> RefreshReport:
    """Refresh a model with the events since its training cutoff; see the module docstring.

    Parameters
    ----------
    model : str or path
        A model folder, a run id (or prefix) of ``threefold train``, or an MLflow model URI.
    events : path or DataFrame
        Event log (CSV, Parquet file or folder) or normalized events
        (:func:`threefold.data.events.load_events`); may include older events.
    out : path
        The new model folder (a new version when it exists).
    items : path or DataFrame, optional
        Catalog: live times of new items, and attributes for items without events.
    update_known : bool, default=False
        Also re-solve the trained rows of users and items with new events, around their trained values.
    metadata_prior : bool, default=False
        Solve items that have a metadata row around it instead of zero.
    metadata_alpha : float, default=1.0
        Ridge penalty of the attribute map (used when the model has none yet).
    store : RunStore or None
        Needed for run ids and URIs; with a model from the store the refresh is logged as a child run.
    errors : {"raise", "drop"}, default="raise"
        A log read from a file is checked as ``threefold validate`` checks it
        (:func:`threefold.pipeline.prepare.read_log`): refused on errors, or
        the bad rows dropped and counted.
    allow : sequence of str, default=()
        Suspicious patterns to accept (codes of
        :data:`threefold.data.validate.SUSPICIOUS_CODES`), as in
        :func:`threefold.pipeline.prepare.read_log`.

    Returns
    -------
    RefreshReport
    """
    from threefold.data.events import load_items
    from threefold.evaluation.queries import catalog_times
    from threefold.models.model_io import load_model, save_model
    from threefold.models.refresh import RefreshState, refresh_result
    from threefold.pipeline.prepare import options_from_json, read_log
    from threefold.ranking.recommender import context_specs
    from threefold.tracking.pyfunc import model_folder

    started = time.perf_counter()
    folder = model_folder(model, store=store)
    result, meta, extra = load_model(folder)
    serving = meta["extra"].get("serving") or {}
    if "build" not in serving or "trained_until" not in serving:
        raise ValueError(f"The model at {folder} records no build options or training cutoff (it was saved "
                         "before refreshes existed); retrain it with `threefold train`.")
    zone = serving.get("timezone")
    frame = events if isinstance(events, pd.DataFrame) else read_log(
        events, errors=errors, timezone=zone, allow=allow)[0]
    cutoff = int(serving["trained_until"])
    recent = frame[frame["timestamp"].to_numpy(dtype=np.int64) >= cutoff]
    catalog = None if items is None else (items if isinstance(items, pd.DataFrame) else load_items(items, timezone=zone))
    metadata_map = _metadata_map(meta, extra, result, catalog, metadata_alpha)
    metadata_rows = _metadata_rows(metadata_map, catalog, recent)
    contexts = context_specs(serving)
    state = RefreshState.from_arrays(result, extra)
    n_items = len(result.vocabularies[1])
    refreshed, state, counts = refresh_result(result, recent, contexts, options_from_json(serving["build"]),
                                              state=state, update_known=update_known, metadata_rows=metadata_rows,
                                              metadata_prior=metadata_prior)
    arrays = {**{k: v for k, v in extra.items() if not k.startswith(("user_origin", "item_", "trained_rows"))},
              **state.to_arrays()}
    arrays.update(_live_times(refreshed, n_items, extra, catalog, recent, catalog_times))
    if metadata_map is not None:
        arrays.update(metadata_coef=metadata_map.coef, metadata_intercept=metadata_map.intercept)
    times = recent["timestamp"].to_numpy(dtype=np.int64)
    window = (int(times.min()), int(times.max())) if times.size else (cutoff, cutoff)
    seconds = time.perf_counter() - started
    record = {"parent": str(model), "window": list(window), "counts": counts.to_dict(), "seconds": seconds,
              "ignored_events": int(len(frame) - len(recent)), "update_known": update_known,
              "metadata_prior": metadata_prior}
    meta_extra = {k: v for k, v in meta["extra"].items() if k not in ("serving", "name")}
    meta_extra["refreshes"] = list(meta_extra.get("refreshes", [])) + [record]
    if metadata_map is not None:
        meta_extra["metadata_map"] = {"encoder": metadata_map.encoder.to_dict(), "alpha": metadata_map.alpha}
    out = Path(out)
    save_model(refreshed, out, parameters=meta.get("parameters"), training_fingerprint=meta.get("training_fingerprint"),
               extra={**meta_extra, "serving": serving, "name": meta["extra"].get("name", "model")},
               extra_arrays=arrays)
    report = RefreshReport(out=out, counts=counts.to_dict(), ignored_events=record["ignored_events"], window=window,
                           seconds=time.perf_counter() - started)
    parent_run = _parent_run(model, store)
    if parent_run is not None:
        report.run_id, report.model_uri = _log_refresh(store, parent_run, out, serving, record)
    return report


def _metadata_map(meta, extra, result, catalog, alpha):
    """The model's attribute map, or one fitted now on the trained items of the catalog (None without a catalog)."""
    from threefold.models.metadata import AttributeEncoder, MetadataMap, fit_metadata_map
    from threefold.models.refresh import TRAINED

    saved = meta["extra"].get("metadata_map")
    if saved is not None:
        return MetadataMap(encoder=AttributeEncoder.from_dict(saved["encoder"]), coef=extra["metadata_coef"],
                           intercept=extra["metadata_intercept"], alpha=float(saved["alpha"]))
    if catalog is None:
        return None
    origin = extra.get("item_origin", np.zeros(result.shape[1], np.uint8))
    labels = pd.Index(result.vocabularies[1].labels, dtype=object)
    rows = labels.get_indexer(catalog["item_id"].astype(str))
    keep = (rows >= 0) & (origin[np.maximum(rows, 0)] == TRAINED)
    if keep.sum() < 2:
        raise ValueError(f"The catalog lists {int(keep.sum())} of the model's trained items; the attribute map "
                         "needs the trained items' attributes (pass the catalog the model was trained with, "
                         "plus the new items).")
    return fit_metadata_map(catalog[keep].reset_index(drop=True), result.item_matrix()[rows[keep]], alpha=alpha)


def _metadata_rows(metadata_map, catalog, recent) -> dict:
    """Predicted rows of the catalog items not expired at the end of the window (scheduled ones included:
    scoring's live rule shows them from their ``published_at``)."""
    if metadata_map is None or catalog is None or not len(catalog):
        return {}
    live = np.ones(len(catalog), bool)
    if len(recent) and "expires_at" in catalog.columns:
        end = int(recent["timestamp"].max())
        expires = catalog["expires_at"]
        live &= (expires.isna() | (expires.fillna(0).astype(np.int64) > end)).to_numpy(dtype=bool)
    chosen = catalog[live].reset_index(drop=True)
    rows = metadata_map.predict(chosen)
    return dict(zip(chosen["item_id"].astype(str), rows))


def _live_times(result, n_before: int, extra, catalog, recent, catalog_times) -> dict:
    """Live intervals: the model's for its old items, the catalog's (or the first event) for appended ones."""
    from threefold.core.vocabulary import Vocabulary

    labels = result.vocabularies[1].labels
    appended = Vocabulary(labels[n_before:], name="item")
    published, expires = catalog_times(appended, catalog, recent)
    out = {}
    for name, new in (("published_at", published), ("expires_at", expires)):
        old = extra.get(name)
        if old is None:
            old = np.full(n_before, np.iinfo(np.int64).min if name == "published_at" else np.iinfo(np.int64).max)
        out[name] = np.concatenate([np.asarray(old, np.int64), new.astype(np.int64)])
    return out


def _parent_run(model, store):
    """The run of a model given by run id or ``runs:/`` URI (None for a folder or a registry URI)."""
    if store is None or Path(str(model)).is_dir():
        return None
    text = str(model)
    if text.startswith("runs:/"):
        return text[len("runs:/"):].split("/", 1)[0]
    if "://" in text or text.startswith("models:/"):
        return None
    from threefold.tracking.runs import resolve_run

    return resolve_run(store, text).info.run_id


def _log_refresh(store, parent_run: str, out: Path, serving: dict, record: dict) -> tuple[str, str]:
    """A child run of ``parent_run`` with the refresh's counts and the new model; returns (run id, model URI)."""
    from threefold.models.model_io import read_model_metadata
    from threefold.tracking.pyfunc import log_model_folder
    from threefold.tracking.runlog import log_metrics

    read_model_metadata(out)  # verified before it is logged
    parent = store.client.get_run(parent_run)
    counts = record["counts"]
    tags = {"mlflow.parentRunId": parent_run, "threefold.kind": "refresh",
            "threefold.model": parent.data.tags.get("threefold.model", "model")}
    with store.run(parent.info.experiment_id, run_name=f"refresh {tags['threefold.model']}", tags=tags) as run_id:
        log_metrics(store, run_id, {"new_items": counts["new"]["item"], "new_users": counts["new"]["user"],
                                    "resolved_items": counts["resolved"]["item"],
                                    "resolved_users": counts["resolved"]["user"],
                                    "metadata_items": counts["from_metadata"], "events": counts["events"],
                                    "ignored_events": record["ignored_events"], "refresh_seconds": record["seconds"],
                                    "window_start": record["window"][0], "window_end": record["window"][1]})
        store.call(store.client.log_dict, run_id, record, "refresh.json")
        uri = log_model_folder(store, out, serving)
        store.call(store.client.set_tag, run_id, "threefold.model_uri", uri)
    return run_id, uri
