"""Validation of event logs (threefold.data.validate): one test per bad-input class; invented data."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from threefold.data.validate import STRICT_CODES, validate_events

from _event_logs import NOW, invented_log, write_formats, write_text


def _check(report, code, column, count, rows, severity, source="events"):
    problem = report.problem(code, column, source=source)
    assert problem is not None, [(p.code, p.column) for p in report.problems]
    assert (problem.severity, problem.count, list(problem.rows)) == (severity, count, rows)
    return problem


def _validate(tmp_path, text, **kwargs):
    return validate_events(write_text(tmp_path / "e.csv", text), now=NOW, **kwargs)


def test_clean_log_is_ok_and_summarized(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp,event,position,request_id,device,page_tone
        a,x,2024-03-01T10:00:00Z,impression,1,q1,phone,calm
        a,y,2024-03-01T10:00:00Z,impression,2,q1,phone,
        a,y,2024-03-01T10:00:20Z,click,2,q1,phone,
        b,x,2024-03-02T11:00:00Z,impression,1,q2,desktop,urgent
    """)
    assert report.ok and report.problems == ()
    s = report.summary
    assert (s["rows_read"], s["rows_kept"], s["users"], s["items"], s["requests"]) == (4, 4, 2, 2, 2)
    assert (s["time_min"], s["time_max"]) == ("2024-03-01T10:00:00Z", "2024-03-02T11:00:00Z")
    assert s["events"] == {"impression": 3, "click": 1}
    assert s["by_position"] == [
        {"position": 1, "impressions": 2, "clicks": 0, "clicks_per_impression": 0.0},
        {"position": 2, "impressions": 1, "clicks": 1, "clicks_per_impression": 1.0},
    ]
    assert s["context"]["device"] == {"coverage": 1.0, "levels": 2, "levels_capped": False}
    assert s["context"]["page_tone"] == {"coverage": 0.5, "levels": 2, "levels_capped": False}
    json.dumps(report.to_dict())
    text = report.to_text()
    assert "Result: OK" in text and "page_tone" in text and "50.0%" in text


def test_header_only_log_is_ok_and_empty(tmp_path):
    report = _validate(tmp_path, "user_id,item_id,timestamp,event\n")
    assert report.ok and report.summary["rows_read"] == 0 and report.summary["time_min"] is None
    assert "0 read, 0 kept" in report.to_text()


def test_missing_required_column(tmp_path):
    report = _validate(tmp_path, "user_id,when\na,2024-03-01T10:00:00Z\n")
    _check(report, "missing_column", "item_id", 0, [], "error")
    _check(report, "missing_column", "timestamp", 0, [], "error")
    assert not report.ok and "required column is missing" in report.to_text()


def test_empty_and_nan_ids(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp
        a,x,1700000000
        ,x,1700000001
        NaN,y,1700000002
        b,  ,1700000003
    """)
    _check(report, "missing_id", "user_id", 2, [2, 3], "error")
    _check(report, "missing_id", "item_id", 1, [4], "error")
    assert report.summary["rows_dropped"] == {"missing_id": 3}


def test_null_ids_in_parquet(tmp_path):
    table = pa.table({"user_id": ["a", None], "item_id": ["x", "y"], "timestamp": [1700000000, 1700000001]})
    pq.write_table(table, tmp_path / "e.parquet")
    _check(validate_events(tmp_path / "e.parquet", now=NOW), "missing_id", "user_id", 1, [2], "error")


def test_float_ids_in_parquet(tmp_path):
    table = pa.table({"user_id": [1.0, 2.0], "item_id": ["x", "y"], "timestamp": [1700000000, 1700000001]})
    pq.write_table(table, tmp_path / "e.parquet")
    problem = _check(validate_events(tmp_path / "e.parquet", now=NOW), "bad_id_type", "user_id", 0, [], "error")
    assert "double" in problem.message


def test_unparseable_timestamps(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp
        a,x,2024-03-01T10:00:00Z
        a,x,2024-02-30T10:00:00Z
        a,x,
        a,x,1.5e9
    """)
    _check(report, "unparseable_timestamp", "timestamp", 3, [2, 3, 4], "error")


def test_naive_timestamps_without_and_with_a_timezone(tmp_path):
    text = """
        user_id,item_id,timestamp
        a,x,2024-03-01T10:00:00Z
        a,y,2024-03-01T10:00:00
    """
    _check(_validate(tmp_path, text), "naive_timestamp", "timestamp", 1, [2], "error")
    zoned = _validate(tmp_path, text, timezone="Europe/Lisbon")
    problem = _check(zoned, "naive_timestamp", "timestamp", 1, [2], "warning")
    assert "Europe/Lisbon" in problem.message and zoned.ok
    strict = _validate(tmp_path, text, timezone="Europe/Lisbon", strict=True)
    _check(strict, "naive_timestamp", "timestamp", 1, [2], "error")


def test_daylight_saving_fold_and_gap_are_counted(tmp_path):
    # IANA tz database via zoneinfo: America/New_York skipped 02:00-03:00 on
    # 2024-03-10 and repeated 01:00-02:00 on 2024-11-03.
    report = _validate(tmp_path, """
        user_id,item_id,timestamp
        a,x,2024-03-10T02:30:00
        a,x,2024-11-03T01:30:00
        a,x,2024-11-03T01:45:00
    """, timezone="America/New_York")
    _check(report, "dst_nonexistent", "timestamp", 1, [1], "warning")
    _check(report, "dst_ambiguous", "timestamp", 2, [2, 3], "warning")


def test_future_and_implausible_timestamps(tmp_path):
    # Accepted event times are [1970-01-01, 2100-01-01) UTC (docs/data-format.md): an epoch value in
    # milliseconds (13 digits) or a pre-1970 time is an error, so no single row can widen the time span
    # that later steps allocate over.
    report = _validate(tmp_path, f"""
        user_id,item_id,timestamp
        a,x,1700000000
        a,y,{NOW + 1}
        a,z,1969-07-20T20:17:40Z
        a,w,1700000000000
        a,v,9223372036854775807
        a,u,4102444799
    """)
    _check(report, "future_timestamp", "timestamp", 2, [2, 6], "warning")
    problem = _check(report, "implausible_timestamp", "timestamp", 3, [3, 4, 5], "error")
    assert "milliseconds" in problem.message
    assert not report.ok and report.summary["rows_kept"] == 3
    assert report.summary["rows_dropped"] == {"implausible_timestamp": 3}


def test_unknown_event_values(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp,event
        a,x,1700000000,impression
        a,x,1700000001,Click
        a,x,1700000002,
        a,x,1700000003,click
    """)
    problem = _check(report, "unknown_event", "event", 2, [2, 3], "error")
    assert "'Click' x1" in problem.message


def test_negative_and_non_numeric_dwell(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp,dwell_seconds
        a,x,1700000000,12
        a,y,1700000001,-3
        a,z,1700000002,long
        a,w,1700000003,
    """)
    _check(report, "negative_dwell", "dwell_seconds", 1, [2], "error")
    _check(report, "bad_dwell", "dwell_seconds", 1, [3], "error")
    assert report.summary["values_cleared"] == {"dwell_seconds": 2} and report.summary["rows_kept"] == 4


def test_position_below_one_or_not_an_integer(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp,position
        a,x,1700000000,1
        a,y,1700000001,0
        a,z,1700000002,2.5
        a,w,1700000003,3.0
        a,v,1700000004,top
    """)
    _check(report, "bad_position", "position", 3, [2, 3, 5], "error")


def test_exact_duplicates_are_dropped_and_counted(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp,event
        a,x,2024-03-01T10:00:00Z,impression
        a,x,2024-03-01T10:00:00Z,impression
        a,x,2024-03-01T10:00:00Z,click
        a,x,2024-03-01T10:00:00+00:00,impression
    """)
    # Row 4 is the same instant written differently: equal after parsing.
    _check(report, "duplicate_row", "*", 2, [2, 4], "warning")
    assert report.summary["rows_dropped"] == {"duplicate_row": 2} and report.summary["rows_kept"] == 2
    assert report.ok and not _validate(tmp_path, "user_id,item_id,timestamp\na,x,1\na,x,1\n", strict=True).ok


def test_clicks_without_impression_matched_by_request(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp,event,request_id
        a,y,1700000010,click,q1
        a,x,1700000000,impression,q1
        a,y,1700000000,impression,q1
        a,x,1700000020,click,q2
        a,z,1700000030,click,
        a,x,1700000040,click,
    """)
    # Row 1 matches row 3 (same request, order in the file does not matter);
    # row 4: item x was never shown in q2; row 5: no request, z never shown to a;
    # row 6: no request, x shown to a at 1700000000, before the click.
    _check(report, "unmatched_click", "event", 2, [4, 5], "warning")
    _check(report, "missing_id", "request_id", 2, [5, 6], "warning")


def test_clicks_without_impression_matched_by_user_and_time(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp,event
        a,x,1700000100,click
        a,x,1700000050,impression
        a,y,1700000100,click
        a,y,1700000200,impression
        b,x,1700000300,click
    """)
    # Row 1 is matched by row 2 (earlier); row 3 was shown only later; row 5 was shown to another user.
    _check(report, "unmatched_click", "event", 2, [3, 5], "warning")
    no_impressions = _validate(tmp_path, "user_id,item_id,timestamp,event\na,x,1,click\n")
    assert no_impressions.problem("unmatched_click") is None


def test_catalog_missing_and_duplicated_items(tmp_path):
    items = write_text(tmp_path / "items.csv", """
        item_id,kind,published_at
        x,article,2024-03-01T00:00:00Z
        y,clip,yesterday
        x,audio,
    """)
    report = _validate(tmp_path, """
        user_id,item_id,timestamp
        a,x,1700000000
        a,z,1700000001
        b,z,1700000002
    """, items=items)
    problem = _check(report, "catalog_missing_item", "item_id", 2, [2, 3], "warning")
    assert "1 distinct" in problem.message
    _check(report, "duplicate_item", "item_id", 1, [3], "error", source="items")
    _check(report, "unparseable_timestamp", "published_at", 1, [2], "error", source="items")
    assert report.summary["catalog"]["items"] == 2
    no_id = write_text(tmp_path / "noid.csv", "id,kind\nx,clip\n")
    _check(_validate(tmp_path, "user_id,item_id,timestamp\na,x,1\n", items=no_id),
           "missing_column", "item_id", 0, [], "error", source="items")


def test_activity_outliers_are_flagged(tmp_path):
    lines = ["user_id,item_id,timestamp"]
    lines += [f"reader{u},s{k},{1_700_000_000 + k}" for u in range(30) for k in range(4)]
    lines += [f"crawler,s{k},{1_700_000_000 + k}" for k in range(300)]
    report = _validate(tmp_path, "\n".join(lines))
    # Median of log10(4) over 31 users, MAD 0: threshold max(100, 4 * 10 ** 1.25) = 100.
    _check(report, "activity_outlier", "user_id", 1, [121], "warning")
    assert report.summary["activity_outliers"] == {"threshold": 100.0, "users": 1, "events": 300}
    assert report.ok
    assert _validate(tmp_path, "\n".join(lines), max_user_events=500).problem("activity_outlier") is None


def test_strict_turns_data_quality_warnings_into_errors(tmp_path):
    text = f"""
        user_id,item_id,timestamp,event
        a,x,{NOW + 5},impression
        a,x,{NOW + 5},impression
        a,y,1700000000,click
    """
    loose, strict = _validate(tmp_path, text), _validate(tmp_path, text, strict=True)
    assert loose.ok and not strict.ok
    for p in strict.problems:
        assert p.severity == ("error" if p.code in STRICT_CODES else "warning")
    assert strict.problem("unmatched_click").severity == "warning"


@pytest.mark.parametrize("chunk_rows", [1, 7])
def test_report_does_not_depend_on_chunk_size(tmp_path, chunk_rows):
    path = write_formats(invented_log(seed=1), tmp_path)["csv"]
    whole = validate_events(path, now=NOW)
    assert whole.problem("duplicate_row").rows == (8, 15)  # each straddles a 7-row chunk boundary
    assert whole.problem("unmatched_click").count == 1
    assert validate_events(path, now=NOW, chunk_rows=chunk_rows).to_dict() == whole.to_dict()


@pytest.mark.parametrize("fmt", ["parquet", "folder"])
def test_csv_and_parquet_give_the_same_report(tmp_path, fmt):
    paths = write_formats(invented_log(seed=2), tmp_path)
    expected = validate_events(paths["csv"], now=NOW).to_dict()
    got = validate_events(paths[fmt], now=NOW, chunk_rows=5).to_dict()
    for key in ("source", "format"):
        expected["summary"].pop(key), got["summary"].pop(key)
    assert got == expected


def test_text_report_names_columns_and_rows(tmp_path):
    report = _validate(tmp_path, """
        user_id,item_id,timestamp,position
        a,x,1700000000,0
    """)
    text = report.to_text()
    assert "Result: FAILED - 1 error(s)" in text
    assert "ERROR" in text and "position" in text and "bad_position" in text and "first rows: 1" in text
    with pytest.raises(ValueError, match="'chunk_rows' parameter of validate_events must be an int"):
        validate_events(tmp_path / "e.csv", chunk_rows=0)
    with pytest.raises(FileNotFoundError, match="No such file or folder"):
        validate_events(tmp_path / "absent.csv")


def test_hash_tables_match_python_sets_and_dicts():
    # Slow reference: Python's set and dict over the same keys, through several
    # table growths and with the reserved key 0 (stored as 1).
    from threefold.data._hashing import HashCounter, HashSet

    rng = np.random.default_rng(5)
    table, counter, seen, counts, minima = HashSet(), HashCounter(), set(), {}, {}
    for start in range(0, 6000, 1500):
        keys = rng.integers(2, 3000, 1500).astype(np.uint64)
        keys[:3] = [0, 0, 7]
        values = np.arange(start, start + 1500)
        repeats = table.mark_repeats(keys)
        expected = []
        for k, v in zip(keys.tolist(), values.tolist()):
            k = k or 1
            expected.append(k in seen)
            seen.add(k)
            counts[k] = counts.get(k, 0) + 1
            minima[k] = min(minima.get(k, v), v)
        assert repeats.tolist() == expected
        counter.add(keys, values)
    assert len(table) == len(seen) == len(counter)
    probe = np.arange(0, 3100, dtype=np.uint64)
    assert table.contains(probe).tolist() == [(k or 1) in seen for k in probe.tolist()]
    found, low = counter.lookup(probe)
    assert found.tolist() == [(k or 1) in counts for k in probe.tolist()]
    assert low[found].tolist() == [minima[k or 1] for k in probe[found].tolist()]
    got_counts, _ = counter.items()
    assert sorted(got_counts.tolist()) == sorted(counts.values())


def test_one_pass_load_equals_validate_plus_load(tmp_path):
    import warnings

    import pandas as pd

    from threefold.data.events import EventLogWarning, load_events
    from threefold.data.validate import load_validated_events

    frame = invented_log(seed=4)
    frame.loc[3, "timestamp"] = "soon"
    frame.loc[5, "position"] = "0"
    path = write_formats(frame, tmp_path)["csv"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EventLogWarning)
        expected = load_events(path, errors="drop", hash_user_ids_salt="s3")
    loaded, report = load_validated_events(path, now=NOW, chunk_rows=7, hash_user_ids_salt="s3")
    pd.testing.assert_frame_equal(loaded, expected)
    assert loaded.attrs == expected.attrs
    assert report.to_dict() == validate_events(path, now=NOW).to_dict()
    assert not report.ok and report.problem("unparseable_timestamp").rows == (4,)
    missing = write_text(tmp_path / "m.csv", "user_id,timestamp\na,1\n")
    with pytest.raises(ValueError, match="cannot be loaded: item_id: required column is missing"):
        load_validated_events(missing)


def test_ids_that_differ_only_in_case_are_an_error_unless_allowed(tmp_path):
    # Invented log: item 'A12' and 'a12' would become two items (and split their clicks).
    text = """
        user_id,item_id,timestamp
        u1,A12,1700000000
        u2,a12,1700000060
        U1,b7,1700000120
        u3,A12,1700000180
        u3,c9,1700000240
    """
    report = _validate(tmp_path, text)
    _check(report, "case_variant_id", "item_id", 2, [1, 2], "error")
    _check(report, "case_variant_id", "user_id", 2, [1, 3], "error")
    assert not report.ok
    allowed = _validate(tmp_path, text, allow=["case_variant_id"])
    _check(allowed, "case_variant_id", "item_id", 2, [1, 2], "warning")
    assert allowed.ok


def test_case_variants_across_chunks_count_each_id_once(tmp_path):
    lines = "\n".join(f"u{i % 3},{'X' if i == 7 else 'x'}{i % 2},{1700000000 + i}" for i in range(10))
    report = _validate(tmp_path, "user_id,item_id,timestamp\n" + lines, chunk_rows=3)
    _check(report, "case_variant_id", "item_id", 2, [2, 8], "error")  # x1 first at row 2, X1 at row 8


def test_every_command_that_reads_a_log_refuses_case_variants_even_when_dropping(tmp_path):
    from threefold.pipeline.prepare import read_log

    path = write_text(tmp_path / "e.csv", """
        user_id,item_id,timestamp
        u1,A12,1700000000
        u2,a12,1700000060
    """)
    with pytest.raises(ValueError, match=r"e\.csv: column 'item_id': 2 row\(s\) with case_variant_id \(first rows 1, 2\)"):
        read_log(path, errors="drop")
    with pytest.warns(UserWarning, match="case_variant_id"):
        events, report = read_log(path, allow=["case_variant_id"])
    assert sorted(events["item_id"]) == ["A12", "a12"] and report.ok


def test_a_timestamp_far_outside_the_bulk_of_the_log_is_flagged(tmp_path):
    # Invented log: 200 events over four days of March 2024, and one row in 1999 (inside the accepted range).
    lines = [f"u{i % 7},i{i % 5},{1_709_251_200 + i * 1700}" for i in range(200)]
    lines.insert(120, "u1,i1,915148800")  # 1999-01-01, data row 121
    report = _validate(tmp_path, "user_id,item_id,timestamp\n" + "\n".join(lines))
    problem = _check(report, "outlying_timestamp", "timestamp", 1, [121], "error")
    assert "2024-03-01 to 2024-03-04" in problem.message and not report.ok
    allowed = _validate(tmp_path, "user_id,item_id,timestamp\n" + "\n".join(lines), allow=["outlying_timestamp"])
    _check(allowed, "outlying_timestamp", "timestamp", 1, [121], "warning")
    assert allowed.ok
    plain = _validate(tmp_path, "user_id,item_id,timestamp\n" + "\n".join(lines[:120] + lines[121:]))
    assert plain.problem("outlying_timestamp", "timestamp") is None  # a log of four ordinary days is not flagged


def test_a_log_with_an_outlying_day_is_refused_by_every_reader_even_when_dropping(tmp_path):
    # Issue 15: days far outside the bulk of the log change a model (the split, the decay, the dayparts), and no
    # single row is wrong, so dropping does not lift the error; allow=["outlying_timestamp"] accepts them.
    from threefold.pipeline.prepare import read_log

    lines = [f"u{i % 7},i{i % 5},{1_709_251_200 + i * 1700}" for i in range(200)]
    lines.insert(120, "u1,i1,915148800")  # 1999-01-01, data row 121
    path = tmp_path / "e.csv"
    path.write_text("user_id,item_id,timestamp\n" + "\n".join(lines) + "\n")
    with pytest.raises(ValueError, match=r"e\.csv: column 'timestamp': 1 row\(s\) with outlying_timestamp "
                                         r"\(first rows 121\).*--allow outlying_timestamp"):
        read_log(path, errors="drop")
    with pytest.warns(UserWarning, match="outlying_timestamp"):
        events, report = read_log(path, allow=["outlying_timestamp"])
    assert len(events) == 201 and report.ok


def test_allow_names_only_the_suspicious_codes(tmp_path):
    path = tmp_path / "e.csv"
    path.write_text("user_id,item_id,timestamp\nu1,i1,1700000000\n")
    with pytest.raises(ValueError, match=r"allow: unknown problem code\(s\) 'missing_id'; the codes that can be "
                                         r"allowed are case_variant_id, outlying_timestamp"):
        validate_events(path, allow=["missing_id"])
