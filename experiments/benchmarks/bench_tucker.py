"""Benchmark: sparse HOOI and implicit-weighted Tucker against tensorly and a plain sparse product.

Cases (each contender in its own child process; peak RSS from resource.getrusage in the child):

* ``small``: 2000 users × 1000 items × 24 context levels, 200,000 stored cells (binary: the tensor
  of the CP benchmark B1, ``bench_cp.site_cells`` with seed 1), ranks (16, 16, 4).
  Our :func:`threefold.models.tucker.hooi.fit_hooi` on the sparse tensor against
  ``tensorly.decomposition.tucker`` on the dense tensor (init 'svd', tol = 0), same sweeps.
  Goal of the Tucker issue: at least 20 times faster at under a tenth of its peak memory, same fit.
* ``large``: 100,000 users × 20,000 items × 6 dayparts × 4 devices, 10 million stored cells, item
  popularity Zipf-skewed: the tensor of the CP benchmark B2 (``bench_cp.site_cells``, seed 3, clicks
  and skips weighted with w0 = 0.1). HOOI at ranks (32, 32, 4, 3) (goal: at most 20 s per sweep) and implicit
  Tucker at ranks (16, 16, 4, 3) (time per sweep and peak memory recorded). No dense library can hold
  this tensor (4.8·10¹⁰ cells), so the reference is a plain ``scipy.sparse`` CSR unfolding times a
  dense 32-column matrix, ``nnz · 32`` multiply-adds: the least work any mode update must do.

The tensors are generated once from a seed in the parent, saved to a temporary ``.npz`` and loaded by
each child (generation is not timed; loading counts in peak memory). Numba kernels are compiled (or
loaded from cache) on a tiny tensor before timing. Each case writes its own section of the results file.

Usage (from the repository root)::

    .venv/bin/python experiments/benchmarks/bench_tucker.py                 # both cases, writes results/tucker.md
    .venv/bin/python experiments/benchmarks/bench_tucker.py --case small --no-write
    .venv/bin/python experiments/benchmarks/bench_tucker.py --case large --large-nnz 1000000 --no-write
"""

from __future__ import annotations

import argparse
import os
import platform
import re
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from _harness import gib, run_child  # noqa: E402
from bench_cp import SITE_SHAPE  # noqa: E402  (the tensors are the CP benchmarks': bench_cp.site_cells)

RESULTS = HERE / "results" / "tucker.md"


# ---------------------------------------------------------------------- children
# Each child: imports (and, for threefold, the compiled kernels from numba's cache), then BASE = its RSS so
# far, then the data, then the timed work. "Above imports" in the tables is peak RSS minus BASE.
IMPORTS = """
import resource, time
import numpy as np
from threefold.core.feedback import CellEvidence, FeedbackWeighting
from threefold.core.tensor import SparseTensor
"""

WARM_UP = """
from threefold.models.tucker.hooi import fit_hooi
from threefold.models.tucker.implicit import fit_implicit_tucker
warm = SparseTensor.from_arrays(np.array([[0, 1], [0, 1], [0, 1]]), [1.0, 2.0], (2, 2, 2), w0=0.5)
fit_hooi(warm, rank=1, max_sweeps=1, tol=0.0)
fit_implicit_tucker(warm, rank=1, max_sweeps=1, tol=0.0, core_solver="cg")
fit_implicit_tucker(SparseTensor.from_arrays(np.array([[0, 1]] * 4), [1.0, 2.0], (2,) * 4, w0=0.5), rank=1,
                    max_sweeps=1, tol=0.0, core_solver="cg")
"""

LOAD = """
BASE = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
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

OURS = IMPORTS + WARM_UP + LOAD + """
start = time.perf_counter()
result = {function}(tensor, rank={rank}, max_sweeps={sweeps}, tol=0.0, random_state=0)
total = time.perf_counter() - start
sweeps = [h.seconds for h in result.history[1:]]
RESULT = dict(seconds=total, init_seconds=result.history[0].seconds, sweep_seconds=float(np.mean(sweeps)),
              fit=float(result.fit), base=BASE)
"""

TENSORLY_DENSE = IMPORTS + """
import tensorly as tl
from tensorly.decomposition import tucker
""" + LOAD + """
dense = tensor.to_dense().astype(np.float64)
del tensor
start = time.perf_counter()
_, errors = tucker(tl.tensor(dense), {rank}, n_iter_max={sweeps}, init="svd", tol=0, return_errors=True)
total = time.perf_counter() - start
RESULT = dict(seconds=total, sweep_seconds=total / {sweeps}, fit=float(1.0 - errors[-1]), base=BASE)
"""

SPARSE_PRODUCT = IMPORTS + "import scipy.sparse as sp\n" + LOAD + """
others = np.ravel_multi_index(tuple(coords[1:].astype(np.int64)), shape[1:])
_, columns = np.unique(others, return_inverse=True)
unfolding = sp.csr_matrix((tensor.preference.astype(np.float64), (coords[0], columns)),
                          shape=(shape[0], columns.max() + 1))
dense = np.random.default_rng(0).standard_normal((unfolding.shape[1], 32))
unfolding @ dense
start = time.perf_counter()
for _ in range(3):
    unfolding @ dense
RESULT = dict(seconds=(time.perf_counter() - start) / 3, base=BASE)
"""


GENERATE = """
import sys
import numpy as np
sys.path.insert(0, {here!r})
from bench_cp import site_cells
cells = site_cells({shape!r}, {nnz}, seed={seed})
if {binary}:
    cells = {{"coords": cells["coords"]}}
np.savez({path!r}, shape=np.array({shape!r}), **cells)
RESULT = dict(nnz=int(cells["coords"].shape[1]))
"""


def generate(folder: str, name: str, shape, nnz: int, seed: int, binary: bool) -> tuple[str, int]:
    """Write the cells to ``folder/name.npz`` from a child process; return the path and nnz.

    In a child, so that this process stays small: on Linux a child's ``ru_maxrss`` starts from its
    parent's peak, which would otherwise be counted in every contender's peak memory.
    """
    path = str(Path(folder) / f"{name}.npz")
    out = run_child(GENERATE.format(here=str(HERE), shape=tuple(shape), nnz=nnz, seed=seed, binary=binary,
                                    path=path), timeout=7200)
    if "error" in out:
        raise RuntimeError(out["error"])
    return path, out["nnz"]


def memory(out: dict) -> str:
    return f"{gib(out['peak_rss_bytes'])} ({gib(out['peak_rss_bytes'] - out['base'])})"


def run(template: str, path: str, **fields) -> dict:
    out = run_child(template.format(path=path, **fields), timeout=7200)
    if "error" in out:
        raise RuntimeError(out["error"])
    return out


# ---------------------------------------------------------------------- cases
def case_small(args, folder: str) -> str:
    shape, rank = (2000, 1000, 24), (16, 16, 4)
    path, nnz = generate(folder, "small", shape, args.small_nnz, seed=1, binary=True)
    ours = run(OURS, path, function="fit_hooi", rank=rank, sweeps=args.sweeps)
    theirs = run(TENSORLY_DENSE, path, rank=list(rank), sweeps=args.sweeps)
    command = f".venv/bin/python experiments/benchmarks/bench_tucker.py --case small --sweeps {args.sweeps}"
    rows = [
        ("tensorly `tucker`, dense (reference)", theirs, "1.0x", "1.0x"),
        ("threefold `fit_hooi`, sparse", ours, f"{theirs['seconds'] / ours['seconds']:.1f}x faster",
         f"{ours['peak_rss_bytes'] / theirs['peak_rss_bytes']:.3f}x "
         f"({(ours['peak_rss_bytes'] - ours['base']) / (theirs['peak_rss_bytes'] - theirs['base']):.3f}x)"),
    ]
    lines = [
        f"### HOOI: {shape[0]} × {shape[1]} × {shape[2]}, {nnz:,} stored cells, ranks {rank}, "
        f"{args.sweeps} sweeps (tol = 0, SVD/HOSVD init)",
        "",
        f"Command (from the repository root): `{command}`",
        "",
        "| contender | total time (s) | per sweep (s) | peak memory (above imports) | fit 1 − ‖X − X̂‖/‖X‖ | speed "
        "| memory ratio (above imports) |",
        "|---|---|---|---|---|---|---|",
    ]
    for name, out, speed, ratio in rows:
        lines.append(f"| {name} | {out['seconds']:.2f} | {out['sweep_seconds']:.3f} | {memory(out)} | "
                     f"{out['fit']:.6f} | {speed} | {ratio} |")
    lines.append("")
    lines.append("Total time includes the initialization (tensorly: SVD of each dense unfolding; threefold: HOSVD "
                 f"from the sparse unfoldings, {ours['init_seconds']:.2f} s). Goal: ≥ 20x faster at < 0.1x memory, "
                 "same fit. Both children import threefold (its tensor module loads pandas); threefold's child also "
                 "loads the compiled kernels before BASE.")
    return "\n".join(lines)


def case_large(args, folder: str) -> str:
    shape = SITE_SHAPE
    path, nnz = generate(folder, "large", shape, args.large_nnz, seed=3, binary=False)
    reference = run(SPARSE_PRODUCT, path)
    hooi = run(OURS, path, function="fit_hooi", rank=(32, 32, 4, 3), sweeps=args.sweeps)
    implicit = run(OURS, path, function="fit_implicit_tucker", rank=(16, 16, 4, 3), sweeps=args.sweeps)
    command = (f".venv/bin/python experiments/benchmarks/bench_tucker.py --case large "
               f"--large-nnz {args.large_nnz} --sweeps {args.sweeps}")
    lines = [
        f"### Tucker at scale: {shape[0]:,} × {shape[1]:,} × {shape[2]} × {shape[3]}, {nnz:,} stored cells "
        f"(Zipf item popularity), {args.sweeps} sweeps",
        "",
        f"Command (from the repository root): `{command}`",
        "",
        "| contender | ranks | init (s) | per sweep (s) | peak memory (above imports) | fit | per sweep / reference |",
        "|---|---|---|---|---|---|---|",
        f"| scipy CSR unfolding @ dense (·, 32) (reference, nnz·32 multiply-adds) | — | — | "
        f"{reference['seconds']:.3f} | {memory(reference)} | — | 1.0x |",
        f"| threefold `fit_hooi` | (32, 32, 4, 3) | {hooi['init_seconds']:.1f} | {hooi['sweep_seconds']:.2f} | "
        f"{memory(hooi)} | {hooi['fit']:.4f} | {hooi['sweep_seconds'] / reference['seconds']:.0f}x |",
        f"| threefold `fit_implicit_tucker` (w0 = 0.1, reg = 0.1, core CG 10 steps) | (16, 16, 4, 3) | "
        f"{implicit['init_seconds']:.1f} | {implicit['sweep_seconds']:.2f} | {memory(implicit)} | "
        f"{implicit['fit']:.4f} | {implicit['sweep_seconds'] / reference['seconds']:.0f}x |",
        "",
        "HOOI goal: at most 20 s per sweep. The reference is the least work of one mode update; a HOOI sweep "
        "updates four modes, each with a product over all stored cells and a Gram matrix of its Y_(n). Fit is "
        "1 − ‖X − X̂‖/‖X‖ for HOOI and the weighted fit for implicit Tucker. Init is the HOSVD from the sparse "
        "unfoldings (ARPACK for the user and item modes) plus building the fiber trees.",
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
    with tempfile.TemporaryDirectory() as folder:
        for case, run_case in (("small", case_small), ("large", case_large)):
            if args.case in (case, "all"):
                text = run_case(args, folder)
                print(text, flush=True)
                if not args.no_write:
                    write_section(case, text)


def write_section(case: str, text: str) -> None:
    """Replace this case's section of results/tucker.md, keeping the other case's."""
    RESULTS.parent.mkdir(parents=True, exist_ok=True)
    old = RESULTS.read_text() if RESULTS.exists() else "## Tucker models\n"
    block = (f"<!-- {case} -->\n{text}\n\nMachine: {platform.machine()}, {os.cpu_count()} cores shared with other "
             f"work (load average {os.getloadavg()[0]:.1f} at the end of the run), Python "
             f"{platform.python_version()}; each contender in its own child process, peak RSS of the child.\n"
             f"<!-- /{case} -->")
    pattern = re.compile(rf"<!-- {case} -->.*?<!-- /{case} -->", re.S)
    new = pattern.sub(lambda _: block, old) if pattern.search(old) else old.rstrip() + "\n\n" + block + "\n"
    RESULTS.write_text(new)

if __name__ == "__main__":
    main()
