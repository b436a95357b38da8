"""One pass over an event log: parse each chunk, flag bad values, mark duplicates.

Both :func:`threefold.data.events.load_events` and
:func:`threefold.data.validate.validate_events` consume :func:`scan_events`, so they
drop, clear and count exactly the same rows.

What happens to a row (first matching rule wins; the reasons are counted):

1. ``missing_id``: ``user_id`` or ``item_id`` null, blank, or a missing-value
   marker (``nan``, ``none``, ``null`` in any case) -> dropped;
2. ``unparseable_timestamp``: blank or in no accepted form -> dropped;
3. ``naive_timestamp``: no UTC offset and no time zone given -> dropped;
4. ``implausible_timestamp``: before 1970-01-01 or from 2100-01-01 on (UTC),
   typically epoch milliseconds or microseconds -> dropped;
5. ``unknown_event``: ``event`` not exactly ``impression`` or ``click``
   (after trimming spaces) -> dropped;
6. ``duplicate_row``: equal in every column, after parsing, to an earlier row
   that was kept -> dropped.

A non-numeric or negative ``dwell_seconds`` and a ``position`` that is not an
integer in [1, ``MAX_POSITION``] are cleared (set missing); the row is kept.

The time range and the position bound keep every allocation that depends on a
value of the data (offset tables, per-position counts) bounded: no single row
can make a later step ask for gigabytes.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Iterator
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from threefold.data._hashing import HashSet, combine, encode_strings, hash_dictionary, hash_numbers, hash_strings
from threefold.data._logreader import LogSource
from threefold.data.timestamps import parse_timestamps

__all__ = [
    "REQUIRED_COLUMNS", "RESERVED_COLUMNS", "EVENT_VALUES", "DROP_REASONS", "EARLIEST_TIME", "LATEST_TIME", "MAX_POSITION",
    "ITEM_TIME_COLUMNS", "EventChunk", "ItemsChunk", "scan_events", "scan_items",
    "text_missing", "parse_numbers", "as_text", "ProblemTally", "drop_counts", "cleared_counts",
]

REQUIRED_COLUMNS = ("user_id", "item_id", "timestamp")
RESERVED_COLUMNS = REQUIRED_COLUMNS + ("event", "dwell_seconds", "position", "request_id")
EVENT_VALUES = ("impression", "click")
DROP_REASONS = (
    "missing_id", "unparseable_timestamp", "naive_timestamp", "implausible_timestamp", "unknown_event", "duplicate_row",
)
#: Accepted event times: [1970-01-01T00:00:00Z, 2100-01-01T00:00:00Z) in epoch seconds.
EARLIEST_TIME, LATEST_TIME = 0, 4_102_444_800
#: Largest accepted list position (a larger one is cleared and counted as ``bad_position``).
MAX_POSITION = 10_000
ITEM_TIME_COLUMNS = ("published_at", "expires_at")
_MISSING_MARKERS = ["", "nan", "none", "null"]


def as_text(values: pa.Array | pa.ChunkedArray) -> pa.Array:
    """Any Arrow column as a string array (dictionary decoded, numbers printed)."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if pa.types.is_dictionary(values.type):
        values = values.dictionary_decode()
    if not (pa.types.is_string(values.type) or pa.types.is_large_string(values.type)):
        values = values.cast(pa.string())
    return values


def text_missing(values: pa.Array, markers: bool = True) -> np.ndarray:
    """Mask of null or blank strings (and, with ``markers``, ``nan``/``none``/``null`` in any case)."""
    trimmed = pc.utf8_trim_whitespace(values)
    if markers:
        hit = pc.is_in(pc.utf8_lower(trimmed), value_set=pa.array(_MISSING_MARKERS))
    else:
        hit = pc.equal(trimmed, "")
    return pc.or_(hit.fill_null(True), pc.is_null(values)).to_numpy(zero_copy_only=False)


def blank_to_null(text: pa.Array) -> pa.Array:
    """Text with blank (empty or all-space) values replaced by null; other values as written."""
    blank = text_missing(text, markers=False)
    return pc.if_else(pa.array(blank), pa.scalar(None, pa.string()), text) if blank.any() else text


def parse_numbers(values: pa.Array) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Numbers of a text or numeric column: values (float64, NaN if missing or bad), missing mask, bad mask."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if pa.types.is_integer(values.type) or pa.types.is_floating(values.type) or pa.types.is_null(values.type):
        numbers = values.cast(pa.float64()).fill_null(np.nan).to_numpy(zero_copy_only=False)
        missing = values.is_null().to_numpy(zero_copy_only=False)
    else:
        text = pc.utf8_trim_whitespace(as_text(values))
        missing = text_missing(text)
        present = pc.if_else(pa.array(missing), pa.scalar(None, pa.string()), text)
        try:
            numbers = pc.cast(present, pa.float64()).fill_null(np.nan).to_numpy(zero_copy_only=False)
        except pa.ArrowInvalid:
            numbers = pd.to_numeric(present.to_pandas(), errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    bad = ~missing & ~np.isfinite(numbers)
    numbers = np.where(bad, np.nan, numbers)
    return numbers, missing, bad


def drop_counts(dropped: np.ndarray) -> dict[str, int]:
    """``{reason: rows}`` from a bincount of ``EventChunk.drop`` codes (reasons with no rows left out)."""
    return {r: int(dropped[1 + k]) for k, r in enumerate(DROP_REASONS) if dropped[1 + k]}


def cleared_counts(counts: dict[tuple[str, str], int]) -> dict[str, int]:
    """``{column: values cleared}`` from problem counts (non-numeric or negative dwell, bad positions)."""
    cleared: dict[str, int] = {}
    for (code, column), n in counts.items():
        if code in ("bad_dwell", "negative_dwell", "bad_position"):
            cleared[column] = cleared.get(column, 0) + n
    return dict(sorted(cleared.items()))


class ProblemTally:
    """Count of flagged rows and the first ``keep_rows`` row numbers per (code, column)."""

    def __init__(self, keep_rows: int = 10) -> None:
        self.keep_rows = keep_rows
        self.counts: dict[tuple[str, str], int] = {}
        self.rows: dict[tuple[str, str], list[int]] = {}

    def add(self, key: tuple[str, str], mask: np.ndarray, rows: np.ndarray) -> None:
        """Add the rows where ``mask`` is True (``rows`` ascending, same shape)."""
        hits = np.flatnonzero(mask)
        if hits.size:
            self.counts[key] = self.counts.get(key, 0) + int(hits.size)
            listed = self.rows.setdefault(key, [])
            listed.extend(int(r) for r in rows[hits[: self.keep_rows - len(listed)]])

    def add_flags(self, flags: dict[tuple[str, str], np.ndarray], rows: np.ndarray) -> None:
        for key, mask in flags.items():
            self.add(key, mask, rows)


@dataclass
class EventChunk:
    """Parsed rows ``first_row .. first_row + n - 1`` (1-based data rows) of an event log.

    Arrays have shape (n,). ``drop`` is 0 for a kept row, else ``1 + k`` for
    reason ``DROP_REASONS[k]``; ``flags`` maps (problem code, column) to a
    boolean mask over the chunk's rows.
    """

    first_row: int
    user_id: pa.Array
    item_id: pa.Array
    timestamp: np.ndarray
    event: np.ndarray
    dwell: np.ndarray | None
    position: np.ndarray | None
    request_id: pa.Array | None
    context: dict[str, pa.Array]
    drop: np.ndarray
    flags: dict[tuple[str, str], np.ndarray]
    user_hash: np.ndarray
    item_hash: np.ndarray
    request_hash: np.ndarray | None
    unknown_events: dict[str, int] = field(default_factory=dict)

    @property
    def n(self) -> int:
        return int(self.timestamp.size)

    @property
    def keep(self) -> np.ndarray:
        return self.drop == 0

    @property
    def rows(self) -> np.ndarray:
        """1-based data row numbers, int64 of shape (n,)."""
        return np.arange(self.first_row, self.first_row + self.n, dtype=np.int64)


def _normalize(first_row: int, table: pa.Table, zone: ZoneInfo | None) -> EventChunk:
    n = table.num_rows
    names = table.column_names
    flags: dict[tuple[str, str], np.ndarray] = {}
    drop = np.zeros(n, dtype=np.int8)

    def reject(mask: np.ndarray, reason: str) -> None:
        drop[(drop == 0) & mask] = 1 + DROP_REASONS.index(reason)

    ids, id_hashes = {}, {}
    for name in ("user_id", "item_id", "request_id"):
        if name in names:
            ids[name] = as_text(table.column(name))
            codes, dictionary = encode_strings(ids[name])
            flags[("missing_id", name)] = np.append(text_missing(dictionary), True)[codes]
            id_hashes[name] = hash_dictionary(dictionary)[codes]
    reject(flags[("missing_id", "user_id")] | flags[("missing_id", "item_id")], "missing_id")

    ts = parse_timestamps(table.column("timestamp"), zone)
    flags[("unparseable_timestamp", "timestamp")] = ts.unparseable
    flags[("naive_timestamp", "timestamp")] = ts.naive
    flags[("dst_ambiguous", "timestamp")] = ts.ambiguous
    flags[("dst_nonexistent", "timestamp")] = ts.nonexistent
    reject(ts.unparseable, "unparseable_timestamp")
    reject(ts.naive & ~ts.valid, "naive_timestamp")
    implausible = ts.valid & ((ts.seconds < EARLIEST_TIME) | (ts.seconds >= LATEST_TIME))
    flags[("implausible_timestamp", "timestamp")] = implausible
    reject(implausible, "implausible_timestamp")

    unknown_events: dict[str, int] = {}
    if "event" in names:
        text = pc.utf8_trim_whitespace(as_text(table.column("event")))
        event = np.full(n, -1, dtype=np.int8)
        for code, value in enumerate(EVENT_VALUES):
            event[pc.equal(text, value).fill_null(False).to_numpy(zero_copy_only=False)] = code
        unknown = event < 0
        flags[("unknown_event", "event")] = unknown
        reject(unknown, "unknown_event")
        if unknown.any():
            counts = pc.value_counts(text.filter(pa.array(unknown)).fill_null("<null>"))
            unknown_events = {str(c["values"]): int(c["counts"]) for c in counts.to_pylist()}
    else:
        event = np.full(n, EVENT_VALUES.index("click"), dtype=np.int8)

    dwell = position = None
    if "dwell_seconds" in names:
        dwell, _, bad = parse_numbers(table.column("dwell_seconds"))
        negative = dwell < 0
        flags[("bad_dwell", "dwell_seconds")] = bad
        flags[("negative_dwell", "dwell_seconds")] = negative
        dwell[negative] = np.nan
    if "position" in names:
        position, _, bad = parse_numbers(table.column("position"))
        with np.errstate(invalid="ignore"):
            bad |= (position < 1) | (position > MAX_POSITION) | ((np.floor(position) != position) & ~np.isnan(position))
        flags[("bad_position", "position")] = bad
        position[bad] = np.nan

    context = {}
    for name in names:
        if name not in RESERVED_COLUMNS:
            context[name] = blank_to_null(as_text(table.column(name)))

    return EventChunk(
        first_row=first_row,
        user_id=ids["user_id"],
        item_id=ids["item_id"],
        timestamp=ts.seconds,
        event=event,
        dwell=dwell,
        position=position,
        request_id=ids.get("request_id"),
        context=context,
        drop=drop,
        flags=flags,
        user_hash=id_hashes["user_id"],
        item_hash=id_hashes["item_id"],
        request_hash=id_hashes.get("request_id"),
        unknown_events=unknown_events,
    )


def _row_hash(chunk: EventChunk, index: np.ndarray) -> np.ndarray:
    """Hash of every parsed column of the rows at ``index`` (uint64 of shape (len(index),))."""
    h = combine(chunk.user_hash[index], chunk.item_hash[index])
    parts = [chunk.timestamp, chunk.event, chunk.dwell, chunk.position]
    for values in parts:
        if values is not None:
            h = combine(h, hash_numbers(values[index]))
    if chunk.request_hash is not None:
        h = combine(h, chunk.request_hash[index])
    take = pa.array(index)
    for name in sorted(chunk.context):
        h = combine(h, hash_strings(chunk.context[name].take(take)))
    return h


def scan_events(
    source: LogSource, *, zone: ZoneInfo | None, chunk_rows: int,
    dedupe: Callable[[EventChunk], np.ndarray] | None = None,
) -> Iterator[EventChunk]:
    """Parse a log chunk by chunk, marking exact duplicates of earlier kept rows.

    The caller checks beforehand that the required columns are present.
    Duplicates are found across chunks with a set of 64-bit row hashes (12 to
    23 bytes per distinct row it holds), so the result does not depend on
    ``chunk_rows``. ``dedupe`` narrows the rows looked at: a function of the
    chunk giving a boolean mask of shape (n,); the kept rows outside it are
    never marked and cost no memory (a reader that only counts some rows
    dedupes only those).
    """
    seen = HashSet()
    for first_row, table in source.iter_tables(chunk_rows):
        chunk = _normalize(first_row, table, zone)
        index = np.flatnonzero(chunk.keep if dedupe is None else chunk.keep & dedupe(chunk))
        repeat = seen.mark_repeats(_row_hash(chunk, index))
        chunk.drop[index[repeat]] = 1 + DROP_REASONS.index("duplicate_row")
        duplicate = np.zeros(chunk.n, dtype=bool)
        duplicate[index[repeat]] = True
        chunk.flags[("duplicate_row", "*")] = duplicate
        yield chunk


@dataclass
class ItemsChunk:
    """Parsed rows of an items catalog (1-based data rows from ``first_row``).

    ``times`` maps ``published_at`` / ``expires_at`` to int64 epoch seconds and
    a mask of present values; ``attributes`` holds every other column as text
    (null = missing). ``flags`` as in :class:`EventChunk`; ``keep`` marks rows
    with a usable, first-seen ``item_id``.
    """

    first_row: int
    item_id: pa.Array
    item_hash: np.ndarray
    times: dict[str, tuple[np.ndarray, np.ndarray]]
    attributes: dict[str, pa.Array]
    flags: dict[tuple[str, str], np.ndarray]
    keep: np.ndarray


def _normalize_items(first_row: int, table: pa.Table, zone: ZoneInfo | None) -> ItemsChunk:
    ids = as_text(table.column("item_id"))
    missing = text_missing(ids)
    flags = {("missing_id", "item_id"): missing}
    times = {}
    attributes = {}
    for name in table.column_names:
        if name == "item_id":
            continue
        column = table.column(name)
        if name in ITEM_TIME_COLUMNS:
            blank = text_missing(as_text(column))
            ts = parse_timestamps(column, zone)
            flags[("unparseable_timestamp", name)] = ts.unparseable & ~blank
            flags[("naive_timestamp", name)] = ts.naive & ~ts.valid
            times[name] = (ts.seconds, ts.valid)
        else:
            attributes[name] = blank_to_null(as_text(column))
    if len(times) == 2:
        (pub, pub_ok), (exp, exp_ok) = times["published_at"], times["expires_at"]
        flags[("expires_before_published", "expires_at")] = pub_ok & exp_ok & (exp < pub)
    return ItemsChunk(first_row, ids, hash_strings(ids), times, attributes, flags, ~missing)


def scan_items(source: LogSource, *, zone: ZoneInfo | None, chunk_rows: int) -> Iterator[ItemsChunk]:
    """Parse an items catalog chunk by chunk, flagging repeated ``item_id`` values across chunks."""
    seen = HashSet()
    for first_row, table in source.iter_tables(chunk_rows):
        chunk = _normalize_items(first_row, table, zone)
        index = np.flatnonzero(chunk.keep)
        repeat = seen.mark_repeats(chunk.item_hash[index])
        duplicate = np.zeros(chunk.keep.size, dtype=bool)
        duplicate[index[repeat]] = True
        chunk.flags[("duplicate_item", "item_id")] = duplicate
        chunk.keep = chunk.keep & ~duplicate
        yield chunk
