"""Properties of the main job over generated inputs (hypothesis): the order of the log and the names of
ids never change a model; finite input gives finite output; degenerate shapes give a defined result.

The logs are generated here (invented ids, seeded by hypothesis); the invariances are the definitions
of the operations (a tensor is a function of the set of events; HOOI's HOSVD start, De Lathauwer,
De Moor & Vandewalle, SIAM J. Matrix Anal. Appl. 21(4), 2000, is equivariant under a permutation of a
mode's indices, up to the signs of singular vectors, which cancel in the reconstruction).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from threefold.data.build import build_tensor
from threefold.data.context import ColumnContext
from threefold.models.cp.model import fit_cp
from threefold.models.tucker.hooi import fit_hooi

SETTINGS = settings(max_examples=15, deadline=None)
pytestmark = pytest.mark.filterwarnings("ignore::threefold.core.exceptions.ConvergenceWarning")  # few sweeps on purpose


def _log(seed: int, n: int = 120) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "user_id": rng.choice([f"u{i}" for i in range(9)], n),
        "item_id": rng.choice([f"i{i}" for i in range(7)], n),
        "timestamp": 1_774_000_000 + rng.integers(0, 86_400, n),
        "event": rng.choice(["impression", "click"], n, p=[0.7, 0.3]),
        "device": rng.choice(["phone", "desk"], n),
    })


@SETTINGS
@given(seed=st.integers(0, 10_000), order=st.randoms(use_true_random=False))
def test_shuffling_the_log_gives_the_same_tensor_and_model(seed, order):
    events = _log(seed)
    shuffled = events.iloc[order.sample(range(len(events)), len(events))].reset_index(drop=True)
    first, _ = build_tensor(events, [ColumnContext("device")], negatives="all_exposures")
    second, _ = build_tensor(shuffled, [ColumnContext("device")], negatives="all_exposures")
    assert first.vocabularies == second.vocabularies
    assert_array_equal(first.coords, second.coords)
    a = fit_cp(first, rank=3, max_sweeps=3, random_state=0, n_threads=1, dtype=np.float64)
    b = fit_cp(second, rank=3, max_sweeps=3, random_state=0, n_threads=1, dtype=np.float64)
    for fa, fb in zip(a.factors, b.factors):
        assert_allclose(fa, fb, rtol=1e-10, atol=1e-12)


@SETTINGS
@given(seed=st.integers(0, 10_000), names=st.permutations([f"reader-{c}" for c in "abcdefghi"]))
def test_renaming_users_moves_their_hooi_scores_with_them(seed, names):
    events = _log(seed)
    rename = dict(zip([f"u{i}" for i in range(9)], names))
    renamed = events.assign(user_id=events["user_id"].map(rename))
    first, _ = build_tensor(events, [ColumnContext("device")], negatives="all_exposures")
    second, _ = build_tensor(renamed, [ColumnContext("device")], negatives="all_exposures")
    a = fit_hooi(first, rank=(2, 2, 2), max_sweeps=5, dtype=np.float64, n_threads=1).to_dense()
    b = fit_hooi(second, rank=(2, 2, 2), max_sweeps=5, dtype=np.float64, n_threads=1).to_dense()
    for row, label in enumerate(first.vocabularies[0].labels):
        if label == "unknown":
            continue
        moved = second.vocabularies[0].labels.index(rename[label])
        assert_allclose(b[moved], a[row], rtol=1e-7, atol=1e-9)


@SETTINGS
@given(seed=st.integers(0, 10_000), rank=st.integers(1, 12), reg=st.floats(1e-6, 10.0))
def test_finite_input_gives_finite_factors_at_any_rank(seed, rank, reg):
    # rank up to 12 on a tensor of at most 10 x 8 x 3 cells: above the data's rank is defined, not an error
    tensor, _ = build_tensor(_log(seed, n=40), [ColumnContext("device")], negatives="all_exposures")
    result = fit_cp(tensor, rank=rank, reg=reg, max_sweeps=3, random_state=seed)
    for factor in result.factors:
        assert np.isfinite(factor).all()
    assert np.isfinite(result.loss).all()


def test_a_context_level_without_events_and_a_user_with_only_skips_are_defined():
    events = _log(5)
    events.loc[events["user_id"] == "u3", "event"] = "impression"  # u3 never clicks: an all-skip slice
    tensor, _ = build_tensor(events, [ColumnContext("device")], negatives="all_exposures")
    assert "unknown" in tensor.vocabularies[2].labels  # the fallback level has no events
    result = fit_cp(tensor, rank=3, max_sweeps=4, random_state=1)
    for factor in result.factors:
        assert np.isfinite(factor).all()
    user = tensor.vocabularies[0].labels.index("u3")
    assert np.isfinite(result.factors[0][user]).all()


def test_a_rank_that_is_not_a_positive_integer_is_a_clear_error():
    tensor, _ = build_tensor(_log(1), [ColumnContext("device")], negatives="all_exposures")
    with pytest.raises(ValueError, match=r"'rank' parameter"):
        fit_cp(tensor, rank=0)
