"""Row-system kernels of the CP engine against slow dense references written here.

The reference for every row update is the definition (methods.md section 1;
Hidasi & Tikk, ECML-PKDD 2012): the minimizer over row ``u`` of
``Σ over every cell of the slice  w·(p − off − u·v_A)² + reg·‖u‖²``, summed cell by
cell over the dense tensor, with ``w = w0`` on cells not stored.
"""

import itertools

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from threefold.models.cp import als

from threefold.models.cp import kernels
from threefold.models.cp.structure import Structure
from threefold.core.tensor import SparseTensor

MODES = ("user", "item", "daypart")
SHAPE = (6, 5, 3)


def _weighted_tensor(seed, shape=SHAPE, w0=0.3, density=0.4, dtype=np.float64):
    """Random tensor with stored weights above and below w0; row 0 of mode 0 holds no cell."""
    rng = np.random.default_rng(seed)
    mask = rng.random(shape) < density
    mask[0] = False
    coords = np.array(np.nonzero(mask))
    nnz = coords.shape[1]
    return SparseTensor.from_arrays(
        coords, rng.random(nnz), shape, confidence=rng.uniform(0.05, 3.0, nnz), w0=w0,
        mode_names=MODES[: len(shape)], dtype=dtype,
    )


def _factors(seed, shape, active, dtype=np.float64):
    rng = np.random.default_rng(seed)
    factors = [rng.normal(size=(size, active.shape[1])).astype(dtype) for size in shape]
    for n, f in enumerate(factors):
        f[:, ~active[n]] = 1.0
    return factors


def _dense_row_update(tensor, factors, active, n, reg):
    """Slow reference: each row's normal equations summed over every cell of its slice."""
    P, W = tensor.to_dense(), tensor.dense_confidence()
    cols, fixed = np.flatnonzero(active[n]), np.flatnonzero(~active[n])
    out = factors[n].copy()
    for i in range(tensor.shape[n]):
        M = reg * np.eye(cols.size)
        b = np.zeros(cols.size)
        for idx in itertools.product(*map(range, tensor.shape)):
            if idx[n] != i:
                continue
            v = np.prod([factors[m][idx[m]] for m in range(tensor.ndim) if m != n], axis=0)
            M += W[idx] * np.outer(v[cols], v[cols])
            b += W[idx] * (P[idx] - v[fixed].sum()) * v[cols]
        out[i, cols] = np.linalg.solve(M, b)
    return out


STRUCTURES = {
    "plain": "user*item*daypart:3",
    "mixed": "user*item:2 + user*item*daypart:1 + item*daypart:2",
}


@pytest.mark.parametrize("path", ["rows", "blocks"])
@pytest.mark.parametrize("name", list(STRUCTURES))
def test_exact_row_update_equals_dense_weighted_least_squares(name, path):
    tensor = _weighted_tensor(1)
    active = Structure.parse(STRUCTURES[name], rank=1).active_mask(MODES)
    for n in range(tensor.ndim):
        factors = _factors(2, tensor.shape, active)
        block_cells = 2 if path == "blocks" else als.BLOCK_CELLS  # blocks of 2 cells force the blocked path
        problem = als.make_problem(tensor, factors, active, reg=0.7, update_modes=(n,), block_cells=block_cells)
        assert (problem.cells[n].blocks is not None) == (path == "blocks")
        als.update_mode(problem, n)
        expected = _dense_row_update(tensor, factors, active, n, reg=0.7)
        assert_allclose(problem.factor(n), expected, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("buffer_cells", [als.BUFFER_CELLS, 2])  # rows solved by CG, or long rows solved exactly
@pytest.mark.parametrize("name", list(STRUCTURES))
def test_cg_for_k_steps_equals_exact_solve(name, buffer_cells):
    # Conjugate gradient ends at the exact solution after k steps on a k × k
    # system (Hestenes & Stiefel 1952; methods.md section 2), from any start.
    tensor = _weighted_tensor(3)
    active = Structure.parse(STRUCTURES[name], rank=1).active_mask(MODES)
    for n in range(tensor.ndim):
        problem = als.make_problem(tensor, _factors(4, tensor.shape, active), active, reg=0.2, update_modes=(n,))
        cols, fixed, base, rhs0 = als.row_system_terms(problem, n)
        cells = problem.cells[n]
        solved = {}
        for steps in (0, cols.size):
            F = problem.F.copy()
            kernels.solve_rows(
                F, problem.offsets[n], cells.indptr, cells.other, cells.c, cells.wp,
                cols, fixed, base, rhs0, cells.chunk_bounds, steps, buffer_cells,
            )
            solved[steps] = F
        assert_allclose(solved[cols.size], solved[0], rtol=1e-8, atol=1e-10)


def test_loss_equals_dense_sum_over_all_cells():
    tensor = _weighted_tensor(5)
    active = Structure.parse(STRUCTURES["mixed"], rank=1).active_mask(MODES)
    factors = _factors(6, tensor.shape, active)
    problem = als.make_problem(tensor, factors, active, reg=0.4, update_modes=())
    loss, fit = als.loss_and_fit(problem)
    xhat = np.einsum("ir,jr,kr->ijk", *factors)
    P, W = tensor.to_dense(), tensor.dense_confidence()
    data = np.sum(W * (P - xhat) ** 2)
    penalty = sum(np.sum(f[:, active[n]] ** 2) for n, f in enumerate(factors))
    assert_allclose(loss, data + 0.4 * penalty, rtol=1e-12)
    assert_allclose(fit, 1 - np.sqrt(data / np.sum(W * P**2)), rtol=1e-12)


def _pair_cells(seed):
    """Random cells of a (6, 5, 4, 3) tensor; user 0 holds none."""
    rng = np.random.default_rng(seed)
    mask = rng.random((6, 5, 4, 3)) < 0.3
    mask[0] = False
    coords = np.array(np.nonzero(mask))
    return coords, rng.random(coords.shape[1])


def test_loss_with_w0_per_pair_equals_the_dense_weighted_sum():
    """w0_scope="pair": each (user, item) pair weighs w0 in all, spread over its context cells (dense brute force)."""
    from dataclasses import replace

    from threefold.core.feedback import FeedbackWeighting

    base = SparseTensor.from_arrays(*_pair_cells(9), (6, 5, 4, 3), w0=1.0, mode_names=("user", "item", "daypart", "device"))
    stored_p = base.preference
    stored_w = np.random.default_rng(11).uniform(0.05, 3.0, stored_p.size)
    tensor = SparseTensor.from_arrays(base.coords, stored_p, base.shape, confidence=stored_w, w0=1.0,
                                      mode_names=("user", "item", "daypart", "device"))
    tensor = replace(tensor, weighting=FeedbackWeighting(w0=0.6, w0_scope="pair"))
    assert tensor.w0 == pytest.approx(0.6 / 12) and tensor.weighting.w0_scope == "cell"
    active = np.ones((4, 3), dtype=bool)
    factors = _factors(10, tensor.shape, active)
    problem = als.make_problem(tensor, factors, active, reg=0.2, update_modes=())
    loss, _ = als.loss_and_fit(problem)
    W = np.full(tensor.shape, 0.6 / (4 * 3))  # unshown cells: the pair's 0.6 over its 12 context cells
    P = np.zeros(tensor.shape)
    W[tuple(base.coords)] = stored_w
    P[tuple(base.coords)] = stored_p
    xhat = np.einsum("ir,jr,kr,lr->ijkl", *factors)
    data = np.sum(W * (P - xhat) ** 2)
    unshown = np.ones(tensor.shape, dtype=bool)
    unshown[tuple(base.coords)] = False
    assert_allclose(W[0, 0][unshown[0, 0]].sum(), 0.6, rtol=1e-12)  # user 0 holds no cell: the whole pair weight
    assert_allclose(loss, data + 0.2 * sum(np.sum(f**2) for f in factors), rtol=1e-12)


@pytest.mark.parametrize("block_cells", [als.BLOCK_CELLS, 4])
def test_thread_count_does_not_change_the_update(block_cells):
    tensor = _weighted_tensor(7, shape=(40, 30, 4), density=0.3)
    active = np.ones((3, 4), dtype=bool)
    results = []
    for n_threads in (1, 2):
        with kernels.threads(n_threads):
            problem = als.make_problem(
                tensor, _factors(8, tensor.shape, active), active, reg=0.1, update_modes=(0, 1, 2), block_cells=block_cells
            )
            for n in range(3):
                als.update_mode(problem, n, cg_steps=2 if n == 1 else 0)
            results.append((problem.F.copy(), als.loss_and_fit(problem)))
    assert_array_equal(results[0][0], results[1][0])
    assert results[0][1] == results[1][1]


def test_float32_update_is_close_to_float64():
    active = np.ones((3, 3), dtype=bool)
    rows = {}
    for dtype in (np.float32, np.float64):
        tensor = _weighted_tensor(9, dtype=dtype)
        problem = als.make_problem(tensor, _factors(10, tensor.shape, active, dtype), active, reg=0.5, update_modes=(1,))
        als.update_mode(problem, 1)
        rows[dtype] = problem.factor(1).astype(np.float64)
    assert_allclose(rows[np.float32], rows[np.float64], rtol=1e-4, atol=1e-5)
