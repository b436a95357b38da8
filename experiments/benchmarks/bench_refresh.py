"""Benchmark: one hourly refresh (``refresh_result``) against a full retrain of the same model.

The reference is measured in the same run: the full retrain that the refresh
stands in for, ``build_tensor`` of the training events plus the new hour's
events and ``fit_cp(tensor, rank=R, reg=0.1, max_sweeps=S, tol=0,
random_state=0)`` (build + fit timed). The contender is
``refresh_result(result, hour, contexts, build_options={})`` with ``result``
fitted the same way on the training events only, and ``hour`` the last hour
(new items, new users, returning users); also with ``update_known=True``,
which re-solves the returning users' trained rows too. Goals of the issue:
refresh / retrain at most 1/20, refresh peak memory at most 1.5 GB.

The site is synthetic and seeded (numpy; invented ids): 7 days of requests
before the cutoff, 6 slots per request, click probability 0.25/sqrt(position),
Zipf item popularity, lognormal user activity, contexts daypart (from the
timestamp) and device; in the hour a slot shows a new item with probability
0.3. The logs are written to Parquet once; each contender runs in its own
child process (the base fit too), which reads what its job would hold (the
retrain: both logs; the refresh: the saved model and the hour), first warms
the compiled kernels on a tiny input (not timed), and reports ``VmHWM``.

Usage (from the repository root; the default is the issue's target scale)::

    .venv/bin/python experiments/benchmarks/bench_refresh.py --write
    .venv/bin/python experiments/benchmarks/bench_refresh.py --events 200000 --hour-events 4000   # quick check
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from _harness import gib, run_child  # noqa: E402
from bench_select import _commit  # noqa: E402

RESULTS = HERE / "results" / "bench_refresh.md"
SLATE = 6
CLICK_P = 0.25 / np.sqrt(np.arange(1, SLATE + 1))
ROWS_PER_REQUEST = SLATE + CLICK_P.sum()
CUTOFF = 1_774_224_000  # 2026-03-23 00:00 UTC: the training cutoff; the hour is [CUTOFF, CUTOFF + 3600)


def _rows(rng, ts, users, items, devices):
    """Impression rows of every slot, then the click rows, ordered by request; as columns of codes."""
    req = np.repeat(np.arange(ts.size), SLATE)
    pos = np.tile(np.arange(1, SLATE + 1), ts.size)
    clicked = rng.random(req.size) < CLICK_P[pos - 1]
    r, p = np.concatenate([req, req[clicked]]), np.concatenate([pos, pos[clicked]])
    kind = np.concatenate([np.zeros(req.size, np.int8), np.ones(int(clicked.sum()), np.int8)])
    it = np.concatenate([items.ravel(), items.ravel()[clicked]])
    order = np.lexsort((p, kind, r))
    r, p, kind, it = r[order], p[order], kind[order], it[order]
    return dict(request=r, timestamp=ts[r] + kind * (2 * p + 3), user=users[r], item=it, event=kind, position=p,
                device=devices[r])


def _table(cols, first_request):
    import pyarrow as pa

    def labels(prefix, codes, width):
        uniq, inv = np.unique(codes, return_inverse=True)
        return pa.array([f"{prefix}{c:0{width}d}" for c in uniq]).take(pa.array(inv))
    return pa.table({"request_id": labels("r", cols["request"] + first_request, 8),
                     "timestamp": pa.array(cols["timestamp"].astype(np.int64)),
                     "user_id": labels("u", cols["user"], 7), "item_id": labels("i", cols["item"], 6),
                     "event": pa.array(np.array(["impression", "click"])[cols["event"]]),
                     "position": pa.array(cols["position"].astype(np.int64)),
                     "device": pa.array(np.array(["desktop", "mobile", "tablet"])[cols["device"]])})


def make_site(n_events, hour_events, new_items, returning, new_users, seed):
    """Training and hour logs (pyarrow tables) and the counts of the hour."""
    rng = np.random.default_rng(seed)
    n_users, n_items = max(n_events // 100, 100), max(n_events // 500, 50)
    activity = rng.lognormal(0.0, 1.0, n_users)
    popularity = rng.permutation(1.0 / np.arange(1, n_items + 1))
    home = rng.integers(0, 3, n_users + new_users)

    def requests(who):  # each request on the user's usual device with probability 0.8
        return who, np.where(rng.random(who.size) < 0.8, home[who], rng.integers(0, 3, who.size))
    n_req = int(n_events / ROWS_PER_REQUEST)
    ts = np.sort(rng.integers(CUTOFF - 7 * 86_400, CUTOFF - 60, n_req))
    users, devices = requests(rng.choice(n_users, n_req, p=activity / activity.sum()))
    items = rng.choice(n_items, (n_req, SLATE), p=popularity / popularity.sum())
    train = _rows(rng, ts, users, items, devices)
    seen = np.flatnonzero(np.bincount(users, minlength=n_users) > 0)
    back = rng.choice(seen, returning, replace=False, p=activity[seen] / activity[seen].sum())
    hour_users = np.concatenate([back, n_users + np.arange(new_users)])
    n_req_h = int(hour_events / ROWS_PER_REQUEST)
    if n_req_h < hour_users.size or n_req_h * SLATE * 0.25 < new_items:
        raise SystemExit(f"{hour_events} hour events are too few for {hour_users.size} users and {new_items} new items")
    weights = np.concatenate([activity[back], np.full(new_users, np.median(activity))])
    extra = rng.choice(hour_users, n_req_h - hour_users.size, p=weights / weights.sum())
    who, dev = requests(rng.permutation(np.concatenate([hour_users, extra])))  # every hour user at least once
    items_h = rng.choice(n_items, (n_req_h, SLATE), p=popularity / popularity.sum())
    slot_new = rng.random(items_h.shape) < 0.3
    k = int(slot_new.sum())
    items_h[slot_new] = n_items + rng.permutation(np.concatenate([np.arange(new_items),
                                                                  rng.integers(0, new_items, k - new_items)]))
    hour = _rows(rng, np.sort(rng.integers(CUTOFF, CUTOFF + 3600, n_req_h)), who, items_h, dev)
    counts = dict(returning=returning, new_users=new_users, new_items=new_items, users=int(seen.size),
                  items=int(np.unique(train["item"]).size))
    return _table(train, 0), _table(hour, n_req), counts


CHILD = """
import time, numpy as np, pandas as pd
from threefold.data.build import build_tensor
from threefold.data.context import ColumnContext, Daypart
from threefold.models.cp.model import fit_cp
from threefold.models.model_io import load_model, save_model
from threefold.models.refresh import refresh_result
import threefold.models.refresh as refresh_module
CONTEXTS = [Daypart(), ColumnContext("device")]
KIND, FOLDER, R, S = {kind!r}, {folder!r}, {rank}, {sweeps}
def hwm():
    return int([l for l in open("/proc/self/status") if l.startswith("VmHWM:")][0].split()[1]) * 1024
hour = pd.read_parquet(FOLDER + "/hour.parquet")
if KIND in ("base", "retrain"):
    events = pd.read_parquet(FOLDER + "/train.parquet")
    small, _ = build_tensor(events.iloc[:5000], CONTEXTS)
    fit_cp(small, rank=R, reg=0.1, max_sweeps=1, tol=0, random_state=0)  # kernels from the cache, not timed
    if KIND == "retrain":
        events = pd.concat([events, hour], ignore_index=True)
    del hour
    loaded = hwm()
    t0 = time.perf_counter()
    tensor, _ = build_tensor(events, CONTEXTS)
    t1 = time.perf_counter()
    result = fit_cp(tensor, rank=R, reg=0.1, max_sweeps=S, tol=0, random_state=0)
    t2 = time.perf_counter()
    if KIND == "base":
        save_model(result, FOLDER + "/model")
    RESULT = dict(seconds=t2 - t0, build=t1 - t0, fit=t2 - t1, sweeps=result.n_sweeps, nnz=int(tensor.nnz),
                  shape=list(tensor.shape), loaded=loaded)
else:
    result = load_model(FOLDER + "/model")[0]
    update = KIND == "refresh_known"
    first = hour["request_id"].drop_duplicates().iloc[:50]
    refresh_result(result, hour[hour["request_id"].isin(first)], CONTEXTS, {{}}, update_known=update)  # warm-up
    spent = {{}}
    def timed(name, fn):
        def wrapper(*a, **k):
            t = time.perf_counter()
            try:
                return fn(*a, **k)
            finally:
                spent[name] = spent.get(name, 0.0) + time.perf_counter() - t
        return wrapper
    refresh_module.build_tensor = timed("build_tensor", refresh_module.build_tensor)
    cls = type(result)
    cls.row_posterior = timed("row solves", cls.row_posterior)
    cls.with_rows = timed("append rows", cls.with_rows)
    loaded = hwm()
    t0 = time.perf_counter()
    _, state, counts = refresh_result(result, hour, CONTEXTS, {{}}, update_known=update)
    RESULT = dict(seconds=time.perf_counter() - t0, spent=spent, counts=counts.to_dict(), loaded=loaded)
"""


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=10_000_000, help="training log rows")
    parser.add_argument("--hour-events", type=int, default=200_000, help="log rows of the new hour")
    parser.add_argument("--new-items", type=int, help="default: hour events / 100")
    parser.add_argument("--returning-users", type=int, help="default: hour events / 10")
    parser.add_argument("--new-users", type=int, help="default: hour events / 40")
    parser.add_argument("--rank", type=int, default=64)
    parser.add_argument("--sweeps", type=int, default=10)
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--write", action="store_true", help="write results/bench_refresh.md")
    args = parser.parse_args(argv)
    h = args.hour_events
    new_items, returning = args.new_items or h // 100, args.returning_users or h // 10
    new_users = args.new_users if args.new_users is not None else h // 40
    load = os.getloadavg()[0]
    runs = {}
    with tempfile.TemporaryDirectory() as tmp:
        import pyarrow.parquet as pq

        train, hour, site = make_site(args.events, h, new_items, returning, new_users, args.seed)
        pq.write_table(train, f"{tmp}/train.parquet")
        pq.write_table(hour, f"{tmp}/hour.parquet")
        n_train, n_hour = train.num_rows, hour.num_rows
        del train, hour
        for kind in ("base", "retrain", "refresh", "refresh_known"):
            runs[kind] = run_child(CHILD.format(kind=kind, folder=tmp, rank=args.rank, sweeps=args.sweeps))
            if "error" in runs[kind]:
                raise SystemExit(f"{kind}: {runs[kind]['error']}")
            print(kind, f"{runs[kind]['seconds']:.1f} s", gib(runs[kind]["peak_rss_bytes"]), file=sys.stderr)
    ret, base = runs["retrain"], runs["base"]
    lines = ["## Refresh", "",
             f"One hourly refresh against a full retrain: a synthetic site (seeded numpy, invented ids) of "
             f"{n_train:,} training log rows ({site['users']:,} users, {site['items']:,} items, 7 days) and an hour "
             f"of {n_hour:,} rows with {site['new_items']:,} new items, {site['new_users']:,} new users and "
             f"{site['returning']:,} returning users; CP, R = {args.rank}, reg = 0.1, contexts daypart and device "
             f"(tensor {' × '.join(f'{s:,}' for s in ret['shape'])}, {ret['nnz']:,} stored cells after the hour).",
             "", "| contender | seconds | ratio to full retrain | peak memory (after loading its input) | notes |",
             "| --- | ---: | ---: | ---: | --- |",
             f"| full retrain: `build_tensor` + `fit_cp`, {ret['sweeps']} sweeps (reference) | {ret['seconds']:.1f} | "
             f"1.00 | {gib(ret['peak_rss_bytes'])} ({gib(ret['loaded'])}) | build {ret['build']:.1f} s, fit "
             f"{ret['fit']:.1f} s ({ret['fit'] / ret['sweeps']:.1f} s per sweep); both logs in memory |"]
    for kind, label in (("refresh", "`refresh_result`"), ("refresh_known", "`refresh_result`, `update_known=True`")):
        r, c = runs[kind], runs[kind]["counts"]
        rest = r["seconds"] - sum(r["spent"].values())
        where = ", ".join(f"{k} {v:.2f} s" for k, v in r["spent"].items()) + f", rest {rest:.2f} s"
        lines.append(f"| {label} | {r['seconds']:.2f} | {r['seconds'] / ret['seconds']:.4f} | "
                     f"{gib(r['peak_rss_bytes'])} ({gib(r['loaded'])}) | new items {c['new']['item']:,}, new users "
                     f"{c['new']['user']:,}, re-solved users {c['resolved']['user']:,}; cells: items "
                     f"{c['cells']['item']:,}, users {c['cells']['user']:,}; {where} |")
    r = runs["refresh"]
    lines += ["", f"Goals of the issue: refresh / retrain at most 1/20 = 0.05, measured {r['seconds'] / ret['seconds']:.4f} "
              f"(1/{ret['seconds'] / r['seconds']:.0f}); refresh peak memory at most 1.5 GB, measured "
              f"{r['peak_rss_bytes'] / 1e9:.2f} GB. The base model (same fit on the training rows only, saved and "
              f"loaded by the refresh children) took {base['seconds']:.1f} s.", "",
              "Each contender in its own child process; peak memory is the child's `VmHWM` (imports, its input and "
              "the job), in brackets the peak before the timed call. The refresh's breakdown times its calls of "
              "`build_tensor`, `row_posterior` (the row solves) and `with_rows`; rest is the refresh's own code.", "",
              f"Machine: x86_64, 2 shared cores (1-minute load average {load:.1f} at the start, "
              f"{os.getloadavg()[0]:.1f} at the end); threefold at commit {_commit()}.", "",
              f"Command (from the repository root): `.venv/bin/python experiments/benchmarks/bench_refresh.py "
              f"--events {args.events} --hour-events {h} --rank {args.rank} --sweeps {args.sweeps} --write`"]
    text = "\n".join(lines) + "\n"
    print(text)
    if args.write:
        RESULTS.write_text(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
