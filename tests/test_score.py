"""Specifications of the batch scoring job (``threefold score``, :func:`threefold.pipeline.score.score_requests`).

The model is fitted on invented random clicks (``_tracking.tiny_events``); the
outside references are tensorly's dense CP reconstruction (reference library)
and a slow full sort written here (the ranking definition, common practice).
"""

from __future__ import annotations

import json
import signal
import subprocess
import time

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import tensorly as tl
from numpy.testing import assert_allclose, assert_array_equal

from threefold.core.exceptions import InputRowsError
from threefold.data.context import parse_context
from threefold.data.events import load_events
from threefold.models.model_io import save_model
from threefold.pipeline import cluster as cluster_module
from threefold.pipeline.score import SchedulerUnreachable, score_requests
from threefold.ranking.batch import JobMismatch, read_output
from threefold.ranking.recommender import Recommender

from _tracking import SERVING, child_env, threefold_command, tiny_cp

T0 = 1_700_050_000


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    """A saved CP model (invented data) and 300 requests with every kind of id."""
    folder = tmp_path_factory.mktemp("score")
    result, specs = tiny_cp(seed=4)
    save_model(result, folder / "model", extra={"serving": SERVING})
    rng = np.random.default_rng(0)
    n = 300
    requests = pd.DataFrame({
        "request_id": [f"r{i:03d}" for i in range(n)],
        "user_id": rng.choice([f"u{i:02d}" for i in range(24)], n),  # u20..u23 never seen
        "timestamp": T0 + rng.integers(0, 86_400, n),
        "device": rng.choice(["mobile", "desktop", "tv"], n),  # tv never seen
    })
    requests.to_csv(folder / "requests.csv", index=False)
    return folder, result, specs, requests


def _slow_top(scores: dict, k: int) -> list:
    """The ranking definition (common practice): sort by score descending, then item index ascending."""
    return sorted(scores, key=lambda j: (-scores[j], j))[:k]


def test_batch_output_equals_the_recommender_and_tensorly(saved, tmp_path):
    folder, result, specs, requests = saved
    out = score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "out", k=4, explain="top3",
                         chunk_rows=70, show_progress=False)
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["_job.json", "_manifest.json", "_rejected.parquet"] + [
        f"part-{i:05d}.parquet" for i in range(5)]
    direct = Recommender(result, specs, timezone="UTC").recommend(requests, k=4, explain="top3")
    pd.testing.assert_frame_equal(out, direct, check_dtype=False)  # one code path: the recommender
    assert list(out.groupby("request_id", sort=False).size()) == [4] * len(requests)
    # reference library: tensorly's dense CP reconstruction at every known cell
    dense = tl.cp_to_tensor((result.weights, list(result.factors)))
    vocab = result.vocabularies
    known = out[out["status"] == "ok"].merge(requests, on=["request_id", "user_id", "device"])
    assert len(known) > 100
    dayparts = specs[0].labels_for(known[["timestamp"]])
    cells = (vocab[0].encode(known["user_id"]).codes, vocab[1].encode(known["item_id"]).codes,
             vocab[2].encode(dayparts).codes, vocab[3].encode(known["device"]).codes)
    assert_allclose(known["score"], dense[cells], rtol=1e-10)
    assert_array_equal(known["daypart"], dayparts)
    # every list is the top 4 of a slow full sort of the catalog
    for request_id, got in list(known.groupby("request_id"))[:20]:
        cell = [c[known["request_id"].to_numpy() == request_id][0] for c in cells]
        row = dense[cell[0], :, cell[2], cell[3]]
        expected = _slow_top({j: row[j] for j in range(row.size)}, 4)
        assert list(vocab[1].encode(got["item_id"]).codes) == expected


def test_candidates_are_ranked_as_given_and_requests_without_any_get_none(saved, tmp_path):
    folder, result, specs, requests = saved
    rng = np.random.default_rng(1)
    candidates = pd.DataFrame({"request_id": np.repeat(requests["request_id"][:50], 6),
                               "item_id": rng.choice([f"i{i:02d}" for i in range(18)], 300)})  # i15.. unknown
    candidates.to_parquet(tmp_path / "candidates.parquet")
    out = score_requests(folder / "model", folder / "requests.csv", candidates=tmp_path / "candidates.parquet",
                         out=tmp_path / "out", k=4, chunk_rows=64, show_progress=False)
    scorer = Recommender(result, specs)
    for request_id in requests["request_id"][:50]:
        mine = candidates[candidates["request_id"] == request_id]["item_id"].drop_duplicates().tolist()
        full = scorer.recommend(requests[requests["request_id"] == request_id].merge(
            pd.DataFrame({"item_id": mine}), how="cross"), k=len(mine))
        scores = dict(zip(full["item_id"], full["score"]))
        order = {item: i for i, item in enumerate(mine)}  # ties: in the order given
        expected = sorted(mine, key=lambda j: (-scores[j], order[j]))[:4]
        assert out[out["request_id"] == request_id]["item_id"].tolist() == expected
    rest = out[~out["request_id"].isin(requests["request_id"][:50])]
    assert (rest["rank"] == 0).all() and rest["status"].str.contains("no_candidates").all()
    unknown = out[out["item_id"].isin(["i15", "i16", "i17"])]  # not in the model: zero row
    assert len(unknown) and (unknown["item_status"] == "unknown:zero").all() and (unknown["score"] == 0).all()


def test_bad_inputs_name_file_column_and_rows(saved, tmp_path):
    folder, *_ = saved
    model = folder / "model"
    bad = pd.DataFrame({"request_id": ["a", "b", "c", "d"], "user_id": "u01",
                        "timestamp": ["1700050000", "soon", "2026-03-29T01:30:00+01:00", "later"]})
    bad.to_csv(tmp_path / "bad.csv", index=False)
    out = score_requests(model, tmp_path / "bad.csv", out=tmp_path / "o1", k=3, show_progress=False)
    assert out.groupby("request_id", sort=False).size().to_dict() == {"a": 3, "c": 3}  # the rest is scored
    _assert_rejected(tmp_path / "o1", ["b", "d"], [2, 4], "timestamp", "not a timestamp", ["soon", "later"])
    bad.assign(timestamp=T0, request_id=["a", "b", "a", "c"]).to_csv(tmp_path / "dup.csv", index=False)
    with pytest.raises(InputRowsError, match=r"dup\.csv: column 'request_id': a request id given before .* data row\(s\) 3"):
        score_requests(model, tmp_path / "dup.csv", out=tmp_path / "o2", show_progress=False)
    bad.assign(timestamp=T0, k=["3", "0", "", "x"]).to_csv(tmp_path / "k.csv", index=False)
    out = score_requests(model, tmp_path / "k.csv", out=tmp_path / "o3", k=2, show_progress=False)
    assert out.groupby("request_id", sort=False).size().to_dict() == {"a": 3, "c": 2}
    _assert_rejected(tmp_path / "o3", ["b", "d"], [2, 4], "k", "not a whole number of at least 1", ["0", "x"])
    pd.DataFrame({"request_id": ["a", "zz"], "item_id": ["i01", "i02"]}).to_csv(tmp_path / "c.csv", index=False)
    bad.assign(timestamp=T0).to_csv(tmp_path / "ok.csv", index=False)
    with pytest.raises(InputRowsError, match=r"c\.csv: column 'request_id': a request id that is not in the requests .* data row\(s\) 2"):
        score_requests(model, tmp_path / "ok.csv", candidates=tmp_path / "c.csv", out=tmp_path / "o4",
                       show_progress=False)
    with pytest.raises(ValueError, match=r"need the column\(s\) \['user_id'\]"):
        score_requests(model, pd.DataFrame({"request_id": ["a"]}), out=tmp_path / "o5", show_progress=False)
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("mine")
    with pytest.raises(JobMismatch, match="exists and is not a score job's folder"):
        score_requests(model, tmp_path / "ok.csv", out=tmp_path / "busy", show_progress=False)


def _assert_rejected(out, request_ids, rows, column, problem, values):
    rejected = pq.read_table(out / "_rejected.parquet").to_pandas()
    assert rejected["request_id"].tolist() == request_ids and rejected["row"].tolist() == rows
    assert (rejected["column"] == column).all() and rejected["problem"].str.startswith(problem).all()
    assert rejected["value"].tolist() == values
    manifest = json.loads((out / "_manifest.json").read_text())
    assert manifest["rejected"]["requests"] == len(request_ids)


def test_no_request_is_lost_a_bad_row_is_rejected_with_its_status(saved, tmp_path):
    # Every input row is either in the output or in _rejected.parquet with its row, column and problem.
    folder, *_ = saved
    requests = pd.DataFrame({"request_id": ["a", "b", "c", "d", "e", "f"], "user_id": ["u01", "u02", "u03", "u01",
                                                                                      "u04", "u05"],
                             "timestamp": pd.array([T0, T0 * 1000, None, 2**62, T0, -5], dtype="Int64"),
                             "k": ["2", "2", "2", "2", "-1", "2"]})
    requests.to_parquet(tmp_path / "r.parquet")
    out = score_requests(folder / "model", tmp_path / "r.parquet", out=tmp_path / "o", show_progress=False)
    scored = out.groupby("request_id", sort=False).size().to_dict()
    assert scored == {"a": 2, "c": 2}  # a missing time (an integer NA) is scored without one
    rejected = pq.read_table(tmp_path / "o" / "_rejected.parquet").to_pandas()
    assert rejected["request_id"].tolist() == ["b", "d", "e", "f"] and rejected["row"].tolist() == [2, 4, 5, 6]
    assert rejected.set_index("request_id")["column"].to_dict() == {"b": "timestamp", "d": "timestamp",
                                                                    "e": "k", "f": "timestamp"}
    assert rejected["problem"][rejected["column"] == "timestamp"].str.contains("epoch milliseconds").all()
    assert set(scored) | set(rejected["request_id"]) == set(requests["request_id"])


def test_an_empty_input_gives_an_empty_output_with_the_schema(saved, tmp_path):
    folder, *_ = saved
    pd.DataFrame({"request_id": pd.Series(dtype=str), "user_id": pd.Series(dtype=str)}).to_csv(
        tmp_path / "none.csv", index=False)
    out = score_requests(folder / "model", tmp_path / "none.csv", out=tmp_path / "o", show_progress=False)
    full = score_requests(folder / "model", pd.DataFrame({"request_id": ["a"], "user_id": ["u01"]}),
                          out=tmp_path / "o2", show_progress=False)
    assert len(out) == 0 and list(out.columns) == list(full.columns)
    manifest = json.loads((tmp_path / "o" / "_manifest.json").read_text())
    assert manifest["requests"] == 0 and manifest["rows"] == 0 and manifest["rejected"]["requests"] == 0


def test_per_request_k_and_iso_timestamps(saved, tmp_path):
    folder, result, specs, _ = saved
    requests = pd.DataFrame({"request_id": ["a", "b", "c"], "user_id": "u01",
                             "timestamp": ["2023-11-15T12:06:40+00:00", str(T0), "2023-11-15T13:06:40+01:00"],
                             "device": "mobile", "k": ["2", "", "5"]})
    out = score_requests(folder / "model", requests, out=tmp_path / "out", k=3, show_progress=False)
    assert out.groupby("request_id").size().to_dict() == {"a": 2, "b": 3, "c": 5}
    assert set(out["daypart"]) == {specs[0].labels_for(pd.DataFrame({"timestamp": [T0]}))[0]}  # same instant
    first = out[out["request_id"] == "a"]["item_id"].tolist()
    assert first == out[out["request_id"] == "c"]["item_id"].tolist()[:2]


def test_resume_recomputes_only_missing_parts_and_other_arguments_are_refused(saved, tmp_path):
    folder, *_ = saved
    args = dict(out=tmp_path / "out", k=3, explain="all", chunk_rows=50, show_progress=False, load=False)
    score_requests(folder / "model", folder / "requests.csv", **args)
    before = {p.name: p.read_bytes() for p in (tmp_path / "out").glob("part-*")}
    stamps = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "out").glob("part-*")}
    (tmp_path / "out" / "_manifest.json").unlink()  # as a job killed after part 3 was lost leaves it
    (tmp_path / "out" / "part-00003.parquet").unlink()
    manifest = score_requests(folder / "model", folder / "requests.csv", **args)
    after = {p.name: p.read_bytes() for p in (tmp_path / "out").glob("part-*")}
    assert after == before and manifest["requests"] == 300 and manifest["rows"] == 900
    rewritten = [n for n, t in stamps.items() if (tmp_path / "out" / n).stat().st_mtime_ns != t]
    assert rewritten == ["part-00003.parquet"]
    with pytest.raises(JobMismatch, match=r"other arguments \(k: 3 -> 4\)"):
        score_requests(folder / "model", folder / "requests.csv", **{**args, "k": 4})
    other = pd.read_csv(folder / "requests.csv").iloc[:-1]
    with pytest.raises(JobMismatch, match=r"requests_sha256"):
        score_requests(folder / "model", other, **args)


def test_dask_workers_write_the_same_bytes(saved, tmp_path):
    folder, *_ = saved
    common = dict(k=3, explain="top3", chunk_rows=80, show_progress=False, load=False)
    score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "local", **common)
    score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "dask", workers=2, **common)
    for part in sorted((tmp_path / "local").glob("part-*")):
        assert part.read_bytes() == (tmp_path / "dask" / part.name).read_bytes()


def test_an_unreachable_scheduler_is_one_clear_error(saved, tmp_path, monkeypatch):
    folder, *_ = saved
    monkeypatch.setattr(cluster_module, "CONNECT_TIMEOUT", 2)
    with pytest.raises(SchedulerUnreachable, match=r"No Dask scheduler answered at 'tcp://127.0.0.1:9' within 2 s"):
        score_requests(folder / "model", folder / "requests.csv", out=tmp_path / "out", scheduler="tcp://127.0.0.1:9",
                       show_progress=False)


def test_scoring_derives_context_as_the_training_build_across_a_dst_change(tmp_path):
    """Europe/Paris springs forward on 2026-03-29 02:00 and falls back on 2026-10-25 03:00 (IANA tz database)."""
    zone = "Europe/Paris"
    wall = ["2026-03-29 01:59:59", "2026-03-29 02:30:00", "2026-03-29 03:00:00", "2026-03-28 21:00:00",
            "2026-10-25 02:30:00", "2026-10-25 01:59:59", "2026-10-25 03:00:00", "2026-10-25 08:59:59",
            "2026-03-29 12:00:00", "2026-10-25 18:30:00"]
    aware = ["2026-03-29T01:00:00+01:00", "2026-03-29T03:00:00+02:00", "2026-10-25T02:30:00+01:00"]
    epochs = [str(1_774_746_000), str(1_761_350_400)]
    stamps = wall + aware + epochs
    n = len(stamps)
    devices = ["mobile", "", "desktop"] * n
    log = pd.DataFrame({"user_id": [f"u{i % 3}" for i in range(n)], "item_id": [f"i{i % 4}" for i in range(n)],
                        "timestamp": stamps, "device": devices[:n]})
    log.to_csv(tmp_path / "events.csv", index=False)
    events = load_events(tmp_path / "events.csv", timezone=zone)  # the training build's reader
    specs = [parse_context("daypart", timezone=zone), parse_context("device")]
    training = specs[0].labels_for(events).to_numpy()  # the labels build_tensor gives these events
    training_device = specs[1].labels_for(events).to_numpy()  # a blank device is the level "unknown"
    from threefold.data.build import build_tensor
    from threefold.models.cp.model import fit_cp

    tensor, _ = build_tensor(events, specs, negatives="none")
    result = fit_cp(tensor, rank=2, max_sweeps=2, tol=0, random_state=0)
    requests = pd.DataFrame({"request_id": [f"q{i}" for i in range(n)], "user_id": "u0", "timestamp": stamps,
                             "device": devices[:n]})
    out = Recommender(result, specs, timezone=zone).recommend(requests, k=1)
    assert_array_equal(out["daypart"].to_numpy(), training)
    assert_array_equal(out["device"].to_numpy(), training_device)
    assert "unknown" in set(training_device) and set(out["status"]) == {"ok"}
    assert len(set(training)) >= 3  # the times span several dayparts


@pytest.mark.parametrize("seed", [11])
def test_a_job_killed_at_random_points_resumes_exactly(saved, tmp_path, seed):
    """Real processes: ``threefold score`` killed with SIGKILL at random times, rerun until done."""
    folder, *_ = saved
    rng = np.random.default_rng(seed)
    big = pd.concat([pd.read_csv(folder / "requests.csv")] * 8, ignore_index=True)
    big["request_id"] = [f"q{i:05d}" for i in range(len(big))]
    big.to_csv(tmp_path / "big.csv", index=False)
    command = threefold_command("score", str(folder / "model"), "--requests", str(tmp_path / "big.csv"),
                                "--k", "5", "--explain", "all", "--chunk-rows", "20")
    reference = subprocess.run(command + ["--out", str(tmp_path / "reference")], env=child_env(), capture_output=True,
                               text=True, timeout=300)
    assert reference.returncode == 0, reference.stderr[-2000:]
    target = tmp_path / "killed"
    n_parts = -(-len(big) // 20)
    states = []
    # kill points: a few at random times (often in start-up or staging), then at random numbers of written parts
    plan = [("seconds", rng.uniform(0.5, 3.0)) for _ in range(2)]
    plan += [("parts", int(p)) for p in np.sort(rng.choice(np.arange(1, n_parts), size=4, replace=False))]
    for kind, point in plan:
        process = subprocess.Popen(command + ["--out", str(target)], env=child_env(), stdout=subprocess.DEVNULL,
                                   stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 120
        while process.poll() is None and time.monotonic() < deadline:
            written = len(list(target.glob("part-*.parquet"))) if target.exists() else 0
            if (kind == "seconds" and time.monotonic() > deadline - 120 + point) or (kind == "parts" and written >= point):
                break
            time.sleep(0.005)
        process.send_signal(signal.SIGKILL)
        process.wait()
        parts = len(list(target.glob("part-*.parquet"))) if target.exists() else 0
        states.append((kind, point, parts, (target / "_manifest.json").is_file()))
    assert sum(0 < parts < n_parts and not done for *_, parts, done in states) >= 3, states  # killed mid-job
    final = subprocess.run(command + ["--out", str(target)], env=child_env(), capture_output=True, text=True, timeout=300)
    assert final.returncode == 0, final.stderr[-2000:]
    assert not list(target.glob(".*.tmp")) and not (target / "_staging").exists()
    got, expected = read_output(target), read_output(tmp_path / "reference")
    pd.testing.assert_frame_equal(got, expected)
    assert got.groupby("request_id").size().eq(5).all() and got["request_id"].nunique() == len(big)
    for part in sorted((tmp_path / "reference").glob("part-*")):
        assert pq.read_table(part).equals(pq.read_table(target / part.name))


def test_model_by_folder_run_id_or_mlflow_uri_and_the_pyfunc_agree(saved, tmp_path):
    """One code path: the command's lists equal the served pyfunc's, reasons and ISO timestamps included."""
    import mlflow

    from threefold.tracking.pyfunc import log_pyfunc
    from threefold.tracking.store import open_store

    folder, result, specs, requests = saved
    store = open_store(tmp_path / "store")
    with store.run(store.experiment_id("serving"), run_name="serving") as run_id:
        uri = log_pyfunc(store, result, SERVING)
        store.call(store.client.set_tag, run_id, "threefold.model_uri", uri)  # as `threefold train` tags it
    iso = requests.iloc[:40].assign(timestamp=pd.to_datetime(requests["timestamp"].iloc[:40], unit="s", utc=True)
                                    .dt.tz_convert("Europe/Paris").map(lambda t: t.isoformat()))
    reference = score_requests(folder / "model", iso, out=tmp_path / "folder", k=3, explain="top3", show_progress=False)
    for i, model in enumerate([run_id, run_id[:8], uri, f"runs:/{run_id}/model"]):
        got = score_requests(model, iso, out=tmp_path / f"m{i}", k=3, explain="top3", store=store, show_progress=False)
        pd.testing.assert_frame_equal(got, reference)
        assert not (tmp_path / f"m{i}" / "_model").exists()
    served = mlflow.pyfunc.load_model(uri).predict(iso, params={"k": 3, "explain": "top3"})
    pd.testing.assert_frame_equal(served.reset_index(drop=True), reference, check_dtype=False)
    with pytest.raises(ValueError, match=r"'nonsense!' is not a model folder, a run id or an MLflow model URI"):
        score_requests("nonsense!", iso, out=tmp_path / "bad", store=store, show_progress=False)
    with pytest.raises(ValueError, match=r"Could not fetch the model 'models:/m-0000'"):
        score_requests("models:/m-0000", iso, out=tmp_path / "bad2", store=store, show_progress=False)


def test_the_recommender_never_merges_or_drops_requests(saved):
    """A missing id, one id for two users: an error naming the rows; an empty batch: an empty output with the schema."""
    folder, result, specs, _ = saved
    recommender = Recommender(result, specs)
    with pytest.raises(InputRowsError, match=r"column 'request_id': a missing or blank request id in 2 row\(s\): data row\(s\) 2, 3"):
        recommender.recommend(pd.DataFrame({"request_id": ["a", None, " "], "user_id": ["u01", "u02", "u03"]}))
    with pytest.raises(InputRowsError, match=r"one request id given for several users in 2 row\(s\): data row\(s\) 1, 3"):
        recommender.recommend(pd.DataFrame({"request_id": ["a", "b", "a"], "user_id": ["u01", "u02", "u03"]}))
    empty = recommender.recommend(pd.DataFrame({"request_id": [], "user_id": []}), explain="top3")
    assert empty.empty and list(empty.columns) == recommender.output_columns("top3")
    assert empty["rank"].dtype == np.int64 and empty["score"].dtype == np.float64
