"""Many writers on one run store: N concurrent ``threefold train`` and M concurrent ``threefold sweep``, nothing lost.

All processes start together on one fresh local store (the SQLite database of a
folder store). Afterwards the store is read back: every train's parent and model
runs, every sweep's trials, each run FINISHED (none RUNNING), every metric row
row (the trains do identical work, so every model run of one name must hold
as many metric rows as the others), no traceback in any child's stderr, and every
logged model of the trains loads. Invented data only (the committed sample site).

    .venv/bin/python experiments/reliability/concurrent_store.py --trains 8 --sweeps 2
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from kills import CONFIG, run, threefold, user_env  # noqa: E402  (the same tiny config and command helpers)

SWEEP = """
[sweep]
model = "cp"
search = "grid"
metric = "ndcg"
k = 10

[sweep.space]
"models.cp.rank" = [4, 8]
"""
#: Models per train (popularity, cp) and trials per sweep (the grid above).
MODELS_PER_TRAIN, TRIALS_PER_SWEEP = 2, 2


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--trains", type=int, default=8, help="concurrent trains (default 8)")
    parser.add_argument("--sweeps", type=int, default=2, help="concurrent sweeps, 1 Dask worker each (default 2)")
    parser.add_argument("--json", action="store_true", help="print the result as JSON on the last line")
    args = parser.parse_args(argv)
    env = user_env()
    with tempfile.TemporaryDirectory(prefix="threefold-writers-") as tmp:
        folder = Path(tmp)
        config = folder / "config.toml"
        config.write_text(CONFIG + SWEEP)
        store = str(folder / "store")
        run(threefold("runs", "--store", store), env)  # the store exists before the writers race
        began = time.perf_counter()
        children = [subprocess.Popen(threefold("train", str(config), "--store", store), env=env, text=True,
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE) for _ in range(args.trains)]
        children += [subprocess.Popen(threefold("sweep", str(config), "--store", store, "--workers", "1"), env=env,
                                      text=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
                     for _ in range(args.sweeps)]
        outputs = [child.communicate(timeout=1800) for child in children]
        seconds = time.perf_counter() - began
        failed = [i for i, child in enumerate(children) if child.returncode != 0]
        tracebacks = [i for i, (_, err) in enumerate(outputs) if "Traceback" in err]
        runs = json.loads(run(threefold("runs", "--store", store, "--json", "--limit", "10000"), env).stdout)
        by_kind: dict[str, int] = {}
        for r in runs:
            by_kind[r["kind"]] = by_kind.get(r["kind"], 0) + 1
        not_finished = [r["run_id"] for r in runs if r["status"] != "FINISHED"]
        metric_rows, per_name = _metric_rows(store)
        loads = _models_load(store, [r for r in runs if r["kind"] == "model" and r["name"] == "cp"], env)
    expected_model_runs = args.trains * MODELS_PER_TRAIN
    result = {"trains": args.trains, "sweeps": args.sweeps, "seconds": round(seconds, 1), "failed": failed,
              "tracebacks": tracebacks, "runs_by_kind": by_kind, "not_finished": not_finished,
              "model_runs_expected": expected_model_runs, "metric_rows": metric_rows, "cp_models_loaded": loads}
    lost = []
    if failed or tracebacks:
        lost.append(f"processes failed {failed} / with tracebacks {tracebacks}")
    if by_kind.get("train", 0) != args.trains:
        lost.append(f"{by_kind.get('train', 0)} train runs of {args.trains}")
    if by_kind.get("model", 0) < expected_model_runs:
        lost.append(f"{by_kind.get('model', 0)} model runs, expected at least {expected_model_runs}")
    if not_finished:
        lost.append(f"runs not FINISHED: {len(not_finished)}")
    uneven = {name: sorted(c) for name, c in per_name.items() if len(c) > 1 and name in ("popularity", "cp")}
    if uneven:  # every train does the same work, so each model run must hold the same number of metric rows
        lost.append(f"model runs of one name hold different numbers of metric rows: {uneven}")
    if loads != args.trains:
        lost.append(f"{loads} of {args.trains} cp models load")
    result["lost"] = lost
    print(f"| {args.trains} concurrent trains + {args.sweeps} concurrent sweeps on one store | 1 | "
          f"{by_kind} runs, {metric_rows:,} metric rows, {loads}/{args.trains} cp models load, "
          f"{seconds:.0f} s | {'nothing' if not lost else '; '.join(lost)} |")
    if args.json:
        print(json.dumps(result))
    return 1 if lost else 0


def _metric_rows(store: str) -> tuple[int, dict[str, set[int]]]:
    """Metric rows in the store's database (every logged value), and per run name the set of per-run counts."""
    import sqlite3

    with sqlite3.connect(Path(store) / "mlflow.db") as db:
        total = int(db.execute("select count(*) from metrics").fetchone()[0])
        per_run = db.execute("select r.name, count(m.key) from runs r left join metrics m on m.run_uuid = r.run_uuid "
                             "group by r.run_uuid").fetchall()
    counts: dict[str, set[int]] = {}
    for name, count in per_run:
        counts.setdefault(name, set()).add(int(count))
    return total, counts


def _models_load(store: str, model_runs: list[dict], env: dict) -> int:
    """How many of the trains' cp models score two requests (fetched, verified and loaded)."""
    import pandas as pd

    folder = Path(store).parent
    requests = folder / "two-requests.csv"
    pd.DataFrame({"request_id": ["a", "b"], "user_id": ["u000926", "nobody"]}).to_csv(requests, index=False)
    ok = 0
    for i, r in enumerate(model_runs):
        done = run(threefold("score", r["run_id"], "--requests", str(requests), "--out", str(folder / f"l{i}"),
                             "--store", store), env, check=False)
        ok += done.returncode == 0
    return ok


if __name__ == "__main__":
    sys.exit(main())
