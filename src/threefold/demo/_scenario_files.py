"""Private file mechanics of :mod:`threefold.demo.simulate`: tables, JSON and arrays on disk.

Every file is written under a temporary name in its folder and renamed into
place, so a reader never sees a half-written file under the final name.
Timestamps are int64 epoch seconds in memory and in Parquet, ISO-8601 strings
with a ``+00:00`` offset in CSV. Nothing is ever pickled.
"""

from __future__ import annotations

import csv
import json
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq

FORMAT_VERSION = 1
#: Columns that hold timestamps (int64 epoch seconds in memory).
TIME_COLUMNS = ("timestamp", "published_at", "expires_at")
#: Non-string columns of the simulated tables; every other CSV column is read as a string.
_NUMERIC = {"position": pa.int64(), "dwell_seconds": pa.float64()}


def _replace_atomically(path: Path, write) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    write(tmp)
    os.replace(tmp, path)


def _iso(seconds: pd.Series) -> pa.Array:
    utc = pa.array(seconds.to_numpy(), pa.int64()).cast(pa.timestamp("s", tz="UTC"))
    return pc.strftime(utc, format="%Y-%m-%dT%H:%M:%S+00:00")


def write_table(frame: pd.DataFrame, out: Path, name: str, file_format: str) -> None:
    """Write ``frame`` as ``out/name.parquet`` or ``out/name.csv``."""
    table = pa.Table.from_pandas(frame, preserve_index=False)
    if file_format == "csv":
        for column in TIME_COLUMNS:
            if column in table.column_names:
                table = table.set_column(table.column_names.index(column), column, _iso(frame[column]))
        _replace_atomically(out / f"{name}.csv", lambda path: pa_csv.write_csv(table, path))
    else:
        _replace_atomically(out / f"{name}.parquet", lambda path: pq.write_table(table, path))


def read_table(out: Path, name: str) -> pd.DataFrame:
    """Read ``out/name.parquet`` or ``out/name.csv``: ids as strings, timestamps as int64 epoch seconds."""
    if (out / f"{name}.parquet").exists():
        return pq.read_table(out / f"{name}.parquet").to_pandas()
    path = out / f"{name}.csv"
    if not path.exists():
        raise FileNotFoundError(f"{out} holds neither {name}.parquet nor {name}.csv.")
    with open(path, newline="") as handle:
        header = next(csv.reader(handle))
    options = pa_csv.ConvertOptions(column_types={c: _NUMERIC.get(c, pa.string()) for c in header},
                                    strings_can_be_null=False, quoted_strings_can_be_null=False)
    frame = pa_csv.read_csv(path, convert_options=options).to_pandas()
    for column in TIME_COLUMNS:
        if column in frame:
            stamps = pd.DatetimeIndex(pd.to_datetime(frame[column], format="ISO8601", utc=True))
            frame[column] = stamps.as_unit("s").asi8
    return frame


def write_json(path: Path, payload: dict) -> None:
    """Write ``payload`` with a ``format_version`` key."""
    text = json.dumps({"format_version": FORMAT_VERSION, **payload}, indent=2) + "\n"
    _replace_atomically(path, lambda tmp: tmp.write_text(text))


def read_json(path: Path) -> dict:
    """Read a JSON file written by :func:`write_json`, refusing an unknown ``format_version``."""
    data = json.loads(Path(path).read_text())
    if data.get("format_version") != FORMAT_VERSION:
        raise ValueError(f"{path} has format_version {data.get('format_version')!r}; "
                         f"this version of threefold reads {FORMAT_VERSION}.")
    return data


def write_arrays(path: Path, arrays: dict[str, np.ndarray]) -> None:
    """Write ``arrays`` to a compressed ``.npz`` (no object arrays)."""
    def write(tmp: Path) -> None:
        with open(tmp, "wb") as handle:
            np.savez_compressed(handle, **arrays)

    _replace_atomically(path, write)


def read_arrays(path: Path) -> dict[str, np.ndarray]:
    """Read a ``.npz`` with ``allow_pickle=False``."""
    with np.load(path, allow_pickle=False) as npz:
        return {name: npz[name] for name in npz.files}
