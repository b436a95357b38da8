"""The rolling protocol: fold in newcomers before each step of the test window, never retrain.

News items live for hours, so with one frozen model most test clicks go to
items it never saw. A production system refreshes hourly: it keeps the trained
factors and folds in the users and items that appeared since. The rolling
protocol reproduces that: the evaluation window is cut into steps (default one
hour); before step ``s`` starting at ``t_s``, every model that supports fold-in
gets rows for the step's new items and then its new users, solved from the
events before ``t_s`` with every trained factor fixed (methods.md section 8;
Hu, Koren & Volinsky, ICDM 2008). Items come first, from the clicks and skips of
known users; users second, against the item rows just added, so a new user's
clicks on new items count. Each step starts again from the trained model, so a
newcomer's row always uses all of its events before the step.

The fold-in is :func:`threefold.models.refresh.refresh_result`, the code path of
``threefold refresh``: a model refreshed by the deployed hourly job with the
same events is the model this protocol ranks with.

Baselines need no fold-in: they are computed as of each request time anyway.
Models that cannot fold in rank every step with their trained rows (unknown
users and items score as zero rows), and the report says so.
"""

from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from threefold.data.context import ContextSpec
from threefold.evaluation.rankers import as_ranker
from threefold.evaluation.queries import QuerySet
from threefold.evaluation.splits import Stage, _requests, to_seconds
from threefold.models.refresh import refresh_result

__all__ = ["rolling_schedule"]


def rolling_schedule(
    stage: Stage,
    queries: QuerySet,
    models: Mapping[str, object],
    contexts: Sequence[ContextSpec] = (),
    *,
    step: int | str = "1h",
    build_options: Mapping | None = None,
) -> tuple[list[tuple[np.ndarray, dict]], dict]:
    """Steps of the rolling protocol, each with the models as refreshed before it.

    Parameters
    ----------
    stage : Stage
        A time-split stage (``stage.start`` set); its evaluation events before
        each step are the fold-in data.
    queries : QuerySet
        The stage's queries.
    models : mapping of str to model
    contexts : sequence of ContextSpec
        The context modes of the models' tensors.
    step : int or str, default="1h"
        Step length (seconds or a duration).
    build_options : mapping or None
        The training tensor's build options (``weighting``, ``negatives``).

    Returns
    -------
    schedule : list of (rows, dict of str to ranker)
        For :func:`threefold.evaluation.harness.evaluate`.
    report : dict
        ``steps``, ``folded_users`` and ``folded_items`` (summed over steps),
        and ``static_models`` (models without fold-in).
    """
    if stage.start is None:
        raise ValueError("The rolling protocol needs a time split (temporal_split); this stage has no window start.")
    step = to_seconds(step, "step")
    build_options = dict(build_options or {})
    rankers = {name: as_ranker(m) for name, m in models.items()}
    foldable = {name: r.fitted() for name, r in rankers.items() if r.supports_fold_in}
    events = stage.evaluate.sort_values("timestamp", kind="stable").reset_index(drop=True)
    ts = events["timestamp"].to_numpy(dtype=np.int64)
    user_code, user_labels = pd.factorize(events["user_id"].astype(str).to_numpy(dtype=object))
    item_code, item_labels = pd.factorize(events["item_id"].astype(str).to_numpy(dtype=object))
    user_index, item_index = pd.Index(user_labels, dtype=object), pd.Index(item_labels, dtype=object)
    first_user_row = _first_rows(user_code, len(user_labels))
    first_item_row = _first_rows(item_code, len(item_labels))
    request = _requests(events)
    known = {name: (pd.Index(result.vocabularies[0].labels, dtype=object),
                    pd.Index(result.vocabularies[1].labels, dtype=object)) for name, result in foldable.items()}
    step_of = (queries.times - stage.start) // step
    schedule, folded_users, folded_items = [], 0, 0
    item_names = np.asarray(queries.items.labels, dtype=object)
    for s in np.unique(step_of):
        rows = np.flatnonzero(step_of == s)
        before = int(np.searchsorted(ts, stage.start + s * step, side="left"))
        step_users = user_index.get_indexer(np.unique(queries.users[rows].astype(str)))
        step_items = item_index.get_indexer(item_names[queries.candidates.mask(rows).any(axis=0)])
        step_users = step_users[(step_users >= 0) & (first_user_row[np.maximum(step_users, 0)] < before)]
        step_items = step_items[(step_items >= 0) & (first_item_row[np.maximum(step_items, 0)] < before)]
        step_rankers = dict(rankers)
        for name, result in foldable.items():
            users = step_users[known[name][0].get_indexer(user_labels[step_users]) < 0]
            items = step_items[known[name][1].get_indexer(item_labels[step_items]) < 0]
            if users.size == 0 and items.size == 0:
                continue
            touched = np.zeros(int(request.max(initial=-1)) + 1, dtype=bool)
            rows_before = np.isin(user_code[:before], users) | np.isin(item_code[:before], items)
            touched[request[:before][rows_before]] = True
            subset = events.iloc[:before].loc[touched[request[:before]]]
            refreshed, _, counts = refresh_result(result, subset, contexts, build_options)
            step_rankers[name] = refreshed
            folded_users += counts.new[result.mode_names[0]]
            folded_items += counts.new[result.mode_names[1]]
        schedule.append((rows, step_rankers))
    report = {"steps": len(schedule), "step_seconds": step, "folded_users": folded_users,
              "folded_items": folded_items, "static_models": sorted(n for n, r in rankers.items() if not r.supports_fold_in and not r.learns_from_events)}
    return schedule, report


def _first_rows(codes: np.ndarray, n: int) -> np.ndarray:
    """First row of each code (``len(codes)`` for codes that never occur)."""
    first = np.full(n, codes.size, dtype=np.int64)
    np.minimum.at(first, codes, np.arange(codes.size))
    return first
