"""Shared pieces of the tracking tests: a small experiment config on the committed sample log,
a tiny fitted model, and child processes started as a user would start them."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "data_samples" / "quillfen-courier"

#: A small experiment on the committed sample log: one CP model and the popularity baseline,
#: a 12-hour test window, the static protocol and few bootstrap resamples, so it trains in seconds.
SMALL_CONFIG = f"""
[experiment]
name = "tracking-tests"

[data]
events = "{SAMPLE / 'events.parquet'}"
items = "{SAMPLE / 'items.parquet'}"
timezone = "Europe/Berlin"

[build]
contexts = ["daypart", "device"]

[split]
cutoff = "2026-04-04T00:00:00+00:00"
validation_window = "24h"
test_window = "12h"

[evaluation]
ks = [3, 5]
baseline = "popularity"
protocol = "static"
n_resamples = 20
metrics = ["recall", "ndcg"]

[models.popularity]
method = "popularity"

[models.cp]
method = "cp"
structure = "user*item + item*device:2"
rank = 4
max_sweeps = 2
random_state = 3

[sweep]
model = "cp"
k = 5
"""


def write_config(folder: Path, text: str = SMALL_CONFIG, name: str = "small.toml") -> Path:
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def tiny_events(seed: int = 0, n: int = 400) -> pd.DataFrame:
    """Invented clicks of 20 users on 15 items at random times over three days (random data)."""
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "user_id": rng.choice([f"u{i:02d}" for i in range(20)], n),
        "item_id": rng.choice([f"i{i:02d}" for i in range(15)], n),
        "timestamp": 1_700_000_000 + rng.integers(0, 3 * 86400, n),
        "device": rng.choice(["mobile", "desktop"], n),
    })


def tiny_cp(seed: int = 0, dtype=np.float64, structure: str = "user*item:2 + item*device:1"):
    """A CP model fitted on :func:`tiny_events` (contexts daypart and device) and its specifications."""
    from threefold.data.build import build_tensor
    from threefold.data.context import parse_context
    from threefold.models.cp.model import fit_cp

    specs = [parse_context("daypart"), parse_context("device")]
    tensor, _ = build_tensor(tiny_events(seed), specs, negatives="none", dtype=dtype)
    return fit_cp(tensor, rank=3, structure=structure, max_sweeps=3, tol=0, random_state=seed), specs


SERVING = {"contexts": ["daypart", "device"], "timezone": "UTC",
           "daypart_starts": [5.0, 9.0, 12.0, 17.0, 21.0],
           "daypart_labels": ["early", "morning", "afternoon", "evening", "night"]}


def child_env(**extra: str) -> dict:
    """The environment of a user's shell: pytest's own variables removed."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTEST_")}
    env.pop("MLFLOW_TRACKING_URI", None)
    env.update(extra)
    return env


def threefold_command(*args: str) -> list[str]:
    """The ``threefold`` command as installed beside this Python."""
    script = Path(sys.executable).with_name("threefold")
    return [str(script), *args] if script.exists() else [sys.executable, "-m", "threefold.cli", *args]


def run(command: list[str], cwd: Path, timeout: float = 300, **kwargs) -> subprocess.CompletedProcess:
    return subprocess.run(command, cwd=cwd, env=child_env(), capture_output=True, text=True, timeout=timeout, **kwargs)
