"""Benchmark: sparse HOOI and implicit-weighted Tucker against tensorly and a plain sparse product.

Cases (each contender in its own child process; peak RSS from resource.getrusage in the child):

* ``small``: 2000 users × 1000 items × 24 context levels, 200,000 stored cells (binary: the tensor
  of the CP benchmark B1, ``bench_cp.site_cells`` with seed 1), ranks (16, 16, 4).
  Our :func:`threefold.hooi.fit_hooi` on the sparse tensor against
  ``tensorly.decomposition.tucker`` on the dense tensor (init 'svd', tol = 0), same sweeps.
  Goal of the Tucker issue: at least 20 times faster at under a tenth of its peak memory, same fit.
* ``large``: 100,000 users × 20,000 items × 6 dayparts × 4 devices, 10 million stored cells, item
  popularity Zipf-skewed: the tensor of the CP benchmark B2 (``bench_cp.site_cells``, seed 3, clicks
  and skips weighted with w0 = 0.1). HOOI at ranks (32, 32, 4, 3) (goal: at most 20 s per sweep) and implicit
  Tucker at ranks (16, 16, 4, 3) (time per sweep and peak memory recorded). No dense library can hold
  this tensor (4.8·10¹⁰ cells), so the reference is a plain ``scipy.sparse`` CSR unfolding times a
  dense 32-column matrix, ``nnz · 32`` multiply-adds: the least work any mode update must do.

The tensors are generated once from a seed in the parent, saved to a temporary ``.npz`` and loaded by
each child (generation is not timed; loading counts in peak memory). Numba kernels are compiled (or loaded from cache) on a tiny
tensor before timing.

Usage (from the repository root)::

    /work/venv/bin/python experiments/benchmarks/bench_tucker.py                 # both cases, writes results/tucker.md
    /work/venv/bin/python experiments/benchmarks/bench_tucker.py --case small --no-write
    /work/venv/bin/python experiments/benchmarks/bench_tucker.py --case large --nnz 1000000 --no-write
"""

from __future__ import annotations

import argparse
import platform
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from _harness import gib, run_child  # noqa: E402
from bench_cp import SITE_SHAPE, site_cells  # noqa: E402  (the CP benchmarks' tensors)

RESULTS = HERE / "results" / "tucker.md"


# ---------------------------------------------------------------------- children
CHILD_PRELUDE = """
import sys, time
import numpy as np
from threefold.feedback import CellEvidence, FeedbackWeighting
from threefold.tensor import SparseTensor
data = np.load({path!r})
shape = tuple(int(s) for s in data["shape"])
coords = data["coords"]
n = coords.shape[1]
if "clicks" in data:  # exposure-aware evidence of the CP benchmark B2, its weighting (w0 = 0.1)
    evidence = CellEvidence(clicks=data["clicks"], dwell=np.zeros(n, np.float32), skips=data["skips"],
                            last_seen=np.zeros(n, np.uint32), time_origin=0)
    tensor = SparseTensor(coords=coords, shape=shape, mode_names=("user", "item", "daypart", "device"),
                          vocabularies=(None,) * 4, evidence=evidence, weighting=FeedbackWeighting(w0=0.1),
                          dtype=np.dtype(np.float32))
else:  # binary cells of the CP benchmark B1
    tensor = SparseTensor.from_arrays(coords, np.ones(n, np.float32), shape, dtype=np.float32)
"""

OURS_HOOI = CHILD_PRELUDE + """
from threefold.hooi import fit_hooi
warm = SparseTensor.from_arrays(np.array([[0, 1], [0, 1]] + [[0, 1]] * (len(shape) - 2)), [1.0, 2.0],
                                (2,) * len(shape), dtype=np.float32)
fit_hooi(warm, rank=1, max_sweeps=1, tol=0.0)
start = time.perf_counter()
result = fit_hooi(tensor, rank={rank}, max_sweeps={sweeps}, tol=0.0, random_state=0)
total = time.perf_counter() - start
sweeps = [h.seconds for h in result.history[1:]]
RESULT = dict(seconds=total, init_seconds=result.history[0].seconds, sweep_seconds=float(np.mean(sweeps)),
              fit=float(result.fit))
"""

OURS_IMPLICIT = CHILD_PRELUDE + """
from threefold.implicit_tucker import fit_implicit_tucker
warm = SparseTensor.from_arrays(np.array([[0, 1], [0, 1]] + [[0, 1]] * (len(shape) - 2)), [1.0, 2.0],
                                (2,) * len(shape), dtype=np.float32, w0=0.5)
fit_implicit_tucker(warm, rank=1, max_sweeps=1, tol=0.0, core_solver="cg")
start = time.perf_counter()
result = fit_implicit_tucker(tensor, rank={rank}, reg=0.1, max_sweeps={sweeps}, tol=0.0, random_state=0)
total = time.perf_counter() - start
sweeps = [h.seconds for h in result.history[1:]]
RESULT = dict(seconds=total, init_seconds=result.history[0].seconds, sweep_seconds=float(np.mean(sweeps)),
              fit=float(result.fit))
"""

TENSORLY_DENSE = CHILD_PRELUDE + """
import tensorly as tl
from tensorly.decomposition import tucker
dense = tensor.to_dense().astype(np.float64)
del tensor
start = time.perf_counter()
_, errors = tucker(tl.tensor(dense), {rank}, n_iter_max={sweeps}, init="svd", tol=0, return_errors=True)
total = time.perf_counter() - start
RESULT = dict(seconds=total, sweep_seconds=total / {sweeps}, fit=float(1.0 - errors[-1]))
"""

SPARSE_PRODUCT = CHILD_PRELUDE + """
import scipy.sparse as sp
others = np.ravel_multi_index(tuple(coords[1:].astype(np.int64)), shape[1:])
_, columns = np.unique(others, return_inverse=True)
unfolding = sp.csr_matrix((tensor.preference.astype(np.float64), (coords[0], columns)),
                          shape=(shape[0], columns.max() + 1))
dense = np.random.default_rng(0).standard_normal((unfolding.shape[1], 32))
unfolding @ dense
start = time.perf_counter()
for _ in range(3):
    unfolding @ dense
RESULT = dict(seconds=(time.perf_counter() - start) / 3)
"""


def run(template: str, path: str, **fields) -> dict:
    out = run_child(template.format(path=path, **fields), timeout=7200)
    if "error" in out:
        raise RuntimeError(out["error"])
    return out


# ---------------------------------------------------------------------- cases
def case_small(args, folder: str) -> str:
    shape, rank = (2000, 1000, 24), (16, 16, 4)
    coords = site_cells(shape, args.small_nnz, seed=1)["coords"]
    path = str(Path(folder) / "small.npz")
    np.savez(path, coords=coords, shape=np.array(shape))
    ours = run(OURS_HOOI, path, rank=rank, sweeps=args.sweeps)
    theirs = run(TENSORLY_DENSE, path, rank=list(rank), sweeps=args.sweeps)
    command = f"/work/venv/bin/python experiments/benchmarks/bench_tucker.py --case small --sweeps {args.sweeps}"
    rows = [
        ("tensorly `tucker`, dense (reference)", theirs, "1.0x", "1.0x"),
        ("threefold `fit_hooi`, sparse", ours, f"{theirs['seconds'] / ours['seconds']:.1f}x faster",
         f"{ours['peak_rss_bytes'] / theirs['peak_rss_bytes']:.3f}x"),
    ]
    lines = [
        f"### HOOI: {shape[0]} × {shape[1]} × {shape[2]}, {coords.shape[1]:,} stored cells, ranks {rank}, "
        f"{args.sweeps} sweeps (tol = 0, SVD/HOSVD init)",
        "",
        f"Command (from the repository root): `{command}`",
        "",
        "| contender | total time (s) | per sweep (s) | peak memory | fit 1 − ‖X − X̂‖/‖X‖ | speed | memory ratio |",
        "|---|---|---|---|---|---|---|",
    ]
    for name, out, speed, memory in rows:
        lines.append(f"| {name} | {out['seconds']:.2f} | {out['sweep_seconds']:.3f} | {gib(out['peak_rss_bytes'])} | "
                     f"{out['fit']:.6f} | {speed} | {memory} |")
    lines.append("")
    lines.append("Total time includes the initialization (tensorly: SVD of each dense unfolding; threefold: HOSVD "
                 f"from the sparse unfoldings, {ours['init_seconds']:.2f} s). Goal: ≥ 20x faster at < 0.1x memory, "
                 "same fit.")
    return "\n".join(lines)


def case_large(args, folder: str) -> str:
    shape = SITE_SHAPE
    cells = site_cells(shape, args.large_nnz, seed=3)
    path = str(Path(folder) / "large.npz")
    np.savez(path, shape=np.array(shape), **cells)
    nnz = cells["coords"].shape[1]
    del cells
    reference = run(SPARSE_PRODUCT, path)
    hooi = run(OURS_HOOI, path, rank=(32, 32, 4, 3), sweeps=args.sweeps)
    implicit = run(OURS_IMPLICIT, path, rank=(16, 16, 4, 3), sweeps=args.sweeps)
    command = (f"/work/venv/bin/python experiments/benchmarks/bench_tucker.py --case large "
               f"--large-nnz {args.large_nnz} --sweeps {args.sweeps}")
    lines = [
        f"### Tucker at scale: {shape[0]:,} × {shape[1]:,} × {shape[2]} × {shape[3]}, {nnz:,} stored cells "
        f"(Zipf item popularity), {args.sweeps} sweeps",
        "",
        f"Command (from the repository root): `{command}`",
        "",
        "| contender | ranks | init (s) | per sweep (s) | peak memory | fit | per sweep / reference |",
        "|---|---|---|---|---|---|---|",
        f"| scipy CSR unfolding @ dense (·, 32) (reference, nnz·32 multiply-adds) | — | — | "
        f"{reference['seconds']:.3f} | {gib(reference['peak_rss_bytes'])} | — | 1.0x |",
        f"| threefold `fit_hooi` | (32, 32, 4, 3) | {hooi['init_seconds']:.1f} | {hooi['sweep_seconds']:.2f} | "
        f"{gib(hooi['peak_rss_bytes'])} | {hooi['fit']:.4f} | {hooi['sweep_seconds'] / reference['seconds']:.0f}x |",
        f"| threefold `fit_implicit_tucker` (w0 = 0.1, reg = 0.1, core CG 10 steps) | (16, 16, 4, 3) | {implicit['init_seconds']:.1f} | "
        f"{implicit['sweep_seconds']:.2f} | {gib(implicit['peak_rss_bytes'])} | {implicit['fit']:.4f} | "
        f"{implicit['sweep_seconds'] / reference['seconds']:.0f}x |",
        "",
        "HOOI goal: at most 20 s per sweep. The reference is the least work of one mode update; a HOOI sweep "
        "updates four modes, each with a product over all stored cells and a Gram matrix of its Y_(n). Fit is "
        "1 − ‖X − X̂‖/‖X‖ for HOOI and the weighted fit for implicit Tucker.",
    ]
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--case", choices=("small", "large", "all"), default="all")
    parser.add_argument("--sweeps", type=int, default=5)
    parser.add_argument("--small-nnz", type=int, default=200_000)
    parser.add_argument("--large-nnz", type=int, default=10_000_000)
    parser.add_argument("--no-write", action="store_true", help="print only, do not write results/tucker.md")
    args = parser.parse_args()
    sections = [f"## Tucker models\n\nMachine: {platform.machine()}, Python {platform.python_version()}, "
                f"2 cores shared; each contender in its own child process, peak RSS of the child."]
    with tempfile.TemporaryDirectory() as folder:
        if args.case in ("small", "all"):
            sections.append(case_small(args, folder))
            print(sections[-1], flush=True)
        if args.case in ("large", "all"):
            sections.append(case_large(args, folder))
            print(sections[-1], flush=True)
    if not args.no_write:
        RESULTS.parent.mkdir(parents=True, exist_ok=True)
        RESULTS.write_text("\n\n".join(sections) + "\n")


if __name__ == "__main__":
    main()
