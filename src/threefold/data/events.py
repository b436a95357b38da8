"""Reading event logs and items catalogs (the contract is in ``docs/data-format.md``).

Three entry points:

* :func:`iter_event_chunks`: the raw rows of a log in chunks of a fixed number
  of rows, with bounded memory; ids as text, nothing else converted;
* :func:`load_events`: the whole log, parsed and normalized (ids as text,
  ``timestamp`` as int64 epoch seconds UTC, bad rows refused or dropped and
  counted, exact duplicates dropped and counted, user ids optionally replaced
  by salted hashes);
* :func:`load_items`: the items catalog, parsed.

Row numbers everywhere are 1-based *data* row numbers: row 1 is the first row
after a CSV header (equal to the file's line number minus one when no field
holds a line break), or the first row of a Parquet file; in a folder of Parquet
files, rows are numbered through the files in sorted path order.
"""

from __future__ import annotations

import hashlib
import os
import warnings
from typing import Iterator, Literal, Sequence

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from threefold.core.checks import check_choice, check_int
from threefold.core.defaults import EVENT_CHUNK_ROWS
from threefold.data._eventscan import (
    DROP_REASONS, EVENT_VALUES, ITEM_TIME_COLUMNS, REQUIRED_COLUMNS, RESERVED_COLUMNS, EventChunk, ProblemTally,
    cleared_counts, drop_counts, scan_events, scan_items,
)
from threefold.data._logreader import LogSource, open_source
from threefold.data.timestamps import check_timezone

__all__ = [
    "DEFAULT_CHUNK_ROWS", "EVENT_VALUES", "REQUIRED_COLUMNS", "EventLogWarning",
    "iter_event_chunks", "load_events", "load_items", "pseudonymize_ids", "activity_outlier_threshold",
]

#: Rows per chunk when reading a log (about 100-200 MB of transient memory for a typical log).
DEFAULT_CHUNK_ROWS = EVENT_CHUNK_ROWS

#: Problems that make :func:`load_events` refuse a log unless ``errors="drop"``.
_LOAD_ERRORS = (
    ("missing_id", "user_id"), ("missing_id", "item_id"), ("unparseable_timestamp", "timestamp"),
    ("naive_timestamp", "timestamp"), ("implausible_timestamp", "timestamp"), ("unknown_event", "event"), ("bad_dwell", "dwell_seconds"),
    ("negative_dwell", "dwell_seconds"), ("bad_position", "position"),
)


class EventLogWarning(UserWarning):
    """Rows were dropped or values cleared while loading a log (the counts are in the message)."""


def require_columns(source: LogSource, required: Sequence[str]) -> list[str]:
    """Names in ``required`` that the source lacks."""
    return [c for c in required if c not in source.columns]


def iter_event_chunks(
    path: str | os.PathLike, *, chunk_rows: int = DEFAULT_CHUNK_ROWS, columns: Sequence[str] | None = None
) -> Iterator[pd.DataFrame]:
    """Raw rows of a log, ``chunk_rows`` at a time.

    Parameters
    ----------
    path : str or path-like
        A CSV file, a Parquet file, or a folder of Parquet files.
    chunk_rows : int, default=250_000
        Rows per chunk (the last chunk may be shorter); memory is bounded by it.
    columns : sequence of str or None
        Columns to read (default: all).

    Yields
    ------
    pandas.DataFrame
        Index ``row``: the 1-based data row number of each row. Id columns are
        text exactly as written (``"007"``, ``""``, ``"9007199254740993"``); CSV
        columns are all text (a blank field is ``""``); Parquet columns keep
        their types (integers as nullable ``Int64``).
    """
    check_int("chunk_rows", chunk_rows, low=1, owner="iter_event_chunks")
    source = open_source(path)
    for first_row, table in source.iter_tables(chunk_rows, columns):
        frame = table.to_pandas(types_mapper=_nullable_ints)
        frame.index = pd.RangeIndex(first_row, first_row + table.num_rows, name="row")
        yield frame


def _nullable_ints(kind: pa.DataType) -> object:
    if pa.types.is_integer(kind):
        return pd.UInt64Dtype() if kind == pa.uint64() else pd.Int64Dtype()
    return None


def _salt_bytes(salt: str | bytes) -> bytes:
    key = salt.encode("utf-8") if isinstance(salt, str) else salt
    if not isinstance(key, bytes) or not 1 <= len(key) <= 64:
        raise ValueError(
            "The 'hash_user_ids_salt' parameter must be a str or bytes of 1 to 64 bytes "
            f"(e.g. secrets.token_hex(16)). Got {type(salt).__name__} of length {len(key) if isinstance(key, bytes) else '?'}."
        )
    return key


def _pseudonymize(values: pa.Array, key: bytes) -> pa.Array:
    encoded = pc.dictionary_encode(values)
    digests = [
        None if v is None else hashlib.blake2b(v.encode("utf-8"), key=key, digest_size=8).hexdigest()
        for v in encoded.dictionary.to_pylist()
    ]
    return pa.array(digests, pa.string()).take(encoded.indices)


def pseudonymize_ids(values: Sequence[str] | pd.Series, salt: str | bytes) -> pd.Series:
    """Salted hashes of ids: ``blake2b(id as UTF-8, key=salt, digest_size=8).hexdigest()``.

    Parameters
    ----------
    values : sequence of str or pandas Series of shape (n,)
    salt : str or bytes
        Secret key of 1 to 64 bytes (str is encoded as UTF-8). The same salt
        gives the same pseudonym for the same id, so logs of different periods
        stay joinable; keep it secret and apart from the data.

    Returns
    -------
    pandas Series of shape (n,), str
        16 lowercase hexadecimal digits per id (64 bits); missing stays missing.
    """
    text = pa.array(pd.Series(values, dtype="str").to_numpy(dtype=object, na_value=None), pa.string())
    return _pseudonymize(text, _salt_bytes(salt)).to_pandas()


def activity_outlier_threshold(counts: np.ndarray, min_events: int = 100, n_mads: float = 5.0) -> float:
    """Event count above which a user is flagged as an activity outlier (a likely bot).

    Rule (robust z-score on log counts, after Iglewicz & Hoaglin's modified
    z-score, 1993, with a stricter cut-off): with ``c`` the kept events per user,
    ``m = median(log10 c)`` and ``s = 1.4826 * MAD(log10 c)`` floored at 0.25,
    the threshold is ``max(min_events, 10 ** (m + n_mads * s))``. A user is
    flagged when their count is strictly above it.

    Parameters
    ----------
    counts : ndarray of shape (n_users,), int
    min_events : int, default=100
    n_mads : float, default=5.0

    Returns
    -------
    float
    """
    if counts.size == 0:
        return float(min_events)
    logs = np.log10(np.asarray(counts, dtype=np.float64))
    median = float(np.median(logs))
    scale = max(1.4826 * float(np.median(np.abs(logs - median))), 0.25)
    return float(max(min_events, 10.0 ** (median + n_mads * scale)))


def _schema(source: LogSource, context_columns: Sequence[str] | None) -> pa.Schema:
    """Columns and Arrow types of the loaded frame, in the documented order."""
    text, fields = pa.large_string(), [("user_id", pa.large_string()), ("item_id", pa.large_string()),
                                       ("timestamp", pa.int64()), ("event", pa.large_string())]
    fields += [(c, pa.float64()) for c in ("dwell_seconds", "position") if c in source.columns]
    fields += [("request_id", text)] if "request_id" in source.columns else []
    fields += [(c, text) for c in source.columns if c not in RESERVED_COLUMNS
               and (context_columns is None or c in context_columns)]
    return pa.schema(fields)


def _table(chunk: EventChunk, key: bytes | None, schema: pa.Schema) -> pa.Table:
    """The kept rows of a chunk as an Arrow table of the loaded frame's schema."""
    keep = chunk.keep
    take = pa.array(np.flatnonzero(keep))
    user = chunk.user_id.take(take)
    columns = {
        "user_id": _pseudonymize(user, key) if key is not None else user,
        "item_id": chunk.item_id.take(take),
        "timestamp": chunk.timestamp[keep],
        "event": pa.DictionaryArray.from_arrays(pa.array(chunk.event[keep]), pa.array(EVENT_VALUES)),
        "dwell_seconds": None if chunk.dwell is None else chunk.dwell[keep],
        "position": None if chunk.position is None else chunk.position[keep],
        "request_id": None if chunk.request_id is None else chunk.request_id.take(take),
    }
    arrays = [pa.array(columns[f.name]) if f.name in columns else chunk.context[f.name].take(take) for f in schema]
    return pa.Table.from_arrays([a.cast(f.type) for a, f in zip(arrays, schema)], schema=schema)


def load_events(
    path: str | os.PathLike,
    *,
    timezone: str | None = None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    hash_user_ids_salt: str | bytes | None = None,
    context_columns: Sequence[str] | None = None,
    errors: Literal["raise", "drop"] = "raise",
    drop_activity_outliers: bool = False,
) -> pd.DataFrame:
    """Load a whole event log, parsed and normalized.

    Parameters
    ----------
    path : str or path-like
        A CSV file, a Parquet file, or a folder of Parquet files.
    timezone : str or None
        IANA zone (e.g. ``"Europe/Paris"``) of timestamps written without a UTC
        offset; without it such timestamps are errors. Daylight-saving folds and
        gaps are read with the offset in force before the change (see
        ``docs/data-format.md``).
    chunk_rows : int, default=250_000
        Rows parsed at a time; the result does not depend on it.
    hash_user_ids_salt : str, bytes or None
        When given, every ``user_id`` is replaced by
        ``blake2b(user_id, key=salt, digest_size=8).hexdigest()`` as it is read
        (see :func:`pseudonymize_ids`); no raw user id is returned.
    context_columns : sequence of str or None
        Context columns to keep (default: every column that is not part of the
        contract's named columns).
    errors : {"raise", "drop"}, default="raise"
        On bad rows or values (empty ids, bad or zone-less timestamps, unknown
        events, non-numeric or negative dwell, bad positions): raise a
        ``ValueError`` naming the first of them, or drop the rows (clear the
        values) and count them.
    drop_activity_outliers : bool, default=False
        Drop the rows of users above :func:`activity_outlier_threshold`.

    Returns
    -------
    pandas.DataFrame of shape (n_kept, n_columns)
        In file order with a fresh ``RangeIndex``: ``user_id``, ``item_id``
        (str), ``timestamp`` (int64 epoch seconds UTC), ``event`` (str,
        ``"impression"`` or ``"click"``; ``"click"`` when the log has no event
        column), then when present ``dwell_seconds`` and ``position`` (float64,
        NaN when missing), ``request_id`` (str) and the context columns (str,
        NaN when blank). ``frame.attrs["threefold_load"]`` holds the counts:
        ``rows_read``, ``rows_kept``, ``rows_dropped`` by reason,
        ``values_cleared`` by column.

    Raises
    ------
    ValueError
        A required column is missing, an id column is stored as floats, or
        (with ``errors="raise"``) the log holds bad rows.

    Warns
    -----
    EventLogWarning
        When rows were dropped (duplicates included) or values cleared.
    """
    check_int("chunk_rows", chunk_rows, low=1, owner="load_events")
    check_choice("errors", errors, ("raise", "drop"), owner="load_events")
    zone = check_timezone(timezone)
    if hash_user_ids_salt is not None:
        _salt_bytes(hash_user_ids_salt)
    source = open_source(path)
    absent = require_columns(source, REQUIRED_COLUMNS)
    if absent:
        raise ValueError(f"{source.path}: required column(s) {absent} missing; the file has {source.columns}.")
    refused = [k for k in _LOAD_ERRORS if zone is None or k[0] != "naive_timestamp"]
    collector = FrameCollector(source, hash_user_ids_salt=hash_user_ids_salt, context_columns=context_columns)
    tally = ProblemTally(keep_rows=5)
    for chunk in scan_events(source, zone=zone, chunk_rows=chunk_rows):
        tally.add_flags({k: m for k, m in chunk.flags.items() if k in refused}, chunk.rows)
        collector.add(chunk)
    counts = tally.counts
    if counts and errors == "raise":
        code, column = min(counts, key=lambda k: tally.rows[k][0])
        raise ValueError(
            f"{source.path}: {counts[(code, column)]} row(s) with {code.replace('_', ' ')} in column {column!r} "
            f"(first rows {tally.rows[(code, column)]}); {len(counts)} kind(s) of problem in all. "
            "Run `threefold validate` for the full report, or pass errors='drop' to drop and count them."
        )
    frame = collector.frame(cleared_counts(counts), drop_activity_outliers=drop_activity_outliers)
    load = frame.attrs["threefold_load"]
    if load["rows_dropped"] or load["values_cleared"]:
        warnings.warn(
            f"{source.path}: dropped {sum(load['rows_dropped'].values())} row(s) {load['rows_dropped']}, "
            f"cleared values {load['values_cleared']}.",
            EventLogWarning, stacklevel=2,
        )
    return frame


class FrameCollector:
    """Gathers the kept rows of scanned chunks into the loaded frame.

    Shared by :func:`load_events` and
    :func:`threefold.data.validate.load_validated_events`, so both return the same
    frame. Parameters as in :func:`load_events`.
    """

    def __init__(self, source: LogSource, *, hash_user_ids_salt: str | bytes | None,
                 context_columns: Sequence[str] | None) -> None:
        if context_columns is not None:
            unknown = [c for c in context_columns if c not in source.columns]
            if unknown:
                raise ValueError(f"{source.path}: no context column(s) {unknown}; the file has {source.columns}.")
        self.key = None if hash_user_ids_salt is None else _salt_bytes(hash_user_ids_salt)
        self.schema = _schema(source, context_columns)
        self.tables: list[pa.Table] = []
        self.dropped = np.zeros(len(DROP_REASONS) + 1, dtype=np.int64)

    def add(self, chunk: EventChunk) -> None:
        self.dropped += np.bincount(chunk.drop, minlength=self.dropped.size)
        self.tables.append(_table(chunk, self.key, self.schema))

    def frame(self, cleared: dict[str, int], *, drop_activity_outliers: bool = False) -> pd.DataFrame:
        """The frame of every kept row, with ``attrs["threefold_load"]`` (see :func:`load_events`)."""
        # One conversion at the end: pandas string columns keep the Arrow chunks (no copy of the text).
        tables, self.tables = self.tables, []
        frame = pa.concat_tables(tables).to_pandas() if tables else self.schema.empty_table().to_pandas()
        del tables
        reasons = drop_counts(self.dropped)
        if drop_activity_outliers and len(frame):
            per_user = frame["user_id"].value_counts()
            bots = per_user.index[per_user.to_numpy() > activity_outlier_threshold(per_user.to_numpy())]
            outliers = frame["user_id"].isin(bots).to_numpy()
            if outliers.any():
                reasons["activity_outlier"] = int(outliers.sum())
                frame = frame.loc[~outliers].reset_index(drop=True)
        frame.attrs["threefold_load"] = {
            "rows_read": int(self.dropped.sum()), "rows_kept": int(len(frame)),
            "rows_dropped": reasons, "values_cleared": cleared,
        }
        return frame


def load_items(
    path: str | os.PathLike, *, timezone: str | None = None, chunk_rows: int = DEFAULT_CHUNK_ROWS
) -> pd.DataFrame:
    """Load an items catalog.

    Parameters
    ----------
    path : str or path-like
        CSV, Parquet file or Parquet folder with an ``item_id`` column.
    timezone : str or None
        Zone of ``published_at`` / ``expires_at`` values written without offset.
    chunk_rows : int, default=250_000

    Returns
    -------
    pandas.DataFrame of shape (n_items, n_columns)
        ``item_id`` (str, unique), ``published_at`` and ``expires_at`` when
        present (nullable ``Int64`` epoch seconds UTC), every other column as
        str (NaN when blank).

    Raises
    ------
    ValueError
        No ``item_id`` column, an empty or repeated ``item_id``, or an
        unparseable or zone-less time.
    """
    check_int("chunk_rows", chunk_rows, low=1, owner="load_items")
    zone = check_timezone(timezone)
    source = open_source(path)
    if require_columns(source, ("item_id",)):
        raise ValueError(f"{source.path}: the items catalog needs an 'item_id' column; it has {source.columns}.")
    frames = []
    for chunk in scan_items(source, zone=zone, chunk_rows=chunk_rows):
        for (code, column), mask in chunk.flags.items():
            if code != "expires_before_published" and mask.any():
                rows = (chunk.first_row + np.flatnonzero(mask)[:5]).tolist()
                raise ValueError(
                    f"{source.path}: {int(mask.sum())} row(s) with {code.replace('_', ' ')} in column "
                    f"{column!r} of the items catalog (first rows {rows}). Run `threefold validate` for the full report."
                )
        columns: dict[str, object] = {"item_id": chunk.item_id.to_pandas()}
        for name in source.columns:
            if name in ITEM_TIME_COLUMNS:
                seconds, present = chunk.times[name]
                columns[name] = pd.array(np.where(present, seconds, 0), dtype="Int64")
                columns[name][~present] = pd.NA
            elif name != "item_id":
                columns[name] = chunk.attributes[name].to_pandas()
        frames.append(pd.DataFrame(columns))
    if not frames:
        return pd.DataFrame({name: pd.Series([], dtype="Int64" if name in ITEM_TIME_COLUMNS else "str")
                             for name in source.columns})
    return pd.concat(frames, ignore_index=True)
