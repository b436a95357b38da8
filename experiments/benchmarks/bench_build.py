"""Validate and build the tensor of a 10-million-event log, beside a bare pyarrow read of the same file.

Usage:  python experiments/benchmarks/bench_build.py [--events 10000000] [--cache /tmp/threefold-bench]

Contenders, each in its own process (peak RSS of that process):
  * reference: pyarrow.parquet.read_table of the events file (all columns);
  * validate:  threefold.data.validate.validate_events (chunked, bounded memory);
  * build:     threefold.data.validate.load_validated_events (validate and load in one pass) +
               threefold.data.build.build_tensor with daypart, device and page_tone
               context modes (a 5-way tensor), skip-above negatives.
The log is the demo scenario (threefold.demo.simulate), generated once and cached.
"""

from __future__ import annotations

import argparse
import platform
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from _harness import gib, run_child  # noqa: E402

RESULTS = Path(__file__).parent / "results" / "build.md"


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--events", type=int, default=10_000_000)
    parser.add_argument("--cache", default="/tmp/threefold-bench")
    args = parser.parse_args()
    folder = Path(args.cache) / f"site-{args.events}"
    if not (folder / "events.parquet").exists():
        from threefold.demo.simulate import simulate_site, write_site

        started = time.perf_counter()
        write_site(simulate_site(n_events=args.events, random_state=1), folder)
        print(f"generated {folder} in {time.perf_counter() - started:.0f} s", flush=True)
    events = str(folder / "events.parquet")

    reference = run_child(f"""
        import time, pyarrow.parquet as pq
        t = time.perf_counter(); table = pq.read_table({events!r}); RESULT = {{"seconds": time.perf_counter() - t, "rows": table.num_rows}}
    """)
    validate = run_child(f"""
        import time
        from threefold.data.validate import validate_events
        t = time.perf_counter(); report = validate_events({events!r})
        RESULT = {{"seconds": time.perf_counter() - t, "ok": report.ok}}
    """)
    build = run_child(f"""
        import time, json, warnings
        warnings.simplefilter("ignore")
        from threefold.data.validate import load_validated_events
        from threefold.data.build import build_tensor
        from threefold.data.context import Daypart, ColumnContext
        from threefold.demo.simulate import ScenarioParameters
        p = ScenarioParameters.from_dict(json.load(open({str(folder / "scenario.json")!r}))["parameters"])
        t = time.perf_counter(); events, report = load_validated_events({events!r}); t_load = time.perf_counter() - t
        specs = [Daypart(timezone=p.timezone, starts=tuple(float(s) for s in p.daypart_starts), labels=p.daypart_labels),
                 ColumnContext("device"), ColumnContext("page_tone")]
        tensor, report = build_tensor(events, specs)
        RESULT = {{"seconds": time.perf_counter() - t, "load_seconds": t_load, "nnz": tensor.nnz,
                   "bytes_per_cell": tensor.nbytes / tensor.nnz, "shape": list(tensor.shape)}}
    """)
    for name, result in (("reference", reference), ("validate", validate), ("build", build)):
        print(name, result, flush=True)
    rows = reference.get("rows", args.events)
    lines = [
        f"### Validate and build from a {rows:,}-row log (demo scenario, Parquet)",
        "",
        f"Machine: {platform.machine()}, {platform.python_version()}; command: "
        f"`python experiments/benchmarks/bench_build.py --events {args.events}`",
        "",
        "| contender | wall time (s) | peak memory | ratio to pyarrow read |",
        "|---|---|---|---|",
    ]
    ref_s = reference.get("seconds", float("nan"))
    for name, result in (("pyarrow read_table (reference)", reference), ("threefold validate", validate),
                         ("threefold validate + load (one pass) + build_tensor", build)):
        if "error" in result:
            lines.append(f"| {name} | failed: {result['error']} | | |")
            continue
        lines.append(f"| {name} | {result['seconds']:.1f} | {gib(result['peak_rss_bytes'])} | "
                     f"{result['seconds'] / ref_s:.1f}x |")
    if "error" not in build and "error" not in validate:
        lines += ["", f"The pipeline (`load_validated_events` + `build_tensor`, what `threefold build` runs): "
                  f"{build['seconds']:.1f} s and {gib(build['peak_rss_bytes'])} (goal: 60 s and 3 GB); the tensor has "
                  f"{build['nnz']:,} stored cells of shape {build['shape']}, "
                  f"{build['bytes_per_cell']:.0f} bytes per cell (5-way; 4 bytes per extra mode)."
                  f" Validate + load alone: {build['load_seconds']:.1f} s; the standalone validate report: "
                  f"{validate['seconds']:.1f} s."]
    RESULTS.write_text("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
