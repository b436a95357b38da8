"""From an event log to a training tensor: the one prepare path of ``build``, ``demo``, ``train`` and sweeps.

:func:`tensor_options` turns build settings into the options of
:func:`threefold.data.build.build_tensor` (estimating the position propensities
from the events it is given when the log has them); :func:`build_from_log`
reads and validates a log in one pass and builds its tensor with those options.
The train pipeline calls :func:`tensor_options` on each stage's training events,
so the command line and the experiments build tensors the same way.
"""

from __future__ import annotations

import os
import warnings
from typing import Sequence

import numpy as np
import pandas as pd

from threefold.core.feedback import FeedbackWeighting
from threefold.data.build import build_tensor
from threefold.data.propensity import PROPENSITY_COLUMNS, PositionPropensity, estimate_position_propensity

__all__ = ["read_log", "tensor_options", "build_from_log", "options_to_json", "options_from_json"]


def _problem_text(problem, path, refused: bool = False) -> str:
    rows = ", ".join(str(r) for r in problem.rows)
    where = f" (first rows {rows})" if rows else ""
    message = problem.message
    if refused:  # what would happen to the rows with errors="drop" is not what happens now
        message = message.rsplit("; ", 1)[0] if message.rsplit("; ", 1)[-1].startswith(("rows", "value")) else message
    return f"{path}: column {problem.column!r}: {problem.count:,} row(s) with {problem.code}{where}: {message}"


def read_log(path: str | os.PathLike, *, errors: str = "raise", items=None, timezone: str | None = None,
             hash_user_ids_salt=None, drop_activity_outliers: bool = False, allow=()):
    """Validate and load an event log in one pass: the reading of ``build``, ``train``, ``refresh`` and ``demo``.

    The checks are exactly those of ``threefold validate`` (one pass, see
    :func:`threefold.data.validate.load_validated_events`), so every command
    that reads a log refuses, drops and warns about the same rows.

    Parameters
    ----------
    path : str or path-like
        Event log (CSV, Parquet file or folder of Parquet files).
    errors : {"raise", "drop"}, default="raise"
        On an error of the validation report (bad ids, timestamps, events,
        dwell or positions; catalog errors): raise a ``ValueError`` naming the
        file, column and first rows of the first of them, or drop the rows
        (clear the values) and warn with the counts.
    items : path, optional
        Items catalog, validated with the log (items unknown to it are warned about).
    timezone, hash_user_ids_salt, drop_activity_outliers
        As in :func:`threefold.data.events.load_events`.
    allow : sequence of str, default=()
        The suspicious patterns of :data:`threefold.data.validate.SUSPICIOUS_CODES`
        (ids that differ only in letter case, days far outside the bulk of the
        log) are errors that ``errors="drop"`` does not lift (no row is wrong on
        its own); the codes named here are warnings instead.

    Returns
    -------
    events : DataFrame
        The normalized events; ``attrs["threefold_load"]`` holds the counts.
    report : ValidationReport
        The validation of the log (and catalog).

    Warns
    -----
    EventLogWarning
        One per warning of the validation report, one per dropped kind of
        error (with ``errors="drop"``), and one with the rows dropped in all.
    """
    from threefold.core.checks import check_choice
    from threefold.data.events import EventLogWarning
    from threefold.data.validate import SUSPICIOUS_CODES, load_validated_events

    check_choice("errors", errors, ("raise", "drop"), owner="read_log")
    events, report = load_validated_events(path, items=items, timezone=timezone,
                                           hash_user_ids_salt=hash_user_ids_salt, drop_activity_outliers=drop_activity_outliers,
                                           allow=allow)
    sources = {"events": report.summary["source"], "items": (report.summary.get("catalog") or {}).get("source", items)}
    refused = [p for p in report.errors if errors == "raise" or p.code in SUSPICIOUS_CODES]
    if refused:
        first = refused[0]
        kinds = len(refused)
        raise ValueError(_problem_text(first, sources[first.source], refused=True)
                         + (f" ({kinds} kinds of error in all)" if kinds > 1 else "")
                         + f". Run `threefold validate {path}` for the full report; dropping these rows is an "
                         "explicit choice (--drop-bad-rows, [data] errors = \"drop\", errors=\"drop\").")
    if not len(events):
        read = events.attrs["threefold_load"]["rows_read"]
        raise ValueError(f"{path}: no usable rows (read {read:,}" + (", all dropped" if read else ": only a header")
                         + "); nothing to build a model from.")
    for problem in (*report.errors, *report.warnings):
        warnings.warn(_problem_text(problem, sources[problem.source]), EventLogWarning, stacklevel=2)
    load = events.attrs["threefold_load"]
    if load["rows_dropped"] or load["values_cleared"]:
        dropped = sum(load["rows_dropped"].values())
        warnings.warn(f"{path}: read {load['rows_read']:,} rows, kept {load['rows_kept']:,}, dropped {dropped:,} "
                      f"{load['rows_dropped']}; values cleared {load['values_cleared']}", EventLogWarning, stacklevel=2)
    return events, report


def tensor_options(events: pd.DataFrame, *, weighting: FeedbackWeighting, negatives: str, dtype="float32",
                   drop_duplicates: bool = True, position_propensity: bool = False,
                   propensity_clip: float = 10.0) -> tuple[dict, PositionPropensity | None]:
    """Options of :func:`~threefold.data.build.build_tensor`, and the propensities estimated from ``events``.

    Parameters
    ----------
    events : DataFrame
        The events the tensor is built from (a stage's training events, or the whole log).
    weighting : FeedbackWeighting
    negatives : {"skip_above", "all_exposures", "none"}
    dtype : str or numpy dtype, default="float32"
    drop_duplicates : bool, default=True
    position_propensity : bool, default=False
        Weight clicks by inverse examination propensity (IPS); needs the
        columns ``request_id``, ``position`` and ``event``.
    propensity_clip : float, default=10.0

    Returns
    -------
    options : dict
        Keyword arguments of ``build_tensor`` (and of the fold-ins that must match it).
    propensity : PositionPropensity or None
        Estimated from ``events`` when ``position_propensity`` is asked for.
    """
    options = dict(weighting=weighting, negatives=negatives, dtype=np.dtype(dtype), drop_duplicates=drop_duplicates)
    if not position_propensity:
        return options, None
    if not set(PROPENSITY_COLUMNS) <= set(events.columns):
        raise ValueError(f"position_propensity needs the columns {list(PROPENSITY_COLUMNS)} in the log; "
                         f"it has {list(events.columns)}.")
    propensity = estimate_position_propensity(events)
    options.update(click_propensity=propensity.ratios, propensity_clip=propensity_clip)
    return options, propensity


def build_from_log(events_path: str | os.PathLike, contexts: Sequence, weighting: FeedbackWeighting, *,
                   negatives: str, timezone: str | None, items=None, salt=None, position_propensity: bool = False,
                   errors: str = "raise", allow=()):
    """Validate and load a log in one pass (:func:`read_log`), estimate position propensities, build its tensor.

    With ``errors="raise"`` a log with errors is refused; with ``"drop"`` the
    rows the validation counts as bad are dropped and counted (warned), so the
    tensor never sees them.

    Returns
    -------
    tensor : SparseTensor
    report : BuildReport
    propensity : PositionPropensity or None
    validation : ValidationReport
    caught : list of warnings.WarningMessage
        The warnings of loading and building, for the caller to show.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        events, validation = read_log(events_path, errors=errors, items=items, timezone=timezone, hash_user_ids_salt=salt,
                                      allow=allow)
        options, propensity = tensor_options(events, weighting=weighting, negatives=negatives,
                                             position_propensity=position_propensity)
        if propensity is None and set(PROPENSITY_COLUMNS) <= set(events.columns):
            propensity = estimate_position_propensity(events)  # reported even when clicks are not weighted
        options.pop("dtype")  # the command line builds in build_tensor's default precision
        options.pop("drop_duplicates")
        tensor, report = build_tensor(events, contexts, **options)
    return tensor, report, propensity, validation, list(caught)


def options_to_json(options: dict) -> dict:
    """The build options of :func:`tensor_options` as JSON (saved with a model, for its refreshes)."""
    from dataclasses import asdict

    out = {k: v for k, v in options.items() if k not in ("weighting", "dtype", "click_propensity")}
    out["weighting"] = asdict(options.get("weighting") or FeedbackWeighting())
    out["dtype"] = np.dtype(options.get("dtype", np.float32)).name
    if options.get("click_propensity") is not None:
        out["click_propensity"] = [float(v) for v in options["click_propensity"]]
    return out


def options_from_json(data: dict) -> dict:
    """The inverse of :func:`options_to_json`."""
    options = dict(data)
    options["weighting"] = FeedbackWeighting(**data["weighting"])
    options["dtype"] = np.dtype(data["dtype"])
    if "click_propensity" in data:
        options["click_propensity"] = np.asarray(data["click_propensity"], dtype=np.float64)
    return options
