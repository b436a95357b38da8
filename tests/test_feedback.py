"""Feedback weighting and the tensor builder, against the hand-worked table of docs/feedback.md."""

import math

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from threefold import FeedbackWeighting
from threefold.data.build import build_tensor, mark_negatives, select_window
from threefold.data.context import ColumnContext
from threefold.core.feedback import CellEvidence, cell_weights

HOUR = 3600


def worked_log() -> pd.DataFrame:
    """The four-request log of docs/feedback.md (invented data)."""
    rows = []
    t = 1_700_000_000
    shown = {"r1": "abcd", "r2": "ba", "r3": "ac", "r4": "bc"}
    clicked = {"r1": "c", "r2": "b", "r3": "c", "r4": ""}
    for k, (request, items) in enumerate(shown.items()):
        for position, item in enumerate(items, start=1):
            rows.append(("u1", item, t + k * HOUR, "impression", position, request, np.nan, "mobile"))
        for item in clicked[request]:
            rows.append(("u1", item, t + k * HOUR + 5, "click", items.index(item) + 1, request, 30.0, "mobile"))
    return pd.DataFrame(rows, columns=["user_id", "item_id", "timestamp", "event", "position", "request_id", "dwell_seconds", "device"])


WORKED = FeedbackWeighting(alpha=2.0, transform="log1p", signal="clicks", w_skip=0.5)


def cells_by_item(tensor) -> dict:
    p, w = tensor.weights()
    items = tensor.vocabularies[1].labels
    return {items[i]: (float(p[j]), float(w[j])) for j, i in enumerate(tensor.coords[1])}


def test_skip_above_worked_table():
    # Hand-worked table in docs/feedback.md; rule from Joachims et al., SIGIR 2005.
    tensor, report = build_tensor(worked_log(), [ColumnContext("device")], weighting=WORKED)
    cells = cells_by_item(tensor)
    assert set(cells) == {"a", "b", "c"}
    assert_allclose(cells["a"], (0.0, 1.0), rtol=1e-6)
    assert_allclose(cells["b"], (2.386294 / 2.886294, 1 + 2 * math.log(2) + 0.5), rtol=1e-6)
    assert_allclose(cells["c"], (1.0, 1 + 2 * math.log(3)), rtol=1e-6)
    assert report.negatives == 3 and report.clicks == 3 and report.cells == 3
    assert "d" in tensor.vocabularies[1]  # shown items enter the vocabulary even without evidence


def test_all_exposures_worked_table():
    # Hand-worked table in docs/feedback.md.
    tensor, _ = build_tensor(worked_log(), [ColumnContext("device")], weighting=WORKED, negatives="all_exposures")
    cells = cells_by_item(tensor)
    assert_allclose(cells["a"], (0.0, 1.5), rtol=1e-6)
    assert_allclose(cells["b"], (0.704692, 3.386294), rtol=1e-5)
    assert_allclose(cells["c"], (0.864763, 3.697225), rtol=1e-5)
    assert_allclose(cells["d"], (0.0, 0.5), rtol=1e-6)


def test_skip_above_marks_only_unclicked_items_above_the_lowest_click():
    # Common practice in interpreting click logs (Joachims et al., SIGIR 2005):
    # clicks at positions 1 and 3 -> position 2 is a negative, 4 and below are not.
    events = pd.DataFrame({
        "user_id": "u", "item_id": [f"i{k}" for k in range(1, 7)] + ["i1", "i3"],
        "timestamp": 0, "event": ["impression"] * 6 + ["click", "click"],
        "position": [1, 2, 3, 4, 5, 6, 1, 3], "request_id": "r",
    })
    is_click, is_skip = mark_negatives(events, "skip_above")
    assert_array_equal(is_skip, [False, True, False, False, False, False, False, False])
    assert_array_equal(is_click, [False] * 6 + [True, True])


def test_skip_above_needs_positions():
    events = pd.DataFrame({"user_id": ["u"], "item_id": ["a"], "timestamp": [0], "event": ["impression"], "request_id": ["r"]})
    with pytest.raises(ValueError, match=r"needs the column\(s\) \['position'\]"):
        mark_negatives(events, "skip_above")


def test_decay_quarters_a_cell_two_half_lives_old():
    evidence = CellEvidence(
        clicks=np.array([1, 1], np.float32), dwell=np.zeros(2, np.float32), skips=np.zeros(2, np.float32),
        last_seen=np.array([0, 48 * HOUR], np.uint32), time_origin=1_000,
    )
    p, w = cell_weights(evidence, FeedbackWeighting(alpha=0.0, half_life_hours=24.0), np.float64)
    assert_allclose(w, [0.25, 1.0], rtol=1e-12)  # 2 ** (-48 / 24), docs/feedback.md
    assert_allclose(p, [1.0, 1.0])


@pytest.mark.parametrize("transform, expected", [("log1p", 1 + 3 * math.log1p(4.0)), ("linear", 13.0), ("none", 1.0)])
def test_click_transforms(transform, expected):
    # Confidence 1 + alpha * f(x), Hu, Koren & Volinsky, ICDM 2008.
    evidence = CellEvidence(np.array([4], np.float32), np.array([90], np.float32), np.zeros(1, np.float32), np.zeros(1, np.uint32), 0)
    _, w = cell_weights(evidence, FeedbackWeighting(alpha=3.0, transform=transform), np.float64)
    assert_allclose(w, [expected], rtol=1e-12)
    _, w_dwell = cell_weights(evidence, FeedbackWeighting(alpha=3.0, transform="linear", signal="dwell"), np.float64)
    assert_allclose(w_dwell, [1 + 3 * 90.0], rtol=1e-12)


def test_reweighting_reuses_evidence():
    tensor, _ = build_tensor(worked_log(), [ColumnContext("device")], weighting=WORKED)
    heavier = tensor.reweighted(FeedbackWeighting(alpha=2.0, w_skip=1.0))
    assert heavier.evidence is tensor.evidence
    assert_allclose(cells_by_item(heavier)["a"], (0.0, 2.0), rtol=1e-6)


def test_weighting_parameters_are_validated():
    with pytest.raises(ValueError, match="The 'alpha' parameter of FeedbackWeighting must be a float in the range"):
        FeedbackWeighting(alpha=-1.0)
    with pytest.raises(ValueError, match="The 'transform' parameter of FeedbackWeighting must be one of"):
        FeedbackWeighting(transform="sqrt")
    with pytest.raises(ValueError, match="'half_life_hours'"):
        FeedbackWeighting(half_life_hours=0.0)


def test_frozen_vocabulary_drops_and_counts_unseen_ids():
    train, _ = build_tensor(worked_log(), [ColumnContext("device")], weighting=WORKED)
    later = worked_log().assign(user_id="u2", device="tablet")
    later.loc[later["item_id"] == "c", "user_id"] = "u1"
    test, report = build_tensor(later, [ColumnContext("device")], vocabularies=train.vocabularies)
    assert test.shape == train.shape
    assert report.dropped["unseen user_id"] > 0
    # the unseen device level maps to the explicit unknown level, never a crash
    assert set(test.vocabularies[2].labels[i] for i in test.coords[2]) == {"unknown"}


def test_every_dropped_row_is_counted():
    log = worked_log()
    bad = pd.concat([log, log.iloc[[0]], log.iloc[[1]].assign(user_id=None), log.iloc[[2]].assign(event="hover")])
    _, report = build_tensor(bad, [ColumnContext("device")])
    assert report.dropped == {"duplicate": 1, "missing user_id": 1, "unknown event value": 1}


def test_shuffled_log_gives_the_same_tensor():
    # reliability target: loading the same log shuffled gives the same model input
    log = worked_log()
    a, _ = build_tensor(log, [ColumnContext("device")])
    b, _ = build_tensor(log.sample(frac=1.0, random_state=5), [ColumnContext("device")])
    assert_array_equal(a.coords, b.coords)
    assert_array_equal(a.weights()[1], b.weights()[1])


def test_select_window_is_half_open():
    log = worked_log()
    t0 = int(log["timestamp"].min())
    window = select_window(log, t0 + HOUR, t0 + 2 * HOUR)
    assert set(window["request_id"]) == {"r2"}
