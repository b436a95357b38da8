"""Benchmark: ``structure = "auto"`` on the demo config against training the config's models once.

The reference is the issue's own: the time ``threefold train`` spends on the
config's models with the auto model's structure already chosen (each model
fitted on the final stage's tensor and evaluated on the test window, the
test-stage preparation included), measured in the same process right after.
The contender is the selection alone (the validation stage's preparation, the
family fitted and ranked on the validation window, the second round and the
rank splits).

The data are the demo's (``threefold demo``'s simulator and config writer) at a
given size. Prints one Markdown table and writes it to
``experiments/benchmarks/results/select.md`` with ``--write``.

Usage (from the repository root)::

    .venv/bin/python experiments/benchmarks/bench_select.py --events 200000 --write
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _commit() -> str:
    try:
        return subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True,
                              check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=200_000)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--workers", type=int, default=0,
                        help="also time the selection with the candidates on a local Dask cluster of N workers")
    parser.add_argument("--write", action="store_true", help="write results/select.md")
    args = parser.parse_args(argv)
    warnings.filterwarnings("ignore")
    from threefold.cli import _write_demo_config
    from threefold.demo.simulate import simulate_site, site_truth, write_site
    from threefold.pipeline.config import load_config
    from threefold.pipeline.experiment import fit_and_evaluate
    from threefold.pipeline.select import auto_models, select_structure
    from threefold.pipeline.stages import load_dataset, prepare_stage

    load = os.getloadavg()[0]
    site = simulate_site(n_events=args.events, random_state=args.seed)
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        log_dir = write_site(site, out / "site")
        config = load_config(_write_demo_config(out, log_dir, site))
        dataset = load_dataset(config, truth=site_truth)
        (auto,) = auto_models(config)
        started = time.perf_counter()
        selection = select_structure(config, dataset, auto, echo=lambda line: None, show_progress=False)
        t_select = time.perf_counter() - started
        t_dask = None
        if args.workers:
            from threefold.pipeline.cluster import dask_client

            with dask_client(workers=args.workers) as client:
                client.run(lambda: None)  # workers up before the clock starts
                started = time.perf_counter()
                on_dask = select_structure(config, dataset, auto, echo=lambda line: None, show_progress=False,
                                           client=client)
                t_dask = time.perf_counter() - started
            assert on_dask.structure == selection.structure
        final = config.with_overrides({f"models.{auto}.structure": selection.structure})
        started = time.perf_counter()
        data = prepare_stage(final, dataset, "test")
        per_model = {}
        for name in final.models:
            t0 = time.perf_counter()
            fit_and_evaluate(final, data, dataset, name)
            per_model[name] = time.perf_counter() - t0
        t_train = time.perf_counter() - started
    n_candidates = len(selection.table)
    rows = [
        ("training the config's models once (reference)", t_train,
         ", ".join(f"{n} {s:.1f} s" for n, s in per_model.items()) + "; test-stage preparation included"),
        (f"structure = \"auto\": selection of [models.{auto}]", t_select,
         f"{n_candidates} candidates fitted and ranked on the validation window; chosen {selection.chosen}"),
    ]
    if t_dask is not None:
        rows.append((f"the same, candidates on {args.workers} Dask workers", t_dask,
                     "same choice; workers started before the clock (their numba kernels compile on first use)"))
    lines = ["## Structure selection (`structure = \"auto\"`)", "",
             f"The demo site and config (`threefold demo`'s simulator, {args.events:,} log rows, seed {args.seed}); "
             "timed one after the other in one process (the Dask row's fits in worker processes).", "",
             "| what | seconds | ratio to training once | notes |", "| --- | ---: | ---: | --- |"]
    for what, seconds, notes in rows:
        lines.append(f"| {what} | {seconds:.1f} | {seconds / t_train:.2f} | {notes} |")
    measured = f"{t_select / t_train:.2f}" + (f" ({t_dask / t_train:.2f} on Dask)" if t_dask is not None else "")
    lines += ["", f"Goal of the issue: the selection within 4 times the reference; measured {measured}.",
              "", f"Machine: 2 shared cores (1-minute load average {load:.1f} at the start, "
              f"{os.getloadavg()[0]:.1f} at the end); threefold at commit {_commit()}.", "",
              f"Command (from the repository root): `.venv/bin/python experiments/benchmarks/bench_select.py "
              f"--events {args.events}{f' --workers {args.workers}' if args.workers else ''} --write`"]
    text = "\n".join(lines) + "\n"
    print(text)
    if args.write:
        (ROOT / "experiments" / "benchmarks" / "results" / "select.md").write_text(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
