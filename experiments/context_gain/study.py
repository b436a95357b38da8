"""Context-gain study: when do context structures beat context-free MF, and does ``structure = "auto"`` find them?

For each invented scenario (``scenarios.py``, planted effects stated there), seed and
weighting, it simulates a log, runs the structure selection of
``threefold.pipeline.select`` on the validation window (observed NDCG@10, paired with
MF), then fits MF and the chosen structure on the final stage and scores both against
the simulator's true relevance on the test window (true-relevance NDCG@10).

Usage (from the repository root)::

    .venv/bin/python experiments/context_gain/study.py --scenario quillfen brackenridge flat \
        --seeds 3 --events 200000 --w0 0.1 --out experiments/context_gain/results.csv

The test window is the last two days of the log, the validation window the
``--validation-window`` before it (default 48h); ``--context-ranks`` (default 4 8)
and ``--select-candidates`` set the ``[select]`` section. Prints one row per
(scenario, seed, weighting) and writes them as CSV.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
import warnings
from pathlib import Path

import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from scenarios import scenario  # noqa: E402

from threefold.demo.simulate import simulate_site, site_truth, write_site  # noqa: E402
from threefold.pipeline.config import parse_config  # noqa: E402
from threefold.pipeline.select import select_structure  # noqa: E402
from threefold.pipeline.stages import load_dataset, prepare_stage  # noqa: E402
from threefold.pipeline.experiment import fit_and_evaluate  # noqa: E402


def config_for(site, log_dir: Path, weighting: dict, rank: int, context_ranks, candidates: str = "shown",
               validation_window: str = "24h", reg: float = 0.1) -> object:
    """The study's experiment config: the last two days for test, ``validation_window`` before them for validation."""
    p = site.params
    end = int(site.events["timestamp"].max())
    base = {"method": "cp", "rank": rank, "reg": reg, "max_sweeps": 10, "random_state": 1}
    return parse_config({
        "experiment": {"name": "context-gain-study"},
        "data": {"events": str(log_dir / "events.parquet"), "items": str(log_dir / "items.parquet"),
                 "timezone": p.timezone},
        "build": {"contexts": ["daypart", "device", "page_tone"], "negatives": "skip_above",
                  "daypart_starts": [float(x) for x in p.daypart_starts], "daypart_labels": list(p.daypart_labels)},
        "weighting": weighting,
        "split": {"cutoff": end - 2 * 86_400, "validation_window": validation_window},
        "evaluation": {"ks": [10], "metrics": ["ndcg", "ndcg_true"], "n_resamples": 200, "random_state": 0},
        "select": {"context_ranks": list(context_ranks), "candidates": candidates},
        "models": {"mf": {**base, "structure": f"user*item:{rank}"}, "auto": {**base, "structure": "auto"}},
    }, source=f"study:{p.site_name}")


def run_one(name: str, seed: int, n_events: int, weighting: dict, rank: int, context_ranks,
            candidates: str = "shown", validation_window: str = "24h", reg: float = 0.1) -> dict:
    started = time.perf_counter()
    site = simulate_site(scenario(name, n_events, seed))
    with tempfile.TemporaryDirectory() as tmp:
        log_dir = write_site(site, Path(tmp) / "site")
        config = config_for(site, log_dir, weighting, rank, context_ranks, candidates, validation_window, reg)
        dataset = load_dataset(config, truth=site_truth)
        selection = select_structure(config, dataset, "auto", echo=lambda line: None, show_progress=False)
        truth_validation = {row["model"]: row["value"] for _, row in selection.evaluation.table.iterrows()
                            if row["metric"] == "ndcg_true" and row["k"] == 10 and row["breakdown"] == "all"}
        final = config.with_overrides({"models.auto.structure": selection.structure})
        data = prepare_stage(final, dataset, "test")
        test = {}
        for model in ("mf", "auto"):
            outcome = fit_and_evaluate(final, data, dataset, model, with_baseline=False)
            test[model] = outcome.evaluation.value(model, "ndcg_true", 10)
    best_truth = max(truth_validation, key=truth_validation.get)
    return {
        "scenario": name, "seed": seed, "events": n_events, "select_candidates": candidates,
        "validation_window": validation_window, "reg": reg, **{f"w.{k}": v for k, v in weighting.items()},
        "chosen": selection.chosen, "chosen_structure": selection.structure,
        "test_true_ndcg_mf": test["mf"], "test_true_ndcg_chosen": test["auto"],
        "test_gain": test["auto"] / test["mf"] - 1.0,
        "val_best_by_truth": best_truth, "val_true_gain_of_best": truth_validation[best_truth] / truth_validation["mf"] - 1.0,
        "seconds": time.perf_counter() - started,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenario", nargs="+", default=["quillfen", "brackenridge", "flat"])
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--first-seed", type=int, default=1)
    parser.add_argument("--events", type=int, default=150_000)
    parser.add_argument("--rank", type=int, default=16)
    parser.add_argument("--context-ranks", type=int, nargs="+", default=[4, 8])
    parser.add_argument("--w0", type=float, nargs="+", default=[1.0])
    parser.add_argument("--w0-scope", nargs="+", default=["cell"])
    parser.add_argument("--alpha", type=float, nargs="+", default=[10.0])
    parser.add_argument("--signal", nargs="+", default=["clicks"])
    parser.add_argument("--select-candidates", default="shown", choices=["shown", "eligible"],
                        help="what each validation request ranks during selection ([select] candidates)")
    parser.add_argument("--reg", type=float, nargs="+", default=[0.1], help="reg of every candidate")
    parser.add_argument("--validation-window", default="48h", help="[split] validation_window of the selection")
    parser.add_argument("--out", default=None, help="CSV of the rows")
    args = parser.parse_args(argv)
    warnings.filterwarnings("ignore")
    rows = []
    for name in args.scenario:
        for seed in range(args.first_seed, args.first_seed + args.seeds):
            for w0 in args.w0:
                for scope in args.w0_scope:
                    for alpha in args.alpha:
                        for signal in args.signal:
                            for reg in args.reg:
                                weighting = {"w0": w0, "w0_scope": scope, "alpha": alpha, "signal": signal}
                                row = run_one(name, seed, args.events, weighting, args.rank, args.context_ranks,
                                              args.select_candidates, args.validation_window, reg)
                                rows.append(row)
                                print(" ".join(f"{k}={v:.4f}" if isinstance(v, float) else f"{k}={v}"
                                               for k, v in row.items()), flush=True)
    table = pd.DataFrame(rows)
    if args.out:
        table.to_csv(args.out, index=False)
    print(table.groupby([c for c in table.columns if c.startswith(("scenario", "w.", "reg"))])[["test_gain"]].describe())
    return 0


if __name__ == "__main__":
    sys.exit(main())
