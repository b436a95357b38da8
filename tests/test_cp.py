"""The CP engine: outside references, planted truths, fold-in, warm starts and the API contract."""

import inspect
import warnings

import numpy as np
import pytest
import tensorly as tl
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal
from tensorly.cp_tensor import CPTensor
from tensorly.datasets import load_kinetic
from tensorly.decomposition import parafac

from threefold.models.cp.model import CPModel, CPResult, fit_cp, fold_in
from threefold.models.diagnostics import factor_match_score
from threefold.core.exceptions import ConvergenceWarning
from threefold.core.feedback import CellEvidence, FeedbackWeighting
from threefold.models.initialize import SMALL_MODE, leading_left_vectors
from threefold.core.tensor import SparseTensor
from threefold.core.vocabulary import Vocabulary

MODES = ("user", "item", "daypart")


def _random_tensor(seed, shape=(8, 7, 4), density=0.35, w0=0.3, mode_names=MODES):
    rng = np.random.default_rng(seed)
    mask = rng.random(shape) < density
    coords = np.array(np.nonzero(mask))
    nnz = coords.shape[1]
    return SparseTensor.from_arrays(
        coords, rng.random(nnz), shape, confidence=rng.uniform(0.05, 4.0, nnz), w0=w0, mode_names=mode_names
    )


def _rows_of(tensor, mode, rows):
    """The cells of some rows of one mode, as a tensor whose mode indexes them 0.. (for fold-in)."""
    keep = np.isin(tensor.coords[mode], rows)
    part = tensor.take(keep)
    coords = part.coords.copy()
    coords[mode] = np.searchsorted(rows, coords[mode])
    shape = tuple(len(rows) if m == mode else s for m, s in enumerate(tensor.shape))
    return SparseTensor.from_arrays(
        coords, part.preference, shape, confidence=part.confidence, w0=tensor.w0, mode_names=tensor.mode_names
    )


# ---------------------------------------------------------------------- outside references
@pytest.mark.parametrize("shape", [(6, 5, 4), (5, 4, 3, 3)])
def test_uniform_weights_match_tensorly_parafac(shape):
    # Reference library: tensorly.decomposition.parafac (ordinary CP-ALS). With w0 = 1,
    # every stored weight 1 and reg = 0 our loss is least squares on the zero-filled
    # tensor, so exact-ALS sweeps from the same factors must give the same model.
    rng = np.random.default_rng(11)
    dense = rng.random(shape) * (rng.random(shape) < 0.6)
    tensor = SparseTensor.from_dense(dense, w0=1.0)
    init = [rng.random((s, 3)) for s in shape]
    sweeps = 4
    theirs = parafac(
        tl.tensor(dense), 3, init=CPTensor((np.ones(3), [f.copy() for f in init])),
        tol=0, n_iter_max=sweeps, l2_reg=0, normalize_factors=False,
    )
    ours = fit_cp(tensor, rank=3, reg=0.0, init=init, max_sweeps=sweeps, tol=0, solver="als")
    assert ours.n_sweeps == sweeps
    assert_allclose(
        tl.cp_to_tensor(ours.to_tensorly()), tl.cp_to_tensor(theirs), rtol=1e-6, atol=1e-9
    )


def test_incomplete_kinetic_data_matches_tensorly_masked_parafac():
    # Data set shipped with tensorly: tensorly.datasets.load_kinetic (Nikolajsen, Booksh,
    # Hansen & Bro, Analytica Chimica Acta 475, 2003), 64 × 12 × 10 × 60. Reference
    # library: tensorly.decomposition.parafac(..., mask=...). Its missing cells plus 20%
    # removed at random get weight 0; every other cell is stored with weight 1.
    data = load_kinetic()
    dense = np.asarray(data.tensor)
    rng = np.random.default_rng(0)
    observed = ~(np.asarray(data.missing_values_position, dtype=bool) | (rng.random(dense.shape) < 0.2))
    coords = np.array(np.nonzero(np.ones(dense.shape, dtype=bool)))
    weight = observed[tuple(coords)].astype(float)
    tensor = SparseTensor.from_arrays(coords, dense[tuple(coords)] * weight, dense.shape, confidence=weight, w0=1.0)

    def observed_fit(reconstruction):
        return 1 - np.linalg.norm((dense - reconstruction)[observed]) / np.linalg.norm(dense[observed])

    theirs = parafac(tl.tensor(dense), 3, mask=tl.tensor(observed.astype(float)), init="svd", n_iter_max=1000, tol=1e-6)
    ours = fit_cp(tensor, rank=3, reg=0.0, init="svd", max_sweeps=1000, tol=1e-4, random_state=0)
    assert ours.converged
    fit_theirs = observed_fit(tl.cp_to_tensor(theirs))
    fit_ours = observed_fit(tl.cp_to_tensor(ours.to_tensorly()))
    assert abs(fit_ours - fit_theirs) <= 0.01 * fit_theirs
    assert_allclose(ours.fit, fit_ours, rtol=1e-8)  # our weighted fit is the fit on observed cells


def test_factor_match_score_of_a_permuted_rescaled_copy_is_one():
    # Acar, Dunlavy, Kolda & Mørup, Chemometr. Intell. Lab. Syst. 106 (2011): FMS is
    # invariant to permutation, sign flips and rescaling within a component.
    rng = np.random.default_rng(0)
    weights = np.array([3.0, 2.0, 1.0])
    factors = [rng.normal(size=(s, 3)) for s in (5, 4, 6)]
    perm = [2, 0, 1]
    copy = [factors[0][:, perm] * [-2.0, 1.0, 0.5], factors[1][:, perm] * [-1.0, 3.0, 2.0], factors[2][:, perm]]
    copy_weights = weights[perm] / np.array([2.0, 3.0, 1.0])
    assert_allclose(factor_match_score((weights, factors), (copy_weights, copy)), 1.0, rtol=1e-12)
    assert factor_match_score((weights, factors), (weights, [factors[0], factors[1], rng.normal(size=(6, 3))])) < 0.6
    with pytest.raises(ValueError, match="fewer than the 3 true ones"):
        factor_match_score((weights, factors), (weights[:2], [f[:, :2] for f in factors]))


def test_planted_rank_is_recovered_from_20_percent_of_cells():
    # Planted-truth test: a noiseless rank-3 tensor observed on 20% of its cells
    # (weight 1 there, w0 = 0 elsewhere) is recovered (FMS as in Acar et al. 2011).
    rng = np.random.default_rng(5)
    shape = (20, 16, 12)
    truth = [rng.random((s, 3)) for s in shape]
    dense = np.einsum("ir,jr,kr->ijk", *truth)
    observed = rng.random(shape) < 0.2
    coords = np.array(np.nonzero(observed))
    tensor = SparseTensor.from_arrays(coords, dense[observed], shape, w0=0.0)
    result = fit_cp(tensor, rank=3, reg=0.0, max_sweeps=400, tol=0, random_state=1)
    assert factor_match_score((np.ones(3), truth), (result.weights, result.factors)) >= 0.99


# ---------------------------------------------------------------------- implicit weighting
def test_a_shown_and_skipped_cell_scores_below_a_never_shown_one():
    # Users 0-5 click items 0-4, users 6-11 click items 5-9. Users 12 and 13 click
    # items 0-3; item 4 was shown to user 12 and skipped, never shown to user 13.
    clicks = {u: range(5) for u in range(6)} | {u: range(5, 10) for u in range(6, 12)}
    clicks |= {12: range(4), 13: range(4)}
    cells = [(u, i, 1.0, 0.0) for u, items in clicks.items() for i in items] + [(12, 4, 0.0, 1.0)]
    users, items, n_clicks, n_skips = (np.array(col) for col in zip(*cells))
    evidence = CellEvidence(
        clicks=n_clicks.astype(np.float32), dwell=np.zeros(len(cells), np.float32),
        skips=n_skips.astype(np.float32), last_seen=np.zeros(len(cells), np.uint32), time_origin=0,
    )
    weighting = FeedbackWeighting(w_skip=3.0, w0=0.5)
    assert weighting.w_skip > weighting.w0
    tensor = SparseTensor(
        coords=np.array([users, items]), shape=(14, 10), mode_names=("user", "item"),
        vocabularies=(None, None), evidence=evidence, weighting=weighting, dtype=np.dtype(np.float64),
    )
    model = CPModel(rank=2, reg=0.1, max_sweeps=2000, tol=1e-7, random_state=0).fit(tensor)
    assert model.converged_
    scores = model.score([12, 13], items=[4])[:, 0]
    assert scores[0] < scores[1]  # 0.765 < 0.887 when written


# ---------------------------------------------------------------------- fold-in and warm start
@pytest.mark.parametrize("structure", [None, "user*item:2 + user*item*daypart:2 + item*daypart:1"])
def test_fold_in_reproduces_rows_after_a_user_sweep(structure):
    tensor = _random_tensor(21)
    first = fit_cp(tensor, rank=3, structure=structure, reg=0.2, max_sweeps=8, tol=0, random_state=0)
    # One more sweep over the user mode only: every user row is then its row-system solution.
    swept = fit_cp(tensor, rank=3, structure=structure, reg=0.2, init=first, fixed_modes=("item", "daypart"),
                   max_sweeps=1, tol=0)
    users = np.array([1, 4, 7])
    rows = fold_in(swept, _rows_of(tensor, 0, users), "user")
    assert_allclose(rows, swept.factors[0][users], rtol=0, atol=1e-8)


def test_fold_in_of_a_user_without_events_is_zero():
    tensor = _random_tensor(22)
    result = fit_cp(tensor, rank=3, reg=0.2, max_sweeps=5, tol=0, random_state=0)
    newcomers = _rows_of(tensor, 0, np.array([2]))
    grown = SparseTensor.from_arrays(
        newcomers.coords, newcomers.preference, (2,) + tensor.shape[1:], confidence=newcomers.confidence,
        w0=tensor.w0, mode_names=MODES,
    )  # row 1 has no cells
    rows = fold_in(result, grown, "user")
    assert_array_equal(rows[1], np.zeros(3))
    assert np.abs(rows[0]).max() > 0


def test_warm_start_with_appended_users_solves_them_like_fold_in():
    full = _random_tensor(23, shape=(10, 7, 4))
    old_users = np.arange(8)
    labels = tuple(f"u{i}" for i in range(10))
    vocabs = lambda n: (Vocabulary(labels[:n], name="user"), None, None)  # noqa: E731
    old = _rows_of(full, 0, old_users)
    old = SparseTensor.from_arrays(old.coords, old.preference, old.shape, confidence=old.confidence, w0=old.w0,
                                   mode_names=MODES, vocabularies=vocabs(8))
    grown = SparseTensor.from_arrays(full.coords, full.preference, full.shape, confidence=full.confidence,
                                     w0=full.w0, mode_names=MODES, vocabularies=vocabs(10))
    first = fit_cp(old, rank=3, reg=0.3, max_sweeps=6, tol=0, random_state=0)
    warm = fit_cp(grown, rank=3, reg=0.3, init=first, fixed_modes=("item", "daypart"), max_sweeps=1, tol=0)
    new_rows = fold_in(first, _rows_of(full, 0, np.array([8, 9])), "user")
    folded = first.with_rows("user", new_rows, labels=["u8", "u9"])
    contexts = [[0], [3]]
    assert_allclose(warm.score([8, 9], contexts), folded.score([8, 9], contexts), rtol=1e-8, atol=1e-10)
    assert folded.vocabularies[0].labels == labels
    shrunk = SparseTensor.from_arrays(old.coords[:, old.coords[0] < 5], old.preference[old.coords[0] < 5],
                                      (5, 7, 4), w0=old.w0, mode_names=MODES)
    with pytest.raises(ValueError, match="vocabularies only grow by appending"):
        fit_cp(shrunk, rank=3, init=first)
    with pytest.raises(ValueError, match="structure 'user\\*item\\*daypart:3' differs"):
        fit_cp(grown, rank=3, structure="user*item:3", init=first)


# ---------------------------------------------------------------------- convergence and precision
@settings(max_examples=25, deadline=None)
@given(
    shape=st.lists(st.integers(2, 5), min_size=2, max_size=4),
    rank=st.integers(1, 3),
    w0=st.floats(0.0, 1.0),
    reg=st.floats(0.01, 1.0),
    mixed=st.booleans(),
    seed=st.integers(0, 2**16),
)
def test_exact_als_loss_never_increases(shape, rank, w0, reg, mixed, seed):
    # Block coordinate descent: every exact row update minimizes the loss over its block.
    names = tuple(f"m{n}" for n in range(len(shape)))
    tensor = _random_tensor(seed, shape=tuple(shape), density=0.5, w0=w0, mode_names=names)
    structure = f"m0*m1:{rank} + {'*'.join(names)}:1" if mixed and len(shape) > 2 else None
    result = fit_cp(tensor, rank=rank, structure=structure, reg=reg, max_sweeps=6, tol=0, random_state=seed)
    losses = np.array([h.loss for h in result.history])
    assert np.all(losses[1:] <= losses[:-1] * (1 + 1e-10) + 1e-12)


def test_float32_and_float64_agree_on_fit():
    tensor = _random_tensor(31, shape=(30, 20, 5))
    fits = [fit_cp(tensor, rank=4, reg=0.5, max_sweeps=10, tol=0, random_state=0, dtype=dt).fit
            for dt in (np.float32, np.float64)]
    assert abs(fits[0] - fits[1]) <= 1e-4 * abs(fits[1])


@pytest.mark.parametrize("solver", ["als", "cg"])
def test_same_seed_gives_the_same_factors_for_any_thread_count(solver):
    tensor = _random_tensor(32, shape=(40, 30, 5))
    runs = [fit_cp(tensor, rank=4, solver=solver, max_sweeps=3, tol=0, random_state=7, n_threads=t, init=init)
            for t, init in ((2, "random"), (2, "random"), (1, "random"), (2, "svd"), (2, "svd"))]
    for run in runs[1:3]:
        for a, b in zip(runs[0].factors, run.factors):
            assert_array_equal(a, b)
    for a, b in zip(runs[3].factors, runs[4].factors):
        assert_array_equal(a, b)


def test_cap_warns_and_callback_stops():
    tensor = _random_tensor(33)
    with pytest.warns(ConvergenceWarning, match="stopped after max_sweeps=2 sweeps"):
        capped = fit_cp(tensor, rank=2, max_sweeps=2, tol=1e-12, random_state=0)
    assert (capped.stop_reason, capped.converged, capped.n_sweeps) == ("max_sweeps", False, 2)
    seen = []

    def stop_at_three(record, factors):
        seen.append(record.sweep)
        with pytest.raises(ValueError, match="read-only"):
            factors[0][0, 0] = 1.0
        return record.sweep == 3

    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)
        stopped = fit_cp(tensor, rank=2, max_sweeps=10, tol=1e-12, callback=stop_at_three, random_state=0)
    assert seen == [1, 2, 3] and stopped.stop_reason == "callback" and stopped.n_sweeps == 3
    assert [h.sweep for h in stopped.history] == [0, 1, 2, 3]
    assert all(h.seconds >= 0 for h in stopped.history)


def test_svd_init_spans_the_leading_singular_subspace():
    # Reference: numpy.linalg.svd of the dense mode unfolding (Kolda & Bader 2009 ordering;
    # left singular vectors do not depend on the column order). Both the small-Gram
    # path and the scipy.sparse.linalg.svds path.
    tensor = _random_tensor(34, shape=(SMALL_MODE + 88, 6, 5), density=0.1)
    rng = np.random.default_rng(0)
    for mode in (0, 1):
        dense = np.moveaxis(tensor.to_dense(), mode, 0).reshape(tensor.shape[mode], -1)
        reference = np.linalg.svd(dense, full_matrices=False)[0][:, :3]
        ours = leading_left_vectors(tensor, mode, 3, rng)
        assert_allclose(np.linalg.svd(reference.T @ ours, compute_uv=False), np.ones(3), atol=1e-6)
    eight = leading_left_vectors(tensor, 2, 8, rng)  # 5 rows, rank 8: 3 random unit columns
    assert_allclose(np.linalg.norm(eight, axis=0), np.ones(8), rtol=1e-12)


# ---------------------------------------------------------------------- API contract
def test_scores_equal_model_values_and_terms_sum_to_the_score():
    tensor = _random_tensor(41)
    result = fit_cp(tensor, rank=4, structure="user*item:2 + user*item*daypart:1 + item*daypart:1",
                    max_sweeps=5, tol=0, random_state=0)
    users, contexts = np.array([0, 3, 5]), np.array([[1], [0], [3]])
    scores = result.score(users, contexts)
    for q, (u, d) in enumerate(zip(users, contexts[:, 0])):
        cells = np.array([[u] * 7, np.arange(7), [d] * 7])
        assert_allclose(scores[q], result.predict(cells), rtol=1e-12)
        terms = result.score_terms(u, [d], 5)
        assert_allclose(terms.total, scores[q, 5], rtol=1e-12)
        assert terms.labels[0] == "user*item #0"
    assert np.all(np.diff(result.weights[:2]) <= 0)  # sorted within a term
    assert_allclose(np.linalg.norm(result.factors[2][:, 2]), 1.0)  # owned columns normalized
    assert_array_equal(result.factors[2][:, :2], 1.0)  # columns daypart does not use


def test_estimator_forwards_every_parameter_and_exposes_fitted_state():
    signature = inspect.signature(fit_cp)
    defaults = {name: p.default for name, p in signature.parameters.items() if name != "tensor"}
    model = CPModel()
    assert model.get_params() == defaults
    tensor = _random_tensor(42)
    params = dict(rank=2, structure="user*item", solver="cg", cg_steps=2, reg=0.3, init="svd", max_sweeps=3,
                  tol=0.0, fixed_modes=(), random_state=3, n_threads=1, dtype=np.float32, callback=None)
    model = CPModel(**params).fit(tensor)
    expected = fit_cp(tensor, **params)
    for a, b in zip(model.factors_, expected.factors):
        assert_array_equal(a, b)
    assert model.n_sweeps_ == 3 and model.factors_[0].dtype == np.float32
    assert_allclose(model.score([1], [[2]]), expected.score([1], [[2]]))
    with pytest.raises(RuntimeError, match="not fitted yet"):
        CPModel().item_matrix()


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(rank=0), r"The 'rank' parameter of fit_cp must be an int in the range \[1, inf\)\. Got 0 instead\."),
        (dict(solver="sgd"), r"The 'solver' parameter of fit_cp must be one of 'als', 'cg'\. Got 'sgd' instead\."),
        (dict(reg=-1.0), r"The 'reg' parameter of fit_cp must be a float in the range \[0, inf\)"),
        (dict(init="nndsvd"), r"The 'init' parameter of fit_cp must be one of 'random', 'svd'"),
        (dict(init=[np.ones((8, 2))]), r"must be 'random', 'svd', a CPResult or 3 factor arrays"),
        (dict(init=[np.ones((9, 2)), np.ones((7, 2)), np.ones((4, 2))]), r"mode 'user' must have shape \(at most 8, 2\)"),
        (dict(fixed_modes=("tone",)), r"No mode named 'tone'"),
        (dict(dtype=np.float16), r"The 'dtype' parameter of fit_cp must be one of"),
        (dict(callback=3), r"The 'callback' parameter of fit_cp must be callable or None"),
    ],
)
def test_invalid_parameters_are_refused(kwargs, match):
    with pytest.raises((ValueError, KeyError), match=match):
        fit_cp(_random_tensor(43), **{"rank": 2, **kwargs})


def test_result_and_fold_in_validate_their_inputs():
    tensor = _random_tensor(44)
    result = fit_cp(tensor, rank=2, max_sweeps=2, tol=0, random_state=0)
    with pytest.raises(ValueError, match="weights must be 2 finite non-negative values"):
        CPResult(**{**_fields(result), "weights": np.array([-1.0, 1.0])})
    with pytest.raises(ValueError, match="must hold 1 in the columns its mode does not use"):
        mixed = fit_cp(tensor, rank=2, structure="user*item", max_sweeps=1, tol=0, random_state=0)
        CPResult(**{**_fields(mixed), "factors": (mixed.factors[0], mixed.factors[1], np.zeros((4, 2)))})
    wrong = _random_tensor(45, shape=(3, 6, 4))
    with pytest.raises(ValueError, match="mode 'item' has 6 rows in the tensor but 7 in the model"):
        fold_in(result, wrong, "user")
    with pytest.raises(ValueError, match=r"the tensor's w0=0.9 differs from the model's w0=0.3"):
        fold_in(result, _random_tensor(46, w0=0.9), "user")


def _fields(result):
    return {name: getattr(result, name) for name in result.__dataclass_fields__}
