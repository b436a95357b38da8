"""One parameter table per model, one model protocol, one id resolver (DEVELOPERS.md, "Adding a model").

The parity checks follow scikit-learn's habit of testing that an estimator and
its function agree on every parameter (common practice; scikit-learn's
``check_parameters_default_constructible`` and tensorly's
``assert_class_wrapper_correctly_passes_arguments`` test the same idea).
"""

from __future__ import annotations

import inspect
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from threefold.core.params import ParamModel
from threefold.core.resolve import ResolvedScorer, UnknownPolicy
from threefold.core.scoring import Ranker, Scorer
from threefold.core.vocabulary import Vocabulary
from threefold.data.build import build_tensor
from threefold.data.context import parse_context
from threefold.models.cp.model import fit_cp
from threefold.models.registry import MODELS, model_class
from threefold.models.tucker.hooi import fit_hooi
from threefold.models.tucker.implicit import fit_implicit_tucker
from threefold.pipeline.config import model_defaults
from threefold.ranking.recommender import Recommender

from _tracking import tiny_cp, tiny_events

FIT_FUNCTIONS = {"cp": fit_cp, "hooi": fit_hooi, "implicit_tucker": fit_implicit_tucker}


def _keyword_defaults(function) -> dict:
    return {name: p.default for name, p in inspect.signature(function).parameters.items()
            if p.kind is inspect.Parameter.KEYWORD_ONLY}


@pytest.mark.parametrize("method", sorted(MODELS))
def test_table_estimator_and_fit_function_name_the_same_parameters_and_defaults(method):
    cls = model_class(method)
    table = cls.params
    assert issubclass(cls, ParamModel) and issubclass(cls, Ranker)
    assert cls().get_params() == table.defaults()
    assert _keyword_defaults(cls) == table.defaults()  # the class signature comes from the table
    if method in FIT_FUNCTIONS:
        assert _keyword_defaults(FIT_FUNCTIONS[method]) == table.defaults(), method
    configurable = {k: list(v) if isinstance(v, tuple) else v for k, v in table.defaults(configurable_only=True).items()}
    assert model_defaults(method) == configurable


def test_set_params_round_trips_and_unknown_names_are_refused_with_the_closest():
    model = model_class("cp")(rank=4)
    assert model.set_params(reg=0.5) is model and model.get_params()["reg"] == 0.5 and model.rank == 4
    with pytest.raises(TypeError, match=r"CPModel has no parameter 'rnak'; did you mean 'rank'\?"):
        model_class("cp")(rnak=3)
    with pytest.raises(TypeError, match=r"HOOIModel has no parameter 'reg'"):
        model_class("hooi")().set_params(reg=1.0)


def test_the_fit_function_checks_by_the_table():
    tensor, _ = build_tensor(tiny_events(0), [parse_context("device")], negatives="none")
    with pytest.raises(ValueError, match=r"The 'rank' parameter of fit_cp must be an int in the range \[1, inf\)"):
        fit_cp(tensor, rank=0)
    with pytest.raises(ValueError, match=r"The 'core_solver' parameter of fit_implicit_tucker must be one of"):
        fit_implicit_tucker(tensor, rank=2, core_solver="magic")
    with pytest.raises(ValueError, match=r"The 'max_sweeps' parameter of fit_hooi must be an int"):
        fit_hooi(tensor, rank=2, max_sweeps=0)


def test_every_factor_result_folds_in_through_the_protocol():
    tensor, _ = build_tensor(tiny_events(1), [parse_context("device")], negatives="none")
    for result in (fit_cp(tensor, rank=2, max_sweeps=2, tol=0, random_state=0),
                   fit_hooi(tensor, rank=2, max_sweeps=2, tol=0, random_state=0),
                   fit_implicit_tucker(tensor, rank=2, max_sweeps=2, tol=0, random_state=0)):
        assert isinstance(result, Scorer) and result.supports_fold_in
        rows = result.fold_in(tensor, "user")
        assert rows.shape == (tensor.shape[0], result.factors[0].shape[1])
    assert not model_class("popularity")().supports_fold_in and model_class("popularity").learns_from_events


def _query_set(users, contexts: dict, item_labels):
    """The attributes a Ranker binds to (threefold.core.scoring): users, contexts, items."""
    return SimpleNamespace(users=np.asarray(users, dtype=object), contexts=pd.DataFrame(contexts),
                           items=Vocabulary(tuple(item_labels), name="item"), n_items=len(item_labels))


@pytest.mark.parametrize("structure", ["user*item:2 + item*device:1", None])
def test_evaluation_and_serving_score_the_same_cells_unknown_ids_included(structure):
    """Both paths resolve ids through threefold.core.resolve: same (user, item, context) -> same score."""
    result, specs = tiny_cp(seed=2, structure=structure) if structure else tiny_cp(seed=2, structure="user*item*daypart*device:3")
    t0 = 1_700_050_000
    daypart = specs[0].labels_for(pd.DataFrame({"timestamp": [t0]})).iloc[0]
    users = ["u01", "stranger", "u07", None]
    devices = ["mobile", "desktop", "smart-fridge", "mobile"]
    items = ["i03", "i11", "brand-new", "i00"]
    # evaluation's path: bind the query set, score blocks
    queries = _query_set([u if u is not None else "\x00threefold-fallback" for u in users],
                         {"daypart": [daypart] * 4, "device": devices}, items)
    offline = result.bind(queries)(np.arange(4))
    # serving's path: one request per (user, context) with the candidates as item rows
    requests = pd.DataFrame([{"request_id": f"r{q}", "user_id": users[q], "timestamp": t0, "device": devices[q],
                              "item_id": item} for q in range(4) for item in items])
    served = Recommender(result, specs).recommend(requests, k=len(items))
    for q in range(4):
        got = served[served["request_id"] == f"r{q}"].set_index("item_id")["score"]
        assert_allclose(got.loc[items].to_numpy(), offline[q], rtol=1e-12, atol=1e-12)
    assert np.all(offline[:, 2] == 0.0)  # an unknown item gets the zero row
    # slow reference for the unknown user: the mean of the trained user rows (the documented rule)
    trained = np.any(result.factors[0] != 0, axis=1)
    mean_user = result.with_rows(0, result.factors[0][trained].mean(axis=0, keepdims=True), labels=["<mean>"])
    vocab = result.vocabularies
    context = [[vocab[2].index(daypart), vocab[3].index("desktop")]]
    known_items = [vocab[1].index(i) for i in ("i03", "i11", "i00")]
    assert_allclose(offline[1, [0, 1, 3]], mean_user.score([result.shape[0]], context, known_items)[0], rtol=1e-12)


def test_zero_policy_is_explicit_and_named():
    result, _ = tiny_cp(seed=3)
    resolved = ResolvedScorer(result, policy=UnknownPolicy(user="zero"))
    rows, unknown = resolved.rows(0, np.array(["stranger", "u01"], dtype=object))
    assert unknown.tolist() == [True, False]
    owned = result.owned_columns(0)
    assert np.all(resolved.scorer.factors[0][rows[0], owned] == 0.0)
    with pytest.raises(ValueError, match=r"The 'item' parameter of UnknownPolicy must be one of 'zero'"):
        UnknownPolicy(item="mean")
