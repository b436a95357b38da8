"""Reading and normalizing event logs (threefold.data.events); invented data throughout."""

from __future__ import annotations

import hashlib
import warnings
from datetime import datetime, timezone
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from numpy.testing import assert_array_equal

from threefold.data.timestamps import parse_timestamps
from threefold.data.events import (
    EventLogWarning, activity_outlier_threshold, iter_event_chunks, load_events, load_items, pseudonymize_ids,
)

from _event_logs import invented_log, write_formats, write_text


def _utc(*args) -> int:
    # Reference: the standard library's datetime arithmetic in UTC.
    return int(datetime(*args, tzinfo=timezone.utc).timestamp())


def _load(path, **kwargs) -> pd.DataFrame:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EventLogWarning)
        return load_events(path, **kwargs)


def test_chunks_have_the_requested_size_and_1_based_row_numbers(tmp_path):
    lines = ["user_id,item_id,timestamp"] + [f"r{i},s{i},{1_700_000_000 + i}" for i in range(20)]
    path = write_text(tmp_path / "e.csv", "\n".join(lines))
    chunks = list(iter_event_chunks(path, chunk_rows=7))
    assert [len(c) for c in chunks] == [7, 7, 6]
    assert_array_equal(np.concatenate([c.index.to_numpy() for c in chunks]), np.arange(1, 21))
    assert chunks[1].loc[8, "user_id"] == "r7"
    only = next(iter_event_chunks(path, chunk_rows=100, columns=["item_id"]))
    assert list(only.columns) == ["item_id"]
    with pytest.raises(ValueError, match=r"no column\(s\) \['device'\]"):
        next(iter_event_chunks(path, columns=["device"]))
    with pytest.raises(ValueError, match="'chunk_rows' parameter of iter_event_chunks must be an int"):
        next(iter_event_chunks(path, chunk_rows=0))


def test_csv_ids_come_back_exactly_as_written(tmp_path):
    big = str(2**53 + 1)  # 9007199254740993: not representable as float64
    path = write_text(tmp_path / "e.csv", f"""
        user_id,item_id,timestamp
        007,{big},1700000000
        ,x1,1700000001
        " 42",0.10,1700000002
    """)
    raw = next(iter_event_chunks(path))
    assert raw["user_id"].tolist() == ["007", "", " 42"]
    assert raw["item_id"].tolist() == [big, "x1", "0.10"]
    frame = _load(path, errors="drop")
    assert frame["user_id"].tolist() == ["007", " 42"]
    assert frame["item_id"].tolist() == [big, "0.10"]
    assert frame.attrs["threefold_load"]["rows_dropped"] == {"missing_id": 1}


def test_parquet_integer_ids_become_exact_text_and_float_ids_are_refused(tmp_path):
    big = 2**53 + 1
    table = pa.table({"user_id": pa.array([big, None, 7], pa.int64()),
                      "item_id": pa.array(["a", "b", "c"]), "timestamp": pa.array([1, 2, 3], pa.int64())})
    pq.write_table(table, tmp_path / "ints.parquet")
    raw = next(iter_event_chunks(tmp_path / "ints.parquet"))
    assert raw["user_id"].tolist()[0] == "9007199254740993"
    assert pd.isna(raw["user_id"].tolist()[1])
    with pytest.warns(EventLogWarning, match="missing_id"):
        frame = load_events(tmp_path / "ints.parquet", errors="drop")
    assert frame["user_id"].tolist() == ["9007199254740993", "7"]
    floats = table.set_column(0, "user_id", pa.array([1.0, None, 7.0]))
    pq.write_table(floats, tmp_path / "floats.parquet")
    with pytest.raises(ValueError, match="column 'user_id' is stored as double"):
        load_events(tmp_path / "floats.parquet")


def test_timestamp_forms_give_the_same_epoch_seconds():
    instant = _utc(2024, 3, 10, 7, 30)
    forms = ["2024-03-10T07:30:00+00:00", "2024-03-10T07:30:00Z", "2024-03-10 02:30:00-05:00",
             "2024-03-10T13:00:00+0530", "2024-03-10T02:30-05", str(instant), "2024-03-10T07:30:00.999Z"]
    parsed = parse_timestamps(pa.array(forms), None)
    assert parsed.valid.all()
    assert_array_equal(parsed.seconds, np.full(len(forms), instant))
    # Fractions floor toward the past, before 1970 too.
    before = parse_timestamps(pa.array(["1969-12-31T23:59:59.5Z", "-1"]), None)
    assert_array_equal(before.seconds, [-1, -1])


def test_one_form_per_chunk_and_mixed_chunks_parse_alike():
    # The fast path (one strict Arrow cast of a uniform chunk) and the mixed path
    # (regular expressions + pandas) must agree value by value.
    values = ["2024-03-10T07:30:00Z", "2024-03-10T07Z", "2024-03-10 07:30:00.123456789+01:00",
              "1710055800", "-5", "2024-03-10T07:30:00", "2024-03-10", "9999-12-31T23:59:59Z"]
    mixed = parse_timestamps(pa.array(values + ["not a time", "2024-02-30T00:00:00Z", ""]), None)
    for k, value in enumerate(values):
        alone = parse_timestamps(pa.array([value]), None)
        assert (alone.seconds[0], alone.valid[0], alone.naive[0]) == (mixed.seconds[k], mixed.valid[k], mixed.naive[k]), value
    assert mixed.unparseable[-3:].all()


def test_naive_timestamps_need_a_timezone(tmp_path):
    path = write_text(tmp_path / "e.csv", """
        user_id,item_id,timestamp
        a,x,2024-06-01T12:00:00Z
        a,y,2024-06-01T12:00:00
    """)
    with pytest.raises(ValueError, match=r"1 row\(s\) with naive timestamp in column 'timestamp' \(first rows \[2\]\)"):
        load_events(path)
    frame = load_events(path, timezone="Europe/Lisbon")
    # Europe/Lisbon is UTC+1 in June (IANA tz database, via zoneinfo).
    assert frame["timestamp"].tolist() == [_utc(2024, 6, 1, 12), _utc(2024, 6, 1, 11)]
    with pytest.raises(ValueError, match="must be an IANA time zone name"):
        load_events(path, timezone="Mars/Olympus")


def test_daylight_saving_changes_in_new_york(tmp_path):
    # Source of the rules: the IANA tz database through zoneinfo. America/New_York
    # moved clocks from 02:00 to 03:00 on 2024-03-10 and from 02:00 back to 01:00
    # on 2024-11-03. Rule: offset in force before the change (PEP 495 fold=0).
    path = write_text(tmp_path / "e.csv", """
        user_id,item_id,timestamp
        a,x,2024-03-10T01:59:59
        a,x,2024-03-10T02:30:00
        a,x,2024-03-10T03:00:00
        a,x,2024-11-03T00:59:59
        a,x,2024-11-03T01:30:00
        a,x,2024-11-03T02:00:00
    """)
    frame = load_events(path, timezone="America/New_York")
    expected = [
        _utc(2024, 3, 10, 6, 59, 59),  # EST, UTC-5
        _utc(2024, 3, 10, 7, 30),  # nonexistent: read with EST (the offset before the change)
        _utc(2024, 3, 10, 7, 0),  # EDT, UTC-4
        _utc(2024, 11, 3, 4, 59, 59),  # EDT
        _utc(2024, 11, 3, 5, 30),  # ambiguous: the first 01:30, still EDT
        _utc(2024, 11, 3, 7, 0),  # EST
    ]
    assert frame["timestamp"].tolist() == expected
    # Slow reference: the standard library with fold=0, row by row.
    zone = ZoneInfo("America/New_York")
    walls = [datetime(2024, 3, 10, 1, 59, 59), datetime(2024, 3, 10, 2, 30), datetime(2024, 3, 10, 3),
             datetime(2024, 11, 3, 0, 59, 59), datetime(2024, 11, 3, 1, 30), datetime(2024, 11, 3, 2)]
    assert [int(w.replace(tzinfo=zone).timestamp()) for w in walls] == expected
    parsed = parse_timestamps(pa.array([w.isoformat() for w in walls]), zone)
    assert_array_equal(parsed.nonexistent, [0, 1, 0, 0, 0, 0])
    assert_array_equal(parsed.ambiguous, [0, 0, 0, 0, 1, 0])


def test_load_events_normalizes_columns_and_fills_click(tmp_path):
    path = write_text(tmp_path / "e.csv", """
        user_id,item_id,timestamp,position,dwell_seconds,device
        a,x,1700000000,1,12.5,phone
        b,y,1700000060,2.0,,
    """)
    frame = load_events(path)
    assert list(frame.columns) == ["user_id", "item_id", "timestamp", "event", "dwell_seconds", "position", "device"]
    assert frame["event"].tolist() == ["click", "click"]
    assert frame["timestamp"].dtype == np.int64
    assert frame["position"].tolist() == [1.0, 2.0]
    assert frame["dwell_seconds"].iloc[0] == 12.5 and np.isnan(frame["dwell_seconds"].iloc[1])
    assert frame["device"].iloc[0] == "phone" and pd.isna(frame["device"].iloc[1])
    assert frame["user_id"].dtype == "str"


def test_bad_values_are_refused_or_dropped_and_counted(tmp_path):
    path = write_text(tmp_path / "e.csv", """
        user_id,item_id,timestamp,event,position,dwell_seconds
        a,x,1700000000,impression,1,
        a,x,1700000000,impression,1,
        b,y,yesterday,click,1,3
        c,z,1700000002,view,1,3
        d,z,1700000003,click,0,-4
    """)
    with pytest.raises(ValueError, match=r"unparseable timestamp in column 'timestamp' \(first rows \[3\]\)"):
        load_events(path)
    with pytest.warns(EventLogWarning, match="dropped 3 row"):
        frame = load_events(path, errors="drop")
    assert frame["user_id"].tolist() == ["a", "d"]
    assert np.isnan(frame["position"].iloc[1]) and np.isnan(frame["dwell_seconds"].iloc[1])
    counts = frame.attrs["threefold_load"]
    assert counts["rows_read"] == 5 and counts["rows_kept"] == 2
    assert counts["rows_dropped"] == {"unparseable_timestamp": 1, "unknown_event": 1, "duplicate_row": 1}
    assert counts["values_cleared"] == {"dwell_seconds": 1, "position": 1}


def test_user_ids_are_replaced_by_salted_hashes(tmp_path):
    path = write_text(tmp_path / "e.csv", """
        user_id,item_id,timestamp
        reader-ana,x,1700000000
        reader-bo,y,1700000001
        reader-ana,z,1700000002
    """)
    frame = load_events(path, hash_user_ids_salt="pepper-123")
    # Reference: hashlib.blake2b keyed with the salt, 8-byte digest in hex.
    expected = [hashlib.blake2b(u.encode(), key=b"pepper-123", digest_size=8).hexdigest()
                for u in ("reader-ana", "reader-bo", "reader-ana")]
    assert frame["user_id"].tolist() == expected
    assert not frame.isin(["reader-ana", "reader-bo"]).any().any()
    assert pseudonymize_ids(["reader-ana"], "pepper-123").tolist() == expected[:1]
    assert pseudonymize_ids(["reader-ana"], "other").tolist() != expected[:1]
    with pytest.raises(ValueError, match="must be a str or bytes of 1 to 64 bytes"):
        load_events(path, hash_user_ids_salt="")


@pytest.mark.parametrize("fmt", ["parquet", "folder"])
def test_csv_and_parquet_give_the_same_frame(tmp_path, fmt):
    paths = write_formats(invented_log(seed=3), tmp_path)
    expected = _load(paths["csv"])
    pd.testing.assert_frame_equal(_load(paths[fmt]), expected)


def test_chunk_size_does_not_change_the_loaded_frame(tmp_path):
    path = write_formats(invented_log(seed=1), tmp_path)["csv"]
    whole = _load(path, chunk_rows=1_000_000)
    assert whole.attrs["threefold_load"]["rows_dropped"] == {"duplicate_row": 2}
    for chunk_rows in (1, 7):
        pd.testing.assert_frame_equal(_load(path, chunk_rows=chunk_rows), whole)


def test_hive_partition_folders_become_context_columns(tmp_path):
    for day in ("2024-03-01", "2024-03-02"):
        folder = tmp_path / f"day={day}"
        folder.mkdir()
        pq.write_table(pa.table({"user_id": ["a"], "item_id": ["x"], "timestamp": [f"{day}T08:00:00Z"]}),
                       folder / "part.parquet")
    frame = load_events(tmp_path)
    assert frame["day"].tolist() == ["2024-03-01", "2024-03-02"]


def test_activity_outlier_threshold_rule():
    # Hand computation: log10 counts of [10, 10, 10, 100] have median 1 and MAD 0,
    # so the scale is floored at 0.25 and the threshold is 10 ** (1 + 5 * 0.25).
    counts = np.array([10, 10, 10, 100])
    np.testing.assert_allclose(activity_outlier_threshold(counts), 10 ** 2.25, rtol=1e-12)
    # log10 of [1, 10, 100, 1000, 1000]: median 2, |deviations| [2, 1, 0, 1, 1], MAD 1,
    # threshold 10 ** (2 + 2 * 1.4826) with n_mads=2.
    wide = np.array([1, 10, 100, 1000, 1000])
    np.testing.assert_allclose(activity_outlier_threshold(wide, n_mads=2.0), 10 ** (2 + 2 * 1.4826), rtol=1e-12)
    assert activity_outlier_threshold(np.array([1, 1, 1, 2])) == 100.0  # the floor of 100 events wins


def test_drop_activity_outliers_option(tmp_path):
    lines = ["user_id,item_id,timestamp"]
    lines += [f"reader{u},s{k},{1_700_000_000 + k}" for u in range(20) for k in range(3)]
    lines += [f"crawler,s{k},{1_700_000_000 + k}" for k in range(500)]
    path = write_text(tmp_path / "e.csv", "\n".join(lines))
    assert (load_events(path)["user_id"] == "crawler").sum() == 500
    with pytest.warns(EventLogWarning, match="activity_outlier"):
        frame = load_events(path, drop_activity_outliers=True)
    assert len(frame) == 60 and frame.attrs["threefold_load"]["rows_dropped"] == {"activity_outlier": 500}


def test_load_items_parses_times_and_refuses_repeats(tmp_path):
    path = write_text(tmp_path / "items.csv", """
        item_id,kind,topic,published_at,expires_at
        007,article,weather,2024-03-01T06:00:00Z,
        x2,clip,,1709280000,1709366400
    """)
    items = load_items(path)
    assert items["item_id"].tolist() == ["007", "x2"]
    assert items["published_at"].tolist() == [_utc(2024, 3, 1, 6), 1709280000]
    assert pd.isna(items["expires_at"].iloc[0]) and items["expires_at"].dtype == "Int64"
    assert pd.isna(items["topic"].iloc[1])
    repeated = write_text(tmp_path / "rep.csv", "item_id,kind\na,clip\nb,clip\na,audio\n")
    with pytest.raises(ValueError, match=r"duplicate item in column 'item_id' of the items catalog \(first rows \[3\]\)"):
        load_items(repeated)
    with pytest.raises(ValueError, match="needs an 'item_id' column"):
        load_items(write_text(tmp_path / "bad.csv", "id,kind\na,clip\n"))


def test_malformed_csv_errors_reach_the_caller(tmp_path):
    # The CSV is parsed in a reader thread; its errors must surface in the caller.
    lines = ["user_id,item_id,timestamp"] + [f"r{i},s{i},{1_700_000_000 + i}" for i in range(50)] + ["a,b,c,d"]
    path = write_text(tmp_path / "e.csv", "\n".join(lines))
    with pytest.raises(ValueError, match=r"e\.csv: data row 51 has 4 field\(s\), the header 3"):
        load_events(path, chunk_rows=7)
    good = write_text(tmp_path / "good.csv", "\n".join(lines[:-1]))
    chunks = iter_event_chunks(good, chunk_rows=7)
    assert len(next(chunks)) == 7
    chunks.close()  # stopping early stops the reader thread
