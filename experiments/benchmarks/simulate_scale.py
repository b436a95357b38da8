"""Time and peak memory of the demo scenario generator at 1M and 10M events.

Each measurement runs in its own child process; peak RSS comes from
``resource.getrusage`` inside the child. The reference is a plain numpy/pyarrow
job of comparable shape: draw ``n`` uniform numbers, argsort them (the log's
final time ordering) and build one ``n``-row string id column by ``take`` —
the least work any generator of an ``n``-row sorted log with string ids does.

    .venv/bin/python experiments/benchmarks/simulate_scale.py [--sizes 1000000 10000000]
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import os
import platform
import resource
import tempfile
import time


def _peak_gb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2  # kB on Linux


def _simulate(n: int, queue) -> None:
    from threefold.demo.simulate import simulate_site, write_site

    start = time.perf_counter()
    site = simulate_site(n_events=n, random_state=20260323)
    seconds = time.perf_counter() - start
    with tempfile.TemporaryDirectory() as folder:
        start = time.perf_counter()
        write_site(site, folder, file_format="parquet")
        write_seconds = time.perf_counter() - start
        size_mb = sum(os.path.getsize(os.path.join(folder, f)) for f in os.listdir(folder)) / 1e6
    queue.put({"seconds": seconds, "write_seconds": write_seconds, "peak_gb": _peak_gb(),
               "rows": len(site.events), "users": site.params.n_users, "items": site.params.n_items,
               "size_mb": size_mb})


def _reference(n: int, queue) -> None:
    import numpy as np
    import pyarrow as pa

    start = time.perf_counter()
    rng = np.random.default_rng(0)
    order = np.argsort(rng.random(n), kind="stable")
    labels = pa.array([f"u{k:06d}" for k in range(max(n // 100, 50))])
    column = labels.take(pa.array(order % len(labels)))
    seconds = time.perf_counter() - start
    queue.put({"seconds": seconds, "peak_gb": _peak_gb(), "rows": len(column)})


def _run(target, n: int) -> dict:
    context = mp.get_context("spawn")
    queue = context.Queue()
    child = context.Process(target=target, args=(n, queue))
    child.start()
    result = queue.get()
    child.join()
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[1_000_000, 10_000_000])
    args = parser.parse_args()
    rows = []
    for n in args.sizes:
        sim, ref = _run(_simulate, n), _run(_reference, n)
        print(json.dumps({"n_events": n, "simulate": sim, "reference": ref}), flush=True)
        rows.append(
            f"| {n:,} | {sim['rows']:,} | {sim['users']:,} / {sim['items']:,} | {sim['seconds']:.1f} | "
            f"{sim['peak_gb']:.2f} | {sim['write_seconds']:.1f} | {sim['size_mb']:.0f} | "
            f"{ref['seconds']:.1f} | {ref['peak_gb']:.2f} | {sim['seconds'] / ref['seconds']:.1f}x |"
        )
    print(f"\nMachine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}\n")
    print("| n_events | rows | users / items | simulate s | simulate peak GB | write Parquet s | folder MB "
          "| reference s | reference peak GB | simulate / reference |")
    print("|---|---|---|---|---|---|---|---|---|---|")
    print("\n".join(rows))


if __name__ == "__main__":
    main()
