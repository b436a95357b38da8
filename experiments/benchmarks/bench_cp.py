"""Benchmarks B1–B3 of the CP engine (issue "CP engine"), each contender in its own child process.

* ``b1``: 2000 users × 1000 items × 24 context levels, 200,000 stored cells, R = 32, uniform
  weights (w0 = 1, every stored weight 1, preference 1): time to reach the fit that tensorly's dense
  ``parafac`` reaches after 10 sweeps, and peak memory, for our exact ALS and CG (float32),
  ``tensorly.decomposition.parafac`` on the dense tensor, and
  ``tensorly.contrib.sparse.decomposition.parafac`` (capped: 1 sweep, 900 s timeout, 14 GiB
  address-space limit). All start from the same random factors. Goals: exact ALS at least 10×
  and CG at least 25× faster than the dense one, each under a tenth of its memory.
* ``b2``: 100,000 users × 20,000 items × 6 dayparts × 4 devices, 10 million stored cells, item
  popularity Zipf-skewed (exponent 1), user activity lognormal, exposure-aware evidence (clicks and
  skips), R = 64, CG solver (3 steps), float32, 2 threads: seconds per sweep and peak memory (goals:
  10 s and 3 GB). Reference: a plain numpy float32 matrix product with as many floating-point
  operations as one of our sweeps (counted from the algorithm, printed), in its own process.
* ``b3``: 1, 2, 4 and 8 million stored cells at the shape of b2, R = 32, CG on one thread: CPU
  seconds per sweep (the fastest of sweeps 2–5; CPU time of one thread is what another process on a
  shared machine disturbs least) against nnz, with the straight-line fit t = a + b·nnz and its R²
  (goal ≥ 0.98); wall seconds beside it. Reference in the same child: numpy evaluation of the
  model at every stored cell (gather, multiply, sum; chunks of 65,536 cells), also linear in nnz.

Tensors are generated once from a seed in the parent, saved to a temporary ``.npz`` and loaded by
each child (generation not timed; loading counts in peak memory). Our children first fit a tiny
tensor so numba's compiled kernels are loaded from cache before timing.

Usage (from the repository root; run one case at a time on a shared machine)::

    .venv/bin/python experiments/benchmarks/bench_cp.py b1     # writes its section of results/cp.md
    .venv/bin/python experiments/benchmarks/bench_cp.py b2
    .venv/bin/python experiments/benchmarks/bench_cp.py b3
    .venv/bin/python experiments/benchmarks/bench_cp.py b2 --nnz 1000000 --no-write   # quick check
"""

from __future__ import annotations

import argparse
import os
import platform
import re
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from _harness import gib, run_child  # noqa: E402

RESULTS = HERE / "results" / "cp.md"
SITE_SHAPE = (100_000, 20_000, 6, 4)


# ---------------------------------------------------------------------- data
def site_cells(shape, nnz, seed):
    """Unique cells of a simulated site log: who saw what, in which context, clicked or skipped.

    Users draw events by lognormal activity, items by Zipf popularity (exponent 1, random item
    order), context modes by fixed random mixes. A drawn event is a click with probability 0.35,
    else an exposure that was skipped; repeated draws of a cell add up.

    Returns
    -------
    dict with ``coords`` (ndim, nnz) int32, ``clicks`` and ``skips`` (nnz,) float32.
    """
    rng = np.random.default_rng(seed)
    draws = int(nnz * 1.5)
    user_p = rng.lognormal(0.0, 1.0, shape[0])
    item_p = 1.0 / np.arange(1, shape[1] + 1)
    columns = [
        rng.choice(shape[0], draws, p=user_p / user_p.sum()),
        rng.permutation(shape[1])[rng.choice(shape[1], draws, p=item_p / item_p.sum())],
    ]
    for size in shape[2:]:
        columns.append(rng.choice(size, draws, p=rng.dirichlet(np.full(size, 2.0))))
    keys = np.ravel_multi_index(tuple(columns), shape)
    clicked = rng.random(draws) < 0.35
    unique, inverse = np.unique(keys, return_inverse=True)
    if unique.size < nnz:
        raise RuntimeError(f"only {unique.size} unique cells drawn; raise the draw factor")
    keep = np.sort(rng.choice(unique.size, nnz, replace=False))
    clicks = np.bincount(inverse, weights=clicked, minlength=unique.size)[keep]
    skips = np.bincount(inverse, weights=~clicked, minlength=unique.size)[keep]
    coords = np.array(np.unravel_index(unique[keep], shape), dtype=np.int32)
    return {"coords": coords, "clicks": clicks.astype(np.float32), "skips": skips.astype(np.float32)}


WARM_UP = """
import numpy as np, time
from threefold.models.cp.model import fit_cp
from threefold.core.feedback import CellEvidence, FeedbackWeighting
from threefold.core.tensor import SparseTensor
_tiny = SparseTensor.from_arrays(np.array([[0, 1, 1], [0, 0, 1], [0, 1, 0]]), np.ones(3), (2, 2, 2), dtype=np.float32)
for _solver in ("als", "cg"):
    fit_cp(_tiny, rank=2, solver=_solver, max_sweeps=1, tol=0)
"""

SITE_TENSOR = """
data = np.load({path!r})
n = data["coords"].shape[1]
evidence = CellEvidence(clicks=data["clicks"], dwell=np.zeros(n, np.float32), skips=data["skips"],
                        last_seen=np.zeros(n, np.uint32), time_origin=0)
tensor = SparseTensor(coords=data["coords"], shape={shape!r}, mode_names=("user", "item", "daypart", "device"),
                      vocabularies=(None,) * 4, evidence=evidence, weighting=FeedbackWeighting(w0=0.1),
                      dtype=np.dtype(np.float32))
"""


# ---------------------------------------------------------------------- B1
def case_b1(tmp: Path, args) -> str:
    shape, rank, nnz = (2000, 1000, 24), 32, 200_000
    cells = site_cells(shape, nnz, seed=1)
    rng = np.random.default_rng(2)
    init = [rng.random((s, rank)) for s in shape]
    path = tmp / "b1.npz"
    np.savez(path, coords=cells["coords"], init0=init[0], init1=init[1], init2=init[2])
    load = f"""
import numpy as np, time
data = np.load({str(path)!r})
coords, init = data["coords"], [data["init0"], data["init1"], data["init2"]]
shape = {shape!r}
"""
    dense_code = load + f"""
import tensorly as tl
from tensorly.cp_tensor import CPTensor
from tensorly.decomposition import parafac
dense = np.zeros(shape)
dense[tuple(coords)] = 1.0
marks = []
def record(cp, error):
    marks.append((time.perf_counter(), 1.0 - float(error)))
start = time.perf_counter()
# tol=1e-16, not 0: tensorly computes the error its callback needs only when tol > 0
parafac(tl.tensor(dense), {rank}, init=CPTensor((np.ones({rank}), [f.copy() for f in init])), n_iter_max=10, tol=1e-16,
        l2_reg=0, normalize_factors=False, callback=record)
RESULT = dict(seconds=marks[-1][0] - start, fit=marks[-1][1], sweeps=len(marks) - 1)
"""
    dense = run_child(dense_code, timeout=3600)
    if "error" in dense:
        raise RuntimeError(f"dense parafac failed: {dense['error']}")
    target = dense["fit"]
    rows = [("tensorly `parafac`, dense float64 (reference)", dense, "10 sweeps")]
    for solver, steps, cap in (("als", 3, 40), ("cg", 3, 200), ("cg", 5, 200)):
        code = load + WARM_UP + f"""
tensor = SparseTensor.from_arrays(coords, np.ones(coords.shape[1]), shape, w0=1.0, dtype=np.float32)
state = {{}}
def until_target(record, factors):
    state["sweeps"], state["fit"], state["t"] = record.sweep, record.fit, time.perf_counter()
    return record.fit >= {target!r} - 1e-5
start = time.perf_counter()
fit_cp(tensor, rank={rank}, reg=0.0, solver={solver!r}, cg_steps={steps}, init=init, max_sweeps={cap}, tol=0,
       n_threads=2, callback=until_target)
RESULT = dict(seconds=state["t"] - start, fit=state["fit"], sweeps=state["sweeps"], reached=state["fit"] >= {target!r} - 1e-5)
"""
        ours = run_child(code, timeout=3600)
        label = "exact ALS" if solver == "als" else f"CG, {steps} steps"
        note = f"{ours.get('sweeps')} sweeps" + ("" if ours.get("reached", False) else " (target not reached)")
        rows.append((f"threefold `fit_cp`, {label}, float32", ours, note))
    sparse_code = load + f"""
import resource
resource.setrlimit(resource.RLIMIT_AS, (14 * 2**30, 14 * 2**30))
import sparse
from tensorly.cp_tensor import CPTensor
from tensorly.contrib.sparse.decomposition import parafac
tensor = sparse.COO(coords, np.ones(coords.shape[1]), shape=shape)
start = time.perf_counter()
parafac(tensor, {rank}, init=CPTensor((np.ones({rank}), [f.copy() for f in init])), n_iter_max=1, tol=0)
RESULT = dict(seconds=time.perf_counter() - start, fit=float("nan"), sweeps=1)
"""
    capped = run_child(sparse_code, timeout=900)
    rows.append(("tensorly `contrib.sparse` `parafac` (capped: 1 sweep, 900 s, 14 GiB)", capped, "1 sweep only"))
    idle_ours = run_child(WARM_UP + "RESULT = {}")
    idle_tensorly = run_child("import numpy as np, tensorly, tensorly.decomposition\nRESULT = {}")

    lines = [
        f"| contender | time to fit {target:.6f} (s) | sweeps | peak memory | speed-up vs dense | memory vs dense |",
        "|---|---|---|---|---|---|",
    ]
    for name, res, note in rows:
        if "error" in res:
            lines.append(f"| {name} | failed: {res['error']} | – | – | – | – |")
            continue
        speed = dense["seconds"] / res["seconds"]
        memory = res["peak_rss_bytes"] / dense["peak_rss_bytes"]
        lines.append(f"| {name} | {res['seconds']:.2f} | {note} | {gib(res['peak_rss_bytes'])} | {speed:.1f}× | {memory:.3f} |")
    return "\n".join(
        [f"### B1: 2000 × 1000 × 24, 200,000 stored cells, R = 32, uniform weights", "", *lines, "",
         "The target is the fit (1 − ‖X − X̂‖/‖X‖) of tensorly's dense `parafac` after 10 sweeps; every contender "
         "starts from the same random factors. Our times include building the cell layouts and the per-sweep loss. "
         "The sparse tensorly row is one sweep, not time to target. For scale: an idle child with our imports and "
         f"compiled kernels peaks at {gib(idle_ours.get('peak_rss_bytes', 0))}, one importing tensorly at "
         f"{gib(idle_tensorly.get('peak_rss_bytes', 0))}."]
    )


# ---------------------------------------------------------------------- B2
def sweep_flops(nnz: int, rank: int, ndim: int, cg_steps: int, row_modes: int) -> float:
    """Floating-point operations of one CG sweep, counted from the algorithm (approximate)."""
    gather = (ndim - 2) * rank + 2 * rank  # other-mode products and the right-hand side
    per_row_mode = gather + (cg_steps + 1) * 4 * rank  # CG: one matvec per step plus the residual
    per_block_mode = gather + 2 * rank * rank  # blocked exact accumulation for small modes
    loss = ndim * rank
    return float(nnz) * (row_modes * per_row_mode + (ndim - row_modes) * per_block_mode + loss)


def case_b2(tmp: Path, args) -> str:
    nnz, rank, sweeps = args.nnz or 10_000_000, 64, 3
    path = tmp / "b2.npz"
    np.savez(path, **site_cells(SITE_SHAPE, nnz, seed=3))
    code = WARM_UP + SITE_TENSOR.format(path=str(path), shape=SITE_SHAPE) + f"""
start = time.perf_counter()
result = fit_cp(tensor, rank={rank}, solver="cg", cg_steps=3, reg=0.1, max_sweeps={sweeps}, tol=0, random_state=0,
                n_threads=2)
RESULT = dict(total=time.perf_counter() - start, setup=result.history[0].seconds,
              sweeps=[h.seconds for h in result.history[1:]], fit=result.fit)
"""
    ours = run_child(code, timeout=3600)
    if "error" in ours:
        raise RuntimeError(f"b2 fit failed: {ours['error']}")
    flops = sweep_flops(nnz, rank, 4, 3, row_modes=2)
    side = int(round((flops / 2) ** (1 / 3)))
    matmul = run_child(f"""
import numpy as np, time
a = np.random.default_rng(0).random(({side}, {side}), dtype=np.float32)
b = a.copy()
a @ b
times = []
for _ in range(3):
    start = time.perf_counter(); a @ b; times.append(time.perf_counter() - start)
RESULT = dict(seconds=min(times))
""", timeout=3600)
    per_sweep = float(np.median(ours["sweeps"]))
    lines = [
        "| contender | seconds per sweep | peak memory | notes |",
        "|---|---|---|---|",
        f"| threefold `fit_cp`, CG 3 steps, float32, 2 threads | {per_sweep:.2f} | {gib(ours['peak_rss_bytes'])} | "
        f"setup {ours['setup']:.1f} s (layouts, initial loss); sweeps {', '.join(f'{s:.2f}' for s in ours['sweeps'])} |",
        f"| numpy float32 matmul {side}³ (reference, same flops) | {matmul.get('seconds', float('nan')):.2f} | "
        f"{gib(matmul.get('peak_rss_bytes', 0))} | {flops / 1e9:.0f} GFLOP, as one sweep |",
    ]
    return "\n".join(
        [f"### B2: 100,000 × 20,000 × 6 × 4, {nnz:,} stored cells, R = 64, CG", "", *lines, "",
         f"Goals: at most 10 s per sweep and 3 GB peak memory. Sweep time / matmul time = "
         f"{per_sweep / matmul.get('seconds', float('nan')):.1f}."]
    )


# ---------------------------------------------------------------------- B3
def case_b3(tmp: Path, args) -> str:
    rank, sweeps = 32, 5
    sizes = [1_000_000, 2_000_000, 4_000_000, 8_000_000]
    if args.nnz:
        sizes = [s * args.nnz // 8_000_000 for s in sizes]
    rows = []
    for nnz in sizes:
        path = tmp / f"b3_{nnz}.npz"
        np.savez(path, **site_cells(SITE_SHAPE, nnz, seed=4))
        code = WARM_UP + SITE_TENSOR.format(path=str(path), shape=SITE_SHAPE) + f"""
cpu = []
result = fit_cp(tensor, rank={rank}, solver="cg", cg_steps=3, reg=0.1, max_sweeps={sweeps}, tol=0, random_state=0,
                n_threads=1, callback=lambda record, factors: cpu.append(time.process_time()))
factors = result.factors
start = time.process_time()
for lo in range(0, n, 65536):
    c = tensor.coords[:, lo:lo + 65536]
    (factors[0][c[0]] * factors[1][c[1]] * factors[2][c[2]] * factors[3][c[3]]) @ result.weights.astype(np.float32)
RESULT = dict(sweep=float(np.min(np.diff(cpu))), wall=min(h.seconds for h in result.history[1:]),
              numpy=time.process_time() - start)
"""
        res = run_child(code, timeout=3600)
        if "error" in res:
            raise RuntimeError(f"b3 at {nnz} failed: {res['error']}")
        rows.append((nnz, res))
        path.unlink()
    x = np.array([n for n, _ in rows], dtype=float)
    y = np.array([r["sweep"] for _, r in rows])
    slope, intercept = np.polyfit(x, y, 1)
    r2 = 1 - np.sum((y - (intercept + slope * x)) ** 2) / np.sum((y - y.mean()) ** 2)
    lines = ["| stored cells | CPU seconds per sweep | wall seconds per sweep | numpy x̂ at every cell (CPU s) "
             "| sweep / numpy | peak memory |",
             "|---|---|---|---|---|---|"]
    for nnz, res in rows:
        lines.append(f"| {nnz:,} | {res['sweep']:.2f} | {res['wall']:.2f} | {res['numpy']:.2f} | "
                     f"{res['sweep'] / res['numpy']:.1f} | {gib(res['peak_rss_bytes'])} |")
    return "\n".join(
        [f"### B3: sweep time against stored cells (100,000 × 20,000 × 6 × 4, R = 32, CG, 1 thread)", "", *lines, "",
         f"Straight line t = a + b·nnz: a = {intercept:.3f} s, b = {slope * 1e6:.3f} s per million cells, "
         f"R² = {r2:.4f} (goal ≥ 0.98)."]
    )


# ---------------------------------------------------------------------- main
PARALLEL_PROBE = """
import time, numba, numpy as np
from numba import njit, prange
@njit(parallel=True)
def spin(n, steps):
    out = np.zeros(n)
    for i in prange(n):
        x = 0.0
        for j in range(steps):
            x += np.sqrt(j + x * 1e-12)
        out[i] = x
    return out
spin(2, 10)
seconds = []
for threads in (1, 2):
    numba.set_num_threads(threads)
    start = time.perf_counter(); spin(16, 3_000_000); seconds.append(time.perf_counter() - start)
RESULT = dict(speedup=seconds[0] / seconds[1])
"""


def write_section(case: str, text: str, command: str) -> None:
    """Replace this case's section of results/cp.md (other cases are kept)."""
    RESULTS.parent.mkdir(parents=True, exist_ok=True)
    old = RESULTS.read_text() if RESULTS.exists() else "## CP engine benchmarks\n"
    load = os.getloadavg()[0]
    probe = run_child(PARALLEL_PROBE).get("speedup", float("nan"))
    block = (f"<!-- {case} -->\n{text}\n\nMachine: {platform.machine()}, {os.cpu_count()} cores shared with other "
             f"work (load average {load:.1f} at the end of the run; a trivially parallel numba loop ran "
             f"{probe:.2f}× faster on 2 threads than on 1, so about {probe:.1f} cores were free), Python "
             f"{platform.python_version()}. Command: `{command}`\n<!-- /{case} -->")
    pattern = re.compile(rf"<!-- {case} -->.*?<!-- /{case} -->", re.S)
    new = pattern.sub(lambda _: block, old) if pattern.search(old) else old.rstrip() + "\n\n" + block + "\n"
    RESULTS.write_text(new)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("case", choices=["b1", "b2", "b3"])
    parser.add_argument("--nnz", type=int, default=0, help="b2: stored cells; b3: largest size (scaled)")
    parser.add_argument("--no-write", action="store_true", help="print only; leave results/cp.md alone")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        text = {"b1": case_b1, "b2": case_b2, "b3": case_b3}[args.case](Path(tmp), args)
    print(text)
    if not args.no_write:
        command = "python experiments/benchmarks/bench_cp.py " + " ".join(sys.argv[1:])
        write_section(args.case, text, command)


if __name__ == "__main__":
    main()
