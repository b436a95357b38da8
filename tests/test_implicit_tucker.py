"""Implicit-weighted Tucker: every block update against brute-force weighted least squares."""

import functools
import inspect

import numpy as np
import pytest
import tensorly as tl
from numpy.testing import assert_allclose

from threefold import SparseTensor
from threefold.models.tucker import kernels as tucker_kernels
from threefold.models.tucker import rows as tucker_rows
from threefold.models.tucker.implicit import (
    ImplicitTuckerModel,
    fit_implicit_tucker,
    implicit_loss,
    implicit_tucker_fold_in,
    update_core,
    update_rows,
)

W0 = 0.3
REG = 0.2
CASES = [((6, 5, 4), (3, 2, 2)), ((5, 4, 3, 3), (2, 3, 2, 2))]


def weighted_problem(shape, rank, seed, dtype=np.float64):
    """Stored cells with weights above and below w0 = 0.3, a random model, and the dense P and W."""
    rng = np.random.default_rng(seed)
    total = int(np.prod(shape))
    flat = rng.choice(total, total // 3, replace=False)
    coords = np.array(np.unravel_index(flat, shape), dtype=np.int32)
    preference = rng.random(coords.shape[1])
    confidence = rng.uniform(0.05, 3.0, coords.shape[1])  # both sides of w0
    tensor = SparseTensor.from_arrays(coords, preference, shape, confidence=confidence, w0=W0, dtype=dtype)
    dense_p = np.zeros(shape)
    dense_p[tuple(coords)] = preference
    dense_w = np.full(shape, W0)
    dense_w[tuple(coords)] = confidence
    core = rng.standard_normal(rank)
    factors = [rng.standard_normal((size, r)) for size, r in zip(shape, rank)]
    return tensor, dense_p, dense_w, core, factors


def dense_weighted_solve(design, weights, targets, reg):
    """argmin_u Σ weights · (targets − design u)² + reg ‖u‖², by the dense normal equations."""
    lhs = design.T @ (weights[:, None] * design) + reg * np.eye(design.shape[1])
    return np.linalg.solve(lhs, design.T @ (weights * targets))


def slice_design(core, factors, mode):
    """Rows v(cell) = G ×_{m≠mode} F_m[cell] for every cell of a mode-`mode` slice (all cells)."""
    identity = [f if m != mode else np.eye(core.shape[mode]) for m, f in enumerate(factors)]
    return np.moveaxis(tl.tucker_to_tensor((core, identity)), mode, -1).reshape(-1, core.shape[mode])


@pytest.mark.parametrize("shape, rank", CASES)
@pytest.mark.parametrize("chunk_cells, table_combos", [(2, 1), (2, 4096), (10_000, 1)])
def test_every_row_update_equals_dense_weighted_least_squares(monkeypatch, shape, rank, chunk_cells, table_combos):
    # Slow reference written here: for each row, weighted ridge regression over ALL cells of its slice
    # (w0 on cells not stored), as the iTALS row update (Hidasi & Tikk, ECML-PKDD 2012) for Tucker.
    # Tiny chunks share rows between parallel chunks; a one-row prefix table works node by node.
    monkeypatch.setattr(tucker_kernels, "CHUNK_CELLS", chunk_cells)
    monkeypatch.setattr(tucker_rows, "TABLE_COMBOS", table_combos)
    tensor, dense_p, dense_w, core, factors = weighted_problem(shape, rank, seed=len(shape) + chunk_cells)
    for mode in range(len(shape)):
        rows = update_rows(tensor, mode, core, factors, REG)
        design = slice_design(core, factors, mode)
        targets = np.moveaxis(dense_p, mode, -1).reshape(-1, shape[mode])
        weights = np.moveaxis(dense_w, mode, -1).reshape(-1, shape[mode])
        for i in range(shape[mode]):
            expected = dense_weighted_solve(design, weights[:, i], targets[:, i], REG)
            assert_allclose(rows[i], expected, rtol=1e-9, atol=1e-11)


@pytest.mark.parametrize("shape, rank", CASES)
def test_core_update_equals_dense_weighted_least_squares(shape, rank):
    # Slow reference written here: vec(G) by weighted ridge regression over all cells with the
    # design kron(F_1, ..., F_N) (C order, so it matches core.ravel()).
    tensor, dense_p, dense_w, core, factors = weighted_problem(shape, rank, seed=11)
    design = functools.reduce(np.kron, factors)
    expected = dense_weighted_solve(design, dense_w.ravel(), dense_p.ravel(), REG).reshape(rank)
    assert_allclose(update_core(tensor, core, factors, REG, solver="exact"), expected, rtol=1e-9, atol=1e-11)
    # Preconditioned CG reaches the exact solution in at most P = prod(rank) steps in exact arithmetic
    # (Hestenes & Stiefel 1952); in floating point a few more, so 3·P from a random start.
    cg = update_core(tensor, core, factors, REG, solver="cg", cg_steps=3 * core.size)
    assert_allclose(cg, expected, rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("shape, rank", CASES)
def test_loss_equals_dense_weighted_loss(shape, rank):
    # Slow reference written here: Σ_all cells w (p − x̂)² + reg (Σ ‖F_n‖² + ‖G‖²) on the dense model.
    tensor, dense_p, dense_w, core, factors = weighted_problem(shape, rank, seed=12)
    model = tl.tucker_to_tensor((core, factors))
    penalty = REG * (sum(np.sum(f**2) for f in factors) + np.sum(core**2))
    loss, fit = implicit_loss(tensor, core, factors, REG)
    assert_allclose(loss, np.sum(dense_w * (dense_p - model) ** 2) + penalty, rtol=1e-10)
    assert_allclose(fit, 1 - np.sqrt(np.sum(dense_w * (dense_p - model) ** 2) / np.sum(dense_w * dense_p**2)),
                    rtol=1e-10)


@pytest.mark.parametrize("core_solver, init", [("exact", "hosvd"), ("cg", "random")])
def test_loss_never_increases(core_solver, init):
    # Block coordinate descent: exact row solves and an exact or warm-started CG core step
    # (CG from the current core only lowers the quadratic) never raise the loss (common practice).
    tensor = weighted_problem((7, 6, 4, 3), (3, 2, 2, 2), seed=13)[0]
    result = fit_implicit_tucker(tensor, rank=(3, 2, 2, 2), reg=REG, init=init, max_sweeps=12, tol=0.0,
                                 core_solver=core_solver, core_cg_steps=2, random_state=0)
    losses = np.array([h.loss for h in result.history])
    assert losses.size == 13
    assert np.all(np.diff(losses) <= 1e-12 * losses[0])


def test_score_terms_sum_to_the_score():
    # Definition (scoring.py): the per-core-entry terms of one score add up to it.
    tensor = weighted_problem((6, 5, 4, 3), (2, 3, 2, 2), seed=14)[0]
    model = ImplicitTuckerModel(rank=(2, 3, 2, 2), max_sweeps=3, tol=0.0).fit(tensor)
    score = model.score(np.array([3]), np.array([[1, 2]]), np.array([4]))[0, 0]
    terms = model.score_terms(3, (1, 2), 4)
    assert len(terms.labels) == 24
    assert_allclose(terms.total, score, rtol=1e-12)
    assert_allclose(score, model.result_.to_dense()[3, 4, 1, 2], rtol=1e-12)


def test_fold_in_solves_new_rows_from_their_own_cells():
    # Slow reference written here: each new user's row by dense weighted ridge regression over its
    # slice with the fitted core and factors (Hu, Koren & Volinsky, ICDM 2008, methods.md section 8).
    shape, rank = (6, 5, 4), (3, 2, 2)
    tensor = weighted_problem(shape, rank, seed=15)[0]
    model = ImplicitTuckerModel(rank=rank, reg=REG, max_sweeps=3, tol=0.0).fit(tensor)
    new, dense_p, dense_w, _, _ = weighted_problem((3,) + shape[1:], rank, seed=16)
    keep = new.coords[0] != 2  # the third new user has no events
    new = new.take(keep)
    dense_p[2], dense_w[2] = 0.0, W0
    rows = model.fold_in(new, "mode0")
    core, factors = model.result_
    design = slice_design(core, factors, 0)
    for i in range(2):
        expected = dense_weighted_solve(design, dense_w[i].ravel(), dense_p[i].ravel(), REG)
        assert_allclose(rows[i], expected, rtol=1e-9, atol=1e-11)
    assert_allclose(rows[2], 0.0, atol=0)
    grown = model.result_.with_rows(0, rows)
    assert grown.shape == (9, 5, 4)


def test_warm_start_from_a_model_with_fewer_rows():
    shape, rank = (6, 5, 4), (3, 2, 2)
    tensor = weighted_problem(shape, rank, seed=17)[0]
    small = fit_implicit_tucker(tensor.take(tensor.coords[0] < 5), rank=rank, max_sweeps=2, tol=0.0)
    core, factors = small.core, [f[:5] if n == 0 else f for n, f in enumerate(small.factors)]
    result = fit_implicit_tucker(tensor, rank=rank, init=(core, factors), max_sweeps=2, tol=0.0)
    assert result.shape == shape and result.history[0].loss >= result.history[-1].loss


def test_float32_tensor_gives_float32_model_close_to_float64():
    # Common practice: float32 storage agrees with float64 to single precision.
    shape, rank = (6, 5, 4), (3, 2, 2)
    r64 = fit_implicit_tucker(weighted_problem(shape, rank, 18)[0], rank=rank, max_sweeps=3, tol=0.0)
    r32 = fit_implicit_tucker(weighted_problem(shape, rank, 18, np.float32)[0], rank=rank, max_sweeps=3, tol=0.0)
    assert r32.core.dtype == np.float32 and r32.factors[0].dtype == np.float32
    assert_allclose(r32.loss, r64.loss, rtol=1e-4)


def test_errors_are_clear():
    tensor = weighted_problem((6, 5, 4), (3, 2, 2), seed=19)[0]
    big = np.zeros((13, 13, 13))
    with pytest.raises(ValueError, match="use solver='cg' above 2000 core entries"):
        update_core(SparseTensor.from_dense(np.ones((13, 13, 13))), big, [np.eye(13)] * 3, 0.1, solver="exact")
    with pytest.raises(ValueError, match="'core_solver' parameter of fit_implicit_tucker must be one of"):
        fit_implicit_tucker(tensor, rank=2, core_solver="lu")
    with pytest.raises(ValueError, match="each rank must be at most its mode's size"):
        fit_implicit_tucker(tensor, rank=(3, 2, 5))
    result = fit_implicit_tucker(tensor, rank=2, max_sweeps=1, tol=0.0)
    other_w0 = SparseTensor.from_arrays(tensor.coords, tensor.preference, tensor.shape, w0=0.5)
    with pytest.raises(ValueError, match="w0=0.5 differs from the model's w0=0.3"):
        implicit_tucker_fold_in(result, other_w0, 0)
    function_params = set(inspect.signature(fit_implicit_tucker).parameters) - {"tensor"}
    assert set(ImplicitTuckerModel().get_params()) == function_params
