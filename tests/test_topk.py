"""Specifications of the fused top-k routines of ``threefold/ranking/topk.py``.

Every ranking is checked against the definition (common practice): for one
row, ``sorted(valid, key=lambda j: (-s[j], j))[:k]`` padded with -1, where
``valid`` are the candidates whose score is neither -inf nor NaN.
"""

from __future__ import annotations

import numba
import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from numpy.testing import assert_allclose, assert_array_equal

from threefold.ranking import topk

top_k = topk.top_k
top_k_product = topk.top_k_product
ALWAYS_LIVE = topk.ALWAYS_LIVE

FLOATS = [np.float32, np.float64]


# ---------------------------------------------------------------------------
# Definition (common practice): full sort by (score descending, index ascending)
# ---------------------------------------------------------------------------


def slow_rank(s: np.ndarray, k: int, valid=None) -> list[int]:
    """Definition (common practice) for one row: the k best valid columns, ties by lower index, -1 padding."""
    cols = [j for j in range(s.shape[0]) if (valid is None or valid[j]) and not np.isnan(s[j]) and s[j] != -np.inf]
    ranked = sorted(cols, key=lambda j: (-s[j], j))[:k]
    return ranked + [-1] * (k - len(ranked))


def slow_top_k(scores: np.ndarray, k: int, mask=None) -> np.ndarray:
    out = [slow_rank(scores[i], k, None if mask is None else mask[i]) for i in range(scores.shape[0])]
    return np.array(out, dtype=np.int64).reshape(scores.shape[0], k)


def rows_to_csr(rows: list[list[int]]) -> tuple[np.ndarray, np.ndarray]:
    indptr = np.zeros(len(rows) + 1, dtype=np.int64)
    indptr[1:] = np.cumsum([len(r) for r in rows])
    indices = np.array([j for r in rows for j in r], dtype=np.int64)
    return indptr, indices


def int_factors(rng, q, n_items, rank, dtype, low=-3, high=4):
    """Small integer-valued factors: every dot product is exact in float32 and float64, so ties are real."""
    query = rng.integers(low, high, size=(q, rank)).astype(dtype)
    items = rng.integers(low, high, size=(n_items, rank)).astype(dtype)
    bias = rng.integers(-2, 3, size=n_items).astype(dtype)
    return query, items, bias


def slow_product(query, items, k, bias=None, valid=None):
    """Definition (common practice) applied to the dense scores ``Q @ V.T + b`` (in the factors' dtype)."""
    scores = query @ items.T
    if bias is not None:
        scores = scores + bias
    return slow_top_k(scores, k, valid), scores


def picked_scores(scores, idx):
    """The scores of the picked columns, -inf where the index is -1."""
    got = np.take_along_axis(scores, np.maximum(idx, 0), axis=1)
    return np.where(idx >= 0, got, -np.inf)


# ---------------------------------------------------------------------------
# top_k
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("dtype", FLOATS)
@pytest.mark.parametrize("width", [5, 63, 64, 65, 200, 1000])
def test_top_k_matches_definition_with_many_ties(dtype, width):
    rng = np.random.default_rng(width)
    scores = rng.integers(0, 4, size=(12, width)).astype(dtype)  # four values only: ties everywhere
    for k in (1, 3, 10):
        assert_array_equal(top_k(scores, k), slow_top_k(scores, k))


@pytest.mark.parametrize("dtype", FLOATS)
@pytest.mark.parametrize("width", [7, 64, 130, 640])
def test_all_equal_rows_rank_by_index(dtype, width):
    scores = np.full((3, width), 2.5, dtype=dtype)
    k = min(10, width)
    assert_array_equal(top_k(scores, k), np.tile(np.arange(k), (3, 1)))


@pytest.mark.parametrize("dtype", FLOATS)
def test_signed_zeros_are_equal_scores(dtype):
    """-0.0 == +0.0: among zeros the lower index wins, whatever the sign (IEEE 754 equality)."""
    row = np.zeros(300, dtype=dtype)
    row[::2] = -0.0
    row[5] = -1.0
    expected = [j for j in range(300) if j != 5][:10]
    assert_array_equal(top_k(row[None, :], 10)[0], expected)
    row[::3] = np.copysign(0.0, -1.0)
    assert_array_equal(top_k(row[None, :], 10), slow_top_k(row[None, :], 10))


@pytest.mark.parametrize("dtype", FLOATS)
@pytest.mark.parametrize("width", [9, 64, 300])
def test_inf_and_nan_are_never_ranked(dtype, width):
    rng = np.random.default_rng(7)
    scores = rng.standard_normal((20, width)).astype(dtype)
    scores[rng.random(scores.shape) < 0.2] = -np.inf
    scores[rng.random(scores.shape) < 0.2] = np.nan
    scores[rng.random(scores.shape) < 0.05] = -np.nan  # sign bit set: a different bit pattern
    scores[rng.random(scores.shape) < 0.02] = np.inf
    scores[3] = np.nan
    scores[4] = -np.inf
    scores[5, :] = np.nan
    scores[5, width // 2] = 1.0
    got = top_k(scores, 10)
    assert_array_equal(got, slow_top_k(scores, 10))
    assert_array_equal(got[3], -1)
    assert_array_equal(got[4], -1)
    assert_array_equal(got[5], [width // 2] + [-1] * 9)


@pytest.mark.parametrize("dtype", FLOATS)
def test_nan_does_not_hide_a_better_score_in_its_chunk(dtype):
    """NaNs around the row's best scores (same chunk of 64 columns, chunk 3 of 5) must not hide them."""
    scores = np.zeros((2, 320), dtype=dtype)
    scores[0, 192:256] = np.nan
    scores[0, 200] = 5.0
    scores[0, 250] = 4.0
    scores[1, 192:256] = -np.nan
    scores[1, 230] = 5.0
    assert_array_equal(top_k(scores, 3), [[200, 250, 0], [230, 0, 1]])


@pytest.mark.parametrize("dtype", FLOATS)
def test_ties_with_an_earlier_chunk_scanned_later(dtype):
    """The best chunk is scanned first; scores equal to the k-th best in an EARLIER chunk still win by index."""
    scores = np.ones((1, 200), dtype=dtype)
    scores[0, 100] = 5.0
    assert_array_equal(top_k(scores, 3), [[100, 0, 1]])


@pytest.mark.parametrize("dtype", FLOATS)
@pytest.mark.parametrize("order", ["ascending", "descending"])
def test_sorted_rows(dtype, order):
    rng = np.random.default_rng(3)
    scores = np.sort(rng.standard_normal((6, 1000)).astype(dtype), axis=1)
    if order == "descending":
        scores = scores[:, ::-1].copy()
    assert_array_equal(top_k(scores, 10), slow_top_k(scores, 10))


@pytest.mark.parametrize("dtype", FLOATS)
def test_mask_rules_out_candidates(dtype):
    rng = np.random.default_rng(11)
    scores = rng.integers(0, 6, size=(30, 333)).astype(dtype)
    for share in (0.9, 0.3, 0.01):
        mask = rng.random(scores.shape) < share
        assert_array_equal(top_k(scores, 7, mask), slow_top_k(scores, 7, mask))


def test_mask_ruling_out_the_best_scores():
    """The mask removes every column of the best chunks: the rest must still be found."""
    scores = np.tile(np.arange(640, dtype=np.float32), (2, 1))
    mask = np.ones_like(scores, dtype=bool)
    mask[:, 320:] = False
    mask[1, :] = False
    mask[1, 3] = True
    assert_array_equal(top_k(scores, 4, mask), [[319, 318, 317, 316], [3, -1, -1, -1]])


@pytest.mark.parametrize("dtype", FLOATS)
def test_rows_with_fewer_than_k_candidates_end_in_minus_one(dtype):
    scores = np.array([[1.0, -np.inf, 3.0, np.nan], [-np.inf] * 4, [0.0, 0.0, 0.0, 0.0]], dtype=dtype)
    mask = np.array([[True, True, True, True], [True] * 4, [False, True, False, True]])
    assert_array_equal(top_k(scores, 3, mask), [[2, 0, -1], [-1, -1, -1], [1, 3, -1]])


@pytest.mark.parametrize("dtype", FLOATS)
def test_k_larger_than_the_number_of_columns(dtype):
    rng = np.random.default_rng(5)
    scores = rng.integers(0, 3, size=(4, 70)).astype(dtype)
    got = top_k(scores, 100)
    assert got.shape == (4, 100) and got.dtype == np.int64
    assert_array_equal(got, slow_top_k(scores, 100))
    assert_array_equal(got[:, 70:], -1)


def test_empty_inputs():
    assert top_k(np.zeros((0, 5)), 3).shape == (0, 3)
    assert_array_equal(top_k(np.zeros((2, 0)), 3), -np.ones((2, 3), dtype=np.int64))


def test_float16_and_non_contiguous_input_and_input_untouched():
    rng = np.random.default_rng(9)
    base = rng.integers(0, 5, size=(8, 400)).astype(np.float64)
    view = base[::2, ::2]  # not contiguous
    before = view.copy()
    assert_array_equal(top_k(view, 5), slow_top_k(view, 5))
    assert_array_equal(view, before)
    half = base.astype(np.float16)
    assert_array_equal(top_k(half, 5), slow_top_k(base, 5))


@settings(max_examples=150, deadline=None)
@given(
    scores=hnp.arrays(
        np.float32,
        st.tuples(st.integers(0, 4), st.integers(0, 150)),
        elements=st.sampled_from([0.0, -0.0, 1.0, 2.0, 2.5, -1.0, np.inf, -np.inf, np.nan]),
    ),
    k=st.integers(1, 12),
    data=st.data(),
)
def test_top_k_property_against_definition(scores, k, data):
    mask = data.draw(st.none() | hnp.arrays(bool, scores.shape))
    assert_array_equal(top_k(scores, k, mask), slow_top_k(scores, k, mask))


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"k": 0}, r"The 'k' parameter of top_k must be an int in the range \[1, inf\)\. Got 0 instead\."),
        ({"k": 2.0}, r"The 'k' parameter of top_k must be an int in the range \[1, inf\)\. Got 2\.0 instead\."),
        ({"k": True}, r"The 'k' parameter of top_k must be an int"),
        ({"scores": np.zeros(5)}, r"scores of top_k must be a 2-D float16, float32 or float64 array, got shape \(5,\)"),
        ({"scores": np.zeros((2, 3), dtype=np.int64)}, r"scores of top_k must be a 2-D float.*dtype int64"),
        ({"candidate_mask": np.ones((2, 3))}, r"candidate_mask of top_k must be a bool array of shape \(2, 3\), got float64"),
        ({"candidate_mask": np.ones((3, 2), dtype=bool)}, r"candidate_mask of top_k must be a bool array of shape \(2, 3\)"),
    ],
)
def test_top_k_errors(kwargs, match):
    args = {"scores": np.zeros((2, 3)), "k": 2, "candidate_mask": None} | kwargs
    with pytest.raises(ValueError, match=match):
        top_k(**args)


# ---------------------------------------------------------------------------
# top_k_product
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("dtype", FLOATS)
@pytest.mark.parametrize("block_queries", [None, 1, 3, 16])
def test_product_matches_top_k_of_dense_scores(dtype, block_queries):
    rng = np.random.default_rng(21)
    query, items, bias = int_factors(rng, 37, 300, 4, dtype)  # 37 queries: not a multiple of 3 or 16
    for b in (None, bias):
        idx, val = top_k_product(query, items, 10, item_bias=b, block_queries=block_queries)
        dense = query @ items.T + (0 if b is None else b)
        assert idx.dtype == np.int64 and idx.shape == (37, 10)
        assert val.dtype == dtype and val.shape == (37, 10)
        assert_array_equal(idx, top_k(dense, 10))
        assert_array_equal(idx, slow_top_k(dense, 10))
        assert_allclose(val, picked_scores(dense, idx), rtol=0, atol=0)


@pytest.mark.parametrize("n_threads", [1, 2])
def test_product_random_floats_and_threads(n_threads):
    rng = np.random.default_rng(22)
    query = rng.standard_normal((50, 16), dtype=np.float32)
    items = rng.standard_normal((1000, 16), dtype=np.float32)
    before = numba.get_num_threads()
    idx, val = top_k_product(query, items, 10, n_threads=min(n_threads, numba.config.NUMBA_NUM_THREADS),
                             block_queries=7)
    assert numba.get_num_threads() == before
    dense = query @ items.T
    assert_allclose(val, picked_scores(dense, idx), rtol=1e-5, atol=1e-5)
    # the 10th best score of the definition is reached (scores are continuous: no ties to break)
    ref = np.sort(dense, axis=1)[:, ::-1][:, :10]
    assert_allclose(val, ref, rtol=1e-5, atol=1e-5)


def test_product_restores_blas_threads():
    threadpoolctl = pytest.importorskip("threadpoolctl")
    before = [d["num_threads"] for d in threadpoolctl.threadpool_info() if d["user_api"] == "blas"]
    rng = np.random.default_rng(1)
    top_k_product(rng.standard_normal((40, 3)), rng.standard_normal((50, 3)), 2, n_threads=1, block_queries=5)
    after = [d["num_threads"] for d in threadpoolctl.threadpool_info() if d["user_api"] == "blas"]
    assert after == before


def _live_setup(rng, q, n_items):
    published = rng.integers(0, 100, size=n_items)
    expires = published + rng.integers(1, 60, size=n_items)
    times = rng.integers(0, 160, size=q)
    times[::5] = ALWAYS_LIVE
    published[:3] = np.iinfo(np.int64).min  # published since always ...
    expires[:3] = np.iinfo(np.int64).max  # ... and never expiring
    valid = (published[None, :] <= times[:, None]) & (times[:, None] < expires[None, :])
    valid[times == ALWAYS_LIVE] = True
    return (published, expires, times), valid


@pytest.mark.parametrize("dtype", FLOATS)
def test_product_live_rule(dtype):
    rng = np.random.default_rng(31)
    query, items, bias = int_factors(rng, 29, 260, 3, dtype)
    live, valid = _live_setup(rng, 29, 260)
    assert 0.05 < valid.mean() < 0.9
    idx, val = top_k_product(query, items, 8, item_bias=bias, live=live, block_queries=4)
    ref, dense = slow_product(query, items, 8, bias, valid)
    assert_array_equal(idx, ref)
    assert_array_equal(val, picked_scores(dense, idx))


@pytest.mark.parametrize("dtype", FLOATS)
@pytest.mark.parametrize("list_length", [5, 150])  # short lists: gather path; long lists: blocked GEMM path
def test_product_allowed_lists(dtype, list_length):
    rng = np.random.default_rng(41)
    q, n_items = 23, 200
    query, items, bias = int_factors(rng, q, n_items, 3, dtype)
    rows = [list(rng.integers(0, n_items, size=rng.integers(0, list_length + 1))) for _ in range(q)]  # unsorted, duplicates
    valid = np.zeros((q, n_items), dtype=bool)
    for i, r in enumerate(rows):
        valid[i, r] = True
    ref, dense = slow_product(query, items, 6, bias, valid)
    indptr, indices = rows_to_csr(rows)
    matrix = sp.csr_array((np.ones(indices.size), indices, indptr), shape=(q, n_items))  # duplicates kept
    for allowed in ((indptr, indices), (indptr, indices.astype(np.int32)), matrix, sp.csr_matrix(valid), sp.coo_array(valid)):
        idx, val = top_k_product(query, items, 6, item_bias=bias, allowed=allowed, block_queries=5)
        assert_array_equal(idx, ref)
        assert_allclose(val, picked_scores(dense, idx), rtol=0, atol=0)


@pytest.mark.parametrize("list_length", [5, 150])
def test_product_allowed_lists_with_ties_everywhere(list_length):
    """Three distinct scores only: the tie rule (lower index first) decides almost every slot."""
    rng = np.random.default_rng(43)
    q, n_items = 19, 200
    query = np.ones((q, 1))
    items = rng.integers(0, 3, size=(n_items, 1)).astype(np.float64)
    rows = [sorted(set(rng.integers(0, n_items, size=list_length).tolist())) for _ in range(q)]
    valid = np.zeros((q, n_items), dtype=bool)
    for i, r in enumerate(rows):
        valid[i, r] = True
    ref, _ = slow_product(query, items, 7, None, valid)
    idx, _ = top_k_product(query, items, 7, allowed=rows_to_csr(rows), block_queries=4)
    assert_array_equal(idx, ref)


def test_both_allowed_paths_agree_and_the_choice_follows_list_length(monkeypatch):
    rng = np.random.default_rng(42)
    query, items, bias = int_factors(rng, 17, 90, 5, np.float32)
    allowed = sp.random_array((17, 90), density=0.3, rng=rng, format="csr")
    ref, _ = slow_product(query, items, 4, bias, allowed.toarray() != 0)
    calls = []
    gather = topk._gather_rows
    monkeypatch.setattr(topk, "_gather_rows", lambda *a: (calls.append("gather"), gather(*a))[1])
    for ratio in (1, 100):  # density 0.3: gather iff 0.3 * ratio < 1
        monkeypatch.setattr(topk, "_GATHER_RATIO", ratio)
        idx, _ = top_k_product(query, items, 4, item_bias=bias, allowed=allowed)
        assert_array_equal(idx, ref)
    assert calls == ["gather"]


def test_scipy_explicit_zeros_are_not_listed():
    rng = np.random.default_rng(43)
    query, items, _ = int_factors(rng, 3, 10, 2, np.float64)
    # row 0 stores items 1 and 2, but 2 as an explicit zero; row 1 lists item 5; row 2 nothing
    allowed = sp.csr_array((np.array([1.0, 0.0, 1.0]), np.array([1, 2, 5]), np.array([0, 2, 3, 3])), shape=(3, 10))
    assert allowed.nnz == 3
    idx, _ = top_k_product(query, items, 3, allowed=allowed)
    assert_array_equal(idx, [[1, -1, -1], [5, -1, -1], [-1, -1, -1]])


@pytest.mark.parametrize("dtype", FLOATS)
def test_product_excluded_lists(dtype):
    rng = np.random.default_rng(51)
    q, n_items = 19, 300
    query, items, bias = int_factors(rng, q, n_items, 3, dtype)
    dense = query @ items.T + bias
    # exclude each query's five best items (and some random ones, unsorted with duplicates)
    rows = [list(np.argsort(-dense[i], kind="stable")[:5]) + list(rng.integers(0, n_items, size=4)) for i in range(q)]
    rows = [r[::-1] + r[:2] for r in rows]
    valid = np.ones((q, n_items), dtype=bool)
    for i, r in enumerate(rows):
        valid[i, r] = False
    ref = slow_top_k(dense, 10, valid)
    for excluded in (rows_to_csr(rows), sp.csr_array(~valid)):
        idx, val = top_k_product(query, items, 10, item_bias=bias, excluded=excluded, block_queries=3)
        assert_array_equal(idx, ref)
        assert_array_equal(val, picked_scores(dense, idx))


@pytest.mark.parametrize("dtype", FLOATS)
@pytest.mark.parametrize("list_length", [8, 250])
def test_product_live_allowed_and_excluded_together(dtype, list_length):
    rng = np.random.default_rng(61)
    q, n_items = 31, 280
    query, items, bias = int_factors(rng, q, n_items, 4, dtype)
    live, valid_live = _live_setup(rng, q, n_items)
    allowed = [list(rng.integers(0, n_items, size=list_length)) for _ in range(q)]
    excluded = [list(rng.choice(np.asarray(a), size=min(3, len(a)), replace=False)) for a in allowed]
    v_allowed = np.zeros((q, n_items), dtype=bool)
    v_excluded = np.zeros((q, n_items), dtype=bool)
    for i in range(q):
        v_allowed[i, allowed[i]] = True
        v_excluded[i, excluded[i]] = True
    combos = {
        "live+allowed": (dict(live=live, allowed=rows_to_csr(allowed)), valid_live & v_allowed),
        "live+excluded": (dict(live=live, excluded=rows_to_csr(excluded)), valid_live & ~v_excluded),
        "allowed+excluded": (dict(allowed=rows_to_csr(allowed), excluded=rows_to_csr(excluded)), v_allowed & ~v_excluded),
        "all three": (
            dict(live=live, allowed=rows_to_csr(allowed), excluded=rows_to_csr(excluded)),
            valid_live & v_allowed & ~v_excluded,
        ),
    }
    for name, (rules, valid) in combos.items():
        ref, dense = slow_product(query, items, 5, bias, valid)
        idx, val = top_k_product(query, items, 5, item_bias=bias, block_queries=6, **rules)
        assert_array_equal(idx, ref, err_msg=name)
        assert_array_equal(val, picked_scores(dense, idx), err_msg=name)


@pytest.mark.parametrize("dtype", FLOATS)
def test_product_nan_and_inf_scores_are_never_ranked(dtype):
    rng = np.random.default_rng(71)
    query, items, _ = int_factors(rng, 9, 150, 3, dtype)
    items[5] = np.nan  # NaN scores for item 5
    bias = np.zeros(150, dtype=dtype)
    bias[7] = -np.inf
    bias[8] = np.inf
    dense = query @ items.T + bias
    few = np.eye(9, 150, 5, dtype=bool) | np.eye(9, 150, 7, dtype=bool) | np.eye(9, 150, 20, dtype=bool)
    for kwargs in ({}, {"allowed": sp.csr_array(np.ones((9, 150), dtype=bool))}, {"allowed": sp.csr_array(few)}):
        idx, val = top_k_product(query, items, 4, item_bias=bias, **kwargs)
        valid = None if not kwargs else kwargs["allowed"].toarray()
        assert_array_equal(idx, slow_top_k(dense, 4, valid))
        assert not np.isin(idx, [5, 7]).any()
        assert_array_equal(val[idx == -1], -np.inf)


def test_product_empty_batches_and_degenerate_shapes():
    items = np.ones((5, 3), dtype=np.float32)
    idx, val = top_k_product(np.zeros((0, 3), dtype=np.float32), items, 4)
    assert idx.shape == (0, 4) and val.shape == (0, 4) and idx.dtype == np.int64 and val.dtype == np.float32
    idx, val = top_k_product(np.ones((2, 3)), np.zeros((0, 3)), 2)
    assert_array_equal(idx, -np.ones((2, 2)))
    assert_array_equal(val, np.full((2, 2), -np.inf))
    bias = np.array([0.0, 2.0, 1.0, 2.0])
    idx, val = top_k_product(np.zeros((2, 0)), np.zeros((4, 0)), 3, item_bias=bias)  # R = 0: scores are the bias
    assert_array_equal(idx, [[1, 3, 2], [1, 3, 2]])
    assert_array_equal(val, [[2.0, 2.0, 1.0], [2.0, 2.0, 1.0]])


def test_product_k_larger_than_items_and_mixed_dtypes():
    rng = np.random.default_rng(81)
    query, items, bias = int_factors(rng, 6, 12, 2, np.float64)
    idx, val = top_k_product(query.astype(np.float32), items, 20, item_bias=bias)
    assert val.dtype == np.float64  # common dtype of the two factors
    ref, dense = slow_product(query, items, 20, bias)
    assert_array_equal(idx, ref)
    assert_array_equal(idx[:, 12:], -1)
    assert_array_equal(val, picked_scores(dense, idx))
    idx16, val16 = top_k_product(query.astype(np.float16), items.astype(np.float16), 3)
    assert val16.dtype == np.float32
    assert_array_equal(idx16, slow_top_k(query @ items.T, 3))


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"k": 0}, r"The 'k' parameter of top_k_product must be an int in the range \[1, inf\)\. Got 0 instead\."),
        ({"n_threads": 0}, r"The 'n_threads' parameter of top_k_product must be an int in the range \[1, \d+\]\. Got 0"),
        ({"n_threads": 10_000}, r"The 'n_threads' parameter of top_k_product must be an int in the range \[1, \d+\]"),
        ({"block_queries": 0}, r"The 'block_queries' parameter of top_k_product must be an int in the range \[1, inf\)"),
        ({"query_matrix": np.zeros((4, 2))}, r"must share R, got \(4, 2\) and \(6, 3\)"),
        ({"query_matrix": np.zeros((4, 3), dtype=np.int32)}, r"query_matrix of top_k_product must be a 2-D float16, float32 or float64"),
        ({"item_matrix": np.zeros(6)}, r"item_matrix of top_k_product must be a 2-D float"),
        ({"item_bias": np.zeros(5)}, r"item_bias of top_k_product must be a real array of shape \(6,\)"),
        ({"live": (np.zeros(6), np.zeros(6))}, r"live of top_k_product must be a tuple \(published, expires, times\)"),
        ({"live": (np.zeros(6), np.zeros(6, int), np.zeros(4, int))}, r"live\[0\] \(published\) of top_k_product must be an int array of shape \(6,\)"),
        ({"live": (np.zeros(6, int), np.zeros(6, int), np.zeros(3, int))}, r"live\[2\] \(times\) of top_k_product must be an int array of shape \(4,\)"),
        ({"allowed": (np.array([0, 1, 2, 3, 4]), np.array([0, 1, 2, 6]))}, r"allowed of top_k_product holds item indices outside \[0, 6\)"),
        ({"allowed": (np.array([0, 1, 2, 3, 4]), np.array([0, 1, 2, -1], dtype=np.int32))}, r"allowed of top_k_product holds item indices outside \[0, 6\)"),
        ({"excluded": (np.array([0, 1, 2]), np.array([0, 1]))}, r"excluded of top_k_product: indptr must be a 1-D int array of length 5"),
        ({"excluded": (np.array([0, 2, 1, 3, 4]), np.array([0, 1, 2, 3]))}, r"excluded of top_k_product: indptr must start at 0, never decrease"),
        ({"excluded": (np.array([0, 1, 2, 3, 4]), np.array([0.0, 1, 2, 3]))}, r"excluded of top_k_product: indices must be a 1-D int array"),
        ({"excluded": sp.csr_array((4, 7))}, r"excluded of top_k_product must have shape \(4, 6\), got \(4, 7\)"),
        ({"allowed": [[0, 1], [2]]}, r"allowed of top_k_product: indptr must be a 1-D int array of length 5"),
        ({"allowed": np.ones((4, 6), dtype=bool)}, r"allowed of top_k_product must be a scipy sparse matrix of shape \(4, 6\) or a pair"),
    ],
)
def test_product_errors(kwargs, match):
    args = {"query_matrix": np.zeros((4, 3)), "item_matrix": np.zeros((6, 3)), "k": 2} | kwargs
    with pytest.raises(ValueError, match=match):
        top_k_product(**args)


def test_a_live_rule_every_item_passes_gives_the_ranking_without_it():
    """The shortcut for catalogs live at every request time (no rule read) ranks as the full rule would."""
    rng = np.random.default_rng(77)
    query, items, bias = int_factors(rng, 9, 150, 3, np.float64)
    times = np.array([100, 200, ALWAYS_LIVE, 150, 120, 180, 101, 199, 130])
    published, expires = np.full(150, 50), np.full(150, 300)
    ref, _ = slow_product(query, items, 5, bias)
    idx, _ = top_k_product(query, items, 5, item_bias=bias, live=(published, expires, times))
    assert_array_equal(idx, ref)
    expires[7] = 200  # item 7 expires at 200: the rule applies again, and rules it out for the query at 200
    idx, _ = top_k_product(query, items, 150, item_bias=bias, live=(published, expires, times))
    assert 7 not in idx[1] and 7 in idx[0]
