"""Compare CP model structures on the demo scenario, by NDCG against the simulator's true relevance.

Usage:  python experiments/compare_structures.py [--events 1000000] [--cache /tmp/threefold-structures]

Simulates the invented demo site (seeded), writes a config with one model per structure, and runs the
ordinary `threefold train` pipeline twice: once on the validation window (how a user chooses a structure)
and once on the test window (the honest figure). Whatever the outcome, the table is written to
experiments/results/structures.md; the simulator is never tuned to favor a structure.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from threefold.pipeline.config import load_config, to_toml
from threefold.pipeline.experiment import train
from threefold.demo.simulate import simulate_site, write_site
from threefold.tracking.store import open_store

STRUCTURES = {
    "mf (user*item)": "user*item",
    "cp 5-way": "user*item*daypart*device*page_tone",
    "mf + context-wide": "user*item + user*item*daypart*device*page_tone:8",
    "mf + pairwise context": "user*item + user*item*daypart:8 + item*device:4 + item*page_tone:4",
    "mf + per-mode context": "user*item + user*item*daypart:8 + user*item*device:4 + user*item*page_tone:4",
}


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--events", type=int, default=1_000_000)
    parser.add_argument("--cache", default="/tmp/threefold-structures")
    parser.add_argument("--rank", type=int, default=32)
    args = parser.parse_args()
    cache = Path(args.cache)
    site_dir = cache / f"site-{args.events}"
    site = simulate_site(n_events=args.events, random_state=3)
    if not (site_dir / "truth.json").exists():
        write_site(site, site_dir)
    p = site.params
    end = int(site.events["timestamp"].max())
    models = {"popularity": {"method": "popularity", "window": "24h"}}
    for k, (label, structure) in enumerate(STRUCTURES.items()):
        models[f"s{k}"] = {"method": "cp", "structure": structure, "rank": args.rank, "reg": 0.1,
                           "max_sweeps": 15, "random_state": 1}
    rows = []
    for stage in ("validation", "test"):
        sections = {
            "experiment": {"name": f"structures-{stage}"},
            "data": {"events": str(site_dir / "events.parquet"), "items": str(site_dir / "items.parquet"),
                     "timezone": p.timezone},
            "build": {"contexts": ["daypart", "device", "page_tone"], "daypart_starts": [float(x) for x in p.daypart_starts],
                      "daypart_labels": list(p.daypart_labels)},
            "split": {"cutoff": end - 2 * 86_400, "validation_window": "48h"},
            "evaluation": {"stage": stage, "ks": [10], "baseline": "popularity", "metrics": ["ndcg", "ndcg_true"],
                           "n_resamples": 200, "protocol": "rolling"},
            "models": models,
        }
        path = cache / f"structures-{stage}.toml"
        path.write_text(to_toml(sections))
        report = train(load_config(path), open_store(str(cache / "runs")))
        for run in report.runs:
            rows.append((stage, run.name, run.metrics))
    labels = {f"s{k}": f"{label}: `{s}`" for k, (label, s) in enumerate(STRUCTURES.items())}
    labels["popularity"] = "popularity (as of request time, 24h window)"
    out = ["### CP structures on the demo scenario", "",
           f"Simulated site: {args.events:,} log rows, seed 3; rank {args.rank} per term unless `:r` says otherwise; "
           "rolling protocol (hourly fold-in); test = last 2 days, validation = the 2 days before. "
           f"Command: `python experiments/compare_structures.py --events {args.events}`.", "",
           "| model | stage | NDCG@10 (clicks) | NDCG@10 (true relevance) |", "|---|---|---|---|"]
    for stage, name, metrics in rows:
        def fmt(metric):
            value = metrics.get(f"{metric}_at_10")
            low, high = metrics.get(f"{metric}_at_10_low"), metrics.get(f"{metric}_at_10_high")
            return "-" if value is None else f"{value:.4f} [{low:.4f}, {high:.4f}]"
        out.append(f"| {labels.get(name, name)} | {stage} | {fmt('ndcg')} | {fmt('ndcg_true')} |")
    target = Path(__file__).parent / "results" / "structures.md"
    target.write_text("\n".join(out) + "\n")
    print("\n".join(out))


if __name__ == "__main__":
    main()
