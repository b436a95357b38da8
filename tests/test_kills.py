"""The CI subset of the kill campaign (experiments/reliability/kills.py): real processes, real SIGKILLs.

Invented data only (the committed sample site). The full campaign (50 kills per
operation) and its table are in docs/reliability.md.
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
