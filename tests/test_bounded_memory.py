"""One bad value never makes a command allocate without bound: real processes, peak memory measured.

Each case is a small invented log (seeded, planted-truth style: one row altered)
read by ``threefold build`` in a child process. The process must end with one
clear message naming the file, the column and the row, exit 1, print no
traceback, and peak at well under 1 GB (``ru_maxrss`` of the child, from
``os.wait4``; Linux reports it in KiB). Before the bounds, the epoch-milliseconds
row asked for 14.7 GiB and the int64-max timestamp for 72.8 PiB.
"""

import os
import sys
import tracemalloc

import numpy as np
import pandas as pd
import pytest

PEAK_LIMIT_KIB = 1024 * 1024  # 1 GiB


def _log(n=400, seed=3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "request_id": [f"r{i // 4:04d}" for i in range(n)],
        "timestamp": (1_774_000_000 + np.arange(n) * 60).astype(object),
        "user_id": [f"u{u:03d}" for u in rng.integers(0, 30, n)],
        "item_id": [f"i{i:03d}" for i in rng.integers(0, 40, n)],
        "event": np.where(rng.random(n) < 0.2, "click", "impression"),
        "position": (np.arange(n) % 4 + 1).astype(object),
    })


def _peak_of(args) -> tuple[int, str, int]:
    """Exit code, output and peak resident memory (KiB) of ``threefold ARGS`` in a fresh process."""
    read_out, write_out = os.pipe()
    pid = os.fork()
    if pid == 0:  # child: run the command with its output into the pipe
        os.close(read_out)
        os.dup2(write_out, 1)
        os.dup2(write_out, 2)
        os.execv(sys.executable, [sys.executable, "-m", "threefold.cli", *args])
    os.close(write_out)
    with os.fdopen(read_out) as stream:
        output = stream.read()
    _, status, usage = os.wait4(pid, 0)
    return os.waitstatus_to_exitcode(status), output, int(usage.ru_maxrss)


@pytest.mark.parametrize("column, value, code", [
    ("timestamp", 1_774_000_000_000, "implausible_timestamp"),      # epoch milliseconds
    ("timestamp", 2**63 - 1, "implausible_timestamp"),              # int64 max
    ("timestamp", -2_000_000_000, "implausible_timestamp"),         # 1906
    ("position", 10**9, "bad_position"),
    ("position", "1e20", "bad_position"),
])
def test_one_bad_value_is_a_clear_error_in_bounded_memory(tmp_path, column, value, code):
    events = _log()
    events.loc[5, column] = value  # data row 6
    path = tmp_path / "events.csv"
    events.to_csv(path, index=False)
    exit_code, output, peak = _peak_of(["build", str(path), str(tmp_path / "tensor"), "--context", "daypart",
                                        "--timezone", "Europe/Paris"])
    assert exit_code == 1, output
    assert "Traceback" not in output
    assert f"{path}: column {column!r}: 1 row(s) with {code} (first rows 6)" in output
    assert "--drop-bad-rows" in output
    assert peak < PEAK_LIMIT_KIB, f"peak {peak / 1024:.0f} MiB"


def test_dropping_the_bad_row_is_explicit_and_listed(tmp_path):
    events = _log()
    events.loc[5, "timestamp"] = 1_774_000_000_000
    path = tmp_path / "events.csv"
    events.to_csv(path, index=False)
    exit_code, output, peak = _peak_of(["build", str(path), str(tmp_path / "tensor"), "--context", "daypart",
                                        "--timezone", "Europe/Paris", "--drop-bad-rows"])
    assert exit_code == 0, output
    assert "read 400 rows, kept 399, dropped 1 {'implausible_timestamp': 1}" in output
    assert peak < PEAK_LIMIT_KIB


def test_local_time_of_far_apart_timestamps_costs_rows_not_span():
    # A direct check of the offset lookup with a span of 80 years in two rows, against the
    # standard library's zoneinfo (PEP 615) one timestamp at a time.
    from datetime import datetime, timezone
    from zoneinfo import ZoneInfo

    from threefold.data.context import _local_seconds

    seconds = np.array([10, 4_000_000_000, 1_711_846_800, 1_711_846_799], dtype=np.int64)
    _local_seconds(seconds[:2], "UTC")  # warm up the zone cache outside the measurement
    tracemalloc.start()  # numpy reports its buffers to tracemalloc
    got = _local_seconds(seconds, "Europe/Paris")
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 1_000_000, f"{peak:,} bytes for four timestamps"  # a dense quarter-hour table: ~35 MB per array
    zone = ZoneInfo("Europe/Paris")
    expected = [int(datetime.fromtimestamp(int(s), timezone.utc).astimezone(zone).replace(tzinfo=timezone.utc)
                    .timestamp()) for s in seconds]
    np.testing.assert_array_equal(got, expected)


def test_positions_beyond_the_bound_are_refused_by_the_propensity_estimate():
    from threefold.data.propensity import estimate_position_propensity

    events = _log()
    events["timestamp"] = events["timestamp"].astype(np.int64)
    events["position"] = events["position"].astype(float)
    events.loc[7, "position"] = 1e9
    with pytest.raises(ValueError, match=r"Column 'position': positions above 10,000 \(rows \[7\]"):
        estimate_position_propensity(events)
