"""Kill campaign: SIGKILL train, model save, score and refresh at random moments, then check that nothing was lost.

Every operation is the real command (or, for the model save, the real
``save_model``) in its own child process, on the committed sample site
(``data_samples/quillfen-courier``, invented). Each kill lands at a moment drawn
uniformly within the operation's measured uninterrupted duration (seeded). After
each kill the checks are:

- **train**: the next command on the store (``threefold runs``) succeeds and
  reaps the killed run, so no run is left RUNNING; after the train kills, the
  model trained before the campaign still scores.
- **save**: the model folder being overwritten in a loop still loads and
  verifies (checksums) and holds one of the two versions written, never a mix.
- **score**: rerunning the same command resumes and the lists equal the
  uninterrupted run's, byte for byte per column.
- **refresh**: the output folder either holds the previous refreshed model or a
  complete new one (it loads and verifies); rerunning completes.

    .venv/bin/python experiments/reliability/kills.py --kills 50 --write
    .venv/bin/python experiments/reliability/kills.py --quick      # 2 per operation (tests/test_fault_campaigns.py)
"""

from __future__ import annotations

import argparse
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "data_samples" / "quillfen-courier"
DOC = ROOT / "docs" / "reliability.md"
MARKERS = ("<!-- kills -->", "<!-- /kills -->")
OPERATIONS = ("train", "save", "score", "refresh")

CONFIG = f"""
[experiment]
name = "kill-campaign"

[data]
events = "{SAMPLE / 'events.parquet'}"
items = "{SAMPLE / 'items.parquet'}"
timezone = "Europe/Berlin"

[build]
contexts = ["daypart", "device"]

[split]
cutoff = "2026-04-04T00:00:00+00:00"
validation_window = "24h"

[evaluation]
ks = [10]
n_resamples = 50
random_state = 0

[models.popularity]
method = "popularity"

[models.cp]
method = "cp"
structure = "user*item + item*device:4"
rank = 8
max_sweeps = 4
random_state = 1
"""

SAVE_LOOP = r"""
import sys
from threefold.models.model_io import load_model, save_model
result, meta, _ = load_model(sys.argv[1])
i = 0
while True:
    i += 1
    save_model(result, sys.argv[2], parameters={"round": i % 2})
    print(i, flush=True)
"""

CHECK_SAVE = r"""
import json, sys
from threefold.models.model_io import load_model
result, meta, _ = load_model(sys.argv[1])
print(json.dumps({"round": meta.get("parameters", {}).get("round")}))
"""


def threefold(*args: str) -> list[str]:
    script = Path(sys.executable).with_name("threefold")
    return [str(script), *args] if script.exists() else [sys.executable, "-m", "threefold.cli", *args]


def user_env() -> dict:
    """The environment of a user's shell: no pytest variables, no tracking URI (each script names its store).

    The user's numba kernel cache is kept, so the children load compiled kernels.
    """
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTEST_")}
    env.pop("MLFLOW_TRACKING_URI", None)
    return env


def run(command: list[str], env: dict, check: bool = True) -> subprocess.CompletedProcess:
    done = subprocess.run(command, capture_output=True, text=True, env=env, timeout=900)
    if check and done.returncode != 0:
        raise RuntimeError(f"{' '.join(command)} failed ({done.returncode}): {done.stderr[-1500:]}")
    return done


def kill_after(command: list[str], delay: float, env: dict) -> tuple[bool, str]:
    """Start ``command``, SIGKILL it after ``delay`` s; (True if it was still running when killed, its stdout)."""
    child = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, env=env)
    try:
        child.wait(timeout=delay)
        killed = False
    except subprocess.TimeoutExpired:
        child.send_signal(signal.SIGKILL)
        child.wait()
        killed = True
    return killed, child.stdout.read() if child.stdout else ""


class Workspace:
    """The store, the base model, the requests and the reference outputs every kill is checked against."""

    def __init__(self, folder: Path, env: dict):
        self.folder, self.env = folder, env
        self.config = folder / "config.toml"
        self.config.write_text(CONFIG)
        self.store = str(folder / "store")
        self.durations: dict[str, float] = {}
        run(threefold("train", str(self.config), "--store", self.store), env)  # compiles on a first run
        began = time.perf_counter()
        run(threefold("train", str(self.config), "--store", self.store), env)
        self.durations["train"] = time.perf_counter() - began
        runs = self.runs()
        self.base_run = next(r["run_id"] for r in runs if r["name"] == "cp")
        self.model = self._download(folder / "base-model")
        run(self.score_command(folder / "reference"), env)
        began = time.perf_counter()
        run(self.score_command(folder / "reference-again"), env)
        self.durations["score"] = time.perf_counter() - began
        began = time.perf_counter()
        run(self.refresh_command(folder / "refreshed-reference"), env)
        self.durations["refresh"] = time.perf_counter() - began
        self.durations["save"] = self._save_duration()

    def runs(self) -> list[dict]:
        return json.loads(run(threefold("runs", "--store", self.store, "--json", "--limit", "1000"), self.env).stdout)

    def _requests(self) -> Path:
        import pandas as pd

        path = self.folder / "requests.parquet"
        if not path.exists():
            events = pd.read_parquet(SAMPLE / "events.parquet", columns=["request_id", "user_id", "timestamp",
                                                                         "device"])
            events.drop_duplicates("request_id").head(6000).to_parquet(path, index=False)
        return path

    def _download(self, to: Path) -> Path:
        """A local folder of the logged model (fetched once; score and refresh then read no store)."""
        from threefold.tracking.pyfunc import model_folder
        from threefold.tracking.store import open_store

        return Path(model_folder(self.base_run, store=open_store(self.store), download_to=to))

    def score_command(self, out: Path) -> list[str]:
        return threefold("score", str(self.model), "--requests", str(self._requests()), "--k", "10",
                         "--explain", "top3", "--chunk-rows", "500", "--out", str(out))

    def refresh_command(self, out: Path) -> list[str]:
        return threefold("refresh", str(self.model), "--events", str(SAMPLE / "events.parquet"), "--items",
                         str(SAMPLE / "items.parquet"), "--out", str(out))

    def _save_duration(self) -> float:
        began = time.perf_counter()
        run([sys.executable, "-c", "import sys\nfrom threefold.models.model_io import load_model, save_model\n"
             "r, m, _ = load_model(sys.argv[1]); save_model(r, sys.argv[2])",
             str(self.model), str(self.folder / "save-probe")], self.env)
        return time.perf_counter() - began


def trial(op: str, ws: Workspace, rng: random.Random, n: int) -> tuple[bool, str]:
    """One kill of ``op`` and its checks: (killed mid-way, what was lost or '')."""
    env, folder = ws.env, ws.folder
    delay = rng.uniform(0.0, ws.durations[op])
    if op == "train":
        killed, _ = kill_after(threefold("train", str(ws.config), "--store", ws.store), delay, env)
        runs = ws.runs()  # the next command: reaps what the kill left
        stuck = [r["run_id"] for r in runs if r["status"] == "RUNNING"]
        if stuck:
            return killed, f"runs left RUNNING: {stuck}"
        return killed, ""
    if op == "save":
        target = folder / f"saved-{n}"
        run([sys.executable, "-c", SAVE_LOOP.replace("while True", "for _ in range(1)"), str(ws.model), str(target)],
            env)  # one complete save before the loop that is killed
        killed, out = kill_after([sys.executable, "-c", SAVE_LOOP, str(ws.model), str(target)],
                                 delay * 3 + 1.0, env)  # the child's start and imports come first
        check = run([sys.executable, "-c", CHECK_SAVE, str(target)], env, check=False)
        if check.returncode != 0:
            return killed, f"model folder does not load after {out.count(chr(10))} saves: {check.stderr[-300:]}"
        shutil.rmtree(target, ignore_errors=True)
        return killed, "" if json.loads(check.stdout)["round"] in (0, 1) else "unknown version"
    if op == "score":
        out = folder / f"lists-{n}"
        killed, _ = kill_after(ws.score_command(out), delay, env)
        run(ws.score_command(out), env)  # resume
        lost = _differs(folder / "reference", out)
        shutil.rmtree(out, ignore_errors=True)
        return killed, lost
    out = folder / f"refreshed-{n}"
    if n % 2:
        run(ws.refresh_command(out), env)  # a previous refreshed model the kill must not damage
    killed, _ = kill_after(ws.refresh_command(out), delay, env)
    if out.exists():
        check = run([sys.executable, "-c", CHECK_SAVE, str(out)], env, check=False)
        if check.returncode != 0 and n % 2:
            return killed, f"the previous refreshed model no longer loads: {check.stderr[-300:]}"
    run(ws.refresh_command(out), env)
    check = run([sys.executable, "-c", CHECK_SAVE, str(out)], env, check=False)
    shutil.rmtree(out, ignore_errors=True)
    return killed, "" if check.returncode == 0 else f"rerun's model does not load: {check.stderr[-300:]}"


def _differs(reference: Path, out: Path) -> str:
    import pandas as pd

    a = pd.read_parquet(reference).sort_values(["request_id", "rank"]).reset_index(drop=True)
    b = pd.read_parquet(out).sort_values(["request_id", "rank"]).reset_index(drop=True)
    if a.shape != b.shape:
        return f"resumed output has {len(b)} rows, uninterrupted {len(a)}"
    for column in a.columns:
        if not a[column].equals(b[column]):
            return f"resumed output differs in column {column!r}"
    return ""


def campaign(kills: int, seed: int, folder: Path, echo=print) -> list[dict]:
    env = user_env()
    echo("setting up (one train, score and refresh uninterrupted, timed) ...")
    ws = Workspace(folder, env)
    echo("uninterrupted: " + ", ".join(f"{op} {s:.1f} s" for op, s in ws.durations.items()))
    rng = random.Random(seed)
    rows = []
    for op in OPERATIONS:
        killed, lost = 0, []
        for n in range(kills):
            was_killed, problem = trial(op, ws, rng, n)
            killed += was_killed
            if problem:
                lost.append(problem)
            echo(f"{op} {n + 1}/{kills}: {'killed' if was_killed else 'finished first'}"
                 f"{'; LOST: ' + problem if problem else ''}")
        final = ws.runs()
        if op == "train":
            pending = [r["run_id"] for r in final if r["status"] == "RUNNING"]
            lost += [f"RUNNING at the end: {pending}"] if pending else []
            probe = folder / "after-train-kills"
            if run(ws.score_command(probe), env, check=False).returncode != 0:
                lost.append("the model trained before the campaign no longer scores")
        rows.append({"operation": op, "tried": kills, "killed": killed, "lost": lost,
                     "seconds": round(ws.durations[op], 1)})
    return rows


def table(rows: list[dict], kills: int, seed: int) -> str:
    what = {"train": "`threefold train` (tiny config, sample site)", "save": "`save_model` overwriting one folder",
            "score": "`threefold score` (6,000 requests, parts of 500)",
            "refresh": "`threefold refresh` (sample log)"}
    lines = ["| fault | times tried | killed mid-way | uninterrupted run | what was lost |", "|---|---|---|---|---|"]
    for r in rows:
        lost = "nothing" if not r["lost"] else "; ".join(sorted(set(r["lost"])))[:300]
        lines.append(f"| SIGKILL of {what[r['operation']]} | {r['tried']} | {r['killed']} | {r['seconds']} s | {lost} |")
    lines += ["", f"Command: `.venv/bin/python experiments/reliability/kills.py --kills {kills} --seed {seed} --write` "
                  "(kill moments uniform within the uninterrupted duration; a trial that finished first still "
                  "runs every check)."]
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--kills", type=int, default=50, help="kills per operation (default 50)")
    parser.add_argument("--quick", action="store_true", help="2 kills per operation (the CI subset)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the kill moments (default 0)")
    parser.add_argument("--out", default=None, help="working folder (default: a temporary one, removed)")
    parser.add_argument("--json", action="store_true", help="print the results as JSON on the last line")
    parser.add_argument("--write", action="store_true", help="write the table into docs/reliability.md")
    args = parser.parse_args(argv)
    kills = 2 if args.quick else args.kills
    with tempfile.TemporaryDirectory(prefix="threefold-kills-") as tmp:
        folder = Path(args.out) if args.out else Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        rows = campaign(kills, args.seed, folder, echo=lambda line: print(line, file=sys.stderr, flush=True))
    text = table(rows, kills, args.seed)
    print(text)
    if args.write:
        doc = DOC.read_text()
        start, end = doc.index(MARKERS[0]) + len(MARKERS[0]), doc.index(MARKERS[1])
        DOC.write_text(doc[:start] + "\n" + text + "\n" + doc[end:])
    if args.json:
        print(json.dumps(rows))
    return 1 if any(r["lost"] for r in rows) else 0


if __name__ == "__main__":
    sys.exit(main())
