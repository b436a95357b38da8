"""Benchmark: the whole evaluation harness against bare numpy scoring + argpartition.

Shapes of the evaluation issue: 100,000 test queries over 20,000 items, K = 10,
rank R = 64 (float32 factors), 1-3 clicked items per query, 5 queries per user.

Contenders, each in its own child process (peak RSS from resource.getrusage):

* ``threefold evaluate()``: :func:`threefold.evaluation.harness.evaluate` with its
  defaults (K = 3, 5, 10; 1,000 bootstrap resamples over users for every
  metric; a paired comparison with a random baseline is *not* included). It
  binds the model through the shared scoring interface, masks the candidates
  (every item is live), takes the top K with the index tie rule, asserts that
  every candidate was ranked, computes the six accuracy metrics, the
  beyond-accuracy measures and the intervals.
* ``numpy reference``: blocks of ``Q @ V.T`` followed by a bare
  ``np.argpartition(-scores, K - 1)[:, :K]`` (unsorted, no tie rule, no
  candidates, no metrics), the baseline the issue names.

Usage::

    .venv/bin/python experiments/benchmarks/bench_harness.py                 # full size, writes the results file
    .venv/bin/python experiments/benchmarks/bench_harness.py --queries 10000 --no-write
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _harness import run_child  # noqa: E402

RESULTS = Path(__file__).resolve().parent / "results" / "evaluation-harness.md"

DATA = """
import numpy as np, pandas as pd, scipy.sparse as sp, time
from threefold.evaluation.queries import Candidates, QuerySet
from threefold.core.scoring import Scorer, check_queries
from threefold.core.vocabulary import Vocabulary

n_queries, n_items, rank, seed = {queries}, {items}, {rank}, {seed}
n_users = max(1, n_queries // 5)
rng = np.random.default_rng(seed)
user_factors = rng.standard_normal((n_users, rank), dtype=np.float32)
item_factors = rng.standard_normal((n_items, rank), dtype=np.float32)
query_user = np.sort(rng.integers(0, n_users, size=n_queries))
n_clicks = rng.integers(1, 4, size=n_queries)
rows = np.repeat(np.arange(n_queries), n_clicks)
clicks = sp.csr_array((np.ones(rows.size), (rows, rng.integers(0, n_items, size=rows.size))), shape=(n_queries, n_items))
clicks.data[:] = 1.0
"""

THREEFOLD = DATA + """
from threefold.evaluation.harness import evaluate


class FixedFactors(Scorer):
    # A fitted two-way factor model given by its factors (the scoring interface only).
    def __init__(self, users, items, vocabularies):
        self.users, self.items, self.vocabularies = users, items, vocabularies

    @property
    def shape(self):
        return (self.users.shape[0], self.items.shape[0])

    def query_matrix(self, users, contexts=None):
        users, _ = check_queries(users, contexts, self.shape)
        return self.users[users]

    def item_matrix(self):
        return self.items

    def score_terms(self, user, context, item):
        raise NotImplementedError


user_labels = np.asarray([f"u{{i:06d}}" for i in range(n_users)], dtype=object)
items = Vocabulary(tuple(f"i{{j:06d}}" for j in range(n_items)), name="item")
model = FixedFactors(user_factors, item_factors, (Vocabulary(tuple(user_labels), name="user"), items))
times = np.arange(n_queries, dtype=np.int64) * 10
queries = QuerySet(
    users=user_labels[query_user], contexts=pd.DataFrame(index=range(n_queries)), times=times,
    request_ids=np.arange(n_queries).astype(object), items=items, relevant=clicks,
    candidates=Candidates(kind="eligible", n_items=n_items, times=times, published=np.zeros(n_items, np.int64),
                          expires=np.full(n_items, np.iinfo(np.int64).max)),
    shown_positions=None, index=np.arange(n_queries), requests=pd.DataFrame(index=range(n_queries)),
)
t0 = time.perf_counter()
result = evaluate({{"model": model}}, queries, ks=(3, 5, 10), sensitivity_users=0)
seconds = time.perf_counter() - t0
RESULT = {{"seconds": seconds, "ndcg10": result.value("model", "ndcg", 10),
          "sample": result.ranked["model"][::max(1, n_queries // 2000)].tolist()}}
"""

NUMPY = DATA + """
query = user_factors[query_user]
item_t = np.ascontiguousarray(item_factors.T)
out = np.zeros((n_queries, {k}), dtype=np.int64)
block = max(1, (1 << 22) // n_items)
t0 = time.perf_counter()
for start in range(0, n_queries, block):
    scores = query[start:start + block] @ item_t
    out[start:start + block] = np.argpartition(-scores, {k} - 1, axis=1)[:, :{k}]
seconds = time.perf_counter() - t0
RESULT = {{"seconds": seconds, "sample": out[::max(1, n_queries // 2000)].tolist()}}
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--queries", type=int, default=100_000)
    parser.add_argument("--items", type=int, default=20_000)
    parser.add_argument("--rank", type=int, default=64)
    parser.add_argument("--k", type=int, default=10)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--repeats", type=int, default=2, help="alternating runs per contender; the table shows the fastest")
    parser.add_argument("--no-write", action="store_true")
    args = parser.parse_args()
    fmt = vars(args)
    runs: dict[str, list[dict]] = {"ours": [], "numpy": []}
    for _ in range(args.repeats):
        for name, code in (("ours", THREEFOLD), ("numpy", NUMPY)):
            result = run_child(code.format(**fmt))
            if "error" in result:
                raise RuntimeError(f"{name}: {result['error']}")
            runs[name].append(result)
    ours = min(runs["ours"], key=lambda r: r["seconds"])
    ref = min(runs["numpy"], key=lambda r: r["seconds"])
    same = all(set(a[: args.k]) == set(b) for a, b in zip(ours["sample"], ref["sample"]))

    def spread(name: str) -> str:
        times = [r["seconds"] for r in runs[name]]
        return f"{len(times)} runs: {min(times):.1f}-{max(times):.1f} s"

    def rss(name: str) -> float:
        return max(r["peak_rss_bytes"] for r in runs[name]) / 2**20

    command = ".venv/bin/python experiments/benchmarks/bench_harness.py"
    if (args.queries, args.items, args.rank, args.k) != (100_000, 20_000, 64, 10):
        command += f" --queries {args.queries} --items {args.items} --rank {args.rank} --k {args.k}"
    text = "\n".join([
        "## Evaluation harness: evaluate() end to end",
        "",
        f"{args.queries:,} queries × {args.items:,} items (all live), {args.queries // 5:,} users, K = 3, 5, 10, "
        f"R = {args.rank}, float32 factors, 1-3 clicks per query; {len(os.sched_getaffinity(0))} cores, "
        f"numpy {np.__version__}, {platform.machine()}; each contender in its own child process, "
        f"{args.repeats} alternating run(s) on a shared machine.",
        "",
        "| contender | seconds (best run) | peak RSS (MB) | notes |",
        "| --- | ---: | ---: | --- |",
        f"| threefold evaluate(): bind + candidate mask + top_k + 6 metrics × 3 K + beyond-accuracy + "
        f"1,000-resample user bootstrap per row | {ours['seconds']:.1f} | {rss('ours'):.0f} | {spread('ours')} |",
        f"| numpy reference: blocks of Q @ V.T + argpartition (K = {args.k}) | {ref['seconds']:.1f} | "
        f"{rss('numpy'):.0f} | unsorted, no tie rule, no metrics; {spread('numpy')} |",
        "",
        f"Ratio threefold / reference: {ours['seconds'] / ref['seconds']:.2f}. Same top-{args.k} sets on every "
        f"{max(1, args.queries // 2000)}th query: {same}. NDCG@10 of the random factors: {ours['ndcg10']:.5f}.",
        "",
        f"Command (from the repository root): `{command}`",
        "",
    ])
    print(text)
    if not args.no_write:
        RESULTS.parent.mkdir(parents=True, exist_ok=True)
        RESULTS.write_text(text)


if __name__ == "__main__":
    main()
