"""SparseTensor: unfoldings and mode products against published values and tensorly."""

import numpy as np
import pytest
import tensorly as tl
from numpy.testing import assert_allclose, assert_array_equal

from threefold import CellEvidence, FeedbackWeighting, SparseTensor, Vocabulary


def kolda_bader_tensor() -> np.ndarray:
    """The 3 × 4 × 2 example of Kolda & Bader, SIAM Review 51(3), 2009, section 2.4.

    Frontal slices X1 = [[1,4,7,10],[2,5,8,11],[3,6,9,12]], X2 = X1 + 12.
    """
    x = np.zeros((3, 4, 2))
    x[:, :, 0] = np.arange(1, 13).reshape(4, 3).T
    x[:, :, 1] = np.arange(13, 25).reshape(4, 3).T
    return x


# Published matrices, Kolda & Bader 2009, section 2.4 (earlier modes vary fastest).
KB_UNFOLD_1 = [[1, 4, 7, 10, 13, 16, 19, 22], [2, 5, 8, 11, 14, 17, 20, 23], [3, 6, 9, 12, 15, 18, 21, 24]]
KB_UNFOLD_2 = [[1, 2, 3, 13, 14, 15], [4, 5, 6, 16, 17, 18], [7, 8, 9, 19, 20, 21], [10, 11, 12, 22, 23, 24]]
KB_UNFOLD_3 = [list(range(1, 13)), list(range(13, 25))]
# Kolda & Bader 2009, section 2.5: X ×1 U with U = [[1,3,5],[2,4,6]].
KB_MODE1_PRODUCT = np.stack(
    [np.array([[22, 49, 76, 103], [28, 64, 100, 136]]), np.array([[130, 157, 184, 211], [172, 208, 244, 280]])], axis=2
)


@pytest.fixture
def kb_sparse() -> SparseTensor:
    return SparseTensor.from_dense(kolda_bader_tensor())


def test_unfoldings_match_kolda_bader_published_matrices(kb_sparse):
    # Source: Kolda & Bader 2009, section 2.4 (their column ordering).
    assert_array_equal(kb_sparse.unfold(0).toarray(), KB_UNFOLD_1)
    assert_array_equal(kb_sparse.unfold(1).toarray(), KB_UNFOLD_2)
    assert_array_equal(kb_sparse.unfold(2).toarray(), KB_UNFOLD_3)


@pytest.mark.parametrize("mode", [0, 1, 2])
def test_unfoldings_match_tensorly_unfold(kb_sparse, mode):
    # Source: tensorly.unfold (reference library; later modes vary fastest).
    assert_array_equal(kb_sparse.unfold(mode, ordering="tensorly").toarray(), tl.unfold(tl.tensor(kolda_bader_tensor()), mode))


def test_mode_one_product_matches_kolda_bader_and_tensorly(kb_sparse):
    u = np.array([[1, 3, 5], [2, 4, 6]])
    product = kb_sparse.mode_dot(u, 0)
    assert_array_equal(product, KB_MODE1_PRODUCT)  # Kolda & Bader 2009, section 2.5
    assert_allclose(product, tl.tenalg.mode_dot(tl.tensor(kolda_bader_tensor()), u, 0), rtol=0, atol=1e-12)  # tensorly


def test_norm_matches_published_value(kb_sparse):
    # Kolda & Bader 2009: ||X|| = sqrt(sum 1..24 squared) = 70.
    assert kb_sparse.norm() == pytest.approx(70.0, rel=1e-12)


@pytest.mark.parametrize("mode", [0, 1, 2, 3])
def test_random_4way_mode_products_match_tensorly(mode):
    rng = np.random.default_rng(3)
    dense = rng.random((4, 5, 3, 2)) * (rng.random((4, 5, 3, 2)) < 0.4)
    tensor = SparseTensor.from_dense(dense)
    matrix = rng.standard_normal((3, dense.shape[mode]))
    assert_allclose(tensor.mode_dot(matrix, mode), tl.tenalg.mode_dot(tl.tensor(dense), matrix, mode), rtol=1e-12, atol=1e-12)
    assert_allclose(tensor.unfold(mode, ordering="tensorly").toarray(), tl.unfold(tl.tensor(dense), mode), rtol=0, atol=0)


def test_mode_order_groups_cells_by_index():
    rng = np.random.default_rng(0)
    dense = rng.random((6, 5, 3)) * (rng.random((6, 5, 3)) < 0.3)
    tensor = SparseTensor.from_dense(dense)
    for mode in range(3):
        order, indptr = tensor.mode_order(mode)
        for i in range(tensor.shape[mode]):
            cells = order[indptr[i] : indptr[i + 1]]
            assert np.all(tensor.coords[mode, cells] == i)
        assert indptr[-1] == tensor.nnz


def test_dense_conversion_refuses_large_shapes():
    tensor = SparseTensor.from_arrays(np.zeros((3, 1), dtype=np.int32), [1.0], (100_000, 20_000, 24))
    with pytest.raises(MemoryError, match="above the limit"):
        tensor.to_dense()


def test_storage_is_at_most_32_bytes_per_cell_for_a_4way_float32_log_tensor():
    n = 1000
    rng = np.random.default_rng(1)
    coords = np.vstack([rng.integers(0, s, n) for s in (50, 40, 6, 4)])
    flat = np.unique(np.ravel_multi_index(tuple(coords), (50, 40, 6, 4)))
    coords = np.vstack(np.unravel_index(flat, (50, 40, 6, 4)))
    m = coords.shape[1]
    evidence = CellEvidence(
        clicks=np.ones(m, np.float32), dwell=np.zeros(m, np.float32), skips=np.zeros(m, np.float32),
        last_seen=np.zeros(m, np.uint32), time_origin=0,
    )
    tensor = SparseTensor(coords, (50, 40, 6, 4), ("user", "item", "daypart", "device"), (None,) * 4, evidence=evidence)
    assert tensor.nbytes / tensor.nnz <= 32


def test_constructor_errors_name_the_problem():
    with pytest.raises(ValueError, match="must lie in"):
        SparseTensor.from_arrays(np.array([[0], [5]]), [1.0], (2, 3))
    with pytest.raises(ValueError, match="duplicate cells"):
        SparseTensor.from_arrays(np.array([[0, 0], [1, 1]]), [1.0, 2.0], (2, 3))
    with pytest.raises(ValueError, match="vocabulary has 2 labels"):
        SparseTensor.from_arrays(np.array([[0], [1]]), [1.0], (2, 3), vocabularies=(None, Vocabulary(("a", "b"))))
    with pytest.raises(ValueError, match="float32 or float64"):
        SparseTensor.from_arrays(np.array([[0], [1]]), [1.0], (2, 3), dtype=np.int64)


def test_reweighting_needs_evidence():
    tensor = SparseTensor.from_arrays(np.array([[0], [1]]), [1.0], (2, 3))
    with pytest.raises(ValueError, match="no raw evidence"):
        tensor.reweighted(FeedbackWeighting(alpha=3.0))


def test_vocabulary_round_trip_and_unseen_policies():
    vocab = Vocabulary(("007", "010", "unknown"), name="user")
    assert Vocabulary.from_json(vocab.to_json()) == vocab
    encoded = vocab.encode(["010", "7", "007"], policy="drop")
    assert_array_equal(encoded.codes, [1, -1, 0])
    assert encoded.n_unseen == 1 and encoded.first_unseen_rows == [1]
    assert_array_equal(vocab.encode(["7"], policy="unknown").codes, [2])
    with pytest.raises(KeyError, match="'7' at row 0"):
        vocab.encode(["7"], policy="error")
    grown = vocab.extend(["020", "007"])
    assert grown.labels == ("007", "010", "unknown", "020")
