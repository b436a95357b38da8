"""Chunked reading of tabular logs: CSV, one Parquet file, or a folder of Parquet files.

Every source is read as a stream of Arrow record batches, re-cut into tables of
exactly ``chunk_rows`` rows (the last one shorter), so memory stays bounded by
the chunk size whatever the file's own block or row-group sizes are.

* CSV (optionally compressed, detected from the extension, e.g. ``.csv.gz``):
  UTF-8, a header row, every column read as text. Nothing is converted to a
  number or a missing value at read time: a blank field is the empty string.
* Parquet file (detected by its ``PAR1`` magic bytes, whatever the extension).
* Folder: every Parquet file below it (names starting with ``.`` or ``_`` are
  skipped), in sorted path order, with ``key=value`` folder names read as
  columns (hive partitioning).

Id columns (``user_id``, ``item_id``, ``request_id``) always come out as
strings: text stays as written, integers are printed exactly (``2**53 + 1``
included). Floating-point id columns are refused, since a float cannot hold
every id exactly.
"""

from __future__ import annotations

import os
import queue
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator, Sequence

import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.dataset as pds
import pyarrow.parquet as pq

__all__ = ["LogSource", "open_source", "table_source", "ID_COLUMNS"]

ID_COLUMNS = ("user_id", "item_id", "request_id")
_CSV_BLOCK_BYTES = 8 << 20


@dataclass(frozen=True)
class LogSource:
    """An opened log.

    Attributes
    ----------
    path : str
        The file or folder, or the name of an in-memory table (in messages).
    kind : {"csv", "parquet", "parquet-folder", "table"}
    schema : pyarrow.Schema
        Column names and stored types (CSV: every column is a string).
    table : pyarrow.Table or None
        The rows of a ``"table"`` source (:func:`table_source`).
    """

    path: str
    kind: str
    schema: pa.Schema
    table: pa.Table | None = None

    @property
    def columns(self) -> list[str]:
        """Column names in file order."""
        return list(self.schema.names)

    def id_type_errors(self) -> list[tuple[str, str]]:
        """(column, type) of every id column stored as something other than text or integers."""
        bad = []
        for name in ID_COLUMNS:
            if name in self.schema.names:
                kind = self.schema.field(name).type
                if pa.types.is_dictionary(kind):
                    kind = kind.value_type
                ok = (
                    pa.types.is_string(kind) or pa.types.is_large_string(kind)
                    or pa.types.is_integer(kind) or pa.types.is_null(kind)
                )
                if not ok:
                    bad.append((name, str(kind)))
        return bad

    def iter_tables(self, chunk_rows: int, columns: Sequence[str] | None = None) -> Iterator[tuple[int, pa.Table]]:
        """Yield ``(first_row, table)`` with ``first_row`` the 1-based data row number of the table's first row.

        Raises
        ------
        ValueError
            If a requested column is absent or an id column has a floating-point type.
        """
        names = self.columns if columns is None else list(columns)
        absent = [c for c in names if c not in self.schema.names]
        if absent:
            raise ValueError(f"{self.path}: no column(s) {absent}; the file has {self.columns}.")
        bad = [(c, t) for c, t in self.id_type_errors() if c in names]
        if bad:
            col, kind = bad[0]
            raise ValueError(
                f"{self.path}: column {col!r} is stored as {kind}; ids must be text or integers "
                "(a floating-point id cannot hold every id exactly). Rewrite the column as text."
            )
        first_row = 1
        try:
            for table in _rebatch(_prefetch(self._batches(names, chunk_rows)), chunk_rows):
                yield first_row, _ids_as_text(table)
                first_row += table.num_rows
        except (pa.ArrowInvalid, OSError) as error:  # a corrupt Parquet page is an OSError in pyarrow
            if self.kind != "csv" or not isinstance(error, pa.ArrowInvalid):
                raise ValueError(f"{self.path}: unreadable at or after data row {first_row:,} ({error}); the file is "
                                 "damaged or was cut short: write it again.") from None
            raise ValueError(_csv_problem(self.path, len(self.columns), first_row, error)) from None

    def _batches(self, names: list[str], chunk_rows: int) -> Iterator[pa.RecordBatch]:
        if self.kind == "csv":
            reader = pcsv.open_csv(
                self.path,
                read_options=pcsv.ReadOptions(block_size=_CSV_BLOCK_BYTES, use_threads=True),
                parse_options=pcsv.ParseOptions(newlines_in_values=True),
                convert_options=pcsv.ConvertOptions(
                    column_types={c: pa.string() for c in self.columns},
                    include_columns=names,
                    strings_can_be_null=False,
                    quoted_strings_can_be_null=False,
                ),
            )
            yield from reader
        elif self.kind == "parquet":
            yield from pq.ParquetFile(self.path).iter_batches(batch_size=chunk_rows, columns=names)
        elif self.kind == "table":
            yield from self.table.select(names).to_batches(max_chunksize=chunk_rows)
        else:
            dataset = _dataset(self.path)
            for fragment in sorted(dataset.get_fragments(), key=lambda f: f.path):
                scanner = pds.Scanner.from_fragment(
                    fragment, schema=dataset.schema, columns=names, batch_size=chunk_rows
                )
                yield from scanner.to_batches()


def _dataset(path: str) -> pds.Dataset:
    return pds.dataset(path, format="parquet", partitioning="hive", ignore_prefixes=[".", "_"])


def _prefetch(batches: Iterator[pa.RecordBatch], depth: int = 2) -> Iterator[pa.RecordBatch]:
    """Read ahead in a background thread (Arrow parses without the GIL), at most ``depth`` batches ahead.

    Reading then overlaps with the processing of the previous chunk. Errors of
    the reader are raised in the consuming thread; closing the generator stops
    the reader.
    """
    slots: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    done = object()

    def put(item: object) -> bool:
        """Hand one item over, unless the consumer has stopped; True when handed."""
        while not stop.is_set():
            try:
                slots.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def produce() -> None:
        try:
            for batch in batches:
                if not put(batch):
                    return
            put(done)
        except BaseException as error:  # handed to the consumer
            put(error)

    reader = threading.Thread(target=produce, name="threefold-log-reader", daemon=True)
    reader.start()
    try:
        while True:
            item = slots.get()
            if item is done:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        reader.join()


def _rebatch(batches: Iterator[pa.RecordBatch], chunk_rows: int) -> Iterator[pa.Table]:
    """Re-cut a stream of batches into tables of exactly ``chunk_rows`` rows (last one shorter)."""
    pending: list[pa.RecordBatch] = []
    count = 0
    for batch in batches:
        if batch.num_rows == 0:
            continue
        pending.append(batch)
        count += batch.num_rows
        if count < chunk_rows:
            continue
        table = pa.Table.from_batches(pending)
        start = 0
        while count - start >= chunk_rows:
            yield table.slice(start, chunk_rows)
            start += chunk_rows
        rest = table.slice(start)
        pending = rest.to_batches() if rest.num_rows else []
        count = rest.num_rows
    if count:
        yield pa.Table.from_batches(pending)


def _ids_as_text(table: pa.Table) -> pa.Table:
    """Cast integer, dictionary and null id columns to text (exact decimal digits)."""
    for name in ID_COLUMNS:
        if name in table.column_names:
            i = table.column_names.index(name)
            column = table.column(i)
            if not pa.types.is_string(column.type):
                table = table.set_column(i, name, column.cast(pa.string()))
    return table


def _csv_problem(path: str, n_columns: int, from_row: int, error: Exception) -> str:
    """The first malformed row of a CSV file at or after ``from_row``, found by a second, row-by-row read.

    Arrow's reader says what is wrong but not where; Python's :mod:`csv` module
    reads the file again one row at a time (memory: one row) to name the row.
    """
    import csv

    with open(path, encoding="utf-8", errors="surrogateescape", newline="") as handle:
        rows = csv.reader(handle)
        next(rows, None)  # the header
        for number, row in enumerate(rows, start=1):
            if number < from_row:
                continue
            if any("\udc80" <= ch <= "\udcff" for field in row for ch in field):
                column = next(i for i, f in enumerate(row) if any("\udc80" <= ch <= "\udcff" for ch in f))
                return (f"{path}: data row {number:,}, column {column + 1}: not valid UTF-8 text (save the file "
                        "as UTF-8).")
            if len(row) != n_columns:
                hint = " (an unclosed quote?)" if any('"' in field or "\n" in field for field in row) else ""
                return f"{path}: data row {number:,} has {len(row)} field(s), the header {n_columns}{hint}."
    return f"{path}: not a readable CSV file at or after data row {from_row:,} ({error})."


def table_source(frame, name: str = "the events") -> LogSource:
    """A log already in memory (a DataFrame or an Arrow table), read as a file would be."""
    table = frame if isinstance(frame, pa.Table) else pa.Table.from_pandas(frame, preserve_index=False)
    return LogSource(name, "table", table.schema, table)


def open_source(path: str | os.PathLike) -> LogSource:
    """Open a log (CSV, Parquet file or Parquet folder) and read its schema.

    Raises
    ------
    FileNotFoundError
        If ``path`` does not exist.
    ValueError
        If a folder holds no Parquet files.
    """
    p = Path(path)
    if not p.exists():
        raise FileNotFoundError(f"No such file or folder: {str(p)!r}.")
    if p.is_dir():
        dataset = _dataset(str(p))
        if not dataset.files:
            raise ValueError(f"Folder {str(p)!r} holds no Parquet files.")
        return LogSource(str(p), "parquet-folder", dataset.schema)
    with open(p, "rb") as handle:
        magic = handle.read(4)
    if magic == b"PAR1":
        try:
            return LogSource(str(p), "parquet", pq.read_schema(str(p)))
        except (pa.ArrowInvalid, OSError) as error:
            raise ValueError(f"{p}: not a readable Parquet file ({error}); it is damaged or was cut short.") from None
    if p.stat().st_size == 0:
        raise ValueError(f"{p}: the file is empty; a CSV log starts with a header row (user_id,item_id,timestamp,...).")
    try:
        reader = pcsv.open_csv(str(p), read_options=pcsv.ReadOptions(block_size=1 << 20),
                               convert_options=pcsv.ConvertOptions(column_types={}, strings_can_be_null=False))
    except pa.ArrowInvalid as error:
        header = p.open(encoding="utf-8", errors="surrogateescape").readline()
        raise ValueError(_csv_problem(str(p), header.count(",") + 1, 1, error)) from None
    names = reader.schema.names
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise ValueError(f"{p}: column(s) {repeated} appear more than once in the header; give each column once.")
    schema = pa.schema([pa.field(name, pa.string()) for name in names])
    return LogSource(str(p), "csv", schema)
