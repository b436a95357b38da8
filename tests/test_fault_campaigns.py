"""The CI subsets of the fault campaigns of experiments/reliability/: real processes, real SIGKILLs, real races.

Invented data only (the committed sample site). The full campaigns (50 kills per
operation; 8 trains and 2 sweeps on one store) and their tables are in
docs/reliability.md.
"""

import json
import subprocess
import sys

from _tracking import ROOT, child_env


def test_two_kills_of_each_operation_lose_nothing(tmp_path):
    script = ROOT / "experiments" / "reliability" / "kills.py"
    done = subprocess.run([sys.executable, str(script), "--quick", "--json", "--out", str(tmp_path / "work")],
                          capture_output=True, text=True, env=child_env(), timeout=1200)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    rows = json.loads(done.stdout.strip().splitlines()[-1])
    assert [r["operation"] for r in rows] == ["train", "save", "score", "refresh"]
    for row in rows:
        assert row["tried"] == 2 and row["lost"] == [], row


def test_concurrent_trains_and_a_sweep_on_one_store_lose_nothing():
    script = ROOT / "experiments" / "reliability" / "concurrent_store.py"
    done = subprocess.run([sys.executable, str(script), "--trains", "3", "--sweeps", "1", "--json"],
                          capture_output=True, text=True, env=child_env(), timeout=1200)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    result = json.loads(done.stdout.strip().splitlines()[-1])
    assert result["lost"] == [] and result["runs_by_kind"]["train"] == 3 and result["cp_models_loaded"] == 3


def test_the_main_job_end_to_end_in_fresh_processes():
    # The 10-million-event run of docs/reliability.md, at 20,000 events: every stage exits 0 and reports its peak.
    script = ROOT / "experiments" / "reliability" / "end_to_end.py"
    done = subprocess.run([sys.executable, str(script), "--events", "20000", "--requests", "500", "--json"],
                          capture_output=True, text=True, env=child_env(), timeout=1200)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    stages = json.loads(done.stdout.strip().splitlines()[-1])
    assert [s["stage"].split(" ")[0] for s in stages] == ["simulate", "reference:", "validate", "build", "train",
                                                          "score"]
    assert all(s["peak_gib"] > 0 for s in stages)
