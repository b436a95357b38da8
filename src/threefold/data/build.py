"""From normalized events to an exposure-aware :class:`~threefold.core.tensor.SparseTensor`.

Input contract (what :func:`threefold.data.events.load_events` returns): a DataFrame
with string ``user_id`` and ``item_id``, int64 ``timestamp`` (epoch seconds,
UTC), and optionally ``event`` (``impression``/``click``; absent means every row
is a click), ``dwell_seconds``, ``position`` (1-based), ``request_id`` and
categorical context columns.

Which exposures count as negatives (``negatives``):

``"skip_above"`` (default)
    Joachims, Granka, Pan, Hembrooke & Gay, SIGIR 2005: within one request, an
    unclicked item shown *above* the lowest click is a skip. Items below the
    lowest click, and every item of a request without clicks, are not evidence
    (the visitor may never have looked at them). Needs ``request_id`` and
    ``position``.
``"all_exposures"``
    Every unclicked impression is a skip. With ``request_id`` an impression is
    clicked when its request has a click on the same item; without it, a
    cell's skips are its impressions minus its clicks.
``"none"``
    Impressions are ignored; only clicks are evidence.

Modes are ordered user, item, then the context modes in the order given.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal, Sequence

import numpy as np
import pandas as pd

from threefold.core.checks import check_choice, check_number
from threefold.data.context import ContextSpec, context_levels, spec_name
from threefold.core.feedback import CellEvidence, FeedbackWeighting
from threefold.core.tensor import SparseTensor
from threefold.core.vocabulary import UnseenPolicy, Vocabulary

__all__ = ["BuildReport", "build_tensor", "select_window", "mark_negatives"]

Negatives = Literal["skip_above", "all_exposures", "none"]


@dataclass
class BuildReport:
    """What happened to every input row while building a tensor.

    Attributes
    ----------
    rows_in : int
        Event rows given.
    dropped : dict of str to int
        Rows dropped, by reason (``duplicate``, ``unseen user_id``, ...). No row
        is dropped without being counted here.
    clicks, impressions, negatives : int
        Click rows used, impression rows seen, impressions counted as skips.
    cells : int
        Stored cells of the tensor.
    """

    rows_in: int = 0
    dropped: dict[str, int] = field(default_factory=dict)
    clicks: int = 0
    impressions: int = 0
    negatives: int = 0
    cells: int = 0

    def to_dict(self) -> dict:
        return {
            "rows_in": self.rows_in,
            "dropped": dict(self.dropped),
            "clicks": self.clicks,
            "impressions": self.impressions,
            "negatives": self.negatives,
            "cells": self.cells,
        }


def select_window(events: pd.DataFrame, start: int | None = None, end: int | None = None) -> pd.DataFrame:
    """Events with ``start <= timestamp < end`` (epoch seconds, UTC; ``None`` is open)."""
    keep = np.ones(len(events), dtype=bool)
    ts = events["timestamp"].to_numpy()
    if start is not None:
        keep &= ts >= start
    if end is not None:
        keep &= ts < end
    return events.loc[keep]


def _duplicated_rows(events: pd.DataFrame) -> np.ndarray:
    """Exact duplicate rows (all but the first of each group), via 64-bit row hashes verified exactly."""
    hashes = pd.util.hash_pandas_object(events, index=False).to_numpy()
    candidates = pd.Series(hashes).duplicated(keep=False).to_numpy()
    out = np.zeros(len(events), dtype=bool)
    if candidates.any():
        out[np.flatnonzero(candidates)] = events.loc[candidates].duplicated().to_numpy()
    return out


def spec_codes(spec: ContextSpec, events: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Row codes and labels of one context mode (see ``codes_for`` of the context specifications)."""
    codes, labels = spec.codes_for(events)
    return codes, np.asarray(labels, dtype=object)


def mark_negatives(
    events: pd.DataFrame, negatives: Negatives, *, item_codes: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Which rows are clicks and which impressions count as skips.

    Parameters
    ----------
    events : DataFrame
        Normalized events (see module docstring).
    negatives : {"skip_above", "all_exposures", "none"}

    Returns
    -------
    is_click : ndarray of shape (n,), bool
    is_skip : ndarray of shape (n,), bool
        Impression rows counted as negatives. For ``"all_exposures"`` without
        request ids, skips are resolved per cell later (this array is then the
        impression mask).
    """
    check_choice("negatives", negatives, ("skip_above", "all_exposures", "none"), owner="build_tensor")
    if "event" not in events.columns:
        return np.ones(len(events), dtype=bool), np.zeros(len(events), dtype=bool)
    is_click = (events["event"] == "click").fillna(False).to_numpy(dtype=bool)
    is_impression = (events["event"] == "impression").fillna(False).to_numpy(dtype=bool)
    if negatives == "none" or not is_impression.any():
        return is_click, np.zeros(len(events), dtype=bool)
    has_request = "request_id" in events.columns
    if negatives == "skip_above":
        missing = [c for c in ("request_id", "position") if c not in events.columns]
        if missing:
            raise ValueError(
                f"negatives='skip_above' needs the column(s) {missing}; "
                "use negatives='all_exposures' or 'none' for this log."
            )
    if not has_request:
        return is_click, is_impression
    request, request_labels = pd.factorize(events["request_id"])
    item = pd.factorize(events["item_id"])[0] if item_codes is None else item_codes
    key = request.astype(np.int64) * (int(item.max(initial=0)) + 1) + item
    # a hash table of the clicked (request, item) keys only: no sort of the whole log
    impression_clicked = is_impression & (pd.Index(np.unique(key[is_click])).get_indexer(key) >= 0)
    del key
    if negatives == "all_exposures":
        return is_click, is_impression & ~impression_clicked
    position = pd.to_numeric(events["position"], errors="coerce").to_numpy(dtype=np.float64)
    lowest = np.full(len(request_labels) + 1, -np.inf)  # the last slot, for a missing request id, stays -inf
    grouped = impression_clicked & (request >= 0)
    np.maximum.at(lowest, request[grouped], position[grouped])
    is_skip = is_impression & ~impression_clicked & (position < lowest[request])
    return is_click, is_skip


def build_tensor(
    events: pd.DataFrame,
    contexts: Sequence[ContextSpec] = (),
    *,
    weighting: FeedbackWeighting | None = None,
    negatives: Negatives = "skip_above",
    vocabularies: Sequence[Vocabulary] | None = None,
    unseen_ids: UnseenPolicy = "drop",
    unseen_context: UnseenPolicy = "unknown",
    click_propensity: np.ndarray | None = None,
    propensity_clip: float = 10.0,
    drop_duplicates: bool = True,
    dtype: np.dtype | type = np.float32,
) -> tuple[SparseTensor, BuildReport]:
    """Aggregate events into a user × item × context tensor of raw evidence.

    Parameters
    ----------
    events : DataFrame
        Normalized events (see the module docstring).
    contexts : sequence of ContextSpec
        Context modes, in mode order after user and item.
    weighting : FeedbackWeighting, default FeedbackWeighting()
        Stored on the tensor; change it later with ``tensor.reweighted``.
    negatives : {"skip_above", "all_exposures", "none"}, default="skip_above"
    vocabularies : sequence of Vocabulary, optional
        Frozen vocabularies, one per mode (user, item, contexts...), e.g. from
        the training period; labels outside them follow the policies below.
        Default: built from these events (sorted labels; time bins in bin order).
    unseen_ids : {"drop", "unknown", "error"}, default="drop"
        Policy for user and item ids outside a frozen vocabulary.
    unseen_context : {"drop", "unknown", "error"}, default="unknown"
        Policy for context levels outside a frozen vocabulary.
    click_propensity : ndarray of shape (n_positions,), optional
        Examination probability of positions 1..n relative to position 1
        (e.g. from :func:`threefold.data.propensity.estimate_position_propensity`);
        when given, each click counts ``min(1 / theta_k, propensity_clip)``.
    propensity_clip : float, default=10.0
    drop_duplicates : bool, default=True
        Drop exact duplicate rows (client retries), counted in the report.
    dtype : float32 or float64

    Returns
    -------
    tensor : SparseTensor
    report : BuildReport
    """
    weighting = weighting or FeedbackWeighting()
    check_number("propensity_clip", propensity_clip, low=1.0, owner="build_tensor")
    for column in ("user_id", "item_id", "timestamp"):
        if column not in events.columns:
            raise KeyError(f"build_tensor needs the column {column!r}; the events have {list(events.columns)}.")
    report = BuildReport(rows_in=len(events))
    # load_events already dropped and counted exact duplicates; other frames are checked here.
    if drop_duplicates and "threefold_load" not in events.attrs:
        dup = _duplicated_rows(events)
        if dup.any():
            report.dropped["duplicate"] = int(dup.sum())
            events = events.loc[~dup]
    events = events.reset_index(drop=True)

    missing_id = np.zeros(len(events), dtype=bool)
    for column in ("user_id", "item_id"):
        values = events[column]
        bad = values.isna().to_numpy() | (values.astype("str").str.strip() == "").fillna(True).to_numpy(dtype=bool)
        if bad.any():
            report.dropped[f"missing {column}"] = int((bad & ~missing_id).sum())
        missing_id |= bad
    if missing_id.any():
        events = events.loc[~missing_id].reset_index(drop=True)

    if "event" in events.columns:
        is_impression = (events["event"] == "impression").fillna(False).to_numpy(dtype=bool)
        known_event = is_impression | (events["event"] == "click").fillna(False).to_numpy(dtype=bool)
        if not known_event.all():
            report.dropped["unknown event value"] = int((~known_event).sum())
            events = events.loc[known_event].reset_index(drop=True)
        report.impressions = int(is_impression[known_event].sum())
    user_codes, user_uniques = pd.factorize(events["user_id"])
    item_codes, item_uniques = pd.factorize(events["item_id"])
    is_click, is_skip = mark_negatives(events, negatives, item_codes=item_codes)
    unresolved_skips = negatives == "all_exposures" and "request_id" not in events.columns

    factorized = [(user_codes, np.asarray(user_uniques, dtype=object)), (item_codes, np.asarray(item_uniques, dtype=object))]
    factorized += [spec_codes(s, events) for s in contexts]
    names = ("user", "item") + tuple(spec_name(s) for s in contexts)
    if len(set(names)) != len(names):
        raise ValueError(f"Mode names must be unique, got {names}.")
    if vocabularies is None:
        vocabs = [Vocabulary(tuple(sorted(map(str, factorized[0][1]))), name="user"),
                  Vocabulary(tuple(sorted(map(str, factorized[1][1]))), name="item")]
        vocabs += [Vocabulary(context_levels(s, labels), name=spec_name(s)) for s, (_, labels) in zip(contexts, factorized[2:])]
    else:
        vocabs = list(vocabularies)
        if len(vocabs) != len(names):
            raise ValueError(f"Got {len(vocabs)} vocabularies for the {len(names)} modes {names}.")
    # Every shown or clicked label enters the vocabularies; only clicks and skips become cells
    # (clicked impressions and impressions that are not skips carry no evidence of their own).
    relevant = is_click | is_skip
    keep = relevant.copy()
    codes = []
    for n, (name, vocab, (row_codes, uniques)) in enumerate(zip(names, vocabs, factorized)):
        policy = unseen_ids if n < 2 else unseen_context
        encoded = vocab.encode_codes(row_codes, uniques, policy=policy)
        if policy == "drop" and encoded.n_unseen:
            column = "user_id" if n == 0 else "item_id" if n == 1 else name
            # rows dropped here are counted once, under the first mode that rejects them
            report.dropped[f"unseen {column}"] = int(((encoded.codes < 0) & keep).sum())
            keep &= encoded.codes >= 0
        codes.append(encoded.codes)
    shape = tuple(len(v) for v in vocabs)
    flat = np.zeros(int(keep.sum()), dtype=np.int64)  # row-major cell key, built mode by mode
    for row_codes, size in zip(codes, shape):
        flat *= size
        flat += row_codes[keep]
    del codes, factorized
    is_click, is_skip = is_click[keep], is_skip[keep]
    timestamps = events["timestamp"].to_numpy(dtype=np.int64)[keep]

    click_weight = is_click.astype(np.float64)
    if click_propensity is not None:
        if "position" not in events.columns:
            raise ValueError("click_propensity needs a position column in the events.")
        theta = np.asarray(click_propensity, dtype=np.float64)
        pos = pd.to_numeric(events["position"], errors="coerce").to_numpy(dtype=np.float64)[keep]
        known = is_click & np.isfinite(pos) & (pos >= 1) & (pos <= theta.size)
        inv = np.ones_like(pos)
        inv[known] = np.minimum(1.0 / np.maximum(theta[pos[known].astype(np.int64) - 1], 1e-12), propensity_clip)
        click_weight = np.where(is_click, inv, 0.0)
    dwell = np.zeros(len(timestamps))
    if "dwell_seconds" in events.columns:
        raw = pd.to_numeric(events["dwell_seconds"], errors="coerce").to_numpy(dtype=np.float64)[keep]
        dwell = np.where(is_click & np.isfinite(raw) & (raw > 0), raw, 0.0)

    cell_keys, cell_of_row = np.unique(flat, return_inverse=True)
    n_cells = cell_keys.size
    clicks = np.bincount(cell_of_row, weights=click_weight, minlength=n_cells)
    n_clicks = np.bincount(cell_of_row, weights=is_click, minlength=n_cells)
    skips = np.bincount(cell_of_row, weights=is_skip, minlength=n_cells)
    if unresolved_skips:
        skips = np.maximum(skips - n_clicks, 0.0)
    total_dwell = np.bincount(cell_of_row, weights=dwell, minlength=n_cells)
    origin = int(timestamps.min(initial=0))
    last = np.full(n_cells, np.iinfo(np.int64).min, dtype=np.int64)
    np.maximum.at(last, cell_of_row, timestamps)
    stored = (n_clicks > 0) | (skips > 0)

    report.clicks = int(is_click.sum())
    report.negatives = int(skips.sum())
    report.cells = int(stored.sum())
    evidence = CellEvidence(
        clicks=clicks[stored].astype(np.float32),
        dwell=total_dwell[stored].astype(np.float32),
        skips=skips[stored].astype(np.float32),
        last_seen=np.clip(last[stored] - origin, 0, np.iinfo(np.uint32).max).astype(np.uint32),
        time_origin=origin,
    )
    cell_coords = np.vstack(np.unravel_index(cell_keys[stored], shape)).astype(np.int32)
    tensor = SparseTensor(
        coords=cell_coords,
        shape=shape,
        mode_names=names,
        vocabularies=tuple(vocabs),
        weighting=weighting,
        evidence=evidence,
        dtype=np.dtype(dtype),
    )
    return tensor, report
