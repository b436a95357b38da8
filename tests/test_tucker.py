"""HOOI on sparse tensors, the fiber-tree products, and the shared Tucker result and scoring."""

import functools
import inspect
import warnings

import numpy as np
import pytest
import tensorly as tl
from numpy.testing import assert_allclose
from scipy.linalg import subspace_angles
from tensorly.datasets import load_covid19_serology
from tensorly.decomposition import tucker
from threadpoolctl import threadpool_limits

from threefold import SparseTensor
from threefold.models.tucker import kernels as tucker_kernels
from threefold.models.tucker import rows as tucker_rows
from threefold.core.exceptions import ConvergenceWarning
from threefold.models.tucker.hooi import HOOIModel, fit_hooi, hooi_fold_in
from threefold.models.tucker.result import core_contributions, core_slice
from threefold.models.tucker.kernels import build_fiber_tree, ttmc, ttmc_core
from threefold.models.tucker.rows import evaluate


def low_rank_plus_noise(shape, rank, noise, seed):
    """A Tucker tensor with orthonormal factors and a strong core, plus Gaussian noise."""
    rng = np.random.default_rng(seed)
    core = 10.0 * rng.standard_normal(rank)
    factors = [np.linalg.qr(rng.standard_normal((size, r)))[0] for size, r in zip(shape, rank)]
    return tl.tucker_to_tensor((core, factors)) + noise * rng.standard_normal(shape)


def random_sparse(shape, density, seed):
    rng = np.random.default_rng(seed)
    total = int(np.prod(shape))
    flat = rng.choice(total, max(1, int(density * total)), replace=False)
    coords = np.array(np.unravel_index(flat, shape), dtype=np.int32)
    return coords, rng.standard_normal(coords.shape[1])


def relative_error(dense, result):
    return np.linalg.norm(dense - result.to_dense()) / np.linalg.norm(dense)


# ---------------------------------------------------------------------- fiber-tree kernels
@pytest.mark.parametrize("shape", [(9, 8), (7, 5, 3), (6, 5, 4, 3)])
@pytest.mark.parametrize("chunk_cells, table_combos", [(2, 1), (2, 4096), (10_000, 1)])
def test_fiber_tree_products_equal_slow_loops(monkeypatch, shape, chunk_cells, table_combos):
    # Slow reference written here: Y[i_root] += x_e * kron of the other modes' rows, cell by cell
    # (methods.md section 3); tiny chunks force rows shared between parallel chunks, and a one-row
    # prefix table forces every contraction to be done per tree node.
    monkeypatch.setattr(tucker_kernels, "CHUNK_CELLS", chunk_cells)
    monkeypatch.setattr(tucker_rows, "TABLE_COMBOS", table_combos)
    rng = np.random.default_rng(0)
    coords, values = random_sparse(shape, 0.4, seed=1)
    rank = [min(3, s) for s in shape]
    factors = [rng.standard_normal((s, r)) for s, r in zip(shape, rank)]
    core = rng.standard_normal(rank)
    dense_model = tl.tucker_to_tensor((core, factors))
    for root in range(len(shape)):
        tree = build_fiber_tree(coords, shape, root)
        if chunk_cells == 2:
            assert tree.chunks.size > 3
        expected = np.zeros((shape[root], int(np.prod([rank[m] for m in tree.levels[1:]]))))
        for e in range(coords.shape[1]):
            kron = functools.reduce(np.kron, [factors[m][coords[m, e]] for m in tree.levels[1:]])
            expected[coords[root, e]] += values[e] * kron
        assert_allclose(ttmc(tree, coords, values, factors, shape[root]), expected, rtol=1e-12, atol=1e-12)
        assert_allclose(ttmc_core(tree, coords, values, factors), factors[root].T @ expected, rtol=1e-12, atol=1e-12)
        assert_allclose(evaluate(tree, coords, core, factors, shape), dense_model[tuple(coords)], rtol=1e-12, atol=1e-12)


# ---------------------------------------------------------------------- HOOI against tensorly
@pytest.mark.parametrize("shape, rank", [((12, 10, 8), (3, 2, 2)), ((8, 7, 6, 5), (3, 3, 2, 2))])
@pytest.mark.parametrize("sweeps", [1, 4])
def test_hooi_matches_tensorly_tucker(shape, rank, sweeps):
    # Reference library: tensorly.decomposition.tucker (HOOI) on the dense tensor, init='svd',
    # tol=0 and the same number of sweeps, on a low-rank-plus-noise tensor with a clear spectral gap.
    dense = low_rank_plus_noise(shape, rank, noise=0.05, seed=sum(shape))
    ours = fit_hooi(SparseTensor.from_dense(dense), rank=rank, max_sweeps=sweeps, tol=0.0, random_state=0)
    theirs = tucker(dense, rank, n_iter_max=sweeps, init="svd", tol=0, random_state=0)
    theirs_error = np.linalg.norm(dense - tl.tucker_to_tensor(theirs)) / np.linalg.norm(dense)
    assert abs(relative_error(dense, ours) - theirs_error) <= 1e-6
    for mine, reference in zip(ours.factors, theirs.factors):
        assert subspace_angles(mine, reference).max() < 1e-4


@pytest.mark.parametrize("rank", [(8, 4, 4), (16, 5, 8)])
def test_hooi_converged_error_on_covid19_serology_matches_tensorly(rank):
    # Data set shipped with tensorly: tensorly.datasets.load_covid19_serology (Tan et al., Molecular
    # Systems Biology 17(9), 2021), 438 samples × 6 antigens × 11 receptors, shipped inside the package
    # (tensorly/datasets/data/COVID19_data.npy). The shipped tensor is already preprocessed and holds no
    # NaN, so it is used as is; the assertion keeps that assumption visible.
    dense = load_covid19_serology().tensor
    assert dense.shape == (438, 6, 11) and not np.isnan(dense).any()
    ours = fit_hooi(SparseTensor.from_dense(dense), rank=rank, max_sweeps=1000, tol=1e-9, random_state=0)
    assert ours.converged
    with threadpool_limits(limits=1, user_api="blas"):  # a multithreaded BLAS only slows these small products
        theirs = tucker(dense, rank, n_iter_max=1000, init="svd", tol=1e-9, random_state=0)
    theirs_error = np.linalg.norm(dense - tl.tucker_to_tensor(theirs)) / np.linalg.norm(dense)
    assert abs(relative_error(dense, ours) - theirs_error) <= 1e-4
    assert abs((1.0 - ours.fit) - theirs_error) <= 1e-4


def test_hooi_factors_orthonormal_and_error_identity():
    # Kolda & Bader, SIAM Review 51(3), 2009, section 4.2: with orthonormal factors
    # ‖X − X̂‖² = ‖X‖² − ‖G‖²; checked against the dense residual on a sparse tensor.
    shape = (15, 12, 6, 4)
    coords, values = random_sparse(shape, 0.3, seed=4)
    tensor = SparseTensor.from_arrays(coords, values, shape)
    result = fit_hooi(tensor, rank=(4, 3, 2, 2), max_sweeps=5, tol=0.0, random_state=0)
    for factor in result.factors:
        assert_allclose(factor.T @ factor, np.eye(factor.shape[1]), atol=1e-10)
    dense = tensor.to_dense()
    residual = np.sum((dense - result.to_dense()) ** 2)
    identity = np.sum(dense**2) - np.sum(result.core**2)
    assert_allclose(residual, identity, rtol=1e-10)
    assert_allclose(result.loss, residual, rtol=1e-10)


def test_hooi_float32_tensor_gives_float32_model_close_to_float64():
    # Common practice: float32 storage agrees with float64 to single precision.
    dense = low_rank_plus_noise((10, 9, 5), (3, 2, 2), noise=0.05, seed=2)
    r64 = fit_hooi(SparseTensor.from_dense(dense), rank=(3, 2, 2), max_sweeps=3, tol=0.0)
    r32 = fit_hooi(SparseTensor.from_dense(dense.astype(np.float32)), rank=(3, 2, 2), max_sweeps=3, tol=0.0)
    assert r32.core.dtype == np.float32 and all(f.dtype == np.float32 for f in r32.factors)
    assert_allclose(r32.fit, r64.fit, rtol=1e-5)


# ---------------------------------------------------------------------- fit control
def test_callback_sees_every_sweep_and_can_stop():
    dense = low_rank_plus_noise((8, 6, 5), (2, 2, 2), noise=0.1, seed=3)
    seen = []

    def callback(record, model):
        core, factors = model
        assert not core.flags.writeable and len(factors) == 3
        seen.append(record.sweep)
        return record.sweep == 2

    result = fit_hooi(SparseTensor.from_dense(dense), rank=2, max_sweeps=10, tol=0.0, callback=callback)
    assert seen == [1, 2]
    assert result.stop_reason == "callback" and [h.sweep for h in result.history] == [0, 1, 2]


def test_max_sweeps_without_convergence_warns():
    dense = low_rank_plus_noise((8, 6, 5), (2, 2, 2), noise=0.5, seed=5)
    with pytest.warns(ConvergenceWarning, match="max_sweeps=1"):
        fit_hooi(SparseTensor.from_dense(dense), rank=2, max_sweeps=1, tol=1e-30)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fit_hooi(SparseTensor.from_dense(dense), rank=2, max_sweeps=1, tol=0.0)


def test_rank_above_mode_size_is_refused():
    tensor = SparseTensor.from_dense(low_rank_plus_noise((6, 5, 3), (2, 2, 2), 0.1, 0))
    with pytest.raises(ValueError, match="4 components in mode 2, which has only 3 indices"):
        fit_hooi(tensor, rank=(2, 2, 4))
    with pytest.raises(ValueError, match="needs one entry per mode"):
        fit_hooi(tensor, rank=(2, 2))
    with pytest.raises(ValueError, match="'rank' parameter of fit_hooi must be an int"):
        fit_hooi(tensor, rank=(2, 0, 2))


def test_estimator_forwards_every_parameter():
    # Style guide: the class forwards every argument of the function (cf. tensorly.testing).
    function_params = set(inspect.signature(fit_hooi).parameters) - {"tensor"}
    assert set(HOOIModel().get_params()) == function_params
    with pytest.raises(RuntimeError, match="not fitted yet"):
        HOOIModel().item_matrix()


# ---------------------------------------------------------------------- fold-in and scoring
def test_hooi_fold_in_is_the_least_squares_projection():
    # Slow reference written here: the row u minimizing ‖x_slice − u · G_(0) (U_2 ⊗ U_3)ᵀ‖ by lstsq.
    shape = (10, 8, 4)
    dense = low_rank_plus_noise(shape, (3, 3, 2), noise=0.2, seed=6)
    model = HOOIModel(rank=(3, 3, 2), max_sweeps=5, tol=0.0).fit(SparseTensor.from_dense(dense))
    core, factors = model.result_
    new = np.random.default_rng(7).standard_normal((2,) + shape[1:])
    new[1] = 0.0  # a user with no cells
    rows = model.fold_in(SparseTensor.from_dense(new), mode=0)
    design = tl.unfold(tl.tucker_to_tensor((core, [np.eye(3), factors[1], factors[2]])), 0)  # (R_0, I_1 I_2)
    expected = np.linalg.lstsq(design.T, tl.unfold(new, 0).T, rcond=None)[0].T
    assert_allclose(rows, expected, atol=1e-10)
    assert_allclose(rows[1], 0.0, atol=0)
    # The last mode is updated last in a sweep, so folding its training slices back in reproduces its factor.
    assert_allclose(model.fold_in(SparseTensor.from_dense(dense), mode=2), factors[2], atol=1e-10)
    with pytest.raises(ValueError, match="mode 'mode1' has 7 rows in the tensor but 8 in the model"):
        hooi_fold_in(model.result_, SparseTensor.from_dense(new[:, :7]), 0)


def test_score_terms_and_core_contributions_sum_to_scores():
    # Definition (scoring.py): scores = Q Vᵀ and the terms of one score sum to it; checked against
    # the dense reconstruction.
    shape = (7, 6, 3, 2)
    dense = low_rank_plus_noise(shape, (3, 2, 2, 2), noise=0.1, seed=8)
    result = fit_hooi(SparseTensor.from_dense(dense), rank=(3, 2, 2, 2), max_sweeps=2, tol=0.0)
    full = result.to_dense()
    users, contexts = np.array([0, 4, 6]), np.array([[0, 1], [2, 0], [1, 1]])
    scores = result.score(users, contexts)
    assert_allclose(scores, full[users, :, contexts[:, 0], contexts[:, 1]], atol=1e-12)
    terms = result.score_terms(4, [2, 0], 5)
    assert len(terms.values) == 3 * 2 * 2 * 2 and terms.labels[1] == "core (0, 0, 0, 1)"
    assert_allclose(terms.total, full[4, 5, 2, 0], atol=1e-12)
    cells = np.array([[4, 5, 2, 0], [0, 1, 0, 1]])
    contributions = core_contributions(result.core, result.factors, cells)
    assert contributions.shape == (2, 3, 2, 2, 2)
    assert_allclose(contributions.reshape(2, -1).sum(axis=1), full[tuple(cells.T)], atol=1e-12)
    assert_allclose(result.predict(cells.T), full[tuple(cells.T)], atol=1e-12)
    # A core slice at fixed context levels gives the user-group × item-group scores of that context.
    sliced = core_slice(result, {2: 2, 3: 0})
    assert_allclose(result.factors[0] @ sliced @ result.factors[1].T, full[:, :, 2, 0], atol=1e-12)
