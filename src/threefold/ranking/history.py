"""What each user already consumed or kept ignoring, read from an event log in chunks (repetition control).

:func:`read_history` reduces an impression and click log to two sorted sets of
64-bit (user, item) keys:

* ``clicked``: pairs with at least one click anywhere in the log (the user
  consumed the item);
* ``ignored``: pairs shown at least ``cap_shown`` times in the last
  ``cap_days`` days before ``as_of`` with no click in that window (the
  frequency cap).

Memory: one pass per chunk of ``chunk_rows`` rows; the state is 16 bytes per
distinct pair shown in the window (key and count) plus 8 per clicked pair, each
chunk reduced to its distinct keys and merged into the table once the pending
chunks outgrow it (so the merging costs O(n log n) overall), and the row hashes
of the window's impressions (exact repeats of an impression row are counted
once; a repeated click changes neither set, so click rows and rows outside the
window are not hashed): a 30-day log of 10⁸ rows needs its distinct pairs and
its last ``cap_days`` of impressions, not its rows. Without ``as_of`` the
window ends at the latest readable timestamp of the log, found by a first pass
that reads the timestamp column alone. Rows the event reader drops (missing
ids, unparseable times, unknown events, repeated window impressions) are
skipped and counted.
"""

from __future__ import annotations

import os
import zipfile
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

from threefold.core.checks import check_int, check_number
from threefold.data._eventscan import EVENT_VALUES, scan_events
from threefold.data._hashing import HashSet, combine, hash_strings
from threefold.data._logreader import open_source, table_source
from threefold.data.events import require_columns
from threefold.data.timestamps import check_timezone, parse_timestamps

__all__ = ["History", "read_history", "pair_keys", "write_history", "load_history", "is_history_digest"]

_DAY = 86_400
_CLICK = EVENT_VALUES.index("click")


@dataclass(frozen=True)
class History:
    """Sorted uint64 (user, item) keys of :func:`pair_keys`; see the module docstring."""

    clicked: np.ndarray = field(default_factory=lambda: np.zeros(0, np.uint64))
    ignored: np.ndarray = field(default_factory=lambda: np.zeros(0, np.uint64))
    as_of: int | None = None
    rows: int = 0
    skipped: int = 0
    cap_shown: int | None = None
    cap_days: float | None = None

    @cached_property
    def clicked_set(self) -> HashSet:
        """``clicked`` in a hash set, built on first use (a lookup costs one probe, a sorted search log n misses)."""
        return _hash_set(self.clicked)

    @cached_property
    def ignored_set(self) -> HashSet:
        """``ignored`` in a hash set, built on first use."""
        return _hash_set(self.ignored)

    @staticmethod
    def member(keys: np.ndarray, sorted_keys: np.ndarray) -> np.ndarray:
        """Boolean mask of the same shape as ``keys``: which are in ``sorted_keys``."""
        if sorted_keys.size == 0:
            return np.zeros(keys.shape, bool)
        at = np.minimum(np.searchsorted(sorted_keys, keys), sorted_keys.size - 1)
        return sorted_keys[at] == keys


def _hash_set(keys: np.ndarray) -> HashSet:
    found = HashSet()
    found.add(keys)
    return found


def pair_keys(user_hash: np.ndarray, item_hash: np.ndarray) -> np.ndarray:
    """The key of each (user, item) pair from the id hashes of :func:`threefold.data._hashing.hash_strings`."""
    return combine(np.asarray(user_hash, np.uint64), np.asarray(item_hash, np.uint64))


def id_hashes(ids) -> np.ndarray:
    """Hashes of ids given as text, as the event reader computes them (uint64)."""
    values = np.asarray(ids, dtype=object)
    try:  # text already: no copy through Python strings
        text = pa.array(values, pa.string())
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        text = pa.array([str(v) for v in values], pa.string())
    return hash_strings(text)


class _KeyCounts:
    """Counts of uint64 keys, merged when the pending chunks outgrow the merged table (amortized n log n)."""

    def __init__(self):
        self.keys, self.counts = np.zeros(0, np.uint64), np.zeros(0, np.int64)
        self.pending: list[tuple[np.ndarray, np.ndarray]] = []
        self.size = 0

    def add(self, keys: np.ndarray, counts: np.ndarray | None = None) -> None:
        if keys.size == 0:
            return
        unique, inverse = np.unique(keys, return_inverse=True)
        weights = None if counts is None else counts
        self.pending.append((unique, np.bincount(inverse, weights=weights, minlength=unique.size).astype(np.int64)))
        self.size += unique.size
        if self.size > max(self.keys.size, 1 << 22):
            self._merge()

    def _merge(self) -> None:
        if not self.pending:
            return
        keys = np.concatenate([self.keys] + [k for k, _ in self.pending])
        counts = np.concatenate([self.counts] + [c for _, c in self.pending])
        self.keys, inverse = np.unique(keys, return_inverse=True)
        self.counts = np.bincount(inverse, weights=counts, minlength=self.keys.size).astype(np.int64)
        self.pending, self.size = [], 0

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        self._merge()
        return self.keys, self.counts


class _KeySet(_KeyCounts):
    """Distinct uint64 keys (counts ignored)."""

    def result(self) -> np.ndarray:
        return super().result()[0]


def read_history(path, *, cap_shown: int | None = None, cap_days: float = 7.0,
                 as_of: int | None = None, timezone: str | None = None, chunk_rows: int = 1_000_000,
                 report=None) -> History:
    """Reduce an event log to the clicked and the ignored (user, item) pairs.

    Parameters
    ----------
    path : path, DataFrame or pyarrow.Table
        Event log (CSV or Parquet, or rows in memory) with ``user_id``, ``item_id``, ``timestamp``
        and ``event`` (``impression`` / ``click``; without the column every row
        is a click, as in training).
    cap_shown : int or None
        Impressions without a click that make a pair ignored; None: no cap.
    cap_days : float, default=7
    as_of : int or None
        End of the cap's window (epoch seconds); None: the log's last event.
    timezone : str or None
        Zone of timestamps written without an offset (as for training).
    chunk_rows : int, default=1,000,000
    report : callable(int) or None
        Called with rows read, chunk by chunk (progress).

    Returns
    -------
    History
    """
    chunk_rows = check_int("chunk_rows", chunk_rows, low=1, owner="read_history")
    if cap_shown is not None:
        cap_shown = check_int("cap_shown", cap_shown, low=1, owner="read_history")
        check_number("cap_days", cap_days, low=0.0, low_open=True, owner="read_history")
    zone = check_timezone(timezone)
    source = table_source(path, "the history events") if isinstance(path, (pd.DataFrame, pa.Table)) else open_source(path)
    missing = require_columns(source, ("user_id", "item_id", "timestamp"))
    if missing:
        raise ValueError(f"{source.path}: the history log needs the column(s) {missing}; it has {source.columns}.")
    report = report or (lambda n: None)
    if cap_shown is not None and as_of is None:
        as_of = _latest_timestamp(source, zone, chunk_rows)
    start = None if as_of is None else as_of - int(cap_days * _DAY)
    clicked, window_clicked = _KeySet(), _KeySet()
    shown = _KeyCounts()
    rows = skipped = 0

    def window_impressions(chunk) -> np.ndarray:
        if cap_shown is None or start is None:
            return np.zeros(chunk.n, bool)
        return (chunk.event != _CLICK) & (chunk.timestamp >= start) & (chunk.timestamp <= as_of)

    for chunk in scan_events(source, zone=zone, chunk_rows=chunk_rows, dedupe=window_impressions):
        keep = chunk.drop == 0
        rows += chunk.n
        skipped += int((~keep).sum())
        keys = pair_keys(chunk.user_hash[keep], chunk.item_hash[keep])
        click = chunk.event[keep] == _CLICK
        clicked.add(keys[click])
        if cap_shown is not None and start is not None:
            t = chunk.timestamp[keep]
            inside = (t >= start) & (t <= as_of)
            window_clicked.add(keys[inside & click])
            shown.add(keys[inside & ~click])
        report(chunk.n)
    clicked, window_clicked = clicked.result(), window_clicked.result()
    shown_keys, shown_counts = shown.result()
    ignored = np.zeros(0, np.uint64)
    if cap_shown is not None:
        candidates = shown_keys[shown_counts >= cap_shown]
        ignored = candidates[~History.member(candidates, window_clicked)]
    return History(clicked=clicked.astype(np.uint64), ignored=ignored.astype(np.uint64), as_of=as_of, rows=rows,
                   skipped=skipped, cap_shown=cap_shown, cap_days=None if cap_shown is None else float(cap_days))


def _latest_timestamp(source, zone, chunk_rows: int) -> int | None:
    """Latest readable timestamp of the log (epoch seconds; None if it has none), from its timestamp column alone."""
    latest = None
    for _, table in source.iter_tables(chunk_rows, columns=["timestamp"]):
        parsed = parse_timestamps(table.column("timestamp"), zone)
        seconds = parsed.seconds[parsed.valid]
        if seconds.size:
            latest = int(seconds.max()) if latest is None else max(latest, int(seconds.max()))
    return latest


_FORMAT = "threefold history digest 1"


def write_history(history: History, path: str | os.PathLike) -> Path:
    """Save a history to ``path`` (an ``.npz`` of plain arrays, no pickles; written to a temporary file, then renamed).

    A digest made once (``threefold history``) serves every scoring job until
    the log moves on: reading a 10⁸-row log costs a minute, loading its digest
    well under a second.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.tmp")
    with open(temporary, "wb") as handle:
        np.savez(handle, format=np.array(_FORMAT), clicked=history.clicked, ignored=history.ignored,
                 as_of=np.int64(-1 if history.as_of is None else history.as_of), rows=np.int64(history.rows),
                 skipped=np.int64(history.skipped), cap_shown=np.int64(history.cap_shown or 0),
                 cap_days=np.float64(history.cap_days or 0.0))
    os.replace(temporary, path)
    return path


def is_history_digest(path: str | os.PathLike) -> bool:
    """Whether ``path`` is a file that starts like a digest of :func:`write_history` (a zip archive)."""
    p = Path(path)
    if not p.is_file():
        return False
    with open(p, "rb") as handle:
        return handle.read(4) == b"PK\x03\x04"


def load_history(path: str | os.PathLike) -> History:
    """Read a digest of :func:`write_history`.

    Raises
    ------
    ValueError
        If the file is not such a digest (named in the message).
    """
    try:
        with np.load(Path(path), allow_pickle=False) as arrays:
            if "format" not in arrays.files or str(arrays["format"]) != _FORMAT:
                raise ValueError(f"{path}: not a history digest of threefold history ({_FORMAT!r} expected).")
            as_of, shown = int(arrays["as_of"]), int(arrays["cap_shown"])
            return History(clicked=arrays["clicked"].astype(np.uint64), ignored=arrays["ignored"].astype(np.uint64),
                           as_of=None if as_of < 0 else as_of, rows=int(arrays["rows"]),
                           skipped=int(arrays["skipped"]), cap_shown=shown or None,
                           cap_days=float(arrays["cap_days"]) if shown else None)
    except (OSError, EOFError, KeyError, zipfile.BadZipFile) as error:
        raise ValueError(f"{path}: not a readable history digest ({error}).") from None
