"""The main job end to end at scale: simulate, validate, build, train and score, time and peak memory per stage.

Each stage is the real command in its own child process; its peak resident
memory is the child's ``ru_maxrss`` from ``os.wait4`` (the child's own, not
inherited). The reference, measured in the same script, is a plain
``pyarrow.parquet.read_table`` of the same log in its own process: the least
any stage that reads the log must do. Invented data (the demo simulator).

    .venv/bin/python experiments/reliability/end_to_end.py --events 10000000
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from kills import threefold, user_env  # noqa: E402

CONFIG = """
[experiment]
name = "end-to-end"

[data]
events = "{events}"
items = "{items}"
timezone = "{timezone}"

[build]
contexts = ["daypart", "device"]

[split]
cutoff = "{cutoff}"

[evaluation]
ks = [10]
n_resamples = 50
random_state = 0

[models.popularity]
method = "popularity"

[models.cp]
method = "cp"
structure = "user*item + item*device:8"
rank = 24
max_sweeps = 5
random_state = 1
"""


def peak_gib(command: list[str], env: dict) -> tuple[float, float, int]:
    """(seconds, peak RSS GiB, exit code) of ``command`` run as a child, from ``os.wait4``."""
    with tempfile.TemporaryFile() as errors:  # a file, not a pipe: a chatty child can never block on it
        began = time.perf_counter()
        child = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=errors, env=env)
        _, status, usage = os.wait4(child.pid, 0)
        child.returncode = code = os.waitstatus_to_exitcode(status)
        seconds = time.perf_counter() - began
        if code != 0:
            errors.seek(0)
            raise SystemExit(f"{' '.join(command[:3])} failed ({code}): {errors.read().decode()[-2000:]}")
    return seconds, usage.ru_maxrss / 2**20, code  # ru_maxrss is in KiB on Linux


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--events", type=int, default=10_000_000, help="log rows to simulate (default 10,000,000)")
    parser.add_argument("--requests", type=int, default=100_000, help="requests to score (default 100,000)")
    parser.add_argument("--json", action="store_true", help="print the stages as JSON on the last line")
    args = parser.parse_args(argv)
    import pyarrow.parquet as pq

    env = user_env()
    rows = []
    with tempfile.TemporaryDirectory(prefix="threefold-e2e-") as tmp:
        folder = Path(tmp)
        site = folder / "site"

        def measure(name, command):
            seconds, peak, _ = peak_gib(command, env)
            rows.append({"stage": name, "seconds": round(seconds, 1), "peak_gib": round(peak, 2)})
            print(f"{name}: {seconds:.1f} s, peak {peak:.2f} GiB", file=sys.stderr, flush=True)

        measure("simulate", threefold("simulate", str(site), "--events", str(args.events)))
        events, items = site / "events.parquet", site / "items.parquet"
        timezone = json.loads((site / "scenario.json").read_text())["parameters"]["timezone"]
        measure("reference: pyarrow read_table of the log",
                [sys.executable, "-c", f"import pyarrow.parquet as pq; pq.read_table({str(events)!r})"])
        measure("validate", threefold("validate", str(events), "--items", str(items), "--timezone", timezone))
        measure("build", threefold("build", str(events), str(folder / "tensor"), "--context", "daypart",
                                   "--context", "device", "--timezone", timezone))
        times = pq.read_table(events, columns=["timestamp"]).column("timestamp").to_numpy()
        cutoff = time.strftime("%Y-%m-%dT%H:%M:%S+00:00", time.gmtime(int(times.max()) - 2 * 86_400))
        config = folder / "config.toml"
        config.write_text(CONFIG.format(events=events, items=items, timezone=timezone, cutoff=cutoff))
        store = folder / "store"
        measure("train (popularity + CP rank 24, 5 sweeps, evaluated)",
                threefold("train", str(config), "--store", str(store)))
        runs = json.loads(subprocess.run(threefold("runs", "--store", str(store), "--json"), capture_output=True,
                                         text=True, env=env, check=True).stdout)
        run_id = next(r["run_id"] for r in runs if r["name"] == "cp")
        log = pq.read_table(events, columns=["request_id", "user_id", "timestamp", "device"]).to_pandas()
        requests = log[log["timestamp"] >= int(times.max()) - 86_400].drop_duplicates("request_id").head(args.requests)
        requests.to_parquet(folder / "requests.parquet", index=False)
        measure(f"score ({len(requests):,} requests, top 10 with reasons)",
                threefold("score", run_id, "--requests", str(folder / "requests.parquet"), "--k", "10", "--explain",
                          "top3", "--out", str(folder / "lists"), "--store", str(store)))
    lines = [f"{args.events:,} simulated events; each stage a fresh child process (peak RSS from `os.wait4`).", "",
             "| stage | seconds | peak memory |", "|---|---|---|"]
    lines += [f"| {r['stage']} | {r['seconds']} | {r['peak_gib']:.2f} GiB |" for r in rows]
    lines += ["", f"Command: `.venv/bin/python experiments/reliability/end_to_end.py --events {args.events}`"]
    print("\n".join(lines))
    if args.json:
        print(json.dumps(rows))
    return 0


if __name__ == "__main__":
    sys.exit(main())
