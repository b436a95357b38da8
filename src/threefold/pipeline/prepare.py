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

__all__ = ["tensor_options", "build_from_log", "options_to_json", "options_from_json"]


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
                   negatives: str, timezone: str | None, items=None, salt=None, position_propensity: bool = False):
    """Validate and load a log in one pass, estimate position propensities, build its tensor.

    Rows the validation counts as bad are dropped and counted, so the tensor
    never sees them.

    Returns
    -------
    tensor : SparseTensor
    report : BuildReport
    propensity : PositionPropensity or None
    validation : ValidationReport
    caught : list of warnings.WarningMessage
        The warnings of loading and building, for the caller to show.
    """
    from threefold.data.validate import load_validated_events

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        events, validation = load_validated_events(events_path, items=items, timezone=timezone,
                                                   hash_user_ids_salt=salt)
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
