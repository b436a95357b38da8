"""Benchmark: the batch scoring job (``threefold score``) and the pyfunc path against bare numpy.

Shapes of the scoring issue: 1,000,000 requests over a 20,000-item catalog,
K = 10, R = 64, float32 factors (``--requests`` shrinks it). The model is
invented: a CP model with random float32 factors over 200,000 users, 20,000
items and the context modes daypart (5 levels) and device (3 levels), structure
``user*item:32 + user*item*daypart:16 + item*device:16`` (three reason terms),
saved with :func:`threefold.models.model_io.save_model` and the serving
metadata of the tests (contexts daypart and device, time zone UTC). The
requests (``request_id``, ``user_id``, ``timestamp`` in epoch seconds,
``device``) are written once as Parquet; 1% of them name a user and 1% a device
the model never saw (they fall back, as the job documents).

Contenders, one after the other, each in its own child process (peak RSS =
``VmHWM`` of the child's ``/proc/self/status``):

* (a) numpy GEMM: the (N × 64) query matrix times the (64 × 20,000) item
  matrix in blocks of 209 rows (``top_k_product``'s default, ~16 MB of scores)
  into one reused buffer, result discarded; numpy's default BLAS threads. The
  reference.
* (a2) GEMM floor: the same blocks shared by 2 Python threads, each with BLAS
  held to one thread: the layout ``top_k_product`` runs its GEMMs in.
* (b) numpy GEMM + top-10: the same blocks, then ``np.argpartition(scores,
  n_items - 10)`` (no negated copy of the scores) and a sort of the 10 picked
  by score: the naive top-k.
* (c) ``score_requests(model, requests.parquet, out=<new folder>, k=10,
  explain="none", load=False, show_progress=False)``: the whole job, from the
  Parquet file to the part files and the manifest (hashing the input, loading
  the model, staging, scoring, writing, the manifest).
* (d) the same with ``explain="top3"``.
* (e) the pyfunc path on the first 100,000 requests: the model logged with
  :func:`threefold.tracking.pyfunc.log_pyfunc` into a temporary local run
  store, loaded with ``mlflow.pyfunc.load_model``, then ``predict`` on the
  DataFrame of the requests (read from Parquet before the clock starts).
* (e2) ``Recommender.recommend`` on the same DataFrame (what the pyfunc's
  ``predict`` calls), without MLflow.
* (f) ``score_requests`` on the same 100,000 requests (their own Parquet file).
* (a100) numpy GEMM as (a) on 100,000 requests, for the requests/s of the small case.

Each child that runs threefold code first ranks two requests with a tiny
float32 model of the same structure (numba's compiled kernels come from the
on-disk cache, or are compiled there) and only then starts the clock; the
time of that warm-up is in the notes. Python's start and imports are not
timed. (c) checks its output on a sample of requests against the definition
(float64 scores from the raw factors, ``sorted(items, key=lambda j: (-s[j], j))[:10]``).

Before and after each contender a probe process times a trivially parallel
numba loop on 1 and on 2 threads: its speed-up says about how many of the
machine's 2 cores were free (numpy's 2-thread GEMM slows down several times
when another job holds a core). The raw measurements go to
``<workdir>/results.json``; ``--render`` writes the markdown from it again.

``--profile`` adds children that run (c), (d) and (e) with timers around the
stages (staging, the parts of ``Recommender.recommend``, Parquet writing, the
MLflow schema enforcement, ...): each stage's inclusive seconds, with the
stage's own remainder as ``(rest)``. ``--cprofile DIR`` runs those profile
children under cProfile as well and leaves one ``.pstats`` file per child in
DIR.

Usage (from the repository root)::

    .venv/bin/python experiments/benchmarks/bench_score.py --requests 50000 --no-write   # quick look
    .venv/bin/python experiments/benchmarks/bench_score.py --profile                     # full size, writes results/score.md
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _harness import run_child  # noqa: E402

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results" / "score.md"
STRUCTURE = "user*item:{a} + user*item*daypart:{b} + item*device:{c}"
DEVICES = ("desktop", "mobile", "tablet")
#: As tests/_tracking.SERVING (copied: the benchmark does not import the tests).
SERVING = {"contexts": ["daypart", "device"], "timezone": "UTC",
           "daypart_starts": [5.0, 9.0, 12.0, 17.0, 21.0],
           "daypart_labels": ["early", "morning", "afternoon", "evening", "night"]}
T_START = 1_767_225_600  # 2026-01-01T00:00:00Z; request times spread over the next 7 days
PYFUNC_FILE = "requests-pyfunc.parquet"


# ---------------------------------------------------------------------------- invented data
def structure_spec(rank: int) -> str:
    a, b = rank // 2, rank // 4
    return STRUCTURE.format(a=a, b=b, c=rank - a - b)


def make_cp(n_users: int, n_items: int, rank: int, seed: int):
    """A CPResult with random float32 factors (invented ids u…, i…), modes user, item, daypart, device."""
    import numpy as np

    from threefold.core.vocabulary import Vocabulary
    from threefold.models.cp.result import CPResult
    from threefold.models.cp.structure import Structure
    from threefold.models.fitloop import SweepRecord

    rng = np.random.default_rng(seed)
    names = ("user", "item", "daypart", "device")
    structure = Structure.parse(structure_spec(rank), rank=rank)
    mask = structure.active_mask(names)
    labels = [[f"u{i:07d}" for i in range(n_users)], [f"i{i:06d}" for i in range(n_items)],
              list(SERVING["daypart_labels"]), list(DEVICES)]
    factors = []
    for n, rows in enumerate(labels):
        factor = np.ones((len(rows), rank), dtype=np.float32)
        for s in range(0, len(rows), 65536):
            block = rng.standard_normal((min(65536, len(rows) - s), rank), dtype=np.float32)
            factor[s:s + block.shape[0]] = np.where(mask[n], block / np.sqrt(rank), 1.0)
        factors.append(factor)
    return CPResult(weights=np.sort(rng.uniform(0.5, 2.0, rank))[::-1].copy(), factors=tuple(factors),
                    column_norms=np.ones((len(names), rank)), structure=structure, mode_names=names,
                    vocabularies=tuple(Vocabulary(tuple(v), name=m) for v, m in zip(labels, names)),
                    history=(SweepRecord(0, 0.0, 0.0, 0.0),), stop_reason="max_sweeps", w0=1.0, reg=0.1)


def make_requests(n: int, n_users: int, seed: int):
    """``request_id``, ``user_id``, ``timestamp`` (epoch seconds), ``device``; 1% unseen users, 1% unseen devices."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed + 1)
    users = rng.integers(0, n_users, n)
    user_ids = pd.Series([f"u{u:07d}" for u in users], dtype=object)
    unseen = rng.random(n) < 0.01
    user_ids[unseen] = [f"new{i:07d}" for i in range(int(unseen.sum()))]
    devices = np.asarray(DEVICES, dtype=object)[rng.integers(0, len(DEVICES), n)]
    devices[rng.random(n) < 0.01] = "smart-tv"
    return pd.DataFrame({"request_id": [f"r{i:08d}" for i in range(n)], "user_id": user_ids.to_numpy(),
                         "timestamp": T_START + rng.integers(0, 7 * 86400, n), "device": devices})


def prepare(workdir: Path, args) -> dict:
    """Write the model folder, the requests files and the pyfunc store once (reused while the parameters match)."""
    key = {"requests": args.requests, "pyfunc_requests": args.pyfunc_requests, "users": args.users,
           "items": args.items, "rank": args.rank, "seed": args.seed, "version": 1}
    stamp = workdir / "data.json"
    if stamp.is_file() and json.loads(stamp.read_text()).get("key") == key:
        return json.loads(stamp.read_text())
    import pyarrow as pa
    import pyarrow.parquet as pq

    from threefold.models.model_io import save_model
    from threefold.tracking.pyfunc import log_pyfunc
    from threefold.tracking.store import open_store

    shutil.rmtree(workdir, ignore_errors=True)
    workdir.mkdir(parents=True)
    t0 = time.perf_counter()
    result = make_cp(args.users, args.items, args.rank, args.seed)
    save_model(result, workdir / "model", extra={"serving": SERVING})
    requests = make_requests(args.requests, args.users, args.seed)
    pq.write_table(pa.Table.from_pandas(requests, preserve_index=False), workdir / "requests.parquet")
    small = requests.iloc[:args.pyfunc_requests].reset_index(drop=True)
    pq.write_table(pa.Table.from_pandas(small, preserve_index=False), workdir / PYFUNC_FILE)
    store = open_store(workdir / "store")
    with store.run(store.experiment_id("bench-score"), run_name="bench-score"):
        uri = log_pyfunc(store, result, SERVING)
    info = {"key": key, "uri": uri, "tracking_uri": store.location.tracking_uri,
            "seconds": time.perf_counter() - t0,
            "requests_mb": (workdir / "requests.parquet").stat().st_size / 2**20}
    stamp.write_text(json.dumps(info))
    return info


# ---------------------------------------------------------------------------- children
def _block(n_items: int) -> int:
    return max(16, (16 << 20) // (n_items * 4))  # top_k_product's default for float32


def _random_factors(n: int, n_items: int, rank: int, seed: int):
    import numpy as np

    rng = np.random.default_rng(seed + 2)
    query = np.empty((n, rank), dtype=np.float32)
    for s in range(0, n, 65536):
        query[s:s + 65536] = rng.standard_normal((min(65536, n - s), rank), dtype=np.float32)
    return query, rng.standard_normal((n_items, rank), dtype=np.float32)


def child_gemm(n: int, n_items: int, rank: int, k: int, seed: int) -> dict:
    import numpy as np

    query, items = _random_factors(n, n_items, rank, seed)
    items_t, block = items.T, _block(n_items)
    buf = np.empty((block, n_items), dtype=np.float32)
    np.matmul(query[:block], items_t, out=buf[:min(block, n)])  # BLAS threads up
    t0 = time.perf_counter()
    for s in range(0, n, block):
        e = min(s + block, n)
        np.matmul(query[s:e], items_t, out=buf[:e - s])
    return {"seconds": time.perf_counter() - t0, "notes": f"blocks of {block} rows"}


def child_gemm_threads(n: int, n_items: int, rank: int, k: int, seed: int) -> dict:
    """The same blocks shared by 2 Python threads, each with BLAS held to one thread (the layout of top_k_product)."""
    import threading
    from concurrent.futures import ThreadPoolExecutor

    import numpy as np
    from threadpoolctl import threadpool_limits

    query, items = _random_factors(n, n_items, rank, seed)
    items_t, block = items.T, _block(n_items)
    starts, lock = iter(range(0, n, block)), threading.Lock()

    def work() -> None:
        buf = np.empty((block, n_items), dtype=np.float32)
        while True:
            with lock:
                s = next(starts, None)
            if s is None:
                return
            e = min(s + block, n)
            np.matmul(query[s:e], items_t, out=buf[:e - s])

    with threadpool_limits(1, user_api="blas"):
        t0 = time.perf_counter()
        with ThreadPoolExecutor(2) as pool:
            for future in [pool.submit(work) for _ in range(2)]:
                future.result()
        seconds = time.perf_counter() - t0
    return {"seconds": seconds, "notes": f"blocks of {block} rows"}


def child_naive(n: int, n_items: int, rank: int, k: int, seed: int) -> dict:
    import numpy as np

    query, items = _random_factors(n, n_items, rank, seed)
    items_t, block = items.T, _block(n_items)
    buf = np.empty((block, n_items), dtype=np.float32)
    out = np.empty((n, k), dtype=np.int64)
    np.matmul(query[:block], items_t, out=buf[:min(block, n)])
    t0 = time.perf_counter()
    for s in range(0, n, block):
        e = min(s + block, n)
        scores = buf[:e - s]
        np.matmul(query[s:e], items_t, out=scores)
        picked = np.argpartition(scores, n_items - k, axis=1)[:, n_items - k:]
        values = np.take_along_axis(scores, picked, axis=1)
        out[s:e] = np.take_along_axis(picked, np.argsort(-values, axis=1, kind="stable"), axis=1)
    return {"seconds": time.perf_counter() - t0, "notes": f"blocks of {block} rows; no tie rule"}


def _warm(rank: int, seed: int, explain: str) -> float:
    """Rank two requests with a tiny float32 model of the same structure (loads the compiled kernels)."""
    from threefold.ranking.recommender import Recommender, context_specs

    t0 = time.perf_counter()
    recommender = Recommender(make_cp(30, 40, rank, seed), context_specs(SERVING), timezone=SERVING["timezone"])
    recommender.recommend(make_requests(2, 30, seed), k=10, explain=explain)
    return time.perf_counter() - t0


def _check_output(workdir: Path, out: Path, k: int, n_check: int) -> tuple[int, int]:
    """(requests whose top-k equals the definition, requests checked) on part 0 (status ok requests only)."""
    import numpy as np
    import pyarrow.parquet as pq

    from threefold.models.model_io import load_model

    result, _, _ = load_model(workdir / "model")
    part = pq.read_table(out / "part-00000.parquet", columns=["request_id", "user_id", "item_id", "daypart",
                                                               "device", "status"]).to_pandas()
    requests = pq.read_table(workdir / "requests.parquet").slice(0, 5 * n_check).to_pandas().set_index("request_id")
    vocab = result.vocabularies
    starts, labels = np.asarray(SERVING["daypart_starts"]), SERVING["daypart_labels"]
    items = np.asarray(result.factors[1], dtype=np.float64)
    ok = part[part["status"] == "ok"]
    same = checked = 0
    for request_id, rows in ok.groupby("request_id", sort=False):
        if checked == n_check:
            break
        request = requests.loc[request_id]
        hour = (int(request["timestamp"]) % 86400) / 3600
        daypart = labels[max(int(np.searchsorted(starts, hour, side="right")) - 1, -1)]
        code = [vocab[0].index(request["user_id"]), vocab[2].index(daypart), vocab[3].index(request["device"])]
        q = result.weights * np.ones(result.rank)
        for mode, row in zip((0, 2, 3), code):
            q = q * np.asarray(result.factors[mode][row], dtype=np.float64)
        s = items @ q
        expected = [result.vocabularies[1].labels[j] for j in sorted(range(len(s)), key=lambda j: (-s[j], j))[:k]]
        same += list(rows["item_id"]) == expected and set(rows["daypart"]) == {daypart}
        checked += 1
    return same, checked


def _out_mb(out: Path) -> float:
    return sum(p.stat().st_size for p in out.glob("part-*")) / 2**20


def child_score(workdir: str, requests_file: str, rank: int, k: int, seed: int, explain: str,
                check: int = 0, tag: str = "") -> dict:
    from threefold.pipeline.score import score_requests

    workdir = Path(workdir)
    warm = _warm(rank, seed, explain)
    out = workdir / f"out-{tag or explain}"
    shutil.rmtree(out, ignore_errors=True)
    t0 = time.perf_counter()
    manifest = score_requests(workdir / "model", workdir / requests_file, out=out, k=k, explain=explain,
                              load=False, show_progress=False)
    seconds = time.perf_counter() - t0
    notes = [f"{manifest['rows']:,} rows in {len(manifest['parts'])} parts, {_out_mb(out):.0f} MB of Parquet",
             f"warm-up {warm:.1f} s not timed"]
    result = {"seconds": seconds}
    if check:
        same, checked = _check_output(workdir, out, k, check)
        notes.append(f"top-{k} equals the definition on {same} of {checked} sampled requests")
        result["check"] = [same, checked]
    shutil.rmtree(out, ignore_errors=True)
    return result | {"notes": "; ".join(notes)}


def child_pyfunc(workdir: str, uri: str, tracking_uri: str, rank: int, k: int, seed: int) -> dict:
    os.environ["MLFLOW_TRACKING_URI"] = tracking_uri
    os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")
    import warnings

    import mlflow
    import pandas as pd

    requests = pd.read_parquet(Path(workdir) / PYFUNC_FILE)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = mlflow.pyfunc.load_model(uri)
    load = time.perf_counter() - t0
    warm = _warm(rank, seed, "none")
    model.predict(requests.iloc[:2], params={"k": k})  # MLflow's own first-call work
    t0 = time.perf_counter()
    out = model.predict(requests, params={"k": k})
    seconds = time.perf_counter() - t0
    return {"seconds": seconds,
            "notes": f"{len(out):,} rows; load_model {load:.1f} s, warm-up {warm:.1f} s, not timed"}


def child_recommend(workdir: str, rank: int, k: int, seed: int) -> dict:
    import pandas as pd

    from threefold.ranking.recommender import Recommender

    requests = pd.read_parquet(Path(workdir) / PYFUNC_FILE)
    t0 = time.perf_counter()
    recommender = Recommender.from_folder(Path(workdir) / "model")
    load = time.perf_counter() - t0
    warm = _warm(rank, seed, "none")
    t0 = time.perf_counter()
    out = recommender.recommend(requests, k=k)
    seconds = time.perf_counter() - t0
    return {"seconds": seconds, "notes": f"{len(out):,} rows; from_folder {load:.1f} s, warm-up {warm:.1f} s, not timed"}


# ---------------------------------------------------------------------------- stage timers (profile children)
class Stages:
    """Timers around named functions; totals keyed by the stack of stages open when each call began."""

    def __init__(self):
        self.stack: list[str] = []
        self.totals: dict[tuple, list] = {}

    def _record(self, path: tuple, seconds: float) -> None:
        entry = self.totals.setdefault(path, [0.0, 0])
        entry[0] += seconds
        entry[1] += 1

    def timed(self, function, label: str):
        import functools

        @functools.wraps(function)
        def wrapper(*args, **kwargs):
            path = (*self.stack, label)
            self.stack.append(label)
            t0 = time.perf_counter()
            try:
                return function(*args, **kwargs)
            finally:
                self.stack.pop()
                self._record(path, time.perf_counter() - t0)
        return wrapper

    def timed_iter(self, function, label: str):
        """A generator function whose every ``next`` is timed under ``label``."""
        def wrapper(*args, **kwargs):
            iterator = function(*args, **kwargs)
            while True:
                path = (*self.stack, label)
                self.stack.append(label)
                t0 = time.perf_counter()
                try:
                    item = next(iterator)
                except StopIteration:
                    return
                finally:
                    self.stack.pop()
                    self._record(path, time.perf_counter() - t0)
                yield item
        return wrapper

    def patch(self, owner, name: str, label: str, generator: bool = False) -> None:
        original = getattr(owner, name)
        setattr(owner, name, (self.timed_iter if generator else self.timed)(original, label))

    def rows(self) -> list[list]:
        """``[depth, label, seconds, calls]`` in call-tree order, with a ``(rest)`` row under every parent."""
        children: dict[tuple, list[tuple]] = {}
        for path in self.totals:
            children.setdefault(path[:-1], []).append(path)
        out = []

        def walk(path: tuple, depth: int) -> None:
            seconds, calls = self.totals[path]
            out.append([depth, path[-1], seconds, calls])
            kids = children.get(path, [])
            for kid in kids:
                walk(kid, depth + 1)
            if kids:
                out.append([depth + 1, "(rest)", seconds - sum(self.totals[c][0] for c in kids), 1])

        for root in children.get((), []):
            walk(root, 0)
        return out


class _Proxy:
    """A module or class stand-in: the given attributes replaced, every other one forwarded."""

    def __init__(self, target, **overrides):
        self._target, self._overrides = target, overrides

    def __getattr__(self, name):
        return self._overrides[name] if name in self._overrides else getattr(self._target, name)


def _instrument(stages: Stages) -> None:
    """Timers around the stages of the score job, the recommender and the MLflow pyfunc path."""
    import numpy as np
    import pandas as pd
    import pyarrow as pa
    import pyarrow.parquet as pq

    from threefold.core import scoring
    from threefold.core.resolve import ResolvedScorer
    from threefold.pipeline import score
    from threefold.ranking import batch, recommender
    from threefold.ranking.recommender import Recommender

    t = stages.timed
    for name, label in (("_model_folder", "find the model folder (imports threefold.tracking.pyfunc, so mlflow)"),
                        ("prepare_job", "prepare_job: hash input, load model, stage"), ("score_part", "score_part"),
                        ("finish_job", "finish_job: manifest (SHA-256 of every part)")):
        stages.patch(score, name, label)
    for name, label in (("_content_sha256", "SHA-256 of the requests file"), ("bundle_fingerprint", "model fingerprint"),
                        ("_recommender", "load the model (Recommender.from_folder)"),
                        ("_stage_requests", "stage the requests"), ("_id_hashes", "hash request ids"),
                        ("_write_parquet", "write staged Parquet"), ("_part_input", "read the staged part")):
        stages.patch(batch, name, label)
    stages.patch(batch, "_iter_input", "read input chunk (Parquet -> pandas)", generator=True)
    batch.np = _Proxy(np, union1d=t(np.union1d, "np.union1d (seen ids)"), isin=t(np.isin, "np.isin (repeated ids)"))
    batch.pa = _Proxy(pa, Table=_Proxy(pa.Table, from_pandas=t(pa.Table.from_pandas, "pa.Table.from_pandas")))
    batch.pq = _Proxy(pq, write_table=t(pq.write_table, "pq.write_table"))
    for name, label in (("recommend", "Recommender.recommend"), ("request_times", "parse timestamps"),
                        ("request_k", "request k"), ("_context_labels", "context levels (one mode)"),
                        ("_rank_catalog", "rank the catalog"), ("_frame", "output frame (status, ids, levels)"),
                        ("reasons", "reasons")):
        stages.patch(Recommender, name, label)
    stages.patch(ResolvedScorer, "resolve_queries", "resolve ids to rows")
    stages.patch(ResolvedScorer, "query_matrix", "query matrix")
    stages.patch(scoring.Scorer, "reason_terms", "reason terms")
    stages.patch(recommender, "top_k_product", "top_k_product")
    recommender.pd = _Proxy(pd, factorize=t(pd.factorize, "pd.factorize (request ids)"),
                            concat=t(pd.concat, "pd.concat (reasons)"), DataFrame=pd.DataFrame)
    recommender.np = _Proxy(np, lexsort=t(np.lexsort, "np.lexsort (order rows)"),
                            unique=t(np.unique, "np.unique (first rows)"))
    if "mlflow" in sys.modules:
        import mlflow.pyfunc

        from threefold.tracking.pyfunc import RecommenderPyfunc

        stages.patch(mlflow.pyfunc.PyFuncModel, "predict", "PyFuncModel.predict")
        stages.patch(mlflow.pyfunc, "_validate_prediction_input", "MLflow schema enforcement")
        stages.patch(RecommenderPyfunc, "predict", "RecommenderPyfunc.predict")


def child_profile(kind: str, workdir: str, rank: int, k: int, seed: int, uri: str = "", tracking_uri: str = "",
                  cprofile: str = "") -> dict:
    """Run (c), (d) or (e) with stage timers (and cProfile when ``cprofile`` names a folder)."""
    import cProfile

    workdir = Path(workdir)
    stages = Stages()
    explain = "top3" if kind == "score-top3" else "none"
    if kind == "pyfunc":
        os.environ["MLFLOW_TRACKING_URI"] = tracking_uri
        os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")
        import warnings

        import mlflow
        import pandas as pd

        requests = pd.read_parquet(workdir / PYFUNC_FILE)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model = mlflow.pyfunc.load_model(uri)
        _warm(rank, seed, explain)
        model.predict(requests.iloc[:2], params={"k": k})
        _instrument(stages)
        run = lambda: model.predict(requests, params={"k": k})  # noqa: E731
    else:
        from threefold.pipeline.score import score_requests

        _warm(rank, seed, explain)
        _instrument(stages)
        out = workdir / f"out-profile-{kind}"
        shutil.rmtree(out, ignore_errors=True)
        run = lambda: score_requests(workdir / "model", workdir / "requests.parquet", out=out, k=k,  # noqa: E731
                                     explain=explain, load=False, show_progress=False)
    profiler = cProfile.Profile() if cprofile else None
    run_timed = stages.timed(run, "total")
    t0 = time.perf_counter()
    if profiler:
        profiler.enable()
    run_timed()
    if profiler:
        profiler.disable()
        Path(cprofile).mkdir(parents=True, exist_ok=True)
        profiler.dump_stats(str(Path(cprofile) / f"{kind}.pstats"))
    seconds = time.perf_counter() - t0
    if kind != "pyfunc":
        shutil.rmtree(out, ignore_errors=True)
    return {"seconds": seconds, "stages": stages.rows()}


_SPIN = []


def free_cores() -> float:
    """Speed-up of a trivially parallel numba loop on 2 threads over 1: about how many cores are free now."""
    import numba
    import numpy as np

    if not _SPIN:
        @numba.njit(parallel=True)
        def spin(n, steps):
            out = np.zeros(n)
            for i in numba.prange(n):
                x = 0.0
                for j in range(steps):
                    x += np.sqrt(j + x * 1e-12)
                out[i] = x
            return out

        spin(2, 10)
        _SPIN.append(spin)
    previous, seconds = numba.get_num_threads(), []
    for threads in (1, 2):
        numba.set_num_threads(threads)
        t0 = time.perf_counter()
        _SPIN[0](16, 2_000_000)
        seconds.append(time.perf_counter() - t0)
    numba.set_num_threads(previous)
    return seconds[0] / seconds[1]


CHILDREN = {"gemm": child_gemm, "gemm_threads": child_gemm_threads, "naive": child_naive, "score": child_score,
            "pyfunc": child_pyfunc, "recommend": child_recommend, "profile": child_profile}


def in_child(name: str, **params) -> dict:
    """Run ``CHILDREN[name](**params)`` in a new process, with a free-cores probe in its own process before and after."""
    probe = f"import sys\nsys.path.insert(0, {str(HERE)!r})\nimport bench_score as _b\nRESULT = {{'free': _b.free_cores()}}\n"
    code = (f"import sys\nsys.path.insert(0, {str(HERE)!r})\nimport bench_score as _b\n"
            f"RESULT = _b.CHILDREN[{name!r}](**{params!r})\n")
    before, source = run_child(probe).get("free", float("nan")), source_state()
    result = run_child(code, timeout=7200.0)
    return result | {"free_cores": [before, run_child(probe).get("free", float("nan"))], "source": source}


# ---------------------------------------------------------------------------- report
NAMES = {
    "a": "(a) numpy GEMM, blocks of Q @ V.T (reference)",
    "a2": "(a2) GEMM floor: the same blocks on 2 threads × 1-thread BLAS",
    "b": "(b) numpy GEMM + argpartition + sort of the 10",
    "c": "(c) score_requests, explain=\"none\"",
    "d": "(d) score_requests, explain=\"top3\"",
    "e": "(e) pyfunc: mlflow.pyfunc.load_model + predict",
    "e2": "(e2) Recommender.recommend on the same DataFrame",
    "f": "(f) score_requests, explain=\"none\", same requests as (e)",
    "a100": "(a100) numpy GEMM as (a), requests of (e)",
}
SMALL = ("e", "e2", "f", "a100")


def versions() -> str:
    code = ("import numpy, numba, pandas, pyarrow, mlflow\n"
            "from threadpoolctl import threadpool_info\n"
            "b = [d for d in threadpool_info() if d['user_api'] == 'blas'][0]\n"
            "RESULT = {'text': f\"numpy {numpy.__version__}, numba {numba.__version__} ({numba.get_num_threads()} threads), "
            "pandas {pandas.__version__}, pyarrow {pyarrow.__version__}, mlflow {mlflow.__version__}, "
            "BLAS {b['internal_api']} {b['version']} {b['architecture']} ({b['num_threads']} threads)\"}\n")
    return run_child(code).get("text", "?")


def source_state() -> str:
    """The commit of the measured code, and whether src/ differed from it."""
    import subprocess

    root = HERE.parents[1]
    try:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, capture_output=True, text=True,
                                check=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "src"], cwd=root, capture_output=True,
                               text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "commit unknown"
    return f"commit {commit}" + (" with local changes under src/" if dirty else "")


def stage_table(title: str, result: dict) -> list[str]:
    """Markdown of a profile child's stages (under 0.5% of the total left out; a ``(rest)`` row only beside shown siblings)."""
    if "error" in result:
        return [f"{title} error: {result['error']}", ""]
    total = result["seconds"]
    lines = [title, "", "| stage | seconds | share of total | calls |", "| --- | ---: | ---: | ---: |"]
    shown_at: dict[int, bool] = {}  # depth -> a sibling was shown since the parent
    for depth, label, seconds, calls in result["stages"]:
        for deeper in [d for d in shown_at if d > depth]:
            del shown_at[deeper]
        if label == "(rest)" and not shown_at.get(depth):
            continue
        if seconds < 0.005 * total:
            continue
        shown_at[depth] = True
        count = "-" if label == "(rest)" else f"{calls:,}"
        lines.append(f"| {'· ' * depth}{label} | {seconds:.2f} | {seconds / total:.0%} | {count} |")
    return lines + [""]


def best(runs: list[dict]) -> dict:
    ok = [r for r in runs if "error" not in r]
    if not ok:
        return dict(runs[-1])
    out = dict(min(ok, key=lambda r: r["seconds"]))
    out["peak_rss_bytes"] = max(r["peak_rss_bytes"] for r in ok)
    if len(ok) > 1:
        times = sorted(r["seconds"] for r in ok)
        out["notes"] = f"{out.get('notes', '')}; {len(ok)} runs: {times[0]:.1f}-{times[-1]:.1f} s".lstrip("; ")
    return out


def render(record: dict) -> str:
    """The markdown section of one measured run (``record`` as saved in ``<workdir>/results.json``)."""
    args, results, n, small = record["args"], record["results"], record["args"]["requests"], record["args"]["pyfunc_requests"]

    def seconds(key):
        r = results.get(key, {})
        return r.get("seconds") if "error" not in r else None

    rows = []
    for key, r in results.items():
        size = small if key in SMALL else n
        if "error" in r:
            rows.append(f"| {NAMES[key]} | {size:,} | error: {r['error']} | | | | |")
            continue
        ref = seconds("a100" if key in SMALL else "a")
        ratio = f"{r['seconds'] / ref:.2f}" if ref else "-"
        free = "free cores {:.1f} before, {:.1f} after; ".format(*r["free_cores"]) if "free_cores" in r else ""
        rows.append(f"| {NAMES[key]} | {size:,} | {r['seconds']:.1f} | {size / r['seconds']:,.0f} | "
                    f"{r['peak_rss_bytes'] / 2**20:,.0f} | {ratio} | {free}{r.get('notes', '')} |")

    def ratio(top, bottom):
        a, b = seconds(top), seconds(bottom)
        return f"{a / b:.2f}" if a and b else "n/a"

    def peak(key):
        r = results.get(key, {})
        return f"{r['peak_rss_bytes'] / 2**30:.2f} GiB" if "peak_rss_bytes" in r else "n/a"

    summary = (
        f"Goals of the issue, measured in this run: (c) / (a) = {ratio('c', 'a')} and (d) / (a) = {ratio('d', 'a')} "
        f"(goal: at most 1.5); (b) / (c) = {ratio('b', 'c')} and (b) / (d) = {ratio('b', 'd')} (goal: at least 2.5); "
        f"peak memory of (c) {peak('c')}, of (d) {peak('d')} (goal: at most 2 GB); (e) / (f) = {ratio('e', 'f')} "
        f"(goal: at most 2). Also: (b) / (a) = {ratio('b', 'a')}, (a2) / (a) = {ratio('a2', 'a')}, "
        f"(e) / (e2) = {ratio('e', 'e2')} (what MLflow adds to the recommender).")
    command = ".venv/bin/python experiments/benchmarks/bench_score.py"
    for flag, key, default in (("--requests", "requests", 1_000_000), ("--pyfunc-requests", "pyfunc_requests", 100_000),
                               ("--users", "users", 200_000), ("--items", "items", 20_000), ("--rank", "rank", 64),
                               ("--k", "k", 10), ("--seed", "seed", 0), ("--repeats", "repeats", 1), ("--only", "only", "")):
        if args[key] != default:
            command += f" {flag} {args[key]}"
    if args["profile"]:
        command += " --profile"
    text = [
        "## Batch scoring (`threefold score`)",
        "",
        f"{n:,} requests (Parquet, {record['requests_mb']:.0f} MB) over {args['items']:,} items, "
        f"{args['users']:,} users, K = {args['k']}, R = {args['rank']} (structure `{structure_spec(args['rank'])}`), "
        f"float32 factors, contexts daypart (5 levels, from the timestamp) and device (3 levels); invented random "
        f"factors and ids, 1% unseen users and 1% unseen devices. Each contender in its own child process, "
        f"{args['repeats']} alternating run(s) each (the table shows the fastest); peak RSS is `VmHWM` of the child. "
        f"Times exclude Python's start and imports; the threefold children first rank two requests with a tiny "
        f"model (compiled kernels from the on-disk cache), not timed. (a), (a2) and (b) multiply random "
        f"float32 matrices of the same shapes. \"Free cores\": just before and just after each contender's "
        f"child, a probe process times a trivially parallel numba loop on 1 and on 2 threads; the speed-up says "
        f"about how many of the 2 cores were free (the machine is shared).",
        "",
        "| contender | requests | seconds | requests/s | peak RSS (MB) | ratio to numpy GEMM | notes |",
        "| --- | ---: | ---: | ---: | ---: | ---: | --- |",
        *rows,
        "",
        "The ratio column divides by (a) for the full size and by (a100) for the pyfunc size. " + summary,
        "",
        f"Machine: {record['machine']}, {record['cores']} cores shared with other work (1-minute load average "
        f"{record['load'][0]:.1f} at the start, {record['load'][1]:.1f} at the end), Python {record['python']}, "
        f"{record['versions']}; threefold at {record['source']}.",
        "",
        f"Command (from the repository root): `{command}`",
        "",
    ]
    profiles = record.get("profiles") or {}
    if profiles:
        text += ["### Where the time goes", "",
                 "Stage timers (wrappers around the named functions, in a child that ran the job once more; "
                 "`(rest)` is the stage's own code outside the timed calls below it; one `· ` per level of nesting; "
                 "stages under 0.5% of the total left out). Same sizes as above.", ""]
        text += stage_table(f"(c) `score_requests`, explain=\"none\", {n:,} requests:", profiles["score"])
        text += stage_table(f"(d) `score_requests`, explain=\"top3\", {n:,} requests:", profiles["score-top3"])
        text += stage_table(f"(e) pyfunc `predict`, {small:,} requests:", profiles["pyfunc"])
    return "\n".join(text)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--requests", type=int, default=1_000_000)
    parser.add_argument("--pyfunc-requests", type=int, default=100_000)
    parser.add_argument("--users", type=int, default=200_000)
    parser.add_argument("--items", type=int, default=20_000)
    parser.add_argument("--rank", type=int, default=64)
    parser.add_argument("--k", type=int, default=10)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--repeats", type=int, default=1, help="alternating runs per contender; the table shows the fastest")
    parser.add_argument("--only", default="", help="comma-separated subset of " + ",".join(NAMES))
    parser.add_argument("--check", type=int, default=200, help="requests of (c) checked against the definition")
    parser.add_argument("--profile", action="store_true", help="also run (c), (d), (e) with stage timers")
    parser.add_argument("--cprofile", default="", help="folder for .pstats files of the profile children")
    parser.add_argument("--workdir", default="/tmp/threefold-bench-score",
                        help="model, requests, outputs and results.json (the raw measurements of the last run)")
    parser.add_argument("--render", action="store_true", help="measure nothing: render <workdir>/results.json again")
    parser.add_argument("--out", default=str(RESULTS), help="where the markdown goes (default results/score.md)")
    parser.add_argument("--no-write", action="store_true", help="print only")
    args = parser.parse_args()
    workdir = Path(args.workdir)
    if args.render:
        record = json.loads((workdir / "results.json").read_text())
    else:
        record = measure(args, workdir)
        (workdir / "results.json").write_text(json.dumps(record, indent=1))
    output = render(record)
    print(output)
    if not args.no_write:
        Path(args.out).parent.mkdir(parents=True, exist_ok=True)
        Path(args.out).write_text(output + "\n")


def measure(args, workdir: Path) -> dict:
    """Run every contender (and the profile children); return what :func:`render` needs."""
    n = args.requests
    small = args.pyfunc_requests = min(args.pyfunc_requests, args.requests)
    load_start = os.getloadavg()[0]
    data = prepare(workdir, args)
    print(f"data ready ({data['seconds']:.0f} s when written): {workdir}", flush=True)
    common = dict(rank=args.rank, k=args.k, seed=args.seed)
    shapes = dict(n_items=args.items, **common)
    pyfunc = dict(uri=data["uri"], tracking_uri=data["tracking_uri"])
    calls = {
        "a": lambda: in_child("gemm", n=n, **shapes),
        "a2": lambda: in_child("gemm_threads", n=n, **shapes),
        "b": lambda: in_child("naive", n=n, **shapes),
        "c": lambda: in_child("score", workdir=str(workdir), requests_file="requests.parquet", explain="none",
                              check=args.check, **common),
        "d": lambda: in_child("score", workdir=str(workdir), requests_file="requests.parquet", explain="top3",
                              **common),
        "e": lambda: in_child("pyfunc", workdir=str(workdir), **pyfunc, **common),
        "e2": lambda: in_child("recommend", workdir=str(workdir), **common),
        "f": lambda: in_child("score", workdir=str(workdir), requests_file=PYFUNC_FILE, explain="none", tag="small",
                              **common),
        "a100": lambda: in_child("gemm", n=small, **shapes),
    }
    only = [s for s in args.only.split(",") if s] or list(calls)
    runs: dict[str, list] = {key: [] for key in calls if key in only}
    for _ in range(args.repeats):  # alternating, so load changes hit every contender
        for key in runs:
            runs[key].append(calls[key]())
            print(NAMES[key], runs[key][-1], flush=True)
    profiles = {}
    if args.profile:
        for kind in ("score", "score-top3", "pyfunc"):
            profiles[kind] = in_child("profile", kind=kind, workdir=str(workdir), cprofile=args.cprofile,
                                      **(pyfunc if kind == "pyfunc" else {}), **common)
            print("profile", kind, {k: v for k, v in profiles[kind].items() if k != "stages"}, flush=True)
    sources = [r.get("source", "?") for rs in [*runs.values(), list(profiles.values())] for r in rs]
    return {"args": vars(args), "results": {key: best(r) for key, r in runs.items()}, "runs": runs,
            "profiles": profiles, "requests_mb": data["requests_mb"], "load": [load_start, os.getloadavg()[0]],
            "machine": platform.machine(), "cores": len(os.sched_getaffinity(0)), "python": platform.python_version(),
            "versions": versions(), "source": " / ".join(dict.fromkeys(sources)) + (
                " (the source changed during the run)" if len(set(sources)) > 1 else "")}


if __name__ == "__main__":
    main()
