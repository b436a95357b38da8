"""Specifications of the beyond-accuracy measures and of MMR re-ranking."""

import itertools

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from threefold.evaluation.beyond_accuracy import (
    catalog_coverage,
    context_sensitivity,
    exposure_counts,
    gini_index,
    intra_list_diversity,
    jaccard_distance,
    novelty,
    temporal_diversity,
    top_k_kendall_distance,
)
from threefold.ranking.mmr import mmr_rerank


def random_lists(rng, q, k, n_items, empty=0.0):
    """Lists of distinct items per row, with some empty (-1) slots at the end."""
    lists = np.array([rng.choice(n_items, size=k, replace=False) for _ in range(q)])
    lengths = np.where(rng.random(q) < empty, rng.integers(0, k + 1, size=q), k)
    lists[np.arange(k)[None, :] >= lengths[:, None]] = -1
    return lists


# ---------------------------------------------------------------- coverage and exposure
def test_coverage_and_exposure_of_a_small_example():
    # Coverage = |union of top-K lists| / |catalog| (methods.md section 7):
    # lists {0, 1} and {1, 2} over 5 items cover {0, 1, 2}: 3 / 5 = 0.6; item 1 is shown twice.
    lists = np.array([[0, 1], [1, 2], [2, -1]])
    assert_allclose(catalog_coverage(lists, 5), 0.6, rtol=1e-12)
    assert_array_equal(exposure_counts(lists, 5), [1, 2, 2, 0, 0])


@pytest.mark.parametrize(
    ("exposure", "expected"),
    # methods.md section 7: G = (1/(n - 1)) sum_j (2j - n - 1) p_j, p sorted ascending.
    # [1,2,3,4]: p = [.1,.2,.3,.4], coefficients [-3,-1,1,3]: (-.3 - .2 + .3 + 1.2) / 3 = 0.3333
    [([5, 5, 5, 5], 0.0), ([0, 0, 0, 10], 1.0), ([1, 2, 3, 4], 0.3333)],
)
def test_gini_of_exposure_worked_values(exposure, expected):
    assert_allclose(gini_index(exposure), expected, atol=5e-5)


def test_gini_equals_mean_absolute_difference_form():
    # Common practice: sum_j (2j - n - 1) x_(j) / (n sum x) = sum_ij |x_i - x_j| / (2 n sum x);
    # the methods.md form is that times n / (n - 1).
    rng = np.random.default_rng(0)
    x = rng.integers(0, 20, size=37).astype(float)
    slow = np.abs(x[:, None] - x[None, :]).sum() / (2 * (x.size - 1) * x.sum())
    assert_allclose(gini_index(x), slow, rtol=1e-12)


def test_gini_rejects_degenerate_exposure():
    with pytest.raises(ValueError, match="positive total"):
        gini_index([0, 0, 0])
    with pytest.raises(ValueError, match="at least 2 items"):
        gini_index([3])
    with pytest.raises(ValueError, match="non-negative"):
        gini_index([1, -1, 3])


def test_exposure_rejects_items_outside_the_catalog():
    with pytest.raises(IndexError, match="catalog has 3 items"):
        exposure_counts(np.array([[0, 3]]), 3)


# ---------------------------------------------------------------- intra-list diversity
def test_ild_by_topic_hand_example():
    # ILD = 2/(K(K-1)) sum_{a<b} (1 - sim(a, b)) (Ziegler et al., WWW 2005; methods.md section 7).
    # Topics [sport, sport, weather]: pairs (0,1) sim 1, (0,2) sim 0, (1,2) sim 0:
    # 2/(3*2) * (0 + 1 + 1) = 2/3. A list with one item has no pair: NaN.
    topics = np.array([0, 0, 1, 2])
    out = intra_list_diversity(np.array([[0, 1, 2], [0, 1, -1], [3, -1, -1]]), item_topics=topics)
    assert_allclose(out[:2], [2 / 3, 0.0], rtol=1e-12)
    assert np.isnan(out[2])


def test_ild_by_latent_cosine_matches_slow_reference():
    rng = np.random.default_rng(1)
    factors = rng.normal(size=(30, 5))
    lists = random_lists(rng, 20, 6, 30, empty=0.3)
    expected = []
    for row in lists:
        items = [i for i in row if i >= 0]
        d = [
            1 - factors[a] @ factors[b] / (np.linalg.norm(factors[a]) * np.linalg.norm(factors[b]))
            for a, b in itertools.combinations(items, 2)
        ]
        expected.append(np.mean(d) if d else np.nan)
    assert_allclose(intra_list_diversity(lists, item_factors=factors), expected, rtol=1e-10)


def test_ild_requires_exactly_one_attribute():
    with pytest.raises(ValueError, match="exactly one of item_topics and item_factors"):
        intra_list_diversity(np.zeros((1, 2), dtype=int))


# ---------------------------------------------------------------- novelty
def test_novelty_hand_example():
    # Self-information -log2((k_i + 1) / (n_users + 1)) with n_users = 3:
    # item 0 clicked by all 3 users: -log2(4/4) = 0; item 1 by none: -log2(1/4) = 2 bits;
    # item 2 by 1 user: -log2(2/4) = 1 bit. List [0, 1] -> 1.0; list [1, 2] -> 1.5.
    pop = np.array([3, 0, 1])
    assert_allclose(novelty(np.array([[0, 1], [1, 2]]), pop, 3), [1.0, 1.5], rtol=1e-12)
    with pytest.raises(ValueError, match="item_popularity must lie in"):
        novelty(np.array([[0]]), np.array([4]), 3)


# ---------------------------------------------------------------- list distances
def test_jaccard_and_temporal_diversity_hand_example():
    # [1,2,3] vs [3,4,5]: intersection {3}, union {1,2,3,4,5}: Jaccard distance 1 - 1/5 = 0.8.
    # Lathia et al. (SIGIR 2010): |L2 \ L1| / N = |{4, 5}| / 3 = 2/3 new, repetition 1/3.
    a, b = np.array([[1, 2, 3]]), np.array([[3, 4, 5]])
    assert_allclose(jaccard_distance(a, b), [0.8], rtol=1e-12)
    assert_allclose(temporal_diversity(a, b), [2 / 3], rtol=1e-12)
    assert_allclose(temporal_diversity(a, a[:, ::-1]), [0.0])


def slow_kendall(a, b, p):
    """The four cases of K^(p), Fagin, Kumar & Sivakumar (2003), written literally.

    Case definitions recalled from memory: the paper text we could reach showed only the
    abstract and the Kendall tau between permutations (its section 2), which case 1 matches.
    """
    a, b = [int(x) for x in a if x >= 0], [int(x) for x in b if x >= 0]
    total = 0.0
    for i, j in itertools.combinations(sorted(set(a) | set(b)), 2):
        in_a, in_b = (i in a, j in a), (i in b, j in b)
        if all(in_a) and all(in_b):  # case 1: opposite order costs 1
            total += float((a.index(i) < a.index(j)) != (b.index(i) < b.index(j)))
        elif all(in_a) and any(in_b) or all(in_b) and any(in_a):  # case 2
            both, other = (a, b) if all(in_a) else (b, a)
            present = i if i in other else j
            absent = j if present == i else i
            total += float(both.index(absent) < both.index(present))
        elif all(in_a) or all(in_b):  # case 4: both in one list, neither in the other
            total += p
        else:  # case 3: one only in a, the other only in b
            total += 1.0
    return total


def test_top_k_kendall_hand_example():
    # Fagin, Kumar & Sivakumar (2003), K^(p) by hand (case definitions recalled from memory,
    # see slow_kendall), k = 3, p = 1/2:
    # a = [1, 2, 3], b = [4, 5, 1]; union {1, 2, 3, 4, 5}, 10 pairs:
    #   {1,2}, {1,3}: both in a, only 1 in b, 1 ahead in a          -> case 2, 0 + 0
    #   {2,3}: both in a, neither in b                              -> case 4, p
    #   {1,4}, {1,5}: both in b, only 1 in a, 4 and 5 ahead of 1 in b -> case 2, 1 + 1
    #   {4,5}: both in b, neither in a                              -> case 4, p
    #   {2,4}, {2,5}, {3,4}, {3,5}: one only in a, one only in b    -> case 3, 4 x 1
    # K^(1/2) = 6 + 2p = 7; disjoint lists give k^2 + p k (k - 1) = 9 + 3 = 12: normalized 7/12.
    a, b = np.array([[1, 2, 3]]), np.array([[4, 5, 1]])
    assert_allclose(top_k_kendall_distance(a, b, 0.5, normalize=False), [7.0], rtol=1e-12)
    assert_allclose(top_k_kendall_distance(a, b, 0.5), [7 / 12], rtol=1e-12)
    # Case 1 only: the same set in another order is plain Kendall tau: [1,2,3] vs [3,1,2] -> 2.
    assert_allclose(top_k_kendall_distance(a, np.array([[3, 1, 2]]), normalize=False), [2.0])


def test_top_k_kendall_matches_the_literal_case_definition():
    rng = np.random.default_rng(2)
    a = random_lists(rng, 40, 5, 9, empty=0.2)
    b = random_lists(rng, 40, 5, 9, empty=0.2)
    for p in (0.0, 0.5, 1.0):
        expected = [slow_kendall(x, y, p) for x, y in zip(a, b)]
        assert_allclose(top_k_kendall_distance(a, b, p, normalize=False), expected, rtol=1e-12)
        assert_allclose(top_k_kendall_distance(b, a, p, normalize=False), expected, rtol=1e-12)
    normalized = top_k_kendall_distance(a, b)
    assert normalized.min() >= 0 and normalized.max() <= 1
    full = random_lists(rng, 10, 4, 20)
    assert_allclose(top_k_kendall_distance(full, full), 0.0)
    assert_allclose(top_k_kendall_distance(full[:, :2], full[:, 2:]), 1.0)


def test_top_k_kendall_rejects_bad_input():
    with pytest.raises(ValueError, match="'p' parameter of top_k_kendall_distance"):
        top_k_kendall_distance(np.zeros((1, 2), dtype=int), np.zeros((1, 2), dtype=int), 1.5)
    with pytest.raises(ValueError, match="same number of lists"):
        jaccard_distance(np.zeros((1, 2), dtype=int), np.zeros((2, 2), dtype=int))


def test_context_sensitivity_is_zero_for_a_context_blind_model_and_averages_level_pairs():
    # Three levels: lists L0 = [1,2,3], L1 = [1,2,3], L2 = [3,4,5].
    # Jaccard: pairs (0,1) 0, (0,2) 0.8, (1,2) 0.8 -> mean 1.6/3.
    same = np.array([[[1, 2, 3], [1, 2, 3], [1, 2, 3]]])
    blind = context_sensitivity(same)
    assert_allclose(blind.jaccard, [0.0])
    assert_allclose(blind.kendall, [0.0])
    lists = np.array([[[1, 2, 3], [1, 2, 3], [3, 4, 5]]])
    result = context_sensitivity(lists, p=0.5)
    assert_allclose(result.jaccard, [1.6 / 3], rtol=1e-12)
    expected = 2 * top_k_kendall_distance(lists[:, 0], lists[:, 2], 0.5)[0] / 3
    assert_allclose(result.kendall, [expected], rtol=1e-12)
    with pytest.raises(ValueError, match="n_levels >= 2"):
        context_sensitivity(same[:, :1])


# ---------------------------------------------------------------- MMR
def test_mmr_worked_example():
    # Carbonell & Goldstein (SIGIR 1998), values from methods.md section 7, lambda = 0.7:
    # step 1: argmax 0.7 * [0.9, 0.85, 0.5] -> 0;
    # step 2: d1: 0.7*0.85 - 0.3*0.95 = 0.310;  d2: 0.7*0.5 - 0.3*0.1 = 0.320 -> 2;  step 3: 1.
    sim = np.array([[1.0, 0.95, 0.1], [0.95, 1.0, 0.2], [0.1, 0.2, 1.0]])
    assert_array_equal(mmr_rerank(np.array([0.9, 0.85, 0.5]), sim, 3, tradeoff=0.7), [0, 2, 1])
    assert_array_equal(mmr_rerank(np.array([0.9, 0.85, 0.5]), sim, 3, tradeoff=1.0), [0, 1, 2])


def test_mmr_batch_equals_one_list_at_a_time_and_pads():
    rng = np.random.default_rng(3)
    rel = rng.random((6, 8))
    rel[0, 3:] = -np.inf  # only 3 candidates
    sims = rng.random((6, 8, 8))
    sims = (sims + sims.transpose(0, 2, 1)) / 2
    batch = mmr_rerank(rel, sims, 5, tradeoff=0.5)
    for i in range(6):
        assert_array_equal(batch[i], mmr_rerank(rel[i], sims[i], 5, tradeoff=0.5))
    assert_array_equal(batch[0, 3:], [-1, -1])
    assert_array_equal(mmr_rerank(np.array([0.5, 0.5, 0.5]), np.eye(3), 2), [0, 1])  # ties: lower index


def test_mmr_rejects_bad_input():
    with pytest.raises(ValueError, match="similarity must have shape"):
        mmr_rerank(np.zeros(3), np.zeros((2, 2)), 2)
    with pytest.raises(ValueError, match="'tradeoff' parameter of mmr_rerank"):
        mmr_rerank(np.zeros(3), np.zeros((3, 3)), 2, tradeoff=1.5)
