"""The run store: MLflow's SQLite tracking database and one artifact root, made safe to share.

By default every command uses ``./threefold-runs/`` in the working directory,
created on first use::

    threefold-runs/
      mlflow.db        MLflow's SQLite tracking database
      artifacts/       the one artifact root (absolute in the database)
      .lock            held while the schema or an experiment is created

``--store URI`` (or the standard ``MLFLOW_TRACKING_URI``) points elsewhere: a
folder path, a ``sqlite:///`` file (its artifacts go beside it), or any MLflow
tracking server (``http://...``), which then owns the artifacts.

What this module adds to MLflow, and why:

* *Concurrent processes.* SQLite allows one writer at a time, and MLflow gives
  up on a lock after its busy timeout. Schema and experiment creation happen
  under a file lock; every store call is retried on lock errors with capped
  exponential backoff (:func:`with_retries`).
* *Runs never stay "running".* Each run records its process (host, pid, start
  time). SIGTERM marks the run killed; after a SIGKILL the next command (or
  ``threefold runs cleanup``) finds runs whose process is gone and marks them
  killed (:meth:`RunStore.reap_stale_runs`).
* *No silent migration.* A database written by another MLflow version is
  refused with what to do; :func:`upgrade_store` backs it up first, then migrates.
* *One absolute artifact root*, wherever a later command starts.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import random
import signal
import socket
import sqlite3
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator, Mapping, TypeVar

__all__ = ["StoreError", "RunTerminated", "StoreLocation", "RunStore", "resolve_store", "open_store",
           "upgrade_store", "with_retries", "DEFAULT_STORE_DIR"]

DEFAULT_STORE_DIR = "threefold-runs"
_DB_NAME = "mlflow.db"
_LOCK_MARKERS = ("database is locked", "database table is locked", "temporarily_unavailable",
                 "temporarily unavailable", "unable to open database file", "disk i/o error")
_JITTER = random.Random()  # retry jitter only; seeded from the OS, never the global generator
T = TypeVar("T")

TAG_PID, TAG_HOST, TAG_STARTED, TAG_ENDED_BY, TAG_ERROR = (
    "threefold.pid", "threefold.host", "threefold.process_started", "threefold.ended_by", "threefold.error")


class StoreError(ValueError):
    """The run store cannot be used as it is (schema of another MLflow version, not a tracking database)."""


class RunTerminated(SystemExit):
    """Raised in the main thread on SIGTERM while a run is active; exits with status 143."""

    def __init__(self) -> None:
        super().__init__(128 + signal.SIGTERM)


# ---------------------------------------------------------------------- locations
@dataclass(frozen=True)
class StoreLocation:
    """Where runs go.

    Attributes
    ----------
    tracking_uri : str
        MLflow tracking URI.
    folder : Path or None
        Local folder of a SQLite store (lock file, database); None for a server.
    artifact_root : str or None
        Absolute ``file://`` URI of the artifact root of a local store.
    """

    tracking_uri: str
    folder: Path | None
    artifact_root: str | None

    @property
    def database(self) -> Path | None:
        """The SQLite file of a local store."""
        if not self.tracking_uri.startswith("sqlite:///"):
            return None
        return Path(self.tracking_uri[len("sqlite:///"):])


def resolve_store(store: str | os.PathLike | None = None) -> StoreLocation:
    """The store of ``--store`` if given, else ``MLFLOW_TRACKING_URI``, else ``./threefold-runs``.

    A value without ``://`` is a folder; ``sqlite:///path/to/file.db`` keeps its
    artifacts in ``artifacts/`` beside the file; any other URI is a tracking server.
    """
    value = str(store) if store is not None else os.environ.get("MLFLOW_TRACKING_URI") or DEFAULT_STORE_DIR
    if value.startswith("file:"):
        raise StoreError(f"{value!r}: file-based MLflow stores are not supported; give a folder (threefold keeps "
                         "a SQLite database in it) or a sqlite:/// or server URI.")
    if value.startswith("sqlite:///"):
        database = Path(value[len("sqlite:///"):]).expanduser().absolute()
        folder = database.parent
    elif "://" in value:
        return StoreLocation(tracking_uri=value, folder=None, artifact_root=None)
    else:
        folder = Path(value).expanduser().absolute()
        database = folder / _DB_NAME
    return StoreLocation(tracking_uri=f"sqlite:///{database}", folder=folder,
                         artifact_root=(folder / "artifacts").as_uri())


# ---------------------------------------------------------------------- retries and locks
def _is_lock_error(error: BaseException) -> bool:
    code = str(getattr(error, "error_code", "") or "")
    text = f"{code} {error}".lower()
    return any(marker in text for marker in _LOCK_MARKERS)


def with_retries(fn: Callable[..., T], *args, attempts: int = 12, base_delay: float = 0.05,
                 max_delay: float = 2.0, **kwargs) -> T:
    """Call ``fn`` and retry it on SQLite lock errors with capped, jittered exponential backoff.

    Waits ``min(max_delay, base_delay * 2**i)`` times a random factor in
    [0.5, 1] before retry ``i``; other errors are raised at once, and the last
    lock error after ``attempts`` tries.
    """
    for attempt in range(attempts):
        try:
            return fn(*args, **kwargs)
        except Exception as error:  # noqa: BLE001 - filtered just below
            if attempt == attempts - 1 or not _is_lock_error(error):
                raise
            time.sleep(min(max_delay, base_delay * 2 ** attempt) * _JITTER.uniform(0.5, 1.0))
    raise AssertionError("unreachable")


@contextlib.contextmanager
def _file_lock(folder: Path | None) -> Iterator[None]:
    if folder is None:
        yield
        return
    folder.mkdir(parents=True, exist_ok=True)
    with open(folder / ".lock", "a+") as handle:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


# ---------------------------------------------------------------------- schema checks
def _schema_revisions(database: Path) -> tuple[str | None, str]:
    """(revision of the database or None when it is new, revision this MLflow needs)."""
    from mlflow.store.db.utils import _get_latest_schema_revision

    head = _get_latest_schema_revision()
    if not database.exists() or database.stat().st_size == 0:
        return None, head
    with contextlib.closing(sqlite3.connect(f"file:{database}?mode=ro", uri=True, timeout=60)) as con:
        try:
            tables = {row[0] for row in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        except sqlite3.DatabaseError as error:
            raise StoreError(f"{database} is not a SQLite database ({error}).") from None
        if not tables:
            return None, head
        if "alembic_version" not in tables:
            raise StoreError(f"{database} is a SQLite database but not an MLflow tracking store.")
        row = con.execute("SELECT version_num FROM alembic_version").fetchone()
    return (row[0] if row else ""), head


def _check_schema(location: StoreLocation) -> None:
    import mlflow

    current, head = _schema_revisions(location.database)
    if current is None or current == head:
        return
    raise StoreError(
        f"The run store {location.database} has MLflow schema revision {current!r}, but MLflow "
        f"{mlflow.__version__} needs {head!r}. threefold never migrates a store silently. Either use the "
        f"MLflow version that wrote it, or run `threefold runs upgrade --store {location.folder}`, which first "
        f"copies the database to a backup beside it and then migrates it."
    )


def upgrade_store(store: str | os.PathLike | None = None) -> Path | None:
    """Back up a local store's database, then migrate it to this MLflow's schema.

    Returns
    -------
    Path of the backup, or None when the store was already current (nothing done).
    """
    from mlflow.store.db.utils import _upgrade_db, create_sqlalchemy_engine

    location = resolve_store(store)
    if location.database is None:
        raise StoreError(f"{location.tracking_uri} is not a local SQLite store; migrate it on its server.")
    with _file_lock(location.folder):
        current, head = _schema_revisions(location.database)
        if current is None or current == head:
            return None
        backup = location.database.with_name(f"{location.database.name}.backup-{current or 'unversioned'}-"
                                             f"{time.strftime('%Y%m%dT%H%M%S')}")
        with contextlib.closing(sqlite3.connect(location.database)) as src, \
                contextlib.closing(sqlite3.connect(backup)) as dst:
            src.backup(dst)
        engine = create_sqlalchemy_engine(location.tracking_uri)
        try:
            _upgrade_db(engine)
        finally:
            engine.dispose()
    return backup


# ---------------------------------------------------------------------- the store
def _process_tags() -> dict[str, str]:
    import psutil

    return {TAG_PID: str(os.getpid()), TAG_HOST: socket.gethostname(),
            TAG_STARTED: repr(psutil.Process().create_time())}


def _process_alive(pid: int, started: float | None) -> bool:
    import psutil

    try:
        process = psutil.Process(pid)
        if process.status() == psutil.STATUS_ZOMBIE:
            return False
        return started is None or abs(process.create_time() - started) < 0.01
    except psutil.Error:
        return False


class RunStore:
    """An open run store: an MLflow client plus retries, process records and cleanup.

    Create it with :func:`open_store`.
    """

    def __init__(self, location: StoreLocation, client):
        self.location = location
        self.client = client

    def call(self, fn: Callable[..., T], *args, **kwargs) -> T:
        """``fn(*args, **kwargs)`` with retries on lock errors (see :func:`with_retries`)."""
        return with_retries(fn, *args, **kwargs)

    def experiment_id(self, name: str) -> str:
        """The id of the experiment ``name``, created (under the store lock) if missing."""
        found = self.call(self.client.get_experiment_by_name, name)
        if found is not None:
            return found.experiment_id
        with _file_lock(self.location.folder):
            found = self.call(self.client.get_experiment_by_name, name)
            if found is not None:
                return found.experiment_id
            return self.call(self.client.create_experiment, name, artifact_location=self.location.artifact_root)

    @contextlib.contextmanager
    def run(self, experiment_id: str, *, run_name: str, tags: Mapping[str, str] | None = None,
            nested: bool = False) -> Iterator[str]:
        """An active MLflow run whose final status always reflects how it ended.

        Yields the run id. Ends FINISHED on success, FAILED on an exception
        (with the error as the ``threefold.error`` tag) and KILLED on SIGTERM or
        Ctrl-C; the process's host, pid and start time are recorded as tags.
        ``nested=True`` makes it a child of the active run.
        """
        import mlflow

        run = self.call(mlflow.start_run, experiment_id=experiment_id, run_name=run_name, nested=nested,
                        tags={**(tags or {}), **_process_tags()})
        run_id = run.info.run_id
        previous = _install_sigterm()
        try:
            yield run_id
        except (RunTerminated, KeyboardInterrupt):
            self._end(run_id, "KILLED", "signal")
            raise
        except BaseException as error:
            self.call(self.client.set_tag, run_id, TAG_ERROR, f"{type(error).__name__}: {error}"[:4000])
            self._end(run_id, "FAILED", "exception")
            raise
        else:
            self._end(run_id, "FINISHED", None)
        finally:
            _restore_sigterm(previous)

    def create_run(self, experiment_id: str, *, run_name: str, tags: Mapping[str, str] | None = None,
                   parent_run_id: str | None = None) -> str:
        """A RUNNING run outside the active-run stack (e.g. a sweep trial logged from a worker's result).

        End it with :meth:`finish`; if this process dies first, :meth:`reap_stale_runs` marks it killed.
        """
        tags = {**(tags or {}), **_process_tags()}
        if parent_run_id is not None:
            tags["mlflow.parentRunId"] = parent_run_id
        run = self.call(self.client.create_run, experiment_id, run_name=run_name, tags=tags)
        return run.info.run_id

    def finish(self, run_id: str, status: str = "FINISHED", error: str | None = None) -> None:
        """End a run made by :meth:`create_run` as FINISHED, FAILED (with ``error``) or KILLED."""
        if error is not None:
            self.call(self.client.set_tag, run_id, TAG_ERROR, error[-4000:])
        self.call(self.client.set_terminated, run_id, status=status)

    def _end(self, run_id: str, status: str, ended_by: str | None) -> None:
        import mlflow

        if ended_by is not None:
            self.call(self.client.set_tag, run_id, TAG_ENDED_BY, ended_by)
        active = mlflow.active_run()
        if active is not None and active.info.run_id == run_id:
            self.call(mlflow.end_run, status=status)
        else:
            self.call(self.client.set_terminated, run_id, status=status)

    def reap_stale_runs(self) -> list[tuple[str, str]]:
        """Mark KILLED every RUNNING run of this host whose process is gone, and FAILED their unfinished models.

        Returns
        -------
        list of (run_id or model_id, reason)
        """
        host = socket.gethostname()
        experiments = [e.experiment_id for e in self.call(self.client.search_experiments)]
        reaped = []
        if not experiments:
            return reaped
        for run in self.call(self.client.search_runs, experiments, "attributes.status = 'RUNNING'", max_results=5000):
            tags = run.data.tags
            if TAG_PID not in tags or tags.get(TAG_HOST) != host:
                continue
            started = float(tags[TAG_STARTED]) if TAG_STARTED in tags else None
            if _process_alive(int(tags[TAG_PID]), started):
                continue
            reason = f"cleanup: process {tags[TAG_PID]} on {host} is gone"
            self.call(self.client.set_tag, run.info.run_id, TAG_ENDED_BY, reason)
            self.call(self.client.set_terminated, run.info.run_id, status="KILLED")
            reaped.append((run.info.run_id, reason))
        reaped += self._fail_orphaned_models(experiments)
        return reaped

    def _fail_orphaned_models(self, experiments: list[str]) -> list[tuple[str, str]]:
        """Mark FAILED every logged model still PENDING whose run has ended (killed mid-save).

        MLflow creates a logged model as PENDING before its files are written and
        finalizes it after; a process killed in between leaves a model without
        artifacts that looks loadable (``No such artifact: ''``). Once its run is
        no longer running it can never be finished, so it is marked FAILED and
        tagged with the reason; its run's other models are untouched.
        """
        from mlflow.entities import LoggedModelStatus

        failed = []
        for model in self.call(self.client.search_logged_models, experiments, max_results=5000):
            if str(model.status) != "PENDING" or not model.source_run_id:
                continue
            run = self.call(self.client.get_run, model.source_run_id)
            if run.info.status == "RUNNING":
                continue
            reason = f"cleanup: run {model.source_run_id} ended ({run.info.status}) before the model was saved"
            self.call(self.client.set_logged_model_tags, model.model_id, {TAG_ENDED_BY: reason})
            self.call(self.client.finalize_logged_model, model.model_id, LoggedModelStatus.FAILED)
            failed.append((model.model_id, reason))
        return failed


def cleanup_line(item_id: str, reason: str) -> str:
    """The line printed for one entry of :meth:`RunStore.reap_stale_runs` (a run, or a logged model ``m-...``)."""
    if item_id.startswith("m-"):
        return f"marked logged model {item_id} failed ({reason})"
    return f"marked run {item_id} killed ({reason})"


def open_store(store: str | os.PathLike | None = None) -> RunStore:
    """Open (and on first use create) the run store; see the module docstring.

    Sets the process's MLflow tracking URI to the store, so MLflow's own
    functions (model logging, loading ``models:/`` URIs) use it too.

    Raises
    ------
    StoreError
        When a local database has another MLflow schema revision.
    """
    import mlflow
    from mlflow import MlflowClient

    location = resolve_store(store)
    with _file_lock(location.folder):
        if location.database is not None:
            _check_schema(location)
        client = MlflowClient(location.tracking_uri)
        with_retries(client.search_experiments, max_results=1)  # creates the schema of a new store, under the lock
    mlflow.set_tracking_uri(location.tracking_uri)
    return RunStore(location, client)


# ---------------------------------------------------------------------- SIGTERM
def _raise_terminated(signum, frame):  # noqa: ARG001 - signal handler signature
    raise RunTerminated()


def _install_sigterm():
    if threading.current_thread() is not threading.main_thread():
        return None
    previous = signal.getsignal(signal.SIGTERM)
    if previous is _raise_terminated:
        return None
    signal.signal(signal.SIGTERM, _raise_terminated)
    return previous


def _restore_sigterm(previous) -> None:
    if previous is not None:
        signal.signal(signal.SIGTERM, previous)
