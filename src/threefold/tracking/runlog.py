"""What a tracked run records, kept out of the math: fit callbacks, fingerprints, metrics, plots.

The fit functions know nothing of MLflow. :class:`SweepLogger` is an ordinary
fit ``callback`` (``callback(record, model)``) that writes each sweep's loss,
fit and time as step metrics; the other functions turn a dataset, an
environment or an evaluation table into params, tags, metrics and artifacts.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import json
import platform
import resource
import subprocess
import sys
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from threefold.core.bundle import sha256_file as file_sha256  # one SHA-256 reader for bundles and data files

__all__ = ["SweepLogger", "file_sha256", "dataset_fingerprint", "environment_tags", "log_params", "log_metrics",
           "overall_metrics", "peak_memory_mb", "loss_curve_figure", "context_levels_figure", "LIBRARIES"]

#: Libraries whose versions every run records.
LIBRARIES = ("threefold", "numpy", "scipy", "pandas", "numba", "tensorly", "scikit-learn", "pyarrow", "mlflow", "dask")
_MAX_PARAM_CHARS = 6000
_BATCH = 100


class SweepLogger:
    """Fit callback that logs ``loss``, ``fit`` and ``sweep_seconds`` of every sweep as step metrics.

    Parameters
    ----------
    store : threefold.tracking.store.RunStore
    run_id : str
    prefix : str, default=""
        Prepended to the metric names.

    Attributes
    ----------
    records : list of SweepRecord
        Every record received, in order.
    """

    def __init__(self, store, run_id: str, prefix: str = ""):
        self.store = store
        self.run_id = run_id
        self.prefix = prefix
        self.records: list = []

    def __call__(self, record, model=None) -> None:
        self.records.append(record)
        log_metrics(self.store, self.run_id, {"loss": record.loss, "fit": record.fit, "sweep_seconds": record.seconds},
                    step=record.sweep, prefix=self.prefix)

    def log_history(self, history: Sequence) -> None:
        """Log records the callback did not see (sweep 0, the initial state, comes before any callback)."""
        seen = {r.sweep for r in self.records}
        for record in history:
            if record.sweep not in seen:
                self(record)


def dataset_fingerprint(paths: Mapping[str, str | None], events: pd.DataFrame, items: pd.DataFrame | None) -> dict:
    """What a model was trained and evaluated on.

    Parameters
    ----------
    paths : mapping of role to path or None
        E.g. ``{"events": ..., "items": ...}``; a folder counts every file in it.
    events : DataFrame
        The loaded events (``timestamp`` int64 epoch seconds UTC).
    items : DataFrame or None

    Returns
    -------
    dict
        ``files`` (path -> SHA-256), ``rows`` (role -> count), ``time_range``
        (first and last event, ISO-8601 UTC) and ``sha256``, one digest of the
        file digests (the id the sweep's idempotency uses).
    """
    files: dict[str, str] = {}
    for role, path in paths.items():
        if path is None:
            continue
        path = Path(path)
        members = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
        for member in members:
            files[str(member)] = file_sha256(member)
    ts = events["timestamp"].to_numpy(dtype=np.int64) if len(events) else np.zeros(0, dtype=np.int64)
    time_range = [pd.Timestamp(int(x), unit="s", tz="UTC").isoformat() for x in (ts.min(), ts.max())] if ts.size else []
    combined = hashlib.sha256("\n".join(files[k] for k in sorted(files)).encode()).hexdigest()
    return {"files": files, "rows": {"events": int(len(events)), "items": None if items is None else int(len(items))},
            "time_range": time_range, "sha256": combined}


def _git_commit() -> str | None:
    source = Path(__file__).resolve().parent
    try:
        commit = subprocess.run(["git", "-C", str(source), "rev-parse", "HEAD"], capture_output=True, text=True,
                                timeout=10, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(source), "status", "--porcelain", "--untracked-files=no"],
                               capture_output=True, text=True, timeout=10, check=True).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return None
    return commit + ("-dirty" if dirty else "")


def environment_tags() -> dict[str, str]:
    """Package and library versions, Python, platform and the git commit when available."""
    tags = {"threefold.python": platform.python_version(), "threefold.platform": platform.platform()}
    for name in LIBRARIES:
        try:
            tags[f"threefold.version.{name}"] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            continue
    commit = _git_commit()
    if commit is not None:
        tags["mlflow.source.git.commit"] = commit
    tags["mlflow.source.name"] = "threefold " + " ".join(sys.argv[1:2])
    return tags


def _param_text(value) -> str:
    text = value if isinstance(value, str) else json.dumps(value, default=str)
    return text if len(text) <= _MAX_PARAM_CHARS else text[: _MAX_PARAM_CHARS - 3] + "..."


def log_params(store, run_id: str, params: Mapping[str, object]) -> None:
    """Log params in batches of 100 (MLflow's limit), values as JSON text (strings as they are)."""
    from mlflow.entities import Param

    items = [Param(key, _param_text(value)) for key, value in params.items()]
    for start in range(0, len(items), _BATCH):
        store.call(store.client.log_batch, run_id, params=items[start:start + _BATCH])


def log_metrics(store, run_id: str, metrics: Mapping[str, float], *, step: int = 0, prefix: str = "") -> None:
    """Log finite metrics in batches (non-finite values are left out)."""
    import time

    from mlflow.entities import Metric

    now = int(time.time() * 1000)
    items = [Metric(prefix + key, float(value), now, step) for key, value in metrics.items()
             if value is not None and np.isfinite(value)]
    for start in range(0, len(items), _BATCH * 10):
        store.call(store.client.log_batch, run_id, metrics=items[start:start + _BATCH * 10])


def overall_metrics(table: pd.DataFrame, model: str) -> dict[str, float]:
    """A model's overall metrics from an evaluation table: ``ndcg_at_10`` with ``_low`` and ``_high``."""
    rows = table[(table["model"] == model) & (table["breakdown"] == "all") & (table["level"] == "all")]
    out: dict[str, float] = {}
    for _, row in rows.iterrows():
        name = row["metric"] if pd.isna(row["k"]) else f"{row['metric']}_at_{int(row['k'])}"
        out[name] = row["value"]
        for bound in ("low", "high"):
            if pd.notna(row[bound]):
                out[f"{name}_{bound}"] = row[bound]
    return out


def peak_memory_mb() -> float:
    """Peak resident memory of this process so far, MiB (``ru_maxrss``; KiB on Linux)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return peak / (1 << 20) if sys.platform == "darwin" else peak / 1024


def loss_curve_figure(history: Sequence, title: str):
    """Loss and fit by sweep (sweep 0 is the initial state)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    sweeps = [r.sweep for r in history]
    fig, (ax_loss, ax_fit) = plt.subplots(1, 2, figsize=(9, 3.4))
    ax_loss.plot(sweeps, [r.loss for r in history], marker="o")
    ax_loss.set(xlabel="sweep", ylabel="loss", title=f"{title}: loss")
    ax_loss.set_yscale("log")
    shown = [r for r in history if r.sweep > 0] or list(history)  # the random start's fit would flatten the curve
    ax_fit.plot([r.sweep for r in shown], [r.fit for r in shown], marker="o", color="tab:green")
    ax_fit.set(xlabel="sweep", ylabel="weighted relative fit", title=f"{title}: fit after each sweep")
    fig.tight_layout()
    return fig


def context_levels_figure(table: pd.DataFrame, metric: str, k: int, models: Sequence[str], modes: Sequence[str]):
    """One panel per context mode: ``metric@k`` of each model by level, with 95% intervals; None without context."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = table[(table["metric"] == metric) & (table["k"] == k) & table["breakdown"].isin(list(modes))
                 & table["model"].isin(list(models))]
    modes = [m for m in modes if (rows["breakdown"] == m).any()]
    if not modes:
        return None
    fig, axes = plt.subplots(1, len(modes), figsize=(4.5 * len(modes), 3.4), squeeze=False)
    for ax, mode in zip(axes[0], modes):
        sub = rows[rows["breakdown"] == mode]
        levels = list(dict.fromkeys(sub["level"]))
        width = 0.8 / max(len(models), 1)
        for j, model in enumerate(models):
            m = sub[sub["model"] == model].set_index("level").reindex(levels)
            x = np.arange(len(levels)) + j * width
            err = np.vstack([m["value"] - m["low"], m["high"] - m["value"]]).clip(min=0)
            ax.bar(x, m["value"], width, yerr=np.nan_to_num(err), label=model, capsize=2)
        ax.set_xticks(np.arange(len(levels)) + width * (len(models) - 1) / 2, levels, rotation=30, ha="right")
        ax.set(title=mode, ylabel=f"{metric}@{k}")
    axes[0][0].legend(fontsize="small")
    fig.tight_layout()
    return fig
