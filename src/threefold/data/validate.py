"""Validation of an event log (and optionally an items catalog) against the contract.

:func:`validate_events` reads the log once, in chunks of ``chunk_rows`` rows,
and returns a :class:`ValidationReport`: a summary of the data and every
problem found, each with its severity, column, count and first offending rows.
The rules are listed in ``docs/data-format.md``; what is dropped or cleared is
exactly what :func:`threefold.data.events.load_events` drops or clears.

Chunk-size independence. Everything that relates rows to each other is kept
across chunks as 64-bit hashes (see ``threefold.data._hashing``): the kept rows
(duplicates), the users with their event counts and first rows, the items, the
requests, the (request, item) keys and the (user, item) keys and times of
impressions, and the keys of clicks, which are matched against impressions once
the whole log has been read. The report is the same for any chunk size.

Memory grows by about 12-23 bytes per distinct kept row, per distinct item,
request and (request, item) impression key, 35-70 per distinct user, 16 per
impression (its (user, item) key and time) and 24 per click, on top of one
chunk.
"""

from __future__ import annotations

import os
import time
from dataclasses import replace
from typing import Sequence

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from threefold.core.checks import check_int
from threefold.data._eventscan import (
    DROP_REASONS, EVENT_VALUES, LATEST_TIME, REQUIRED_COLUMNS, EventChunk, ProblemTally, cleared_counts, drop_counts, scan_events,
    scan_items,
)
from threefold.data._hashing import HashCounter, HashSet, combine, hash_strings
from threefold.data._logreader import open_source
from threefold.data._report import SUSPICIOUS_CODES, Problem, ValidationReport, describe, iso_utc
from threefold.data.timestamps import check_timezone
from threefold.data.events import DEFAULT_CHUNK_ROWS, FrameCollector, activity_outlier_threshold, require_columns

__all__ = ["validate_events", "load_validated_events", "ValidationReport", "Problem", "STRICT_CODES", "SUSPICIOUS_CODES",
           "check_allow"]

#: Data-quality warnings that ``strict=True`` turns into errors.
STRICT_CODES = frozenset(
    {"duplicate_row", "future_timestamp", "naive_timestamp", "dst_ambiguous", "dst_nonexistent"}
)


def check_allow(allow, owner: str = "validate_events") -> frozenset:
    """``allow`` as a set of :data:`SUSPICIOUS_CODES`; a ValueError naming any other code."""
    if isinstance(allow, str):
        allow = (allow,)
    unknown = sorted(set(allow) - set(SUSPICIOUS_CODES))
    if unknown:
        raise ValueError(f"{owner}: allow: unknown problem code(s) {', '.join(map(repr, unknown))}; "
                         f"the codes that can be allowed are {', '.join(SUSPICIOUS_CODES)}")
    return frozenset(allow)


_LEVEL_CAP = 10_000
_CLICK, _IMPRESSION = EVENT_VALUES.index("click"), EVENT_VALUES.index("impression")


class _CaseTwins:
    """Distinct ids of one column, to find ids that differ only in letter case (``A12`` / ``a12``).

    Holds, per distinct id, its 64-bit hash, the hash of its lower-case form and
    its first row (about 40 bytes per id): memory follows the distinct ids.
    """

    def __init__(self) -> None:
        self.seen = HashSet()
        self.lower: list[np.ndarray] = []
        self.rows: list[np.ndarray] = []

    def add(self, ids: pa.Array, hashes: np.ndarray, rows: np.ndarray) -> None:
        """Ids, their hashes and their 1-based rows (kept rows of one chunk, shape (n,))."""
        take = np.flatnonzero(~self.seen.mark_repeats(hashes))  # first row of each id not seen before
        if not take.size:
            return
        self.lower.append(hash_strings(pc.utf8_lower(ids.take(pa.array(take)))))
        self.rows.append(rows[take])

    def twins(self) -> tuple[int, list[int]]:
        """Number of ids with a case-only twin, and the first row of each (sorted, at most ten)."""
        if not self.lower:
            return 0, []
        lower, rows = np.concatenate(self.lower), np.concatenate(self.rows)
        _, inverse, counts = np.unique(lower, return_inverse=True, return_counts=True)
        twin = counts[inverse.reshape(-1)] > 1
        return int(twin.sum()), np.sort(rows[twin])[:10].tolist()


class _DayCounts:
    """Events per UTC day over the accepted time range (about 47,500 days: 0.8 MB), and each day's first row.

    The bulk of a log is the span of days between its 1st and 99th percentile
    event; a day more than three times that span (and at least a week) outside
    it holds *outlying* timestamps: a clock reset, a test row, a wrong unit that
    still lands in the accepted range.
    """

    def __init__(self) -> None:
        n = LATEST_TIME // 86_400 + 1
        self.counts = np.zeros(n, dtype=np.int64)
        self.first_rows = np.full(n, np.iinfo(np.int64).max, dtype=np.int64)

    def add(self, seconds: np.ndarray, rows: np.ndarray) -> None:
        day = seconds // 86_400
        self.counts += np.bincount(day, minlength=self.counts.size)
        days, first = np.unique(day, return_index=True)
        self.first_rows[days] = np.minimum(self.first_rows[days], rows[first])

    def outliers(self) -> tuple[int, list[int], str]:
        """Events on outlying days, the first row of each such day (sorted, at most ten), and the bulk's span."""
        total = int(self.counts.sum())
        if total == 0:
            return 0, [], ""
        cumulative = np.cumsum(self.counts)
        low = int(np.searchsorted(cumulative, 0.01 * total, side="left"))
        high = int(np.searchsorted(cumulative, 0.99 * total, side="left"))
        margin = max(3 * (high - low + 1), 7)
        outside = (self.counts > 0) & ((np.arange(self.counts.size) < low - margin)
                                       | (np.arange(self.counts.size) > high + margin))
        span = f"{iso_utc(low * 86_400)[:10]} to {iso_utc(high * 86_400)[:10]}"
        return int(self.counts[outside].sum()), np.sort(self.first_rows[outside])[:10].tolist(), span


class _EventStats:
    """Summary statistics and cross-row checks accumulated over the chunks of one log."""

    def __init__(self, now: int, catalog: HashSet | None) -> None:
        self.now, self.catalog = now, catalog
        self.tally = ProblemTally()
        self.dropped = np.zeros(len(DROP_REASONS) + 1, dtype=np.int64)
        self.events = np.zeros(len(EVENT_VALUES), dtype=np.int64)
        self.time_range = [None, None]
        self.users, self.items, self.requests = HashCounter(), HashSet(), HashSet()
        self.missing_items = HashSet()
        self.positions: dict[int, np.ndarray] = {}
        self.coverage: dict[str, int] = {}
        self.levels: dict[str, set] = {}
        self.unknown_events: dict[str, int] = {}
        self.shown_in_request = HashSet()
        self.shown_to_user: list[tuple[np.ndarray, np.ndarray]] = []
        self.clicks_by_request: list[tuple[np.ndarray, np.ndarray]] = []
        self.clicks_by_user: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        self.has_request = False
        self.case_twins = {"user_id": _CaseTwins(), "item_id": _CaseTwins()}
        self.days = _DayCounts()

    def add(self, chunk: EventChunk) -> None:
        rows, keep = chunk.rows, chunk.keep
        self.tally.add_flags(chunk.flags, rows)
        self.dropped += np.bincount(chunk.drop, minlength=self.dropped.size)
        for value, n in chunk.unknown_events.items():
            if value in self.unknown_events or len(self.unknown_events) < 20:
                self.unknown_events[value] = self.unknown_events.get(value, 0) + n
        k = np.flatnonzero(keep)
        if k.size == 0:
            return
        ts, event, user, item = chunk.timestamp[k], chunk.event[k], chunk.user_hash[k], chunk.item_hash[k]
        krows = rows[k]
        take = pa.array(k)
        self.case_twins["user_id"].add(chunk.user_id.take(take), user, krows)
        self.case_twins["item_id"].add(chunk.item_id.take(take), item, krows)
        self.tally.add(("future_timestamp", "timestamp"), ts > self.now, krows)
        low, high = int(ts.min()), int(ts.max())
        self.time_range = [low if self.time_range[0] is None else min(low, self.time_range[0]),
                           high if self.time_range[1] is None else max(high, self.time_range[1])]
        self.events += np.bincount(event, minlength=self.events.size)
        self.days.add(ts, krows)
        self.users.add(user, krows)
        self.items.add(item)
        if self.catalog is not None:
            unknown = ~self.catalog.contains(item)
            self.tally.add(("catalog_missing_item", "item_id"), unknown, krows)
            self.missing_items.add(item[unknown])
        if chunk.position is not None:
            self._add_positions(chunk.position[k], event)
        for name, values in chunk.context.items():
            kept = values.take(take)
            self.coverage[name] = self.coverage.get(name, 0) + len(kept) - kept.null_count
            levels = self.levels.setdefault(name, set())
            if len(levels) <= _LEVEL_CAP:
                levels.update(pc.unique(kept.drop_null()).to_pylist())
        self._add_matching(chunk, k, event, user, item, ts, krows)

    def _add_positions(self, position: np.ndarray, event: np.ndarray) -> None:
        ok = ~np.isnan(position)
        for code in (_IMPRESSION, _CLICK):
            values, counts = np.unique(position[ok & (event == code)].astype(np.int64), return_counts=True)
            for p, n in zip(values.tolist(), counts.tolist()):
                self.positions.setdefault(p, np.zeros(2, dtype=np.int64))[code] += n

    def _add_matching(self, chunk, k, event, user, item, ts, krows) -> None:
        """Remember impression keys and click keys; clicks are matched in :meth:`unmatched_clicks`."""
        shown, clicked = event == _IMPRESSION, event == _CLICK
        user_item = combine(user, item)
        by_request = np.zeros(k.size, dtype=bool)
        if chunk.request_hash is not None:
            self.has_request = True
            has_request = ~chunk.flags[("missing_id", "request_id")][k]
            request_item = combine(chunk.request_hash[k], item)
            self.requests.add(chunk.request_hash[k][has_request])
            self.shown_in_request.add(request_item[shown & has_request])
            by_request = clicked & has_request
            self.clicks_by_request.append((request_item[by_request], krows[by_request]))
        self.shown_to_user.append((user_item[shown], ts[shown]))
        by_user = clicked & ~by_request
        self.clicks_by_user.append((user_item[by_user], ts[by_user], krows[by_user]))

    def unmatched_clicks(self) -> np.ndarray:
        """Row numbers (sorted) of kept clicks without a matching impression."""
        rows = []
        if self.clicks_by_request:
            keys = np.concatenate([c[0] for c in self.clicks_by_request])
            rows.append(np.concatenate([c[1] for c in self.clicks_by_request])[~self.shown_in_request.contains(keys)])
        keys = np.concatenate([c[0] for c in self.clicks_by_user])
        if keys.size:
            when = np.concatenate([c[1] for c in self.clicks_by_user])
            wanted, first_shown = HashSet(), HashCounter()
            wanted.add(keys)
            for shown, at in self.shown_to_user:  # earliest impression of each clicked (user, item)
                relevant = wanted.contains(shown)
                first_shown.add(shown[relevant], at[relevant])
            found, earliest = first_shown.lookup(keys)
            rows.append(np.concatenate([c[2] for c in self.clicks_by_user])[~(found & (earliest <= when))])
        return np.sort(np.concatenate(rows)) if rows else np.empty(0, dtype=np.int64)


def _catalog(path, zone, chunk_rows: int, problems: list[Problem]) -> tuple[HashSet | None, dict]:
    """Scan an items catalog; its problems are appended to ``problems``."""
    source = open_source(path)
    summary = {"source": source.path, "format": source.kind, "columns": source.columns}
    absent = require_columns(source, ("item_id",))
    if absent or source.id_type_errors():
        code = "missing_column" if absent else "bad_id_type"
        problems.append(describe(code, "item_id", 0, (), source="items"))
        return None, summary
    items, tally, rows = HashSet(), ProblemTally(), 0
    for chunk in scan_items(source, zone=zone, chunk_rows=chunk_rows):
        tally.add_flags(chunk.flags, chunk.first_row + np.arange(chunk.keep.size))
        items.add(chunk.item_hash[chunk.keep])
        rows += chunk.keep.size
    for (code, column), count in tally.counts.items():
        problems.append(describe(code, column, count, tally.rows[(code, column)], source="items",
                                 timezone=None if zone is None else zone.key))
    summary.update(rows=rows, items=len(items))
    return items, summary


def validate_events(
    path: str | os.PathLike,
    *,
    items: str | os.PathLike | None = None,
    timezone: str | None = None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    strict: bool = False,
    now: int | None = None,
    max_user_events: int | None = None,
    allow: Sequence[str] = (),
) -> ValidationReport:
    """Check an event log against the contract of ``docs/data-format.md``.

    Parameters
    ----------
    path : str or path-like
        Event log: CSV, Parquet file or folder of Parquet files.
    items : str, path-like or None
        Items catalog to check, and to check the log's items against.
    timezone : str or None
        IANA zone of timestamps written without a UTC offset (they are errors
        without it).
    chunk_rows : int, default=250_000
        Rows read at a time; the report does not depend on it.
    strict : bool, default=False
        Turn the data-quality warnings in :data:`STRICT_CODES` into errors.
    now : int or None
        Epoch seconds after which a timestamp counts as in the future (default:
        the current time).
    max_user_events : int or None
        Event count above which a user is an activity outlier (default: the
        rule of :func:`threefold.data.events.activity_outlier_threshold`).
    allow : sequence of str, default=()
        Codes of :data:`SUSPICIOUS_CODES` to report as warnings instead of
        errors: ``"case_variant_id"`` (ids of one column that differ only in
        letter case, ``A12`` and ``a12``, each of which would become its own
        user or item; for sources where case is meaningful) and
        ``"outlying_timestamp"`` (days far outside the bulk of the log; for a
        log that really has such days).

    Returns
    -------
    ValidationReport
        ``report.ok`` is False when any problem is an error. Problem rows are
        1-based data rows of the file (row 1 is the first row after a CSV
        header).
    """
    report, _ = _run(path, items=items, timezone=timezone, chunk_rows=chunk_rows, strict=strict, now=now,
                     max_user_events=max_user_events, allow=allow, collect=None)
    return report


def load_validated_events(
    path: str | os.PathLike,
    *,
    items: str | os.PathLike | None = None,
    timezone: str | None = None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    strict: bool = False,
    now: int | None = None,
    max_user_events: int | None = None,
    hash_user_ids_salt: str | bytes | None = None,
    context_columns: Sequence[str] | None = None,
    drop_activity_outliers: bool = False,
    allow: Sequence[str] = (),
) -> tuple[pd.DataFrame, ValidationReport]:
    """Validate and load a log in one pass (half the reading of the two calls apart).

    Parameters are those of :func:`validate_events` and
    :func:`threefold.data.events.load_events`.

    Returns
    -------
    frame : pandas.DataFrame
        Exactly ``load_events(path, errors="drop", ...)``: every row the report
        counts as dropped is dropped, every value it counts as cleared is
        cleared. Check ``report.ok`` before using it.
    report : ValidationReport
        Exactly ``validate_events(path, ...)``.

    Raises
    ------
    ValueError
        When the log cannot be read at all (a required column is missing or an
        id column is stored as floats); the message lists the problems.
    """
    report, collector = _run(path, items=items, timezone=timezone, chunk_rows=chunk_rows, strict=strict, now=now,
                             max_user_events=max_user_events, allow=allow,
                             collect={"hash_user_ids_salt": hash_user_ids_salt, "context_columns": context_columns})
    if collector is None:
        raise ValueError(f"{report.summary['source']}: the log cannot be loaded: "
                         + "; ".join(f"{p.column}: {p.message}" for p in report.errors if p.source == "events"))
    cleared = report.summary["values_cleared"]
    return collector.frame(cleared, drop_activity_outliers=drop_activity_outliers), report


def _run(path, *, items, timezone, chunk_rows, strict, now, max_user_events, collect: dict | None,
         allow: Sequence[str] = ()) -> tuple[ValidationReport, FrameCollector | None]:
    """The one pass behind :func:`validate_events` and :func:`load_validated_events`."""
    allow = check_allow(allow)
    check_int("chunk_rows", chunk_rows, low=1, owner="validate_events")
    if max_user_events is not None:
        check_int("max_user_events", max_user_events, low=1, owner="validate_events")
    zone = check_timezone(timezone)
    now = int(time.time()) if now is None else check_int("now", now, owner="validate_events")
    source = open_source(path)
    tz_name = None if zone is None else zone.key
    summary: dict = {"source": source.path, "format": source.kind, "columns": source.columns,
                     "timezone": tz_name, "checked_at": iso_utc(now)}
    problems: list[Problem] = []
    catalog = None
    if items is not None:
        catalog, summary["catalog"] = _catalog(items, zone, chunk_rows, problems)
    absent = require_columns(source, REQUIRED_COLUMNS)
    bad_types = source.id_type_errors()
    if absent or bad_types:
        problems[:0] = [describe("missing_column", c, 0, ()) for c in absent]
        problems[:0] = [describe("bad_id_type", c, 0, (), detail=t) for c, t in bad_types]
        return ValidationReport(summary=summary, problems=tuple(_promote(problems, strict))), None
    stats = _EventStats(now, catalog)
    collector = None if collect is None else FrameCollector(source, **collect)
    for chunk in scan_events(source, zone=zone, chunk_rows=chunk_rows):
        stats.add(chunk)
        if collector is not None:
            collector.add(chunk)
    summary.update(_summary(stats, source.columns))
    event_problems = []
    for (code, column), count in stats.tally.counts.items():
        detail = {"unknown_event": stats.unknown_events, "future_timestamp": iso_utc(now),
                  "catalog_missing_item": len(stats.missing_items)}.get(code)
        event_problems.append(describe(code, column, count, stats.tally.rows[(code, column)],
                                       timezone=tz_name, detail=detail))
    if stats.events[_IMPRESSION]:
        unmatched = stats.unmatched_clicks()
        if unmatched.size:
            event_problems.append(describe("unmatched_click", "event", int(unmatched.size), unmatched[:10].tolist(),
                                           detail="request_id" if stats.has_request else "user_id"))
    counts, first_rows = stats.users.items()
    threshold = summary["activity_outliers"]["threshold"] if max_user_events is None else max_user_events
    flagged = counts > threshold
    summary["activity_outliers"].update(threshold=threshold, users=int(flagged.sum()), events=int(counts[flagged].sum()))
    if flagged.any():
        event_problems.append(describe("activity_outlier", "user_id", int(flagged.sum()),
                                       np.sort(first_rows[flagged])[:10].tolist(), detail=threshold))
    outlying, rows, span = stats.days.outliers()
    if outlying:
        event_problems.append(describe("outlying_timestamp", "timestamp", outlying, rows, detail=span))
    for column, twins in stats.case_twins.items():
        count, rows = twins.twins()
        if count:
            event_problems.append(describe("case_variant_id", column, count, rows))
    event_problems = [replace(p, severity="warning") if p.code in allow else p for p in event_problems]
    problems = event_problems + problems
    return ValidationReport(summary=summary, problems=tuple(_promote(problems, strict))), collector




def _promote(problems: list[Problem], strict: bool) -> list[Problem]:
    if strict:
        problems = [p.as_error() if p.code in STRICT_CODES else p for p in problems]
    order = {"error": 0, "warning": 1}
    return sorted(problems, key=lambda p: (order[p.severity], p.source, p.rows[0] if p.rows else 0, p.code, p.column))


def _summary(stats: _EventStats, columns: list[str]) -> dict:
    kept = int(stats.dropped[0])
    dropped, cleared = drop_counts(stats.dropped), cleared_counts(stats.tally.counts)
    positions = [
        {"position": p, "impressions": int(n[_IMPRESSION]), "clicks": int(n[_CLICK]),
         "clicks_per_impression": float(n[_CLICK] / n[_IMPRESSION]) if n[_IMPRESSION] else None}
        for p, n in sorted(stats.positions.items())
    ]
    context = {
        name: {"coverage": stats.coverage.get(name, 0) / kept if kept else 0.0,
               "levels": min(len(levels), _LEVEL_CAP), "levels_capped": len(levels) > _LEVEL_CAP}
        for name, levels in stats.levels.items()
    }
    events = {value: int(stats.events[i]) for i, value in enumerate(EVENT_VALUES)}
    return {
        "rows_read": int(stats.dropped.sum()), "rows_kept": kept, "rows_dropped": dropped,
        "values_cleared": cleared, "has_event_column": "event" in columns,
        "users": len(stats.users), "items": len(stats.items),
        "requests": len(stats.requests) if stats.has_request else None,
        "time_min": iso_utc(stats.time_range[0]), "time_max": iso_utc(stats.time_range[1]),
        "events": events,
        "clicks_per_impression": (events["click"] / events["impression"]) if events["impression"] else None,
        "by_position": positions, "context": context,
        "activity_outliers": {"threshold": activity_outlier_threshold(stats.users.items()[0])},
    }
