"""Benchmark: list policies in the batch scoring job, and the frequency cap's history reader.

Model and requests as in ``bench_score.py`` (an invented CP model with random
float32 factors over 200,000 users and 20,000 items, R = 64; requests with
``device`` and, here, a ``page_tone`` column), plus an invented catalog
(``topic`` 12 levels, ``tone`` grave / neutral / upbeat, ``kind`` article /
clip / audio) and an invented history log (impressions and clicks of the
benchmark's users over 30 days, ``--history-rows`` rows).

Contenders, each in its own child process (peak RSS = ``VmHWM``):

* (c) ``score_requests(..., k=10)`` without policies: the reference, measured
  in the same run;
* (p) the same job with the policies of ``RULES`` below: an exclude guardrail,
  a demote guardrail, repetition (consumed with re-consumable audio, a cap of 3
  impressions in 7 days), MMR λ = 0.8 on factor cosine and at most 3 items per
  topic, the default pool (30 for K = 10);
* (d) the same job given the history as a digest made beforehand (what an
  hourly job does: ``threefold history`` once a day, every job reuses it);
  (c) and (d) run ``--repeats`` times, alternating, and the best run of each
  counts (the machines are shared: their drift should hit both alike);
* (h) ``read_history`` on the history log alone, the cap's 7-day window, and
  the digest written: its time and peak memory against the log's size on disk.

Usage (from the repository root)::

    .venv/bin/python experiments/benchmarks/bench_policies.py --requests 100000 --history-rows 10000000 --write
"""

from __future__ import annotations

import argparse
import json
import platform
import shutil
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _harness import gib, run_child  # noqa: E402

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results" / "policies.md"
T_START = 1_767_225_600
RULES = """[[guardrail]]
name = "nothing upbeat beside a grave page"
when = {page_tone = ["grave"]}
items = {tone = ["upbeat"]}

[[guardrail]]
name = "clips later at night"
when = {daypart = ["night"]}
items = {kind = ["clip"]}
action = "demote"
places = 3

[repetition]
consumed = true
reconsumable = {kind = ["audio"]}
cap = {shown = 3, days = 7}

[diversity]
mmr = 0.8
similarity = "factors"
max_per = {column = "topic", items = 3}
"""


def prepare(workdir: Path, args) -> None:
    """Model, requests, catalog, rules and history (invented, seeded), written once per parameter set."""
    key = {"requests": args.requests, "history_rows": args.history_rows, "users": args.users, "items": args.items,
           "rank": args.rank, "seed": args.seed, "version": 1}
    stamp = workdir / "data.json"
    if stamp.is_file() and json.loads(stamp.read_text()) == key:
        return
    import numpy as np
    import pandas as pd
    import pyarrow as pa
    import pyarrow.parquet as pq

    import bench_score
    from threefold.models.model_io import save_model

    shutil.rmtree(workdir, ignore_errors=True)
    workdir.mkdir(parents=True)
    rng = np.random.default_rng(args.seed + 7)
    save_model(bench_score.make_cp(args.users, args.items, args.rank, args.seed), workdir / "model",
               extra={"serving": bench_score.SERVING})
    requests = bench_score.make_requests(args.requests, args.users, args.seed)
    requests["page_tone"] = rng.choice(["grave", "neutral", "upbeat"], len(requests))
    pq.write_table(pa.Table.from_pandas(requests, preserve_index=False), workdir / "requests.parquet")
    items = pd.DataFrame({"item_id": [f"i{i:06d}" for i in range(args.items)],
                          "topic": [f"topic{t:02d}" for t in rng.integers(0, 12, args.items)],
                          "tone": rng.choice(["grave", "neutral", "upbeat"], args.items),
                          "kind": rng.choice(["article", "clip", "audio"], args.items, p=[0.6, 0.3, 0.1])})
    items.to_parquet(workdir / "items.parquet", index=False)
    (workdir / "rules.toml").write_text(RULES)
    writer = None
    chunk = 5_000_000
    for start in range(0, args.history_rows, chunk):
        n = min(chunk, args.history_rows - start)
        users = rng.integers(0, args.users, n)
        table = pa.table({
            "user_id": pa.array(np.char.add("u", np.char.zfill(users.astype(str), 7))),
            "item_id": pa.array(np.char.add("i", np.char.zfill(rng.integers(0, args.items, n).astype(str), 6))),
            "timestamp": pa.array(T_START - rng.integers(0, 30 * 86_400, n)),
            "event": pa.array(np.where(rng.random(n) < 0.05, "click", "impression")),
        })
        writer = writer or pq.ParquetWriter(workdir / "history.parquet", table.schema)
        writer.write_table(table)
    writer.close()
    stamp.write_text(json.dumps(key))


def child_score(workdir: str, policies: bool, history: str = "history.parquet") -> dict:
    from threefold.pipeline.score import score_requests

    workdir = Path(workdir)
    out = workdir / ("out-policies" if policies else "out-plain")
    shutil.rmtree(out, ignore_errors=True)
    extra = dict(policies=workdir / "rules.toml", items=workdir / "items.parquet",
                 history=workdir / history) if policies else {}
    t0 = time.perf_counter()
    manifest = score_requests(workdir / "model", workdir / "requests.parquet", out=out, k=10, load=False,
                              show_progress=False, **extra)
    seconds = time.perf_counter() - t0
    shutil.rmtree(out, ignore_errors=True)
    return {"seconds": seconds, "rows": manifest["rows"], "policies": manifest.get("policies", {})}


def child_history(workdir: str) -> dict:
    from threefold.ranking.history import read_history, write_history

    t0 = time.perf_counter()
    history = read_history(Path(workdir) / "history.parquet", cap_shown=3, cap_days=7)
    write_history(history, Path(workdir) / "history.npz")
    return {"seconds": time.perf_counter() - t0, "rows": history.rows, "clicked": int(history.clicked.size),
            "ignored": int(history.ignored.size)}


def in_child(name: str, **params) -> dict:
    code = (f"import sys\nsys.path.insert(0, {str(HERE)!r})\nimport bench_policies as _b\n"
            f"RESULT = _b.child_{name}(**{params!r})\n")
    return run_child(code, timeout=7200.0)


def render(args, plain, ruled, digested, history, workdir: Path) -> str:
    ratio = plain["seconds"] / ruled["seconds"]
    ratio_digest = plain["seconds"] / digested["seconds"]
    size = (workdir / "history.parquet").stat().st_size
    fired = "; ".join(f"{rule}: fired in {row['requests']:,}, removed {row['removed']:,}, moved {row['moved']:,}"
                      for rule, row in ruled["policies"].items())
    lines = [
        "## List policies in the scoring job",
        "",
        f"{args.requests:,} requests, {args.items:,} items, {args.users:,} users, R = {args.rank}, K = 10 "
        f"(invented model and requests of `bench_score.py`, an invented catalog and a {args.history_rows:,}-row "
        "30-day history log); each contender in its own process.",
        "",
        "| contender | seconds | requests / s | throughput against no policies | peak memory |",
        "| --- | ---: | ---: | ---: | ---: |",
        f"| (c) `score_requests`, no policies (reference) | {plain['seconds']:.1f} | "
        f"{args.requests / plain['seconds']:,.0f} | 1.00 | {gib(plain['peak_rss_bytes'])} |",
        f"| (p) the same with the rules of `RULES` (read of the history included) | {ruled['seconds']:.1f} | "
        f"{args.requests / ruled['seconds']:,.0f} | {ratio:.2f} | {gib(ruled['peak_rss_bytes'])} |",
        f"| (d) the same, the history given as a digest made beforehand | {digested['seconds']:.1f} | "
        f"{args.requests / digested['seconds']:,.0f} | {ratio_digest:.2f} | {gib(digested['peak_rss_bytes'])} |",
        f"| (h) `read_history` alone (the digest of `threefold history`), cap 3 in 7 days | "
        f"{history['seconds']:.1f} | – | – | {gib(history['peak_rss_bytes'])} |",
        "",
        f"(c) and (d) ran {len(plain['runs'])} times each, alternating; the table gives the best run (seconds of "
        f"every run: (c) {', '.join(f'{x:.1f}' for x in plain['runs'])}; (d) "
        f"{', '.join(f'{x:.1f}' for x in digested['runs'])}).",
        "",
        f"Goal of the issue: throughput with policies at least 0.7 of without; measured {ratio_digest:.2f} with a "
        f"digest, {ratio:.2f} when the job reads the raw log itself. "
        f"The history log: {history['rows']:,} rows, {size / 2**20:,.0f} MB of Parquet, "
        f"{history['clicked']:,} clicked and {history['ignored']:,} capped pairs.",
        "",
        f"What the rules did: {fired}.",
        "",
        f"Machine: {platform.machine()}, 2 shared cores. Command: `.venv/bin/python "
        f"experiments/benchmarks/bench_policies.py --requests {args.requests} --history-rows {args.history_rows} "
        "--write`",
        "",
    ]
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--requests", type=int, default=1_000_000)
    parser.add_argument("--history-rows", dest="history_rows", type=int, default=100_000_000)
    parser.add_argument("--users", type=int, default=200_000)
    parser.add_argument("--items", type=int, default=20_000)
    parser.add_argument("--rank", type=int, default=64)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--repeats", type=int, default=2, help="runs of (c) and (d), alternating; the best counts")
    parser.add_argument("--workdir", default="/tmp/threefold-bench-policies")
    parser.add_argument("--write", action="store_true", help=f"write {RESULTS}")
    args = parser.parse_args()
    workdir = Path(args.workdir)
    t0 = time.perf_counter()
    prepare(workdir, args)
    print(f"data ready in {time.perf_counter() - t0:.0f} s", flush=True)
    ruled = in_child("score", workdir=str(workdir), policies=True)
    print("policies", ruled, flush=True)
    history = in_child("history", workdir=str(workdir))
    print("history", history, flush=True)
    plains, digests = [], []
    for _ in range(args.repeats):  # the reference and the digest job alternate: the machine's drift hits both
        plains.append(in_child("score", workdir=str(workdir), policies=False))
        print("plain", plains[-1], flush=True)
        digests.append(in_child("score", workdir=str(workdir), policies=True, history="history.npz"))
        print("digest", digests[-1], flush=True)
    for result in [ruled, history] + plains + digests:
        if "error" in result:
            raise SystemExit(f"a contender failed: {result['error']}")
    plain = dict(min(plains, key=lambda r: r["seconds"]), runs=[r["seconds"] for r in plains])
    digested = dict(min(digests, key=lambda r: r["seconds"]), runs=[r["seconds"] for r in digests])
    text = render(args, plain, ruled, digested, history, workdir)
    print(text)
    if args.write:
        RESULTS.parent.mkdir(parents=True, exist_ok=True)
        RESULTS.write_text(text)


if __name__ == "__main__":
    main()
