"""Listing and comparing logged runs (``threefold runs`` and ``threefold runs compare``).

Metrics are shown with their interval bounds when the run logged them
(``ndcg_at_10`` with ``ndcg_at_10_low`` and ``ndcg_at_10_high``: 95% percentile
bootstrap over users). Which metrics a listing shows by default is what each
run tagged as its key metrics (``threefold.key_metrics``).
"""

from __future__ import annotations

import datetime
import difflib
import math
from typing import Mapping, Sequence

__all__ = ["list_runs", "format_runs", "compare_runs", "format_comparison"]

_TAG_PREFIX = "threefold."


def _bounds(metrics: Mapping[str, float], name: str) -> tuple[float | None, float | None, float | None]:
    return metrics.get(name), metrics.get(f"{name}_low"), metrics.get(f"{name}_high")


def _interval_text(value, low, high) -> str:
    if value is None:
        return "-"
    if low is None or high is None:
        return f"{value:.4g}"
    return f"{value:.4f} [{low:.4f}, {high:.4f}]"


def _search_filter(tags: Mapping[str, str]) -> str:
    parts = []
    for key, value in tags.items():
        escaped = str(value).replace("'", "\\'")
        parts.append(f"tags.`{key}` = '{escaped}'")
    return " AND ".join(parts)


def list_runs(store, *, experiment: str | None = None, tags: Mapping[str, str] | None = None,
              sort: str | None = None, ascending: bool = False, limit: int = 50) -> list[dict]:
    """Runs of the store, newest first (or sorted by a metric).

    Parameters
    ----------
    store : threefold.tracking.store.RunStore
    experiment : str or None
        Experiment name; default every experiment.
    tags : mapping of str to str, optional
        Keep runs whose tags have these values.
    sort : str or None
        A metric name; runs without it come last.
    ascending : bool, default=False
    limit : int, default=50

    Returns
    -------
    list of dict
        ``run_id``, ``experiment``, ``name``, ``status``, ``start`` (ISO UTC),
        ``seconds``, ``parent_run_id``, ``kind``, ``metrics``, ``params``,
        ``tags`` (threefold's own), ``key_metrics``.
    """
    client = store.client
    experiments = store.call(client.search_experiments)
    names = {e.experiment_id: e.name for e in experiments}
    if experiment is not None:
        ids = [i for i, n in names.items() if n == experiment]
        if not ids:
            raise ValueError(f"No experiment named {experiment!r}; experiments are {sorted(names.values())}.")
    else:
        ids = list(names)
    order = [f"metrics.`{sort}` {'ASC' if ascending else 'DESC'}"] if sort else ["attributes.start_time DESC"]
    runs = store.call(client.search_runs, ids, _search_filter(tags or {}), max_results=limit, order_by=order)
    if sort and runs and not any(sort in run.data.metrics for run in runs):
        known = sorted({m for run in runs for m in run.data.metrics if not m.endswith(("_low", "_high"))})
        close = difflib.get_close_matches(sort, known, n=1)
        hint = f" Did you mean {close[0]!r}?" if close else ""
        raise ValueError(f"--sort {sort!r}: no listed run has that metric.{hint} Metrics of these runs: "
                         f"{', '.join(known[:30])}{' ...' if len(known) > 30 else ''}.")
    out = []
    for run in runs:
        info, data = run.info, run.data
        end = info.end_time or info.start_time
        out.append({
            "run_id": info.run_id, "experiment": names.get(info.experiment_id), "name": info.run_name,
            "status": info.status,
            "start": datetime.datetime.fromtimestamp(info.start_time / 1000, datetime.timezone.utc).isoformat(
                timespec="seconds"),
            "seconds": None if info.end_time is None else round((end - info.start_time) / 1000, 1),
            "parent_run_id": data.tags.get("mlflow.parentRunId"), "kind": data.tags.get("threefold.kind"),
            "metrics": dict(data.metrics), "params": dict(data.params),
            "tags": {k: v for k, v in data.tags.items() if k.startswith(_TAG_PREFIX)},
            "key_metrics": [m for m in data.tags.get("threefold.key_metrics", "").split(",") if m],
        })
    return out


def format_runs(runs: Sequence[dict], metrics: Sequence[str] | None = None) -> str:
    """A text table of runs with their key metrics (or ``metrics``) and intervals."""
    if not runs:
        return "no runs"
    shown = list(metrics) if metrics else list(dict.fromkeys(m for r in runs for m in r["key_metrics"]))
    header = ["run_id", "name", "kind", "status", "start"] + shown
    rows = [[r["run_id"][:12], r["name"] or "", r["kind"] or "", r["status"], r["start"]]
            + [_interval_text(*_bounds(r["metrics"], m)) for m in shown] for r in runs]
    widths = [max(len(str(row[i])) for row in rows + [header]) for i in range(len(header))]
    return "\n".join("  ".join(str(c).ljust(w) for c, w in zip(row, widths)).rstrip() for row in [header] + rows)


def resolve_run(store, run_id: str):
    """A run by its full id or a unique prefix of at least 6 characters (as ``threefold runs`` prints)."""
    from mlflow.exceptions import MlflowException

    if len(run_id) == 32:
        try:
            return store.call(store.client.get_run, run_id)
        except MlflowException as error:
            raise ValueError(f"No run {run_id!r} in {store.location.tracking_uri}: {error.message}") from None
    matches = [r for r in list_runs(store, limit=5000) if r["run_id"].startswith(run_id)] if len(run_id) >= 6 else []
    if len(matches) != 1:
        need = "at least 6 characters of a run id" if len(run_id) < 6 else "a longer prefix or the full run id"
        raise ValueError(f"{run_id!r} matches {len(matches)} runs; give {need} (as threefold runs prints them).")
    return store.call(store.client.get_run, matches[0]["run_id"])


def compare_runs(store, run_a: str, run_b: str) -> dict:
    """Parameter differences and metric deltas (B minus A) of two runs.

    Returns
    -------
    dict
        ``runs`` (the two ids), ``params``: list of ``{key, a, b}`` for every
        key whose value differs or exists in one run only; ``metrics``: list of
        ``{metric, a, a_low, a_high, b, b_low, b_high, delta, overlap}`` for
        every metric both runs logged (interval bounds where logged);
        ``overlap`` says whether the two intervals overlap.
    """
    a, b = resolve_run(store, run_a), resolve_run(store, run_b)
    pa, pb = a.data.params, b.data.params
    params = [{"key": k, "a": pa.get(k), "b": pb.get(k)} for k in sorted(set(pa) | set(pb)) if pa.get(k) != pb.get(k)]
    ma, mb = a.data.metrics, b.data.metrics
    metrics = []
    for name in sorted(set(ma) & set(mb)):
        if name.endswith(("_low", "_high")):
            continue
        va, la, ha = _bounds(ma, name)
        vb, lb, hb = _bounds(mb, name)
        overlap = None if None in (la, ha, lb, hb) else not (ha < lb or hb < la)
        metrics.append({"metric": name, "a": va, "a_low": la, "a_high": ha, "b": vb, "b_low": lb, "b_high": hb,
                        "delta": vb - va if math.isfinite(va) and math.isfinite(vb) else None, "overlap": overlap})
    return {"runs": [a.info.run_id, b.info.run_id], "params": params, "metrics": metrics}


def format_comparison(comparison: dict) -> str:
    """Text of :func:`compare_runs`: the parameters that differ, then metrics with intervals and deltas."""
    a, b = comparison["runs"]
    lines = [f"A = {a}", f"B = {b}", "", "parameters that differ:"]
    if not comparison["params"]:
        lines.append("  (none)")
    width = max([len(p["key"]) for p in comparison["params"]] + [10])
    lines += [f"  {p['key'].ljust(width)}  A: {p['a']}   B: {p['b']}" for p in comparison["params"]]
    lines += ["", "metrics (B - A; 95% intervals of each run):"]
    width = max([len(m["metric"]) for m in comparison["metrics"]] + [6])
    for m in comparison["metrics"]:
        delta = "-" if m["delta"] is None else f"{m['delta']:+.4f}"
        note = {True: "  intervals overlap", False: "  intervals disjoint", None: ""}[m["overlap"]]
        lines.append(f"  {m['metric'].ljust(width)}  A {_interval_text(m['a'], m['a_low'], m['a_high'])}   "
                     f"B {_interval_text(m['b'], m['b_low'], m['b_high'])}   delta {delta}{note}")
    return "\n".join(lines)
