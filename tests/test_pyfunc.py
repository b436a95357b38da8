"""Serving: ranked lists per request with defined fallbacks; the MLflow pyfunc model from another process."""

import json
import re
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from threefold.data.context import Daypart
from threefold.tracking.pyfunc import Recommender, log_pyfunc
from threefold.tracking.store import open_store

from _tracking import SERVING, child_env, tiny_cp

T0 = 1_700_050_000  # a time inside the tiny log's three days


def reference_top(result, specs, user, ts, device, k, items=None):
    """Slow reference: encode one request by hand, score with the model, sort by (-score, candidate order)."""
    vocab = result.vocabularies
    daypart = Daypart().labels_for(pd.DataFrame({"timestamp": [ts]})).iloc[0]
    u = vocab[0].index(user)
    context = [vocab[2].index(daypart), vocab[3].index(device)]
    candidates = list(vocab[1].labels) if items is None else items
    scores = [float(result.score([u], [context], [vocab[1].index(i)])[0, 0]) for i in candidates]
    order = sorted(range(len(candidates)), key=lambda j: (-scores[j], j))[:k]
    return [candidates[j] for j in order], [scores[j] for j in order]


@pytest.fixture(scope="module")
def model():
    return tiny_cp(seed=4)


def test_k_rows_per_request_in_the_models_order(model):
    result, specs = model
    requests = pd.DataFrame({"request_id": ["r1", "r2", "r3"], "user_id": ["u01", "u05", "u11"],
                             "timestamp": [T0, T0 + 5 * 3600, T0 + 13 * 3600], "device": ["mobile", "desktop", "mobile"]})
    recommender = Recommender(result, specs)
    out = recommender.recommend(requests, k=3)
    assert list(out.columns) == ["request_id", "user_id", "rank", "item_id", "score", "daypart", "device",
                                 "user_status", "item_status", "status"] == recommender.output_columns()
    assert set(out["user_status"]) == set(out["item_status"]) == {"known"}
    assert out.groupby("request_id").size().to_dict() == {"r1": 3, "r2": 3, "r3": 3}
    for _, request in requests.iterrows():
        got = out[out["request_id"] == request["request_id"]]
        items, scores = reference_top(result, specs, request["user_id"], request["timestamp"], request["device"], 3)
        assert list(got["item_id"]) == items and list(got["rank"]) == [1, 2, 3]
        assert_allclose(got["score"], scores, rtol=1e-12)
        assert set(got["status"]) == {"ok"}


def test_candidate_rows_are_ranked_as_given_with_unknown_items_flagged(model):
    result, specs = model
    requests = pd.DataFrame({"request_id": ["c"] * 4, "user_id": "u03", "timestamp": T0, "device": "desktop",
                             "item_id": ["i07", "i02", "not-in-training", "i07"]})
    out = Recommender(result, specs).recommend(requests, k=10)
    items, scores = reference_top(result, specs, "u03", T0, "desktop", 10, items=["i07", "i02"])
    known = out[out["status"] == "ok"]
    assert list(known["item_id"]) == [i for i in out["item_id"] if i in items]
    assert_allclose(known.set_index("item_id").loc[items, "score"], scores, rtol=1e-12)
    unknown = out[out["item_id"] == "not-in-training"]
    assert len(out) == 3 and unknown["status"].item() == "unknown_item" and unknown["score"].item() == 0.0


def test_unknown_users_and_context_levels_fall_back_to_mean_rows(model):
    result, specs = model
    recommender = Recommender(result, specs)
    requests = pd.DataFrame({"request_id": ["a", "b", "c"], "user_id": ["stranger", None, "u02"],
                             "timestamp": [T0, T0, T0], "device": ["mobile", "mobile", "smart-fridge"]})
    out = recommender.recommend(requests, k=2)
    status = out.groupby("request_id")["status"].first().to_dict()
    assert status == {"a": "unknown_user", "b": "unknown_user", "c": "unknown_context"}
    # slow reference: the average user (mean of the user rows), the device mode marginalized (mean of its rows)
    factors = [np.asarray(f, dtype=np.float64) for f in result.factors]
    vocab = result.vocabularies
    daypart = vocab[2].index(Daypart().labels_for(pd.DataFrame({"timestamp": [T0]})).iloc[0])
    average = result.weights * factors[0].mean(axis=0) * factors[2][daypart] * factors[3][vocab[3].index("mobile")]
    expected = factors[1] @ average
    top = np.argsort(-expected, kind="stable")[:2]
    got = out[out["request_id"] == "a"]
    assert list(got["item_id"]) == [vocab[1].labels[i] for i in top]
    assert_allclose(got["score"], expected[top], rtol=1e-12)
    marginal = result.weights * factors[0][vocab[0].index("u02")] * factors[2][daypart] * factors[3].mean(axis=0)
    assert_allclose(out[out["request_id"] == "c"]["score"], np.sort(factors[1] @ marginal)[::-1][:2], rtol=1e-12)
    assert out[out["request_id"] == "b"]["user_id"].isna().all()


def test_context_levels_are_taken_from_columns_or_derived_or_flagged(model):
    result, specs = model
    recommender = Recommender(result, specs)
    base = pd.DataFrame({"request_id": ["x"], "user_id": ["u04"], "timestamp": [T0], "device": ["mobile"]})
    derived = recommender.recommend(base, k=5)
    given = recommender.recommend(base.assign(daypart=Daypart().labels_for(base).iloc[0]).drop(columns="timestamp"), k=5)
    assert_array_equal(derived["item_id"], given["item_id"])
    assert set(given["status"]) == {"ok"}
    no_time = recommender.recommend(base.drop(columns="timestamp"), k=5)
    assert set(no_time["status"]) == {"unknown_context"}  # the daypart cannot be derived


def test_a_request_with_nothing_live_gets_one_flagged_row(model):
    result, specs = model
    n_items = result.shape[1]
    published = np.full(n_items, T0 + 10 * 86400, dtype=np.int64)  # nothing published before ten days later
    recommender = Recommender(result, specs, published=published, expires=np.full(n_items, np.iinfo(np.int64).max))
    requests = pd.DataFrame({"request_id": ["early", "late"], "user_id": ["u01", "u01"],
                             "timestamp": [T0, T0 + 11 * 86400], "device": ["mobile", "mobile"]})
    out = recommender.recommend(requests, k=4)
    early = out[out["request_id"] == "early"]
    assert len(early) == 1 and early["rank"].item() == 0 and early["item_id"].isna().all()
    assert early["status"].item() == "no_candidates" and np.isnan(early["score"].item())
    assert (out["request_id"] == "late").sum() == 4
    with pytest.raises(ValueError, match=r"The 'k' parameter of predict must be an int in the range \[1, inf\)"):
        recommender.recommend(requests, k=0)


LOAD_AND_PREDICT = """
import json, sys
import mlflow
import pandas as pd
model = mlflow.pyfunc.load_model(sys.argv[1])
requests = pd.read_json(sys.stdin, orient="records", convert_dates=False, dtype={"request_id": str, "user_id": str, "item_id": str})
out = model.predict(requests, params={"k": 3})
print(json.dumps({"rows": out.to_dict(orient="records"), "params": [p.name for p in model.metadata.get_params_schema().params]}))
"""


def test_the_logged_pyfunc_model_ranks_requests_from_another_process(model, tmp_path):
    result, specs = model
    store = open_store(tmp_path / "store")
    with store.run(store.experiment_id("serving"), run_name="serving") as run_id:
        uri = log_pyfunc(store, result, SERVING)
    assert uri.startswith("models:/m-")
    requests = pd.DataFrame({"request_id": ["p", "q", "q", "q", "q"], "user_id": ["u01", "u02", "u02", "u02", "u02"],
                             "timestamp": [T0] * 5, "device": ["mobile"] * 5,
                             "item_id": [None, "i01", "i02", "i03", "i04"]})
    child = subprocess.run([sys.executable, "-c", LOAD_AND_PREDICT, uri], input=requests.to_json(orient="records"),
                           env=child_env(MLFLOW_TRACKING_URI=store.location.tracking_uri), capture_output=True,
                           text=True, timeout=300)
    assert child.returncode == 0, child.stderr[-3000:]
    answer = json.loads(child.stdout.strip().splitlines()[-1])
    served = pd.DataFrame(answer["rows"])
    assert answer["params"] == ["k", "explain"]  # reasons behind params={"explain": ...}
    assert served.groupby("request_id").size().to_dict() == {"p": 3, "q": 3}
    local = Recommender(result, specs).recommend(requests, k=3)
    assert list(served.columns) == list(local.columns)
    assert_array_equal(served["item_id"], local["item_id"])
    assert_allclose(served["score"], local["score"], rtol=1e-12)
    model_dir = tmp_path / "store" / "artifacts" / "models" / uri.removeprefix("models:/") / "artifacts"
    files = [p for p in model_dir.rglob("*") if p.is_file()]
    assert (model_dir / "_pyfunc_entry.py").is_file() and any(p.name == "arrays.npz" for p in files)
    for path in files:  # no pickle anywhere in the logged model
        assert path.suffix not in (".pkl", ".pickle", ".joblib"), path
        assert not re.match(rb"\A\x80[\x02-\x05]", path.read_bytes()), path
    assert store.client.get_run(run_id).info.status == "FINISHED"


def test_an_edited_entry_file_in_the_run_store_is_refused_before_serving(model, tmp_path):
    from threefold.core.bundle import is_bundle
    from threefold.tracking.pyfunc import model_folder

    result, _ = model
    store = open_store(tmp_path / "store")
    with store.run(store.experiment_id("serving"), run_name="serving"):
        uri = log_pyfunc(store, result, SERVING)
    assert is_bundle(model_folder(uri, store=store, download_to=tmp_path / "ok"))  # the untouched model is served
    entry = tmp_path / "store" / "artifacts" / "models" / uri.removeprefix("models:/") / "artifacts" / "_pyfunc_entry.py"
    entry.write_text(entry.read_text() + "\nimport os  # an edit MLflow would run on load\n")
    with pytest.raises(ValueError, match=r"_pyfunc_entry\.py differs from the entry code of this threefold"):
        model_folder(uri, store=store, download_to=tmp_path / "edited")


def test_scoring_a_downloaded_model_folder_checks_its_entry_file_too(model, tmp_path):
    from threefold.pipeline.score import score_requests

    result, _ = model
    store = open_store(tmp_path / "store")
    with store.run(store.experiment_id("serving"), run_name="serving"):
        uri = log_pyfunc(store, result, SERVING)
    logged = tmp_path / "store" / "artifacts" / "models" / uri.removeprefix("models:/") / "artifacts"
    requests = pd.DataFrame({"request_id": ["a"], "user_id": ["u01"]})
    assert len(score_requests(logged, requests, out=tmp_path / "ok", show_progress=False)) > 0
    (logged / "_pyfunc_entry.py").write_text("raise SystemExit('edited')\n")
    with pytest.raises(ValueError, match=r"_pyfunc_entry\.py differs from the entry code of this threefold"):
        score_requests(logged, requests, out=tmp_path / "edited", show_progress=False)
