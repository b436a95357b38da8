"""A corpus of bad inputs: each ends in one clear message naming the file, the column and the rows.

Every case is written here by hand (invented data) and run through the
command line in-process (``threefold.cli.main``): the exit code is 1, stderr
holds one ``threefold COMMAND: error:`` line that matches the expected text,
and no traceback. The messages are the project's own specification
(docs/data-format.md, docs/experiments.md, docs/scoring.md).
"""

from __future__ import annotations

import re
import textwrap

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from threefold import cli
from threefold.models.model_io import save_model

from _tracking import SERVING, SMALL_CONFIG, tiny_cp

HEADER = "request_id,user_id,item_id,timestamp,event,position,dwell_seconds\n"
GOOD = "q1,u1,i1,1774000000,impression,1,\nq1,u1,i1,1774000005,click,1,12\n"


def _events_csv(*rows: str) -> str:
    return HEADER + GOOD + "".join(row + "\n" for row in rows)


# name -> (file name, content as text or bytes, expected message; {path} is the file)
EVENT_LOGS = {
    "empty file": ("e.csv", "", r"{path}: the file is empty"),
    "header only": ("e.csv", HEADER, r"{path}: no usable rows \(read 0: only a header\)"),
    "unclosed quote": ("e.csv", _events_csv('q2,u2,"i2,1774000100,impression,1,'),
                       r"{path}: data row 3 has \d field\(s\), the header 7 \(an unclosed quote\?\)"),
    "ragged row": ("e.csv", _events_csv("q2,u2,i2,1774000100,impression,1,,extra"),
                   r"{path}: data row 3 has 8 field\(s\), the header 7"),
    "not UTF-8": ("e.csv", (HEADER + GOOD).encode() + b"q2,u2,i\xff2,1774000100,impression,1,\n",
                  r"{path}: data row 3, column 3: not valid UTF-8"),
    "duplicate header": ("e.csv", "user_id,item_id,timestamp,user_id\nu1,i1,1774000000,u2\n",
                         r"{path}: column\(s\) \['user_id'\] appear more than once"),
    "no user_id column": ("e.csv", "item_id,timestamp\ni1,1774000000\n", r"{path}.*user_id"),
    "no timestamp column": ("e.csv", "user_id,item_id\nu1,i1\n", r"{path}.*timestamp"),
    "blank user id": ("e.csv", _events_csv("q2,,i2,1774000100,impression,1,"),
                      r"{path}: column 'user_id': 1 row\(s\) with missing_id \(first rows 3\)"),
    "nan item id": ("e.csv", _events_csv("q2,u2,NaN,1774000100,impression,1,"),
                    r"{path}: column 'item_id': 1 row\(s\) with missing_id \(first rows 3\)"),
    "word for a time": ("e.csv", _events_csv("q2,u2,i2,yesterday,impression,1,"),
                        r"{path}: column 'timestamp': 1 row\(s\) with unparseable_timestamp \(first rows 3\)"),
    "30 February": ("e.csv", _events_csv("q2,u2,i2,2026-02-30T10:00:00Z,impression,1,"),
                    r"{path}: column 'timestamp': 1 row\(s\) with unparseable_timestamp \(first rows 3\)"),
    "epoch milliseconds": ("e.csv", _events_csv("q2,u2,i2,1774000100000,impression,1,"),
                           r"{path}: column 'timestamp': 1 row\(s\) with implausible_timestamp \(first rows 3\)"),
    "epoch microseconds": ("e.csv", _events_csv("q2,u2,i2,1774000100000000,impression,1,"),
                           r"{path}: column 'timestamp': 1 row\(s\) with implausible_timestamp \(first rows 3\)"),
    "int64 max": ("e.csv", _events_csv("q2,u2,i2,9223372036854775807,impression,1,"),
                  r"{path}: column 'timestamp': 1 row\(s\) with implausible_timestamp \(first rows 3\)"),
    "beyond int64": ("e.csv", _events_csv("q2,u2,i2,99999999999999999999,impression,1,"),
                     r"{path}: column 'timestamp': 1 row\(s\) with unparseable_timestamp \(first rows 3\)"),
    "before 1970": ("e.csv", _events_csv("q2,u2,i2,1969-07-20T20:17:40Z,impression,1,"),
                    r"{path}: column 'timestamp': 1 row\(s\) with implausible_timestamp \(first rows 3\)"),
    "no offset, no zone": ("e.csv", _events_csv("q2,u2,i2,2026-03-20T10:00:00,impression,1,"),
                           r"{path}: column 'timestamp': 1 row\(s\) with naive_timestamp \(first rows 3\)"),
    "unknown event": ("e.csv", _events_csv("q2,u2,i2,1774000100,view,1,"),
                      r"{path}: column 'event': 1 row\(s\) with unknown_event \(first rows 3\)"),
    "negative dwell": ("e.csv", _events_csv("q2,u2,i2,1774000100,click,1,-4"),
                       r"{path}: column 'dwell_seconds': 1 row\(s\) with negative_dwell \(first rows 3\)"),
    "dwell as text": ("e.csv", _events_csv("q2,u2,i2,1774000100,click,1,long"),
                      r"{path}: column 'dwell_seconds': 1 row\(s\) with bad_dwell \(first rows 3\)"),
    "position 0": ("e.csv", _events_csv("q2,u2,i2,1774000100,impression,0,"),
                   r"{path}: column 'position': 1 row\(s\) with bad_position \(first rows 3\)"),
    "position 2.5": ("e.csv", _events_csv("q2,u2,i2,1774000100,impression,2.5,"),
                     r"{path}: column 'position': 1 row\(s\) with bad_position \(first rows 3\)"),
    "position 10^9": ("e.csv", _events_csv("q2,u2,i2,1774000100,impression,1000000000,"),
                      r"{path}: column 'position': 1 row\(s\) with bad_position \(first rows 3\)"),
    "position 1e20": ("e.csv", _events_csv("q2,u2,i2,1774000100,impression,1e20,"),
                      r"{path}: column 'position': 1 row\(s\) with bad_position \(first rows 3\)"),
    "position as a word": ("e.csv", _events_csv("q2,u2,i2,1774000100,impression,first,"),
                           r"{path}: column 'position': 1 row\(s\) with bad_position \(first rows 3\)"),
    "item ids in two cases": ("e.csv", _events_csv("q2,u2,I1,1774000100,impression,1,"),
                              r"{path}: column 'item_id': 2 row\(s\) with case_variant_id \(first rows 1, 3\)"),
    "user ids in two cases": ("e.csv", _events_csv("q2,U1,i2,1774000100,impression,1,"),
                              r"{path}: column 'user_id': 2 row\(s\) with case_variant_id \(first rows 1, 3\)"),
}


@pytest.fixture()
def main(capsys):
    def run(*argv: str) -> str:
        code = cli.main(list(argv))
        out, err = capsys.readouterr()
        assert code == 1, (out, err)
        assert "Traceback" not in err
        errors = [line for line in err.splitlines() if ": error: " in line]
        assert len(errors) == 1, err
        return errors[0]
    return run


@pytest.mark.parametrize("case", sorted(EVENT_LOGS))
def test_a_bad_event_log_is_one_clear_message(case, tmp_path, main):
    name, content, expected = EVENT_LOGS[case]
    path = tmp_path / name
    path.write_bytes(content if isinstance(content, bytes) else content.encode())
    message = main("build", str(path), str(tmp_path / "tensor"))
    assert re.search(expected.format(path=re.escape(str(path))), message), message


def _parquet_log(path, **columns):
    base = {"user_id": ["u1", "u2"], "item_id": ["i1", "i2"], "timestamp": [1_774_000_000, 1_774_000_060]}
    pq.write_table(pa.table({**base, **columns}), path)


def test_damaged_and_mistyped_parquet_logs(tmp_path, main):
    good = tmp_path / "good.parquet"
    _parquet_log(good)
    cut = tmp_path / "cut.parquet"
    cut.write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    assert f"{cut}: not a readable Parquet file" in main("build", str(cut), str(tmp_path / "t1"))
    floats = tmp_path / "floats.parquet"
    _parquet_log(floats, item_id=[1.0, 2.0])
    assert "item_id" in main("build", str(floats), str(tmp_path / "t2"))
    assert "No such file or folder" in main("build", str(tmp_path / "nowhere.csv"), str(tmp_path / "t3"))
    (tmp_path / "empty_folder").mkdir()
    assert "holds no Parquet files" in main("build", str(tmp_path / "empty_folder"), str(tmp_path / "t4"))


CONFIG_CASES = {
    "unknown section": (SMALL_CONFIG.replace("[split]", "[splitting]"), (),
                        r"unknown key 'splitting' in the config; did you mean 'split'\?"),
    "typo in a key": (SMALL_CONFIG.replace("max_sweeps = 2", "max_sweep = 2"), (),
                      r"unknown key 'max_sweep' in \[models\.cp\]"),
    "rank 0": (SMALL_CONFIG.replace("rank = 4", "rank = 0"), (), r"'rank' parameter of \[models\.cp\]"),
    "not TOML": (SMALL_CONFIG + "\n[models.x\n", (), r"not valid TOML"),
    "unknown method": (SMALL_CONFIG.replace('method = "cp"', 'method = "svd"'), (), r"svd"),
    "cutoff without offset": (SMALL_CONFIG.replace("2026-04-04T00:00:00+00:00", "2026-04-04"), (),
                              r"'cutoff' parameter '2026-04-04' has no UTC offset"),
    "unset a key it does not set": (SMALL_CONFIG, ("--unset", "models.cp.solver"),
                                    r"cannot remove 'models\.cp\.solver': the config does not set it"),
    "set without a value": (SMALL_CONFIG, ("--set", "rank"), r"--set 'rank': write section\.key=value"),
    "events file missing": (SMALL_CONFIG.replace("events.parquet", "absent.parquet"), (),
                            r"bad\.toml: \[data\] events = '.*absent\.parquet': no such file or folder"),
    "items file missing": (SMALL_CONFIG.replace("items.parquet", "absent.parquet"), (),
                           r"bad\.toml: \[data\] items = '.*absent\.parquet': no such file or folder"),
    "context column absent": (SMALL_CONFIG.replace('"daypart", "device"', '"daypart", "screen"').replace(
        "item*device:2", "item*screen:2"), (), r"bad\.toml: \[build\] contexts read the column\(s\) \['screen'\]"),
    "cutoff after the log": (SMALL_CONFIG.replace("2026-04-04T00:00:00+00:00", "2027-04-04T00:00:00+00:00"), (),
                             r"bad\.toml: \[split\] cutoff 2027-04-04T00:00:00Z is outside the log's time range"),
    "cutoff before the log": (SMALL_CONFIG.replace("2026-04-04T00:00:00+00:00", "2020-04-04T00:00:00+00:00"), (),
                              r"bad\.toml: \[split\] cutoff 2020-04-04T00:00:00Z is outside the log's time range"),
    "a mode no context builds": (SMALL_CONFIG.replace("item*device:2", "item*weather:2"), (), r"weather"),
}


@pytest.mark.parametrize("case", sorted(CONFIG_CASES))
def test_a_bad_config_is_one_clear_message(case, tmp_path, main):
    text, extra, expected = CONFIG_CASES[case]
    path = tmp_path / "bad.toml"
    path.write_text(textwrap.dedent(text))
    message = main("train", str(path), "--store", str(tmp_path / "runs"), *extra)
    assert re.search(expected, message), message


@pytest.fixture(scope="module")
def model_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("bad-requests") / "model"
    result, _ = tiny_cp(seed=2)
    save_model(result, folder, extra={"serving": SERVING})
    return folder


REQUEST_CASES = {
    "no user_id column": (pd.DataFrame({"request_id": ["a"]}), None, r"need the column\(s\) \['user_id'\]"),
    "a repeated request id": (pd.DataFrame({"request_id": ["a", "b", "a"], "user_id": "u01"}), None,
                              r"column 'request_id': a request id given before .* data row\(s\) 3"),
    "a blank request id": (pd.DataFrame({"request_id": ["a", ""], "user_id": "u01"}), None,
                           r"column 'request_id': a blank request id .* data row\(s\) 2"),
    "items in the requests": (pd.DataFrame({"request_id": ["a"], "user_id": "u01", "item_id": "i01"}), None,
                              r"the requests have an 'item_id' column"),
    "a candidate of no request": (pd.DataFrame({"request_id": ["a"], "user_id": "u01"}),
                                  pd.DataFrame({"request_id": ["a", "zz"], "item_id": ["i01", "i02"]}),
                                  r"column 'request_id': a request id that is not in the requests .* data row\(s\) 2"),
}


@pytest.mark.parametrize("case", sorted(REQUEST_CASES))
def test_bad_requests_that_concern_the_whole_table_are_one_clear_message(case, tmp_path, main, model_folder):
    requests, candidates, expected = REQUEST_CASES[case]
    requests.to_csv(tmp_path / "requests.csv", index=False)
    argv = ["score", str(model_folder), "--requests", str(tmp_path / "requests.csv"), "--out", str(tmp_path / "o")]
    if candidates is not None:
        candidates.to_csv(tmp_path / "candidates.csv", index=False)
        argv += ["--candidates", str(tmp_path / "candidates.csv")]
    message = main(*argv)
    assert re.search(expected, message), message
    assert ("candidates.csv" if candidates is not None else "requests.csv") in message  # the file is named
