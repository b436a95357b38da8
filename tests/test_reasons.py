"""Reasons for every ranked item: score terms that add up to the score, checked against tensorly's reconstruction."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import tensorly as tl
from numpy.testing import assert_allclose

from threefold.data.build import build_tensor
from threefold.data.context import parse_context
from threefold.models.tucker.hooi import fit_hooi
from threefold.ranking.recommender import Recommender

from _tracking import tiny_cp, tiny_events

T0 = 1_700_050_000  # inside the tiny log's three days


def _requests():
    return pd.DataFrame({"request_id": ["a", "b", "c"], "user_id": ["u01", "u09", "stranger"],
                         "timestamp": [T0, T0 + 9 * 3600, T0 + 15 * 3600], "device": ["mobile", "desktop", "mobile"]})


def _cells(result, specs, out, requests):
    """(user, item, daypart, device) indices of every output row, encoded by hand."""
    vocab = result.vocabularies
    by_id = requests.set_index("request_id")
    dayparts = specs[0].labels_for(by_id[["timestamp"]].reset_index()).to_numpy()
    daypart_of = dict(zip(by_id.index, dayparts))
    rows = []
    for _, row in out.iterrows():
        request = by_id.loc[row["request_id"]]
        rows.append((vocab[0].index(request["user_id"]), vocab[1].index(row["item_id"]),
                     vocab[2].index(daypart_of[row["request_id"]]), vocab[3].index(request["device"])))
    return np.array(rows).T


@pytest.mark.parametrize("structure", ["user*item*daypart*device:3", "user*item:2 + item*device:1 + user*item*daypart:2"])
def test_cp_scores_equal_tensorly_reconstruction_and_reasons_sum_to_them(structure):
    result, specs = tiny_cp(seed=6, structure=structure)
    requests = _requests().iloc[:2]  # known users: every score is a cell of the model
    out = Recommender(result, specs).recommend(requests, k=4, explain="all")
    dense = tl.cp_to_tensor((result.weights.astype(np.float64), [f.astype(np.float64) for f in result.factors]))
    cells = _cells(result, specs, out, requests)
    # reference library: tensorly's dense CP reconstruction at the requested cells
    assert_allclose(out["score"], dense[tuple(cells)], rtol=1e-10, atol=1e-12)
    n_terms = len(result.structure.terms)
    terms = out[[f"reason_{j}_term" for j in range(1, n_terms + 1)]].to_numpy()
    assert_allclose(terms.sum(axis=1), out["score"], rtol=1e-6, atol=1e-9)
    # each named reason is its structure term's sum of components (slow reference from score_terms)
    for (_, row), cell in zip(out.iterrows(), cells.T):
        per_component = result.score_terms(cell[0], cell[2:], cell[1])
        expected = {}
        for label, value in zip(per_component.labels, per_component.values):
            expected[label.split(" #")[0]] = expected.get(label.split(" #")[0], 0.0) + value
        got = {row[f"reason_{j}"]: row[f"reason_{j}_term"] for j in range(1, n_terms + 1)}
        assert got.keys() == expected.keys()
        assert_allclose([got[k] for k in expected], list(expected.values()), rtol=1e-9, atol=1e-12)
        magnitudes = [abs(row[f"reason_{j}_term"]) for j in range(1, n_terms + 1)]
        assert magnitudes == sorted(magnitudes, reverse=True)
        shares = np.array([row[f"reason_{j}_share"] for j in range(1, n_terms + 1)])
        assert_allclose(np.abs(shares).sum(), 1.0, rtol=1e-9)


def test_tucker_scores_equal_tensorly_reconstruction_and_reasons_sum_to_them():
    specs = [parse_context("daypart"), parse_context("device")]
    tensor, _ = build_tensor(tiny_events(3), specs, negatives="none", dtype=np.float64)
    result = fit_hooi(tensor, rank=(3, 3, 2, 2), max_sweeps=3, tol=0, random_state=0)
    requests = _requests().iloc[:2]
    out = Recommender(result, specs).recommend(requests, k=5, explain="all")
    dense = tl.tucker_to_tensor((result.core, list(result.factors)))  # reference library
    assert_allclose(out["score"], dense[tuple(_cells(result, specs, out, requests))], rtol=1e-10, atol=1e-12)
    n_entries = 3 * 3 * 2 * 2
    terms = out[[f"reason_{j}_term" for j in range(1, n_entries + 1)]].to_numpy()
    assert_allclose(terms.sum(axis=1), out["score"], rtol=1e-6, atol=1e-9)
    # each reason is one core entry G[r] * prod_n F_n[cell_n, r_n] (Tucker 1966's model, term by term)
    cells = _cells(result, specs, out, requests)
    for (_, row), cell in zip(out.iterrows(), cells.T):
        for j in (1, 2, n_entries):
            r = [int(part.split(" ")[-1]) for part in row[f"reason_{j}"].removeprefix("core ").split(" × ")]
            expected = result.core[tuple(r)] * np.prod([result.factors[n][cell[n], r[n]] for n in range(4)])
            assert_allclose(row[f"reason_{j}_term"], expected, rtol=1e-10, atol=1e-14)
    assert out["reason_1"].str.match(r"core user \d × item \d × daypart \d × device \d").all()
    top3 = Recommender(result, specs).recommend(requests, k=5, explain="top3")
    assert_allclose(top3["reason_1_term"], out["reason_1_term"], rtol=1e-12)


def test_top3_keeps_three_reasons_and_unknown_items_have_none():
    result, specs = tiny_cp(seed=7, structure="user*item:2 + item*device:1 + user*item*daypart:1 + item:1")
    requests = pd.DataFrame({"request_id": ["x"] * 2, "user_id": "u02", "timestamp": T0, "device": "mobile",
                             "item_id": ["i04", "never-seen"]})
    out = Recommender(result, specs).recommend(requests, k=5, explain="top3")
    assert [c for c in out.columns if c.startswith("reason_")] == [
        f"reason_{j}{s}" for j in (1, 2, 3) for s in ("", "_term", "_share")]
    unknown = out[out["item_id"] == "never-seen"].iloc[0]
    assert pd.isna(unknown["reason_1"]) and unknown["reason_1_term"] == 0.0
    plain = Recommender(result, specs).recommend(requests, k=5)
    assert not any(c.startswith("reason_") for c in plain.columns)
    with pytest.raises(ValueError, match=r"The 'explain' parameter of predict must be one of 'none', 'top3', 'all'"):
        Recommender(result, specs).recommend(requests, explain="why")
