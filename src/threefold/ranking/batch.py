"""Batch scoring in parts: ranked lists for a file of requests, resumable and exact.

A job turns a requests table (CSV, Parquet file or folder, or a DataFrame) and
optionally a long candidates table (``request_id``, ``item_id``) into ranked
lists with :class:`~threefold.ranking.recommender.Recommender`, the code path
of the served model. Its output folder::

    OUT/
      _job.json             the arguments that define the output (written first)
      _staging/             inputs cut into parts (removed when the job is done)
        requests-00000.parquet, candidates-00000-00003.parquet, ..., staged.json
      _model/               a model fetched from the run store (while the job runs)
      part-00000.parquet    one file per part of ``chunk_rows`` requests, in request order
      ...
      _rejected.parquet     requests with a bad timestamp or k, not scored: row, column, problem
      _manifest.json        written last: every part with its rows and SHA-256

Names starting with ``_`` are skipped by Parquet dataset readers, so
``pandas.read_parquet(OUT)`` (or any engine reading the folder) sees the parts
only. Read the output only once ``_manifest.json`` exists.

Exactness. A part is written to a temporary name and renamed, so a part file
is whole or absent. A rerun with the same arguments reuses the staged inputs
(staging is redone from scratch only when it never finished) and computes only
the missing parts; every request lands in exactly one part, so the finished
output holds exactly one list per request. A rerun with other arguments into
the same folder is refused (:class:`JobMismatch`). A part depends only on its
staged inputs and the model, so running the parts on Dask workers (see
:mod:`threefold.pipeline.score`) writes the same bytes.

Memory. Staging reads the inputs in chunks; it keeps 16 bytes per request (a
64-bit hash of its id and its part) to route candidates and to find duplicate
request ids. A part holds its ``chunk_rows`` requests, their candidates and
their output rows.

Errors name the file, the column and the data rows (1-based, as the event-log
reader counts them), e.g. ``requests.csv: column 'timestamp': not a timestamp
... in 2 row(s): data row(s) 17, 93``.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Callable, Iterator

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq

from threefold.core.bundle import POINTER, bundle_fingerprint, is_bundle, sha256_file
from threefold.core.checks import check_choice, check_int
from threefold.core.defaults import SCORE_CHUNK_ROWS
from threefold.core.exceptions import InputRowsError
from threefold.data.events import open_source
from threefold.ranking._job_policies import policy_digest, stage_policies, staged_policies, summed_counts, write_counts
from threefold.ranking.explore import parse_explore
from threefold.ranking.policies import PolicyCounts
from threefold.ranking.recommender import DEFAULT_K, EXPLAIN_CHOICES, Recommender, blank_mask

__all__ = ["JobArguments", "JobMismatch", "local_model_folder", "prepare_job", "score_part", "finish_job", "read_output", "job_parts",
           "DEFAULT_CHUNK_ROWS", "FORMATS"]

JOB_FILE = "_job.json"
MANIFEST_FILE = "_manifest.json"
STAGING = "_staging"
#: Where a model fetched from the run store is kept while the job runs (inside OUT).
MODEL_COPY = "_model"
_STAGED = "staged.json"
_JOB_FORMAT = "threefold-score-job/1"
FORMATS = ("parquet", "csv")
#: Requests per part (and per staging chunk).
DEFAULT_CHUNK_ROWS = SCORE_CHUNK_ROWS
_CANDIDATE_CHUNK_ROWS = 1_000_000
_ROW = "__row"  # staged column: the request's data row in its file


class JobMismatch(ValueError):
    """The output folder holds a job with other arguments."""


@dataclass(frozen=True)
class JobArguments:
    """What defines a job's output; a rerun must match it exactly.

    Attributes
    ----------
    model : str
        SHA-256 of the model's manifest (:func:`threefold.core.bundle.bundle_fingerprint`).
    model_path : str
        Where the model folder is (not compared: the same model may move).
    requests, candidates : str or None
        Where the inputs came from (shown in messages, not compared).
    requests_sha256, candidates_sha256 : str or None
        Content hashes of the inputs (compared).
    k : int
    explain : {"none", "top3", "all"}
    format : {"parquet", "csv"}
    chunk_rows : int
    explore : str
        ``"off"``, ``"thompson"`` or BETA as text (:mod:`threefold.ranking.explore`).
    explore_slots : int
    policies : str or None
        Where the list policies came from (not compared).
    policies_sha256 : str or None
        Digest of the rules, the catalog and the history they read (compared).
    """

    model: str
    model_path: str
    requests: str
    requests_sha256: str
    candidates: str | None
    candidates_sha256: str | None
    k: int
    explain: str
    format: str
    chunk_rows: int
    explore: str = "off"
    explore_slots: int = 1
    policies: str | None = None
    policies_sha256: str | None = None

    _COMPARED = ("model", "requests_sha256", "candidates_sha256", "k", "explain", "format", "chunk_rows", "explore",
                 "explore_slots", "policies_sha256")

    def differences(self, other: "JobArguments") -> list[str]:
        """``"k: 10 -> 20"`` for every compared field that differs."""
        return [f"{name}: {getattr(other, name)!r} -> {getattr(self, name)!r}"
                for name in self._COMPARED if getattr(self, name) != getattr(other, name)]


def local_model_folder(path: str | os.PathLike) -> Path:
    """The model folder of a local path: a threefold model folder, or a downloaded MLflow model of threefold.

    Raises
    ------
    ValueError
        When the folder is neither.
    """
    path = Path(path)
    if is_bundle(path):
        return path
    if (path / "MLmodel").is_file() and is_bundle(path / "artifacts" / "model"):
        return path / "artifacts" / "model"  # its entry code is checked by threefold.tracking.pyfunc.model_folder
    raise ValueError(f"{path} is neither a threefold model folder (no {POINTER} pointer) nor a downloaded MLflow "
                     "model of threefold (no MLmodel with artifacts/model).")


# ---------------------------------------------------------------------------- inputs
def _content_sha256(source) -> tuple[str, str]:
    """(description, SHA-256) of a path (file or folder of files) or a DataFrame."""
    if isinstance(source, pd.DataFrame):
        hashes = pd.util.hash_pandas_object(source, index=False).to_numpy()
        names = "\x00".join(map(str, source.columns)).encode()
        digest = hashlib.sha256(names + hashes.tobytes()).hexdigest()
        return f"<DataFrame of {len(source):,} rows>", digest
    path = Path(source)
    if path.is_dir():
        digest = hashlib.sha256()
        for file in sorted(p for p in path.rglob("*") if p.is_file() and not p.name.startswith((".", "_"))):
            digest.update(str(file.relative_to(path)).encode() + b"\x00" + sha256_file(file).encode())
        return str(path), digest.hexdigest()
    if not path.is_file():
        raise FileNotFoundError(f"No such file or folder: {str(path)!r}.")
    return str(path), sha256_file(path)


def _iter_input(source, chunk_rows: int, columns=None) -> Iterator[tuple[int, pd.DataFrame]]:
    """``(first data row, chunk)`` of a path or a DataFrame, ``chunk_rows`` rows at a time (ids as text)."""
    if isinstance(source, pd.DataFrame):
        frame = source if columns is None else source[list(columns)]
        for start in range(0, max(len(frame), 1), chunk_rows):
            chunk = frame.iloc[start:start + chunk_rows].reset_index(drop=True)
            for name in chunk.columns:  # ids and mixed columns as text, as the file reader gives them
                if name in ("request_id", "user_id", "item_id") or chunk[name].dtype == object:
                    chunk[name] = chunk[name].astype("string")
            if len(chunk):
                yield start + 1, chunk
        return
    opened = open_source(source)
    for first_row, table in opened.iter_tables(chunk_rows, columns):
        yield first_row, table.to_pandas()


def _columns_of(source) -> list[str]:
    return list(source.columns) if isinstance(source, pd.DataFrame) else open_source(source).columns


def _id_hashes(values: pd.Series) -> np.ndarray:
    """uint64 hash of each id (text)."""
    return pd.util.hash_array(values.astype(str).to_numpy(dtype=object))


# ---------------------------------------------------------------------------- staging
def _stage_requests(requests, name: str, staging: Path, chunk_rows: int, recommender: Recommender,
                    report: Callable[[int], None]) -> tuple[list[int], np.ndarray, np.ndarray]:
    """Cut the requests into parts (checked), return requests per part and the sorted id hashes with their part."""
    columns = _columns_of(requests)
    missing = [c for c in ("request_id", "user_id") if c not in columns]
    if missing:
        raise ValueError(f"{name}: the requests need the column(s) {missing}; the file has {columns}.")
    if "item_id" in columns:
        raise ValueError(f"{name}: the requests have an 'item_id' column; give one row per request and the "
                         "candidate items as a separate candidates table (request_id, item_id).")
    counts, hashes, parts = [], [], []
    for part, (first_row, chunk) in enumerate(_iter_input(requests, chunk_rows)):
        blank = blank_mask(chunk["request_id"])
        if blank.any():
            raise InputRowsError("request_id", np.flatnonzero(blank), "a blank request id").located(name, first_row)
        chunk = chunk.assign(**{_ROW: np.arange(first_row, first_row + len(chunk), dtype=np.int64)})
        chunk, rejected = _reject_bad_rows(chunk, recommender)
        for frame, owner in ((chunk, part), (rejected, REJECTED_PART)):
            hashes.append(_id_hashes(frame["request_id"]))
            parts.append(np.full(len(frame), owner, dtype=np.int64))
        _write_parquet(pa.Table.from_pandas(chunk, preserve_index=False), staging / f"requests-{part:05d}.parquet")
        _write_parquet(pa.Table.from_pandas(rejected, schema=_REJECTED_SCHEMA, preserve_index=False),
                       staging / f"rejected-{part:05d}.parquet")
        counts.append(len(chunk))
        report(len(chunk) + len(rejected))
    if not counts:  # an empty input: one empty part, so the output exists with its schema
        empty = pd.DataFrame({c: pd.Series(dtype=object) for c in columns}).assign(**{_ROW: np.zeros(0, np.int64)})
        _write_parquet(pa.Table.from_pandas(empty, preserve_index=False), staging / "requests-00000.parquet")
        counts, hashes, parts = [0], [np.zeros(0, np.uint64)], [np.zeros(0, np.int64)]
    hashes = np.concatenate(hashes)
    parts = np.concatenate(parts)
    order = np.argsort(hashes, kind="stable")  # file order among equal ids: the later rows are the repeats
    hashes, parts = hashes[order], parts[order]
    repeated = np.flatnonzero(hashes[1:] == hashes[:-1]) + 1
    if repeated.size:
        rows = np.sort(order[repeated])  # 0-based data rows of the file
        raise InputRowsError("request_id", rows, "a request id given before (one row per request)").located(name, 1)
    return counts, hashes, parts


#: The part number of a request that is not scored (its row is in ``_rejected.parquet``).
REJECTED_PART = -1
REJECTED_FILE = "_rejected.parquet"
_REJECTED_SCHEMA = pa.schema([("request_id", pa.string()), ("row", pa.int64()), ("column", pa.string()),
                              ("problem", pa.string()), ("value", pa.string())])


def _reject_bad_rows(chunk: pd.DataFrame, recommender: Recommender) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Split requests into those the recommender can score and the rejected ones, with a status per row.

    The checks are the recommender's own (``timestamp``, ``k``), made before
    any scoring; each rejected row keeps its request id, 1-based data row, the
    column and the problem, so no request disappears without a trace.
    """
    rejected = []
    while len(chunk):
        try:
            recommender.request_times(chunk)
            recommender.request_k(chunk, DEFAULT_K)
            break
        except InputRowsError as error:
            bad = chunk.iloc[error.rows]
            rejected.append(pd.DataFrame({"request_id": bad["request_id"].astype(str).to_numpy(),
                                          "row": bad[_ROW].to_numpy(dtype=np.int64), "column": error.column,
                                          "problem": error.problem,
                                          "value": bad[error.column].astype(str).to_numpy()}))
            chunk = chunk.drop(index=bad.index)
    rejected = (pd.concat(rejected, ignore_index=True) if rejected
                else pd.DataFrame({f.name: pd.Series(dtype="int64" if f.name == "row" else object)
                                   for f in _REJECTED_SCHEMA}))
    return chunk.reset_index(drop=True), rejected


def _stage_candidates(candidates, name: str, staging: Path, hashes: np.ndarray, parts: np.ndarray) -> None:
    """Route every candidate row to the part of its request."""
    columns = _columns_of(candidates)
    missing = [c for c in ("request_id", "item_id") if c not in columns]
    if missing:
        raise ValueError(f"{name}: the candidates need the column(s) {missing}; the file has {columns}.")
    for chunk_index, (first_row, chunk) in enumerate(_iter_input(candidates, _CANDIDATE_CHUNK_ROWS,
                                                                  ["request_id", "item_id"])):
        for column in ("request_id", "item_id"):
            blank = blank_mask(chunk[column])
            if blank.any():
                raise InputRowsError(column, np.flatnonzero(blank), f"a blank {column}").located(name, first_row)
        ids = _id_hashes(chunk["request_id"])
        at = np.minimum(np.searchsorted(hashes, ids), max(hashes.size - 1, 0))
        unknown = hashes[at] != ids
        if unknown.any():
            rows = np.flatnonzero(unknown)
            raise InputRowsError("request_id", rows, "a request id that is not in the requests",
                                 chunk["request_id"].iloc[rows].tolist()).located(name, first_row)
        owner = parts[at]
        chunk = chunk.assign(**{_ROW: np.arange(first_row, first_row + len(chunk), dtype=np.int64)})
        for part in np.unique(owner[owner != REJECTED_PART]):  # a rejected request's candidates go with it
            rows = chunk.loc[owner == part].reset_index(drop=True)
            _write_parquet(pa.Table.from_pandas(rows, preserve_index=False),
                           staging / f"candidates-{part:05d}-{chunk_index:05d}.parquet")


def _write_parquet(table: pa.Table, path: Path) -> None:
    """Write whole or not at all: a temporary name, then a rename."""
    temporary = path.with_name(f".{path.name}.tmp")
    pq.write_table(table, temporary)
    os.replace(temporary, path)


def _write_json(data: dict, path: Path) -> None:
    temporary = path.with_name(f".{path.name}.tmp")
    temporary.write_text(json.dumps(data, indent=2, sort_keys=True))
    os.replace(temporary, path)


# ---------------------------------------------------------------------------- the job
def prepare_job(out: str | os.PathLike, model_folder: str | os.PathLike, requests, *, candidates=None,
                k: int = DEFAULT_K, explain: str = "none", format: str = "parquet",
                chunk_rows: int = DEFAULT_CHUNK_ROWS, report: Callable[[int], None] | None = None,
                explore=None, explore_slots: int = 1, policies=None, items=None, history=None) -> list[int]:
    """Create or reopen a job folder and stage its inputs; return the parts still to compute.

    Parameters
    ----------
    out : path
        The job's folder: new, empty, or holding this same job (then it resumes).
    model_folder : path
        A model folder of :func:`threefold.models.model_io.save_model` with serving metadata.
    requests : path or DataFrame
        One row per request: ``request_id``, ``user_id``, optional ``timestamp``,
        ``k`` and context columns (see :class:`~threefold.ranking.recommender.Recommender`).
    candidates : path or DataFrame or None
        Long table ``request_id``, ``item_id``; a request with no row in it gets
        a ``no_candidates`` row. None: every request ranks the live catalog.
    k : int, default=10
    explain : {"none", "top3", "all"}, default="none"
    format : {"parquet", "csv"}, default="parquet"
    chunk_rows : int, default=50,000
        Requests per part.
    report : callable(int) or None
        Called with the number of requests staged, chunk by chunk (progress).
    explore : None, "off", "thompson" or float, default None
        Exploration of items with a posterior covariance (refreshed models); Thompson
        samples are seeded by part, so a rerun or a Dask run gives the same lists.
    explore_slots : int, default=1
    policies : path, mapping or None
        List policies (a TOML file or a parsed ``[policies]`` table;
        :mod:`threefold.ranking.policy_spec`), applied before the cut to K.
    items : path, DataFrame or None
        The items catalog the rules' columns come from.
    history : path or None
        Event log for repetition control (:func:`threefold.ranking.history.read_history`).

    Returns
    -------
    list of int
        Indices of the parts not written yet (empty when the job is complete).

    Raises
    ------
    JobMismatch
        ``out`` holds a job with other arguments, or files that are not a job's.
    InputRowsError
        Bad values in the inputs (file, column and rows named).
    """
    k = check_int("k", k, low=1, owner="score")
    check_choice("explain", explain, EXPLAIN_CHOICES, owner="score")
    check_choice("format", format, FORMATS, owner="score")
    chunk_rows = check_int("chunk_rows", chunk_rows, low=1, owner="score")
    explore = parse_explore(explore)
    explore_slots = check_int("explore_slots", explore_slots, low=0, owner="score")
    out = Path(out)
    report = report or (lambda n: None)
    requests_name, requests_sha = _content_sha256(requests)
    candidates_name, candidates_sha = _content_sha256(candidates) if candidates is not None else (None, None)
    arguments = JobArguments(model=bundle_fingerprint(model_folder), model_path=str(Path(model_folder).resolve()),
                             requests=requests_name, requests_sha256=requests_sha, candidates=candidates_name,
                             candidates_sha256=candidates_sha, k=k, explain=explain, format=format,
                             chunk_rows=chunk_rows, explore="off" if explore is None else str(explore),
                             explore_slots=explore_slots,
                             policies=None if policies is None or not isinstance(policies, (str, os.PathLike))
                             else str(policies), policies_sha256=policy_digest(policies, items, history))
    if policies is not None and explore is not None:
        raise ValueError("Exploration and list policies cannot be combined yet: score with --explore or with "
                         "--policies.")
    if policies is None and (items is not None or history is not None):
        raise ValueError("--items and --history feed the list policies; give --policies too.")
    _open_folder(out, arguments)
    staging = out / STAGING
    if (out / MANIFEST_FILE).is_file():
        return []
    staged = _staged(out)
    if staged is None:
        recommender = _recommender(arguments)
        shutil.rmtree(staging, ignore_errors=True)
        staging.mkdir(parents=True)
        if policies is not None:  # the rules are checked before any request is read
            stage_policies(staging, policies, items, history, recommender, lambda n: None)
        counts, hashes, parts = _stage_requests(requests, requests_name, staging, chunk_rows, recommender, report)
        if candidates is not None:
            _stage_candidates(candidates, candidates_name, staging, hashes, parts)
        staged = {"parts": counts}
        _write_json(staged, staging / _STAGED)
    else:
        report(sum(staged["parts"]))
    return [i for i in range(len(staged["parts"])) if not _part_path(out, i, format).is_file()]


def _open_folder(out: Path, arguments: JobArguments) -> None:
    """Create the folder and its job file, or check that it holds this job."""
    job_file = out / JOB_FILE
    if job_file.is_file():
        saved = json.loads(job_file.read_text())
        if saved.get("format_name") != _JOB_FORMAT:
            raise JobMismatch(f"{job_file} is not a threefold score job ({saved.get('format_name')!r}).")
        previous = JobArguments(**saved["arguments"])
        differences = arguments.differences(previous)
        if differences:
            raise JobMismatch(
                f"{out} holds a score job with other arguments ({'; '.join(differences)}). Rerun with the same "
                "arguments to resume it, or write to another --out folder (or delete this one)."
            )
        if previous.model_path != arguments.model_path:
            _write_json({"format_name": _JOB_FORMAT, "arguments": asdict(arguments)}, job_file)
        return
    if out.exists() and (not out.is_dir() or any(p.name != MODEL_COPY for p in out.iterdir())):
        raise JobMismatch(f"{out} exists and is not a score job's folder; write to a new or empty folder.")
    out.mkdir(parents=True, exist_ok=True)
    _write_json({"format_name": _JOB_FORMAT, "arguments": asdict(arguments)}, job_file)


def _staged(out: Path) -> dict | None:
    path = out / STAGING / _STAGED
    return json.loads(path.read_text()) if path.is_file() else None


def _part_path(out: Path, index: int, format: str) -> Path:
    return out / f"part-{index:05d}.{format}"


def job_arguments(out: str | os.PathLike) -> JobArguments:
    """The arguments recorded in a job folder."""
    return JobArguments(**json.loads((Path(out) / JOB_FILE).read_text())["arguments"])


def job_parts(out: str | os.PathLike) -> list[int]:
    """Requests per part of a staged job."""
    staged = _staged(Path(out))
    if staged is None:
        raise ValueError(f"{out}: the job's inputs are not staged; run prepare_job first.")
    return list(staged["parts"])


_LOADED: dict[tuple[str, str], Recommender] = {}


def _recommender(arguments: JobArguments) -> Recommender:
    """The job's recommender, loaded once per process (Dask workers keep it between parts)."""
    key = (arguments.model_path, arguments.model)
    if key not in _LOADED:
        if bundle_fingerprint(arguments.model_path) != arguments.model:
            raise JobMismatch(f"The model at {arguments.model_path} is not the one this job was started with.")
        _LOADED.clear()
        _LOADED[key] = Recommender.from_folder(arguments.model_path)
    return _LOADED[key]


def _part_input(out: Path, index: int) -> tuple[pd.DataFrame, bool]:
    """The rows a part ranks: its requests, then its candidate rows joined to them; and whether candidates apply."""
    staging = out / STAGING
    requests = pq.read_table(staging / f"requests-{index:05d}.parquet").to_pandas().drop(columns=[_ROW])
    arguments = job_arguments(out)
    if arguments.candidates_sha256 is None:
        return requests, False
    files = sorted(staging.glob(f"candidates-{index:05d}-*.parquet"))
    base = requests.drop(columns=["item_id"], errors="ignore")
    if not files:
        return base, True
    candidates = pd.concat([pq.read_table(f).to_pandas() for f in files], ignore_index=True)
    joined = candidates.drop(columns=[_ROW]).merge(base, on="request_id", how="left", sort=False)
    return pd.concat([base, joined[list(base.columns) + ["item_id"]]], ignore_index=True), True


def _schema(recommender: Recommender, explain: str, explore: str = "off", policies: bool = False) -> pa.Schema:
    """The output schema: one type per column whatever a part holds (all-empty columns included)."""
    fields = []
    for name in recommender.output_columns(explain, explore, policies):
        if name == "rank":
            kind = pa.int64()
        elif name in ("explored", "pinned"):
            kind = pa.bool_()
        elif name == "score" or name.endswith(("_term", "_share")):
            kind = pa.float64()
        else:
            kind = pa.string()
        fields.append(pa.field(name, kind))
    return pa.schema(fields)


def score_part(out: str | os.PathLike, index: int) -> int:
    """Compute part ``index`` of a staged job (a no-op when it is written); return its number of requests.

    Runs in any process that sees the job folder and the model folder (a Dask
    worker included); the result depends only on them.
    """
    out = Path(out)
    arguments = job_arguments(out)
    counts = job_parts(out)
    path = _part_path(out, index, arguments.format)
    if path.is_file():
        return counts[index]
    recommender = _recommender(arguments)
    frame, with_candidates = _part_input(out, index)
    with_policies = arguments.policies_sha256 is not None
    tables = staged_policies(out / STAGING, arguments.policies_sha256, recommender) if with_policies else None
    rule_counts = PolicyCounts()
    schema = _schema(recommender, arguments.explain, arguments.explore, with_policies)
    if len(frame):
        ranked = recommender.recommend(frame, k=arguments.k, explain=arguments.explain, catalog=not with_candidates,
                                       explore=arguments.explore, explore_slots=arguments.explore_slots,
                                       explore_seed=[0, index], policies=tables, policy_counts=rule_counts)
        table = pa.Table.from_pandas(ranked, schema=schema, preserve_index=False)
    else:  # nothing to score in this part (an empty input, or every request rejected)
        table = schema.empty_table()
    if with_policies:  # before the part lands: a finished part always has its counts
        write_counts(out / STAGING, index, rule_counts)
    temporary = path.with_name(f".{path.name}.tmp")
    if arguments.format == "parquet":
        pq.write_table(table, temporary)
    else:
        pcsv.write_csv(table, temporary)
    os.replace(temporary, path)
    return counts[index]


def finish_job(out: str | os.PathLike) -> dict:
    """Check that every part is written, write the manifest (last), remove the staging; return the manifest.

    Raises
    ------
    ValueError
        If a part is missing (compute it with :func:`score_part` first).
    """
    out = Path(out)
    manifest_path = out / MANIFEST_FILE
    if manifest_path.is_file():
        return json.loads(manifest_path.read_text())
    arguments = job_arguments(out)
    counts = job_parts(out)
    missing = [i for i in range(len(counts)) if not _part_path(out, i, arguments.format).is_file()]
    if missing:
        raise ValueError(f"{out}: part(s) {missing[:5]} are not written yet; rerun the job to compute them.")
    parts = []
    for index, n_requests in enumerate(counts):
        path = _part_path(out, index, arguments.format)
        rows = (pq.read_metadata(path).num_rows if arguments.format == "parquet"
                else sum(batch.num_rows for batch in _csv_reader(path)))
        parts.append({"file": path.name, "requests": n_requests, "rows": rows, "sha256": sha256_file(path)})
    rejected = pa.concat_tables([pq.read_table(f, schema=_REJECTED_SCHEMA) for f in
                                 sorted((out / STAGING).glob("rejected-*.parquet"))] or [_REJECTED_SCHEMA.empty_table()])
    _write_parquet(rejected.sort_by("row"), out / REJECTED_FILE)
    manifest = {"format_name": _JOB_FORMAT, "arguments": asdict(arguments), "parts": parts,
                "requests": sum(counts), "rows": sum(p["rows"] for p in parts),
                "rejected": {"file": REJECTED_FILE, "requests": rejected.num_rows,
                             "sha256": sha256_file(out / REJECTED_FILE)}}
    if arguments.policies_sha256 is not None:
        manifest["policies"] = summed_counts(out / STAGING)
    _write_json(manifest, manifest_path)
    shutil.rmtree(out / STAGING, ignore_errors=True)
    return manifest


def read_output(out: str | os.PathLike) -> pd.DataFrame:
    """The finished output of a job as one DataFrame, parts in order.

    Raises
    ------
    ValueError
        If the job has no manifest yet (not finished).
    """
    out = Path(out)
    manifest_path = out / MANIFEST_FILE
    if not manifest_path.is_file():
        raise ValueError(f"{out} has no {MANIFEST_FILE}: the job has not finished; rerun it to resume.")
    manifest = json.loads(manifest_path.read_text())
    if manifest["arguments"]["format"] == "parquet":
        tables = [pq.read_table(out / part["file"]) for part in manifest["parts"]]
    else:
        tables = [_csv_reader(out / part["file"]).read_all() for part in manifest["parts"]]
    return pa.concat_tables(tables).to_pandas() if tables else pd.DataFrame()


def _csv_reader(path: Path):
    """A streaming reader of an output CSV part, typed as written (ids stay text)."""
    names = pcsv.open_csv(path, read_options=pcsv.ReadOptions(block_size=1 << 16)).schema.names
    numeric = {"rank": pa.int64(), "score": pa.float64()}
    types = {n: numeric.get(n, pa.float64() if n.endswith(("_term", "_share")) else pa.string()) for n in names}
    return pcsv.open_csv(path, convert_options=pcsv.ConvertOptions(column_types=types, strings_can_be_null=True))
