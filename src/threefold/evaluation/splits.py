"""Leakage-free train / validation / test splits of an event log.

Two protocols:

:func:`temporal_split` (the honest default)
    A global time cutoff ``c`` with a validation window ``[c - v, c)`` before
    it and a test window ``[c, c + t)`` after it. Model *selection* (structure,
    rank, weights) trains on the events before ``c - v`` and evaluates on the
    validation window; the *final* evaluation trains on every event before
    ``c`` and evaluates on the test window. Nothing at or after a stage's
    window start reaches that stage's training events, so nothing after it can
    reach a training tensor, its vocabularies or any statistic estimated from
    them (propensities, activity counts, novelty).
:func:`last_n_split`
    Each user's last ``n`` click-bearing requests are the test, the
    ``validation_n`` before them the validation. Common in the literature, but
    *not* leakage-free in global time: other users' later events stay in
    training. Use it for comparability only (Ji, Sun, Zhang & Li, "A critical
    study on data leakage in recommender system offline evaluation", ACM TOIS
    2023 — recalled from memory).

Guard rails (:class:`EventSplit`): the test stage is opened only by
:meth:`EventSplit.final_stage`; once it is open, :meth:`EventSplit.selection_stage`
refuses (selecting after looking at the test is a leak), and
:func:`check_selection` refuses any selection that is not made on the
validation window.

Requests that straddle a window boundary (some rows before it, some after)
are left out of that window's evaluation events and counted in
``Stage.dropped_requests``; their rows before the boundary stay in training,
which is honest because they happened before it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable, Literal, Sequence

import numpy as np
import pandas as pd

from threefold.core.checks import check_choice, check_int
from threefold.data.build import BuildReport, build_tensor
from threefold.data.context import ContextSpec
from threefold.core.tensor import SparseTensor
from threefold.core.vocabulary import Vocabulary
from threefold.data.timestamps import to_epoch_seconds, to_seconds

__all__ = ["Stage", "EventSplit", "temporal_split", "last_n_split", "check_selection", "to_epoch_seconds",
           "to_seconds"]

StageName = Literal["validation", "test"]


@dataclass(frozen=True, eq=False)
class Stage:
    """What one stage may learn from and what it is evaluated on.

    Attributes
    ----------
    name : {"validation", "test"}
    train : DataFrame
        Every event the models of this stage may learn from (tensor,
        vocabularies, propensities, activity counts).
    evaluate : DataFrame
        Events of the evaluation window (complete requests only).
    start, end : int or None
        Evaluation window ``[start, end)`` in epoch seconds; None for a
        per-user split.
    protocol : {"time", "last_n"}
    dropped_requests : int
        Requests left out of ``evaluate`` because they straddle a window boundary.
    """

    name: StageName
    train: pd.DataFrame
    evaluate: pd.DataFrame
    start: int | None
    end: int | None
    protocol: str
    dropped_requests: int = 0

    def train_tensor(self, contexts: Sequence[ContextSpec] = (), **build_options) -> tuple[SparseTensor, BuildReport]:
        """Training tensor of this stage; its vocabularies come from the training events only.

        ``build_options`` go to :func:`threefold.data.build.build_tensor`
        (``weighting``, ``negatives``, ...); ``vocabularies`` is refused, since
        a training vocabulary is always built from the training events.
        """
        if "vocabularies" in build_options:
            raise ValueError("A training tensor builds its own vocabularies from the training events; "
                             "do not pass 'vocabularies'.")
        return build_tensor(self.train, contexts, **build_options)

    def evaluation_tensor(
        self, contexts: Sequence[ContextSpec], vocabularies: Sequence[Vocabulary], **build_options
    ) -> tuple[SparseTensor, BuildReport]:
        """Tensor of the evaluation events against frozen training vocabularies.

        Users and items outside them are dropped and counted (``unseen_ids="drop"``),
        context levels outside them map to ``unknown``.
        """
        build_options.setdefault("unseen_ids", "drop")
        build_options.setdefault("unseen_context", "unknown")
        return build_tensor(self.evaluate, contexts, vocabularies=vocabularies, **build_options)


@dataclass(eq=False)
class EventSplit:
    """A split of one event log into a selection stage and a final (test) stage.

    Create it with :func:`temporal_split` or :func:`last_n_split`.

    Attributes
    ----------
    protocol : {"time", "last_n"}
    test_opened : bool
        True once :meth:`final_stage` was called.
    """

    protocol: str
    _selection: Stage = field(repr=False)
    _final: Stage = field(repr=False)
    test_opened: bool = False

    def selection_stage(self) -> Stage:
        """The stage to select models on: train before the validation window, evaluate on it.

        Raises
        ------
        RuntimeError
            When the test stage was already opened.
        """
        if self.test_opened:
            raise RuntimeError(
                "The test window of this split was already opened; selecting a model after the final "
                "evaluation would use test information. Make the selection first, or make a new split."
            )
        return self._selection

    def final_stage(self) -> Stage:
        """The final evaluation: train on everything before the test window, evaluate on it.

        Call it once, after model selection on :meth:`selection_stage`;
        afterwards the selection stage is closed.
        """
        self.test_opened = True
        return self._final


def _requests(events: pd.DataFrame) -> np.ndarray:
    """Request key per row: factorized ``request_id``; rows without one are their own request."""
    n = len(events)
    if "request_id" not in events.columns:
        return np.arange(n, dtype=np.int64)
    codes = pd.factorize(events["request_id"].astype(object), use_na_sentinel=True)[0].astype(np.int64)
    missing = codes < 0
    codes[missing] = codes.max(initial=-1) + 1 + np.arange(int(missing.sum()))
    return codes


def _window_rows(ts: np.ndarray, request: np.ndarray, start: int, end: int | None) -> tuple[np.ndarray, int]:
    """Rows of complete requests inside ``[start, end)`` and the number of straddling requests."""
    inside = ts >= start
    if end is not None:
        inside &= ts < end
    n_req = int(request.max(initial=-1)) + 1
    rows_in = np.bincount(request, weights=inside, minlength=n_req)
    rows_all = np.bincount(request, minlength=n_req)
    complete = rows_in == rows_all
    straddling = int(np.count_nonzero((rows_in > 0) & ~complete))
    return inside & complete[request], straddling


def temporal_split(
    events: pd.DataFrame,
    cutoff: int | str | pd.Timestamp,
    *,
    validation_window: int | str = "24h",
    test_window: int | str | None = None,
) -> EventSplit:
    """Global time split with a validation window before the cutoff.

    Parameters
    ----------
    events : DataFrame
        Normalized events (``timestamp`` int64 epoch seconds, UTC).
    cutoff : int, str or Timestamp
        Start of the test window (epoch seconds, or ISO-8601 with a UTC offset).
    validation_window : int or str, default="24h"
        Length of the validation window ``[cutoff - validation_window, cutoff)``
        (seconds or a duration such as ``"2D"``).
    test_window : int, str or None
        Length of the test window; default: every event from ``cutoff`` on.

    Returns
    -------
    EventSplit
        Selection stage: train ``ts < cutoff - validation_window``, evaluate the
        validation window. Final stage: train ``ts < cutoff``, evaluate the test window.
    """
    if "timestamp" not in events.columns:
        raise KeyError(f"temporal_split needs a 'timestamp' column; the events have {list(events.columns)}.")
    cutoff = to_epoch_seconds(cutoff, "cutoff")
    validation_start = cutoff - to_seconds(validation_window, "validation_window")
    test_end = None if test_window is None else cutoff + to_seconds(test_window, "test_window")
    ts = events["timestamp"].to_numpy(dtype=np.int64)
    request = _requests(events)
    stages = []
    for name, start, end in (("validation", validation_start, cutoff), ("test", cutoff, test_end)):
        train = ts < start
        if not train.any():
            raise ValueError(f"The {name} stage has no training events before {start} (epoch seconds); "
                             "move the cutoff later or shorten the validation window.")
        rows, straddling = _window_rows(ts, request, start, end)
        if not rows.any():
            raise ValueError(f"The {name} window [{start}, {end}) holds no complete request.")
        stages.append(Stage(name=name, train=events.loc[train], evaluate=events.loc[rows], start=start, end=end,
                            protocol="time", dropped_requests=straddling))
    return EventSplit(protocol="time", _selection=stages[0], _final=stages[1])


def last_n_split(events: pd.DataFrame, n: int = 1, *, validation_n: int = 1) -> EventSplit:
    """Per-user split: each user's last ``n`` click-bearing requests are the test.

    A request is a ``request_id`` (or a single click row without one). For a
    user with at least ``n + validation_n + 1`` click-bearing requests, the last
    ``n`` are test, the ``validation_n`` before them validation; the user's
    training events are those strictly before the held-out requests of the
    stage. Other users keep all their events, so this split is *not*
    leakage-free in global time (see the module docstring).

    Parameters
    ----------
    events : DataFrame
    n : int, default=1
    validation_n : int, default=1

    Returns
    -------
    EventSplit
    """
    n = check_int("n", n, low=1, owner="last_n_split")
    validation_n = check_int("validation_n", validation_n, low=1, owner="last_n_split")
    ts = events["timestamp"].to_numpy(dtype=np.int64)
    request = _requests(events)
    is_click = (events["event"].to_numpy(dtype=object) == "click") if "event" in events.columns else np.ones(len(events), bool)
    frame = pd.DataFrame({"request": request, "ts": ts, "click": is_click,
                          "user": pd.factorize(events["user_id"].astype(object))[0]})
    per_request = frame.groupby("request", sort=False).agg(user=("user", "first"), ts=("ts", "min"), click=("click", "any"))
    clicked = per_request[per_request["click"]].sort_values(["user", "ts"], kind="stable")
    rank_from_end = clicked.groupby("user", sort=False).cumcount(ascending=False).to_numpy()
    count = clicked.groupby("user", sort=False)["ts"].transform("size").to_numpy()
    eligible = count >= n + validation_n + 1
    role = np.where(~eligible, 0, np.where(rank_from_end < n, 2, np.where(rank_from_end < n + validation_n, 1, 0)))
    request_role = pd.Series(role, index=clicked.index).reindex(per_request.index, fill_value=0).to_numpy()
    row_role = request_role[pd.Index(per_request.index).get_indexer(request)]
    user = frame["user"].to_numpy()
    n_users = int(user.max(initial=-1)) + 1
    stages = []
    for name, code in (("validation", 1), ("test", 2)):
        first_held = np.full(n_users, np.iinfo(np.int64).max)
        np.minimum.at(first_held, user[row_role == code], ts[row_role == code])
        train = (ts < first_held[user]) & (row_role < code)
        evaluate = row_role == code
        stages.append(Stage(name=name, train=events.loc[train], evaluate=events.loc[evaluate], start=None, end=None,
                            protocol="last_n"))
    return EventSplit(protocol="last_n", _selection=stages[0], _final=stages[1])


def check_selection(stages: Iterable[str], select_on: str = "validation") -> None:
    """Refuse a model selection that is not made on the validation window.

    Parameters
    ----------
    stages : iterable of str
        The stage name of every result compared (e.g. ``result.stage``).
    select_on : str, default="validation"
        Must be ``"validation"``; ``"test"`` is refused.

    Raises
    ------
    ValueError
        When ``select_on`` is not ``"validation"`` or a result comes from another stage.
    """
    if select_on == "test":
        raise ValueError("Selecting on the test window is refused: select on the validation window "
                         "(select_on='validation') and evaluate the chosen model once on the test window.")
    check_choice("select_on", select_on, ("validation",), owner="check_selection")
    others = sorted({str(s) for s in stages} - {"validation"})
    if others:
        raise ValueError(f"Model selection must compare validation results only; got results of stage(s) {others}.")
