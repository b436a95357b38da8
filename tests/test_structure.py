"""Model structures (General Factorization Framework terms): parsing, masks, errors."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_array_equal

from threefold.models.cp.structure import Structure, Term, resolve_structure

MODES = ("user", "item", "daypart", "device")


def test_parse_fills_default_rank_and_round_trips():
    s = Structure.parse("user*item:32 +  user*item*daypart:8 + item * device", rank=4)
    assert s.terms == (
        Term(("user", "item"), 32),
        Term(("user", "item", "daypart"), 8),
        Term(("item", "device"), 4),
    )
    assert str(s) == "user*item:32 + user*item*daypart:8 + item*device:4"
    assert Structure.parse(str(s), rank=99) == s
    assert s.rank == 44


def test_active_mask_terms_and_labels():
    s = Structure.parse("user*item:2 + user*item*daypart:1 + item*device:2", rank=1)
    expected = np.array(
        [
            [1, 1, 1, 0, 0],  # user
            [1, 1, 1, 1, 1],  # item
            [0, 0, 1, 0, 0],  # daypart
            [0, 0, 0, 1, 1],  # device
        ],
        dtype=bool,
    )
    assert_array_equal(s.active_mask(MODES), expected)
    assert_array_equal(s.component_terms(), [0, 0, 1, 2, 2])
    assert s.component_labels() == (
        "user*item #0", "user*item #1", "user*item*daypart #0", "item*device #0", "item*device #1",
    )


def test_resolve_structure_defaults_to_plain_cp():
    s = resolve_structure(None, MODES, 5)
    assert s == Structure((Term(MODES, 5),))
    assert resolve_structure("user*item", MODES, 3) == Structure((Term(("user", "item"), 3),))
    assert resolve_structure(s, MODES, 99) is s


@pytest.mark.parametrize(
    "spec, match",
    [
        ("", "non-empty string"),
        ("user*item:x", "rank after ':' must be a positive integer"),
        ("user*", "invalid mode name ''"),
        ("user*item:0", r"'rank' parameter of term 'user\*item' must be an int in the range \[1, inf\)"),
        ("user*user", r"names a mode twice"),
        ("user*item + item*user:3", r"appears twice; give one term a larger rank"),
    ],
)
def test_parse_errors(spec, match):
    with pytest.raises(ValueError, match=match):
        Structure.parse(spec, rank=2)


def test_unknown_mode_and_bad_type_are_refused():
    with pytest.raises(ValueError, match=r"uses mode 'tone', but the tensor's modes are"):
        resolve_structure("user*item + item*tone", MODES, 2)
    with pytest.raises(ValueError, match="must be None, a spec string or a Structure"):
        resolve_structure(3, MODES, 2)
    with pytest.raises(ValueError, match="at least one term"):
        Structure(())


@settings(max_examples=30, deadline=None)
@given(
    terms=st.lists(
        st.tuples(st.sets(st.sampled_from(MODES), min_size=1), st.integers(1, 9)),
        min_size=1,
        max_size=4,
        unique_by=lambda t: frozenset(t[0]),
    )
)
def test_spec_round_trip_and_mask_counts(terms):
    s = Structure(tuple(Term(tuple(sorted(modes)), rank) for modes, rank in terms))
    assert Structure.parse(str(s), rank=1) == s
    mask = s.active_mask(MODES)
    assert mask.shape == (len(MODES), s.rank)
    assert_array_equal(mask.sum(axis=0), np.repeat([len(m) for m, _ in terms], [r for _, r in terms]))
