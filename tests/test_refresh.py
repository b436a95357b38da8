"""Refresh: the row posterior against brute force, the ALS row update, and what refresh may and may not change.

Sources: the implicit ALS row update and its normal equations (Hu, Koren &
Volinsky, "Collaborative filtering for implicit feedback datasets", ICDM 2008,
eq. 4); ridge least squares with a prior mean is the Gaussian posterior mean
with covariance ``M⁻¹`` (Bishop, *Pattern Recognition and Machine Learning*,
2006, eqs. 3.53–3.54). The simulated site is invented data (planted truth).
"""

import warnings
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from threefold.core.tensor import SparseTensor
from threefold.core.vocabulary import Vocabulary
from threefold.data.build import build_tensor
from threefold.data.context import ColumnContext, Daypart
from threefold.demo.simulate import ScenarioParameters, simulate_site
from threefold.models.cp.model import fit_cp
from threefold.models.refresh import FOLDED, FROM_METADATA, TRAINED, refresh_result
from threefold.models.tucker.implicit import fit_implicit_tucker

DAY = 86_400
MODES = ("user", "item", "daypart")


def _random_tensor(seed, shape=(8, 7, 4), density=0.35, w0=0.3):
    rng = np.random.default_rng(seed)
    coords = np.array(np.nonzero(rng.random(shape) < density))
    nnz = coords.shape[1]
    return SparseTensor.from_arrays(coords, rng.random(nnz), shape, confidence=rng.uniform(0.05, 4.0, nnz), w0=w0,
                                    mode_names=MODES, dtype=np.float64)


def _rows_of(tensor, mode, rows):
    keep = np.isin(tensor.coords[mode], rows)
    part = tensor.take(keep)
    coords = part.coords.copy()
    coords[mode] = np.searchsorted(rows, coords[mode])
    shape = tuple(len(rows) if m == mode else s for m, s in enumerate(tensor.shape))
    return SparseTensor.from_arrays(coords, part.preference, shape, confidence=part.confidence, w0=tensor.w0,
                                    mode_names=tensor.mode_names, dtype=np.float64)


def _dense_item_system(result, tensor, item):
    """Slow reference: the normal equations of one item row of a plain CP, summed over every cell of its slice.

    ``M = Σ_cells w v vᵀ + reg·I`` and ``b = Σ_cells w p v`` with ``v`` the Hadamard product
    of the other modes' (unnormalized) rows and ``w = w0`` on cells not stored (Hu et al. 2008, eq. 4).
    """
    factors = result.unnormalized_factors()
    dense_p = np.zeros(tensor.shape)
    dense_w = np.full(tensor.shape, tensor.w0)
    p, w = tensor.weights()
    dense_p[tuple(tensor.coords)] = p
    dense_w[tuple(tensor.coords)] = w
    r = result.rank
    m = result.reg * np.eye(r)
    b = np.zeros(r)
    for u in range(tensor.shape[0]):
        for c in range(tensor.shape[2]):
            v = factors[0][u] * factors[2][c]
            m += dense_w[u, item, c] * np.outer(v, v)
            b += dense_w[u, item, c] * dense_p[u, item, c] * v
    return m, b


def test_the_row_posterior_equals_the_brute_force_normal_equations():
    tensor = _random_tensor(3)
    result = fit_cp(tensor, rank=3, reg=0.2, max_sweeps=6, tol=0, random_state=0, dtype="float64")
    items = np.array([1, 4])
    sub = _rows_of(tensor, 1, items)
    prior = np.array([[0.3, -0.2, 0.5], [0.0, 1.0, -1.0]])
    posterior = result.row_posterior(sub, "item", prior=prior)
    norms = result.column_norms[1]
    for j, item in enumerate(items):
        m, b = _dense_item_system(result, tensor, item)
        x = np.linalg.solve(m, b + result.reg * prior[j] * norms)  # prior given in normalized coordinates
        assert_allclose(posterior.rows[j], x / norms, rtol=1e-10, atol=1e-12)
        assert_allclose(posterior.covariance[j], np.linalg.inv(m) / np.outer(norms, norms), rtol=1e-9, atol=1e-12)
    assert_allclose(result.row_posterior(sub, "item").rows, result.fold_in(sub, "item"), rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("structure", [None, "user*item:2 + user*item*daypart:2 + item*daypart:1"])
def test_the_row_posterior_without_prior_is_the_fold_in(structure):
    tensor = _random_tensor(4)
    result = fit_cp(tensor, rank=3, structure=structure, reg=0.2, max_sweeps=6, tol=0, random_state=0, dtype="float64")
    sub = _rows_of(tensor, 0, np.array([0, 2, 5]))
    assert_allclose(result.row_posterior(sub, "user", chunk_rows=2).rows, result.fold_in(sub, "user"),
                    rtol=1e-10, atol=1e-12)
    rows_only = result.row_posterior(sub, "user", prior=np.ones((3, result.rank)), covariance=False)  # solve, no inverse
    assert rows_only.covariance is None
    assert_allclose(rows_only.rows, result.row_posterior(sub, "user", prior=np.ones((3, result.rank))).rows,
                    rtol=1e-10, atol=1e-12)


def test_the_tucker_row_posterior_is_its_fold_in_and_inverts_its_systems():
    tensor = _random_tensor(5)
    result = fit_implicit_tucker(tensor, rank=(3, 2, 2), reg=0.3, max_sweeps=4, tol=0, random_state=0)
    sub = _rows_of(tensor, 1, np.array([0, 3, 6]))
    posterior = result.row_posterior(sub, "item")
    assert_allclose(posterior.rows, result.fold_in(sub, "item"), rtol=1e-8, atol=1e-10)
    # Brute force: v = G ×_{m≠item} F_m[i_m] for every cell of the slice, stored or not.
    core, factors = np.asarray(result.core, np.float64), [np.asarray(f, np.float64) for f in result.factors]
    p, w = sub.weights()
    dense_w = np.full(sub.shape, sub.w0)
    dense_w[tuple(sub.coords)] = w
    for j in range(3):
        m = result.reg * np.eye(2)
        for u in range(sub.shape[0]):
            for c in range(sub.shape[2]):
                v = np.einsum("abc,a,c->b", core, factors[0][u], factors[2][c])
                m += dense_w[u, j, c] * np.outer(v, v)
        assert_allclose(posterior.covariance[j], np.linalg.inv(m), rtol=1e-8, atol=1e-12)


# ---------------------------------------------------------------------- refresh on a simulated log
@pytest.fixture(scope="module")
def site():
    """Invented data (planted truth): a small simulated site, its first 4 days as training, then 2 more days."""
    simulated = simulate_site(ScenarioParameters.scaled(20_000, days=6), random_state=3)
    events = simulated.events.sort_values("timestamp", kind="stable").reset_index(drop=True)
    p = simulated.params
    contexts = [Daypart(timezone=p.timezone, starts=p.daypart_starts, labels=p.daypart_labels), ColumnContext("device")]
    cutoff = int(events["timestamp"].min()) + 4 * DAY
    return {"events": events, "contexts": contexts, "cutoff": cutoff, "items": simulated.items}


def _fit(events, contexts, *, dtype="float64", sweeps=60, tol=1e-12):
    tensor, _ = build_tensor(events, contexts, dtype=np.float64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit_cp(tensor, rank=4, reg=0.1, max_sweeps=sweeps, tol=tol, random_state=0, dtype=dtype), tensor


def _without_user(result, label):
    """The model with one user's row and label removed."""
    labels = list(result.vocabularies[0].labels)
    keep = np.array([x != label for x in labels])
    factors = list(result.factors)
    factors[0] = factors[0][keep]
    vocabularies = list(result.vocabularies)
    vocabularies[0] = Vocabulary(tuple(x for x in labels if x != label), name=vocabularies[0].name)
    return replace(result, factors=tuple(factors), vocabularies=tuple(vocabularies))


def _whole_requests(events, mask):
    return events[events["request_id"].isin(events.loc[mask, "request_id"])]


def test_refresh_of_a_trained_user_from_its_own_events_reproduces_its_row(site):
    # The ALS row update (Hu, Koren & Volinsky 2008): once the user mode has converged with the
    # items fixed (a last sweep over users only), every user row solves its row system, so
    # folding the user in again from exactly its training events must give back the trained row.
    train = site["events"][site["events"]["timestamp"] < site["cutoff"]]
    fitted, tensor = _fit(train, site["contexts"], sweeps=20, tol=0)
    result = fit_cp(tensor, rank=4, reg=0.1, init=fitted, fixed_modes=("item", "daypart", "device"), max_sweeps=1,
                    tol=0, dtype="float64")
    for user in train["user_id"].value_counts().index[[0, 3, 40]]:
        refreshed, state, counts = refresh_result(_without_user(result, user), train[train["user_id"] == user],
                                                  site["contexts"], {"dtype": np.float64})
        assert counts.new == {"item": 0, "user": 1} and refreshed.vocabularies[0].labels[-1] == user
        trained = result.factors[0][result.vocabularies[0].index(user)] * result.column_norms[0]
        folded = refreshed.factors[0][-1] * refreshed.column_norms[0]
        assert_allclose(folded, trained, rtol=0, atol=1e-6)
        assert state.origins[0][-1] == FOLDED


def test_refresh_appends_labels_and_never_changes_a_row_without_events(site):
    events, contexts, cutoff = site["events"], site["contexts"], site["cutoff"]
    result, _ = _fit(events[events["timestamp"] < cutoff], contexts, dtype="float32", sweeps=5, tol=0)
    window = events[(events["timestamp"] >= cutoff) & (events["timestamp"] < cutoff + DAY)]
    refreshed, state, counts = refresh_result(result, window, contexts, {})
    for mode in (0, 1):
        old = result.vocabularies[mode].labels
        assert refreshed.vocabularies[mode].labels[: len(old)] == old  # appended, never relabelled
        assert_array_equal(refreshed.factors[mode][: len(old)], result.factors[mode])  # bitwise
        assert (state.origins[mode][len(old):] == FOLDED).all() and (state.origins[mode][: len(old)] == TRAINED).all()
    assert counts.new["item"] > 0 and counts.new["user"] > 0
    for mode in range(2, 4):
        assert_array_equal(refreshed.factors[mode], result.factors[mode])


def test_refreshes_compose(site):
    events, contexts, cutoff = site["events"], site["contexts"], site["cutoff"]
    result, _ = _fit(events[events["timestamp"] < cutoff], contexts, sweeps=5, tol=0)
    first = events[(events["timestamp"] >= cutoff) & (events["timestamp"] < cutoff + 6 * 3600)]
    longer = events[(events["timestamp"] >= cutoff) & (events["timestamp"] < cutoff + DAY)]
    once, once_state, _ = refresh_result(result, longer, contexts, {"dtype": np.float64}, update_known=True)
    step, step_state, _ = refresh_result(result, first, contexts, {"dtype": np.float64}, update_known=True)
    twice, twice_state, counts = refresh_result(step, longer, contexts, {"dtype": np.float64}, state=step_state,
                                                update_known=True)
    assert counts.resolved["item"] > 0
    for mode in (0, 1):  # label by label: the order of appended labels follows the refreshes
        order = [twice.vocabularies[mode].index(label) for label in once.vocabularies[mode].labels]
        assert sorted(order) == list(range(len(order)))
        assert_allclose(twice.factors[mode][order], once.factors[mode], rtol=1e-9, atol=1e-12)
        assert_array_equal(twice_state.origins[mode][order], once_state.origins[mode])


def test_update_known_moves_trained_rows_around_their_trained_value(site):
    events, contexts, cutoff = site["events"], site["contexts"], site["cutoff"]
    result, _ = _fit(events[events["timestamp"] < cutoff], contexts, sweeps=5, tol=0)
    window = events[(events["timestamp"] >= cutoff) & (events["timestamp"] < cutoff + DAY)]
    refreshed, state, counts = refresh_result(result, window, contexts, {"dtype": np.float64}, update_known=True)
    index, kept = state.trained_rows[0]
    assert index.size == counts.resolved["user"] > 0
    assert_array_equal(kept, result.factors[0][index])
    moved = np.abs(refreshed.factors[0][index] - kept).max(axis=1)
    zero_before = np.abs(kept).max(axis=1) == 0  # no clicks in training and only skips since: the zero row stays
    assert (moved[~zero_before] > 0).all() and (~zero_before).sum() > 0.9 * index.size
    untouched = np.setdiff1d(np.arange(result.shape[0]), index)
    assert_array_equal(refreshed.factors[0][untouched], result.factors[0][untouched])


def test_items_without_events_get_their_metadata_rows_then_folded_rows(site):
    events, contexts, cutoff = site["events"], site["contexts"], site["cutoff"]
    result, _ = _fit(events[events["timestamp"] < cutoff], contexts, sweeps=5, tol=0)
    window = events[(events["timestamp"] >= cutoff) & (events["timestamp"] < cutoff + 3600)]
    later = events[(events["timestamp"] >= cutoff) & (events["timestamp"] < cutoff + DAY)]
    unseen = sorted(set(later["item_id"]) - set(window["item_id"]) - set(result.vocabularies[1].labels))[:5]
    assert unseen
    metadata = {label: np.full(4, 0.25 + j) for j, label in enumerate(unseen)}
    first, state, counts = refresh_result(result, window, contexts, {"dtype": np.float64}, metadata_rows=metadata)
    assert counts.from_metadata == len(unseen)
    labels = list(first.vocabularies[1].labels)
    for label, row in metadata.items():
        j = labels.index(label)
        assert state.origins[1][j] == FROM_METADATA
        assert_array_equal(first.factors[1][j], row)
        assert j in set(state.covariance_rows.tolist())
    second, state2, _ = refresh_result(first, later, contexts, {"dtype": np.float64}, state=state, metadata_rows=metadata)
    assert all(state2.origins[1][labels.index(label)] == FOLDED for label in unseen)
    assert list(second.vocabularies[1].labels[: len(labels)]) == labels
    with_prior, _, _ = refresh_result(first, later, contexts, {"dtype": np.float64}, state=state, metadata_rows=metadata,
                                      metadata_prior=True)
    j = labels.index(unseen[0])
    assert not np.allclose(with_prior.factors[1][j], second.factors[1][j])


# ---------------------------------------------------------------------- the command and the store
@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """The small tracking config on the committed sample log (invented data), trained into a fresh store."""
    from _tracking import write_config

    from threefold.pipeline.config import load_config
    from threefold.pipeline.experiment import train
    from threefold.tracking.store import open_store

    folder = tmp_path_factory.mktemp("refresh")
    store = open_store(str(folder / "runs"))
    config = load_config(write_config(folder))
    report = train(config, store, echo=lambda line: None)
    run = next(r for r in report.runs if r.name == "cp")
    return {"folder": folder, "store": store, "run": run, "config": config}


def test_refresh_by_run_id_logs_a_child_run_and_scores_metadata_items(trained):
    from _tracking import SAMPLE

    from threefold.data.events import load_events, load_items
    from threefold.models.model_io import load_model
    from threefold.pipeline.refresh import refresh_model
    from threefold.pipeline.score import score_requests

    store, run, folder = trained["store"], trained["run"], trained["folder"]
    events = load_events(SAMPLE / "events.parquet", timezone="Europe/Berlin")
    catalog = load_items(SAMPLE / "items.parquet", timezone="Europe/Berlin")
    cutoff = int(pd.Timestamp("2026-04-04T12:00:00+00:00").timestamp())  # end of the 12 h test window
    window = events[events["timestamp"] < cutoff]
    report = refresh_model(run.run_id[:8], window, folder / "hourly", items=catalog, store=store)
    assert report.ignored_events == int((window["timestamp"] < cutoff - 12 * 3600).sum()) > 0
    assert report.counts["new"]["item"] > 0 and report.counts["from_metadata"] > 0
    child = store.client.get_run(report.run_id)
    assert child.data.tags["mlflow.parentRunId"] == run.run_id and child.data.tags["threefold.kind"] == "refresh"
    assert child.data.metrics["new_items"] == report.counts["new"]["item"]
    result, meta, extra = load_model(folder / "hourly")
    assert meta["extra"]["refreshes"][0]["counts"] == report.counts and "metadata_map" in meta["extra"]
    assert extra["published_at"].shape == (result.shape[1],)
    cold = [label for label, origin in zip(result.vocabularies[1].labels, extra["item_origin"]) if origin == 2]
    requests = pd.DataFrame({"request_id": ["q1"], "user_id": ["u000001"], "timestamp": [cutoff]})
    candidates = pd.DataFrame({"request_id": ["q1"] * 3, "item_id": [cold[0], cold[1], result.vocabularies[1].labels[0]]})
    lists = score_requests(report.model_uri, requests, out=folder / "lists", candidates=candidates, k=3, store=store)
    status = dict(zip(lists["item_id"], lists["item_status"]))
    assert status[cold[0]] == "from_metadata" and status[result.vocabularies[1].labels[0]] == "known"
    # A second refresh with a longer window starts from the refreshed model and keeps its map.
    again = refresh_model(folder / "hourly", events[events["timestamp"] < cutoff + 3600], folder / "hourly",
                          items=catalog)
    assert again.run_id is None and len(load_model(folder / "hourly")[1]["extra"]["refreshes"]) == 2


def test_the_rolling_protocol_ranks_with_the_model_refresh_writes(trained):
    # One code path: the model the evaluation ranks step s with is the refresh of the trained
    # model with the events before step s (the rows of every label agree).
    from threefold.evaluation.queries import build_queries
    from threefold.evaluation.rolling import rolling_schedule
    from threefold.models.model_io import load_model
    from threefold.pipeline.refresh import refresh_model
    from threefold.pipeline.stages import load_dataset, prepare_stage
    from threefold.tracking.pyfunc import model_folder

    config, store, folder = trained["config"], trained["store"], trained["folder"]
    dataset = load_dataset(config)
    data = prepare_stage(config, dataset, "test")
    base, _, _ = load_model(model_folder(trained["run"].run_id, store=store))
    queries = build_queries(data.stage.evaluate, data.contexts, candidates="shown", catalog=dataset.items,
                            item_vocabulary=base.vocabularies[1], history=data.stage.train)
    schedule, _ = rolling_schedule(data.stage, queries, {"cp": base}, data.contexts, step="1h",
                                   build_options=data.build_options)
    rows, rankers = schedule[3]
    step_start = data.stage.start + (queries.times[rows[0]] - data.stage.start) // 3600 * 3600
    before = data.stage.evaluate[data.stage.evaluate["timestamp"] < step_start]
    refreshed = load_model(refresh_model(trained["run"].run_id, before, folder / "step3", store=store).out)[0]
    rolled = rankers["cp"]
    for mode in (0, 1):
        labels = rolled.vocabularies[mode].labels
        index = [refreshed.vocabularies[mode].index(label) for label in labels]
        assert_allclose(refreshed.factors[mode][index], rolled.factors[mode], rtol=1e-5, atol=1e-6)


def test_exploration_gives_new_items_at_most_the_capped_slots(trained):
    from _tracking import SAMPLE

    from threefold.data.events import load_events, load_items
    from threefold.pipeline.score import score_requests
    from threefold.ranking.recommender import Recommender

    folder = trained["folder"]
    events = load_events(SAMPLE / "events.parquet", timezone="Europe/Berlin")
    catalog = load_items(SAMPLE / "items.parquet", timezone="Europe/Berlin")
    cutoff = int(pd.Timestamp("2026-04-04T06:00:00+00:00").timestamp())
    from threefold.pipeline.refresh import refresh_model

    refresh_model(trained["run"].run_id, events[events["timestamp"] < cutoff], folder / "explore-model",
                  items=catalog, store=trained["store"])
    recommender = Recommender.from_folder(folder / "explore-model")
    explorable = set(np.asarray(recommender.item_labels)[recommender.explorable])
    requests = events[events["timestamp"] >= cutoff].drop_duplicates("request_id").head(200)[
        ["request_id", "user_id", "timestamp", "device"]]
    plain = recommender.recommend(requests, k=5)
    assert "explored" not in plain.columns
    zero = recommender.recommend(requests, k=5, explore=0.0, explore_slots=2)
    assert not zero["explored"].any()  # a zero bonus: the plain lists
    assert_array_equal(zero["item_id"].to_numpy(), plain["item_id"].to_numpy())
    bold = recommender.recommend(requests, k=5, explore=1e6, explore_slots=2)
    per_list = bold.groupby("request_id")["explored"].sum()
    assert per_list.max() == 2 and (per_list == 2).mean() > 0.9  # the cap, filled by a huge bonus
    assert set(bold.loc[bold["explored"], "item_id"]) <= explorable
    assert bold.groupby("request_id").size().eq(5).all()
    thompson = score_requests(folder / "explore-model", requests, out=folder / "explore-lists", k=5,
                              explore="thompson", explore_slots=1, show_progress=False)
    again = score_requests(folder / "explore-model", requests, out=folder / "explore-lists-2", k=5,
                           explore="thompson", explore_slots=1, show_progress=False)
    assert thompson["explored"].sum() > 0 and thompson.groupby("request_id")["explored"].sum().max() <= 1
    pd.testing.assert_frame_equal(thompson, again)  # seeded by part: a rerun gives the same lists


def test_train_final_logs_deployable_models_fitted_on_every_event(tmp_path):
    from _tracking import write_config

    from threefold.models.model_io import load_model
    from threefold.pipeline.config import load_config
    from threefold.pipeline.experiment import summary_text, train
    from threefold.pipeline.stages import load_dataset
    from threefold.tracking.pyfunc import model_folder
    from threefold.tracking.store import open_store

    store = open_store(str(tmp_path / "runs"))
    config = load_config(write_config(tmp_path))
    report = train(config, store, echo=lambda line: None, final=True)
    evaluated = next(r for r in report.runs if r.name == "cp")
    (final,) = report.finals  # popularity has no factor model to refit
    run = store.client.get_run(final.run_id)
    assert run.data.tags["threefold.kind"] == "final" and run.data.tags["threefold.evaluated_run"] == evaluated.run_id
    assert run.data.tags["mlflow.parentRunId"] == report.parent_run_id
    events = load_dataset(config).events
    result, meta, _ = load_model(model_folder(final.run_id, store=store))
    assert meta["extra"]["serving"]["trained_until"] == int(events["timestamp"].max()) + 1
    assert set(result.vocabularies[1].labels) == set(events["item_id"].astype(str))  # test-window items too
    base = load_model(model_folder(evaluated.run_id, store=store))[0]
    assert len(result.vocabularies[1]) > len(base.vocabularies[1])
    assert "deployable models, refitted on every event" in summary_text(report)
