"""The run store with real processes: concurrent writers, killed runs, old schemas, one artifact root."""

import json
import signal
import sqlite3
import subprocess
import sys
import threading
from pathlib import Path

import pytest
from numpy.testing import assert_allclose

from threefold import cli
from threefold.tracking.store import StoreError, open_store, resolve_store, upgrade_store, with_retries

from _tracking import SMALL_CONFIG, child_env, run, threefold_command, write_config


def runs_by_name(store) -> dict:
    experiments = [e.experiment_id for e in store.client.search_experiments()]
    out: dict = {}
    for r in store.client.search_runs(experiments, max_results=1000):
        out.setdefault(r.info.run_name, []).append(r)
    return out


def test_store_location_precedence(tmp_path, monkeypatch):
    monkeypatch.delenv("MLFLOW_TRACKING_URI", raising=False)
    monkeypatch.chdir(tmp_path)
    default = resolve_store()
    assert default.folder == tmp_path / "threefold-runs"
    assert default.tracking_uri == f"sqlite:///{tmp_path}/threefold-runs/mlflow.db"
    assert default.artifact_root == (tmp_path / "threefold-runs" / "artifacts").as_uri()  # absolute
    monkeypatch.setenv("MLFLOW_TRACKING_URI", str(tmp_path / "team"))
    assert resolve_store().folder == tmp_path / "team"
    assert resolve_store("other").folder == tmp_path / "other"  # --store wins over the variable
    beside = resolve_store(f"sqlite:///{tmp_path}/db/runs.db")
    assert beside.folder == tmp_path / "db" and beside.artifact_root == (tmp_path / "db" / "artifacts").as_uri()
    server = resolve_store("http://127.0.0.1:5000")
    assert server.folder is None and server.artifact_root is None
    with pytest.raises(StoreError, match=r"file-based MLflow stores are not supported"):
        resolve_store("file:///tmp/mlruns")


def test_retries_wait_out_a_real_sqlite_write_lock(tmp_path):
    db = tmp_path / "locked.db"
    with sqlite3.connect(db) as con:
        con.execute("CREATE TABLE t (x INTEGER)")
    holder = sqlite3.connect(db, isolation_level=None, check_same_thread=False)
    holder.execute("BEGIN EXCLUSIVE")
    releaser = threading.Timer(0.4, lambda: holder.execute("COMMIT"))
    releaser.start()
    attempts = []

    def write():
        attempts.append(1)
        with sqlite3.connect(db, timeout=0.01) as con:
            con.execute("INSERT INTO t VALUES (1)")

    with_retries(write, base_delay=0.02, max_delay=0.1, attempts=40)
    releaser.join()
    holder.close()
    assert len(attempts) > 1
    with sqlite3.connect(db) as con:
        assert con.execute("SELECT count(*) FROM t").fetchone()[0] == 1

    def broken():
        attempts.append(2)
        raise sqlite3.OperationalError("no such table: missing")

    with pytest.raises(sqlite3.OperationalError, match=r"no such table"):
        with_retries(broken)
    assert attempts.count(2) == 1  # other errors are not retried


def test_two_train_processes_start_together_on_a_fresh_store(tmp_path, capsys):
    config = write_config(tmp_path)
    children = [subprocess.Popen(threefold_command("train", str(config)), cwd=tmp_path, env=child_env(),
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    outputs = [child.communicate(timeout=600) for child in children]
    for child, (out, err) in zip(children, outputs):
        assert child.returncode == 0, err[-3000:]
        assert "models:/m-" in out and "recall_at_5" in out
    store = open_store(tmp_path / "threefold-runs")
    experiment = store.client.get_experiment_by_name("tracking-tests")
    assert experiment.artifact_location == (tmp_path / "threefold-runs" / "artifacts").as_uri()
    runs = runs_by_name(store)
    assert len(runs["train small"]) == 2 and len(runs["cp"]) == 2 and len(runs["popularity"]) == 2
    assert all(r.info.status == "FINISHED" for group in runs.values() for r in group)
    cp_runs = runs["cp"]
    for r in cp_runs:
        history = store.client.get_metric_history(r.info.run_id, "loss")
        assert sorted(m.step for m in history) == [0, 1, 2]  # sweep 0 (initial state) and two sweeps
        assert {"recall_at_5", "recall_at_5_low", "recall_at_5_high", "ndcg_at_5", "wall_seconds",
                "peak_memory_mb"} <= set(r.data.metrics)
        assert r.data.params["model.rank"] == "4" and r.data.params["weighting.alpha"] == "10.0"
        assert r.data.tags["threefold.model_uri"].startswith("models:/m-")
        assert "threefold.version.numpy" in r.data.tags and "threefold.data_sha256" in r.data.tags
    # the same config on the same data gives the same metrics (fixed seeds)
    first, second = (r.data.metrics for r in cp_runs)
    for name in ("recall_at_5", "ndcg_at_5", "recall_at_5_low", "final_loss"):
        assert_allclose(first[name], second[name], rtol=1e-12)
    artifacts = tmp_path / "threefold-runs" / "artifacts"
    run_folder = artifacts / cp_runs[0].info.run_id / "artifacts"
    assert (run_folder / "evaluation" / "metrics.csv").is_file() and (run_folder / "plots" / "loss_curve.png").is_file()

    assert cli.main(["runs", "--store", str(tmp_path / "threefold-runs"), "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert len(listed) == 6 and {r["kind"] for r in listed} == {"train", "model"}
    a, b = (r.info.run_id for r in cp_runs)
    assert cli.main(["runs", "--store", str(tmp_path / "threefold-runs"), "compare", a, b, "--json"]) == 0
    comparison = json.loads(capsys.readouterr().out)
    assert comparison["params"] == []
    deltas = {m["metric"]: m["delta"] for m in comparison["metrics"]}
    assert deltas["recall_at_5"] == 0.0 and deltas["ndcg_at_5"] == 0.0
    # a prefix works as the listing prints it; a metric no run has is an error, not a silent default order
    assert cli.main(["runs", "--store", str(tmp_path / "threefold-runs"), "compare", a[:12], b[:12], "--json"]) == 0
    capsys.readouterr()
    assert cli.main(["runs", "--store", str(tmp_path / "threefold-runs"), "compare", a[:4], b]) == 1
    assert "matches 0 runs; give at least 6 characters of a run id" in capsys.readouterr().err
    assert cli.main(["runs", "--store", str(tmp_path / "threefold-runs"), "--sort", "ndcg_at_55"]) == 1
    assert "--sort 'ndcg_at_55': no listed run has that metric. Did you mean 'ndcg_at_5'?" in capsys.readouterr().err


HOLD_A_RUN = """
import sys, time
from threefold.tracking.store import open_store
store = open_store(sys.argv[1])
experiment = store.experiment_id("kills")
with store.run(experiment, run_name=sys.argv[2]) as run_id:
    print("ready", run_id, flush=True)
    time.sleep(600)
"""


def test_killed_runs_end_killed_and_the_next_command_reports_them(tmp_path):
    folder = tmp_path / "store"
    children = {name: subprocess.Popen([sys.executable, "-c", HOLD_A_RUN, str(folder), name], env=child_env(),
                                       stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
                for name in ("terminated", "killed")}
    ids = {}
    for name, child in children.items():
        line = child.stdout.readline().split()
        assert line[:1] == ["ready"], child.stderr.read()[-2000:]
        ids[name] = line[1]
    children["terminated"].send_signal(signal.SIGTERM)
    children["killed"].send_signal(signal.SIGKILL)
    assert children["terminated"].wait(timeout=60) == 128 + signal.SIGTERM
    assert children["killed"].wait(timeout=60) == -signal.SIGKILL

    listing = run(threefold_command("runs", "--store", str(folder)), cwd=tmp_path)
    assert listing.returncode == 0, listing.stderr[-2000:]
    assert f"marked run {ids['killed']} killed (cleanup: process" in listing.stdout
    assert f"marked run {ids['terminated']}" not in listing.stdout
    store = open_store(folder)
    terminated, killed = (store.client.get_run(ids[n]) for n in ("terminated", "killed"))
    assert terminated.info.status == "KILLED" and terminated.data.tags["threefold.ended_by"] == "signal"
    assert killed.info.status == "KILLED" and killed.data.tags["threefold.ended_by"].startswith("cleanup: process")
    assert store.reap_stale_runs() == []  # nothing left running
    with sqlite3.connect(folder / "mlflow.db") as con:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


LOG_METRICS = """
import sys
from threefold.tracking.store import open_store
store = open_store(sys.argv[1])
run_id = store.create_run(store.experiment_id("load"), run_name=sys.argv[2])
for i in range(int(sys.argv[3])):
    store.call(store.client.log_metric, run_id, "m", float(i), step=i)
store.finish(run_id)
"""


def test_concurrent_writers_lose_no_metric(tmp_path):
    """Reliability target (scaled down): several processes logging to one store at once."""
    folder = tmp_path / "store"
    open_store(folder).experiment_id("load")
    calls = 100
    children = [subprocess.Popen([sys.executable, "-c", LOG_METRICS, str(folder), f"writer {i}", str(calls)],
                                 env=child_env(), stderr=subprocess.PIPE, text=True) for i in range(3)]
    for child in children:
        assert child.wait(timeout=600) == 0, child.stderr.read()[-2000:]
    store = open_store(folder)
    for name, group in runs_by_name(store).items():
        assert group[0].info.status == "FINISHED"
        assert len(store.client.get_metric_history(group[0].info.run_id, "m")) == calls, name


def _old_store(folder: Path, revision: str) -> None:
    """A store created by an older MLflow: the initial schema migrated only up to ``revision``."""
    import sqlalchemy
    from alembic import command
    from mlflow.store.db.utils import _get_alembic_config
    from mlflow.store.tracking.dbmodels.initial_models import Base

    folder.mkdir()
    url = f"sqlite:///{folder / 'mlflow.db'}"
    engine = sqlalchemy.create_engine(url)
    Base.metadata.create_all(engine)
    config = _get_alembic_config(url)
    with engine.begin() as connection:
        config.attributes["connection"] = connection  # as MLflow's own upgrade does
        command.upgrade(config, revision)
    engine.dispose()


def test_an_old_store_is_refused_and_upgraded_only_after_a_backup(tmp_path):
    from alembic.script import ScriptDirectory
    from mlflow.store.db.utils import _get_alembic_config

    revisions = [r.revision for r in ScriptDirectory.from_config(_get_alembic_config("")).walk_revisions()][::-1]
    old = revisions[len(revisions) // 2]
    folder = tmp_path / "old"
    _old_store(folder, old)
    with pytest.raises(StoreError, match=rf"schema revision '{old}'.*never migrates a store silently.*"
                                         rf"threefold runs upgrade --store {folder}"):
        open_store(folder)
    with sqlite3.connect(folder / "mlflow.db") as con:  # refused without touching it
        assert con.execute("SELECT version_num FROM alembic_version").fetchone()[0] == old
    backup = upgrade_store(folder)
    with sqlite3.connect(backup) as con:
        assert con.execute("SELECT version_num FROM alembic_version").fetchone()[0] == old
    store = open_store(folder)
    assert store.experiment_id("after upgrade")
    assert upgrade_store(folder) is None  # already current: nothing to do


def test_a_missing_random_state_is_drawn_logged_and_printed_so_a_rerun_reproduces(tmp_path):
    from threefold.pipeline.config import load_config
    from threefold.pipeline.experiment import train

    text = SMALL_CONFIG.replace("random_state = 3\n", "")
    store = open_store(tmp_path / "runs")
    lines = []
    first = train(load_config(write_config(tmp_path, text)), store, echo=lines.append)
    drawn = [line for line in lines if line.startswith("models.cp: no random_state given; drew ")]
    assert len(drawn) == 1, lines
    seed = int(drawn[0].split("drew ")[1].split()[0])
    run = next(r for r in first.runs if r.name == "cp")
    assert store.client.get_run(run.run_id).data.params["model.random_state"] == str(seed)
    again = train(load_config(write_config(tmp_path, text.replace("max_sweeps = 2\n", f"max_sweeps = 2\nrandom_state = {seed}\n"),
                                           name="seeded.toml")), store, echo=lambda line: None)
    rerun = next(r for r in again.runs if r.name == "cp")
    assert {k: v for k, v in rerun.metrics.items() if "seconds" not in k and "memory" not in k} == {
        k: v for k, v in run.metrics.items() if "seconds" not in k and "memory" not in k}


def test_a_logged_model_left_pending_by_a_killed_run_is_marked_failed(tmp_path):
    # MLflow creates a logged model PENDING and finalizes it once its files are written; a process
    # killed in between leaves it PENDING forever. The next command marks it FAILED (runs are reaped alike).
    store = open_store(tmp_path / "runs")
    experiment = store.experiment_id("debris")
    dead = store.client.create_run(experiment)
    orphan = store.client.create_logged_model(experiment, source_run_id=dead.info.run_id, name="model")
    store.client.set_terminated(dead.info.run_id, status="KILLED")
    alive = store.client.create_run(experiment)  # still running (no process tag: never reaped)
    busy = store.client.create_logged_model(experiment, source_run_id=alive.info.run_id, name="model")
    reaped = store.reap_stale_runs()
    assert [model_id for model_id, _ in reaped] == [orphan.model_id]
    model = store.client.get_logged_model(orphan.model_id)
    assert str(model.status) == "FAILED" and model.tags["threefold.ended_by"].startswith("cleanup: run ")
    assert str(store.client.get_logged_model(busy.model_id).status) == "PENDING"
    assert store.reap_stale_runs() == []
    listing = run(threefold_command("runs", "--store", str(tmp_path / "runs")), cwd=tmp_path)
    assert listing.returncode == 0, listing.stderr[-2000:]
