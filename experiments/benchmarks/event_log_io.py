"""Benchmark: validating and loading a large event log, beside plain pyarrow reads.

Each contender runs in its own child process; wall time (imports excluded) and peak resident memory
(``resource.getrusage(RUSAGE_SELF).ru_maxrss`` in the child) are reported. The
references read the same file with pyarrow alone: ``read_csv`` (whole file,
multithreaded, types inferred) and the streaming ``open_csv`` reader with every
column as text (what threefold's chunked reader starts from).

The log is invented random data (fictional users, items and requests: lists of
ten impressions, 8% of them followed by a click row, 0.1% exact duplicates),
written once to ``--path`` if the file does not exist.

Usage::

    python experiments/benchmarks/event_log_io.py --rows 10000000 --path /tmp/events_10m.csv \
        --out experiments/benchmarks/results/event-log.md
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time


# name -> (imports, timed code); the timed code leaves the row count in ``n``.
CONTENDERS = {
    "pyarrow read_csv (reference)": ("import pyarrow.csv as c", "n = c.read_csv(PATH).num_rows"),
    "pyarrow open_csv, text columns (reference)": (
        "import pyarrow as pa, pyarrow.csv as c",
        "names = c.open_csv(PATH).schema.names\n"
        "r = c.open_csv(PATH, convert_options=c.ConvertOptions(column_types={k: pa.string() for k in names}))\n"
        "n = sum(b.num_rows for b in r)",
    ),
    "threefold validate_events": (
        "from threefold.data.validate import validate_events",
        "n = validate_events(PATH, now=2_000_000_000).summary['rows_read']",
    ),
    "threefold load_events": (
        "import warnings; from threefold.data.events import load_events; warnings.simplefilter('ignore')",
        "n = len(load_events(PATH))",
    ),
    "threefold load_validated_events (one pass)": (
        "from threefold.data.validate import load_validated_events",
        "n = len(load_validated_events(PATH, now=2_000_000_000)[0])",
    ),
}


def write_log(path: str, rows: int, seed: int = 0, block: int = 1_000_000) -> None:
    """Invented log: lists of 10 impressions, 8% of them followed by a click row, 0.1% client-retry duplicates."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.csv as pcsv

    rng = np.random.default_rng(seed)
    n_users, n_items = max(rows // 40, 10), max(rows // 400, 10)
    names = ("user_id", "item_id", "timestamp", "event", "position", "dwell_seconds", "request_id", "device", "page_tone")
    options = pcsv.WriteOptions(quoting_style="none")
    written, first_request = 0, 0
    with pcsv.CSVWriter(path, pa.schema([(k, pa.string()) for k in names]), write_options=options) as writer:
        while written < rows:
            n_req = block // 11
            req = np.repeat(np.arange(first_request, first_request + n_req), 10)
            first_request += n_req
            user = np.repeat(rng.integers(0, n_users, n_req), 10)
            ts = np.repeat(1_700_000_000 + rng.integers(0, 30 * 86400, n_req), 10)
            item = rng.integers(0, n_items, req.size)
            position = np.tile(np.arange(1, 11), n_req)
            clicked = np.flatnonzero(rng.random(req.size) < 0.08)
            is_click = np.r_[np.zeros(req.size, bool), np.ones(clicked.size, bool)]
            pick = np.r_[np.arange(req.size), clicked]
            order = np.lexsort((is_click, req[pick]))
            pick, is_click = pick[order], is_click[order]
            dup = np.flatnonzero(rng.random(pick.size) < 0.001)
            pick, is_click = np.insert(pick, dup + 1, pick[dup]), np.insert(is_click, dup + 1, is_click[dup])
            m = min(pick.size, rows - written)
            pick, is_click = pick[:m], is_click[:m]
            when = ts[pick] + 30 * is_click
            stamps = np.datetime_as_string(when.astype("datetime64[s]"), unit="s").astype(object) + "+00:00"
            dwell = np.round(rng.exponential(40.0, m), 1).astype(str).astype(object)
            cols = {
                "user_id": np.char.add("reader", user[pick].astype(str)),
                "item_id": np.char.add("story", item[pick].astype(str)),
                "timestamp": stamps,
                "event": np.where(is_click, "click", "impression"),
                "position": position[pick].astype(str),
                "dwell_seconds": np.where(is_click, dwell, ""),
                "request_id": np.char.add("q", req[pick].astype(str)),
                "device": np.array(["phone", "desktop", "tablet"])[(user[pick] + req[pick]) % 3],
                "page_tone": rng.choice(np.array(["calm", "urgent", "playful"]), m),
            }
            writer.write_table(pa.table({k: pa.array(v.astype(str)) for k, v in cols.items()}))
            written += m


def child(name: str, path: str) -> None:
    setup, code = CONTENDERS[name]
    scope = {"PATH": path}
    exec(setup, scope)
    start = time.perf_counter()
    exec(code, scope)
    seconds = time.perf_counter() - start
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"seconds": seconds, "peak_mb": peak_mb, "rows": int(scope["n"])}))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--path", default="/tmp/threefold_events_10m.csv")
    parser.add_argument("--out", default=None)
    parser.add_argument("--child", default=None, help=argparse.SUPPRESS)
    parser.add_argument("--write", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.write:
        write_log(args.path, args.rows)
        return
    if args.child:
        child(args.child, args.path)
        return
    if not os.path.exists(args.path):  # in a child, so that this parent stays small (ru_maxrss survives exec)
        t = time.perf_counter()
        subprocess.run([sys.executable, __file__, "--write", "--rows", str(args.rows), "--path", args.path], check=True)
        print(f"wrote {args.path} in {time.perf_counter() - t:.1f} s", file=sys.stderr)
    size_mb = os.path.getsize(args.path) / 1e6
    lines = [
        f"Event log: {args.path}, {size_mb:,.0f} MB of CSV, {args.rows:,} rows (invented data).",
        f"Machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores; one child process per contender.",
        "",
        "| contender | rows | wall time (s) | peak RSS (MB) | time / pyarrow read_csv |",
        "| --- | ---: | ---: | ---: | ---: |",
    ]
    results, load_start = {}, os.getloadavg()[0]
    for name in CONTENDERS:
        out = subprocess.run([sys.executable, __file__, "--child", name, "--path", args.path],
                             check=True, capture_output=True, text=True).stdout
        results[name] = json.loads(out.strip().splitlines()[-1])
        print(name, results[name], file=sys.stderr)
    ref = results["pyarrow read_csv (reference)"]["seconds"]
    for name, r in results.items():
        lines.append(f"| {name} | {r['rows']:,} | {r['seconds']:.1f} | {r['peak_mb']:,.0f} | {r['seconds'] / ref:.1f} |")
    lines += ["", f"1-minute load average (the machine is shared): {load_start:.1f} at the start, "
              f"{os.getloadavg()[0]:.1f} at the end; compare ratios rather than absolute times.",
              "", "Reproduce:", "", "```",
              f"python experiments/benchmarks/event_log_io.py --rows {args.rows} --path {args.path}"
              + (f" --out {args.out}" if args.out else ""), "```"]
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out:
        with open(args.out, "w") as handle:
            handle.write(text)


if __name__ == "__main__":
    main()
