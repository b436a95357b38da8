"""``threefold explain``: the factor report of a trained model, from a model folder or a run.

Reads the model (:func:`threefold.tracking.pyfunc.model_folder`), the catalog
(``items``), the context-gain report its run recorded (``context_gain/report.json``,
written by ``train`` for ``"auto"`` models), refits its specification on a
training tensor for the stability diagnostics when one is given, compares
context settings, writes the report (:mod:`threefold.explain.report`) and logs
its files as artifacts ``explain/`` of the model's run.
"""

from __future__ import annotations

import json
import os
import warnings
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Sequence

import numpy as np
import pandas as pd

if TYPE_CHECKING:
    from threefold.explain.report import Stability

__all__ = ["explain_model", "parse_setting", "stability"]

#: Users compared per context comparison when no user is named (the first ones in vocabulary order).
MAX_COMPARE_USERS = 2_000


def parse_setting(text: str, result) -> tuple[np.ndarray, list[str]]:
    """``"device=phone,daypart=evening"`` -> one level index per context mode, and the modes left unset.

    Modes not named are averaged over their levels (uniformly) by the caller.
    """
    names = list(result.mode_names)[2:]
    levels = np.zeros(len(names), dtype=np.int64)
    given = set()
    for part in [p.strip() for p in str(text).split(",") if p.strip()]:
        mode, sep, level = part.partition("=")
        mode, level = mode.strip(), level.strip()
        if not sep or not mode or not level:
            raise ValueError(f"--compare {text!r}: write each setting as MODE=LEVEL (e.g. device=tablet).")
        if mode not in names:
            raise ValueError(f"--compare {text!r}: the model has no context mode {mode!r}; its modes are {names}.")
        vocab = result.vocabularies[2 + names.index(mode)]
        labels = [str(x) for x in vocab.labels]
        if level not in labels:
            raise ValueError(f"--compare {text!r}: {mode} has no level {level!r}; its levels are {labels}.")
        levels[names.index(mode)] = labels.index(level)
        given.add(mode)
    if not given:
        raise ValueError(f"--compare {text!r}: name at least one MODE=LEVEL.")
    return levels, [m for m in names if m not in given]


def stability(spec: dict, tensor, seeds: int = 2) -> "Stability":
    """Refit the model's specification on ``tensor``: other seeds, and two halves of the users.

    The seeds' factor match scores are against the refit with the spec's own
    seed on the same tensor (so every fit sees the same rows); the halves hold
    the cells of users with even and odd indices and are compared over the
    non-user modes. CORCONDIA is computed for plain CP (one term over every mode).
    """
    from threefold.explain.diagnostics import core_consistency, factor_match_score
    from threefold.explain.report import Stability
    from threefold.pipeline.stages import make_estimator

    def fit(data, seed):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", category=UserWarning)
            return make_estimator({**spec, "random_state": seed}).fit(data).result_

    base_seed = int(spec.get("random_state") or 0)
    reference = fit(tensor, base_seed)
    scores = {}
    for s in range(1, int(seeds) + 1):
        scores[base_seed + s] = factor_match_score(_comparable(reference), _comparable(fit(tensor, base_seed + s)))[0]
    users = tensor.coords[0]
    halves = [fit(tensor.take(np.flatnonzero(users % 2 == parity)), base_seed) for parity in (0, 1)]
    half_score = factor_match_score(_comparable(halves[0])[1:], _comparable(halves[1])[1:])[0]
    corcondia = None
    structure = getattr(reference, "structure", None)
    if structure is not None and len(structure.terms) == 1 and len(structure.terms[0].modes) == tensor.ndim:
        corcondia = core_consistency(tensor, reference.factors, reference.weights)
    return Stability(seeds=scores, halves=(half_score,), corcondia=corcondia)


def _comparable(result) -> list[np.ndarray]:
    """The CP factor matrices as float64 (columns are matched by the factor match score)."""
    return [np.asarray(f, dtype=np.float64) for f in result.factors]


def _read_id_table(path, flag: str, column: str) -> pd.DataFrame:
    """A small CSV or Parquet file of ``--items`` or ``--segment``, with a non-blank ``column`` (read as strings).

    Errors name the flag, the file, the column and the 1-based data rows.
    """
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"{flag} {path}: no such file.")
    frame = pd.read_parquet(path) if path.suffix.lower() in (".parquet", ".pq") else pd.read_csv(path, dtype=str)
    if column not in frame.columns:
        raise ValueError(f"{flag} {path}: no {column} column; the columns are {list(frame.columns)}.")
    blank = frame[column].isna() | (frame[column].astype(str).str.strip() == "")
    if blank.any():
        rows = (np.flatnonzero(blank.to_numpy()) + 1)[:5].tolist()
        raise ValueError(f"{flag} {path}: column {column} is blank in data row(s) {rows}.")
    return frame


def _segment_rows(segment, labels: dict) -> np.ndarray:
    """Model rows of a user segment (a file with a ``user_id`` column, or a sequence of ids)."""
    if isinstance(segment, (str, os.PathLike)):
        frame = _read_id_table(segment, "--segment", "user_id")
        ids, where = frame["user_id"].astype(str).str.strip().tolist(), f"--segment {Path(segment)}"
    else:
        ids, where = [str(u) for u in segment], "segment"
    unknown = [(row, u) for row, u in enumerate(ids, start=1) if u not in labels]
    if unknown:
        shown = ", ".join(f"row {row}: {u!r}" for row, u in unknown[:5])
        raise ValueError(f"{where}: column user_id names {len(unknown)} user(s) the model does not know ({shown}).")
    if not ids:
        raise ValueError(f"{where}: no users.")
    return np.unique(np.array([labels[u] for u in ids], dtype=np.int64))


def _run_of(model: str, store) -> str | None:
    """The run id behind a run id, a run prefix or a ``runs:/`` URI (None for folders and registry URIs)."""
    text = str(model)
    if Path(text).is_dir() or store is None:
        return None
    if text.startswith("runs:/"):
        return text.removeprefix("runs:/").split("/", 1)[0]
    if all(c in "0123456789abcdef" for c in text) and len(text) >= 6:
        from threefold.tracking.runs import resolve_run

        return resolve_run(store, text).info.run_id
    return None


def _recorded_gain(store, run_id: str | None):
    if run_id is None:
        return None
    import tempfile

    import mlflow

    from threefold.evaluation.context_gain import ContextGain

    try:
        with tempfile.TemporaryDirectory() as tmp:
            local = store.call(mlflow.artifacts.download_artifacts, run_id=run_id,
                               artifact_path="context_gain/report.json", dst_path=tmp)
            data = json.loads(Path(local).read_text())
    except Exception:  # noqa: BLE001 - a run without the report simply has no gain section
        return None
    return ContextGain.from_dict(data)


def rank_trials(store, run_id: str | None) -> pd.DataFrame | None:
    """Sweep trials of the model's run's experiment and model name: ``rank, metric, value, fit`` per trial.

    Reads runs tagged ``threefold.kind = trial`` (``threefold sweep``) with the same
    ``threefold.model`` tag as the model's run; ``value`` is each trial's key
    metric on the validation window, ``fit`` its last training fit. None when
    there are none (or the model is not a run).
    """
    if run_id is None:
        return None
    run = store.call(store.client.get_run, run_id)
    model = run.data.tags.get("threefold.model")
    if not model:
        return None
    rows = []
    token = None
    while True:
        page = store.call(store.client.search_runs, [run.info.experiment_id],
                          f"tags.`threefold.kind` = 'trial' AND tags.`threefold.model` = '{model}' "
                          "AND attributes.status = 'FINISHED'", max_results=1000, page_token=token)
        for trial in page:
            metric = trial.data.tags.get("threefold.key_metrics", "")
            rank = trial.data.params.get("model.rank")
            if rank is None or metric not in trial.data.metrics:
                continue
            rows.append({"rank": int(float(rank)), "metric": metric, "value": trial.data.metrics[metric],
                         "fit": trial.data.metrics.get("fit", np.nan)})
        token = page.token
        if not token:
            break
    if not rows:
        return None
    return (pd.DataFrame(rows).groupby(["rank", "metric"], as_index=False)
            .agg(value=("value", "mean"), fit=("fit", "mean"), trials=("value", "size")))


def explain_model(model: str | os.PathLike, *, out: str | os.PathLike, items=None, tensor=None, seeds: int = 2,
                  compare: Sequence[tuple[str, str]] = (), user: str | None = None, segment=None, k: int = 10,
                  n_top: int = 10, store=None, echo: Callable[[str], None] = print):
    """Write the factor report of ``model`` into ``out`` (and log it on the model's run); returns the Report.

    Parameters
    ----------
    model : str or path
        What ``threefold score`` accepts: a model folder, a run id, ``runs:/`` or ``models:/`` URI.
    out : path
        Folder for ``report.html``, ``report.json`` and ``summary.txt``.
    items : path or DataFrame, optional
        The item catalog (``item_id`` and attribute columns) for the factor labels.
    tensor : path or SparseTensor, optional
        A training tensor (``threefold build``'s folder) for stability and core consistency.
    seeds : int, default=2
        Refits with other seeds for the stability diagnostic.
    compare : sequence of (str, str)
        Pairs of settings such as ``("device=phone", "device=tv")``.
    user : str, optional
        Compare the lists of this user only (default: up to 2,000 users).
    segment : path or sequence of str, optional
        Compare the lists of these users only: a CSV or Parquet file with a
        ``user_id`` column, or the ids themselves. Ids the model does not know
        are refused, naming the first few.
    k, n_top : int
        List length of the comparisons; top items and users per factor.
    store : RunStore, optional
    """
    from threefold.core.tensor_io import load_tensor
    from threefold.evaluation.context_gain import marginalize_mode
    from threefold.explain.compare import compare_contexts
    from threefold.explain.report import build_report
    from threefold.models.model_io import load_model
    from threefold.tracking.pyfunc import model_folder

    folder = model_folder(model, store=store)
    result, meta, _ = load_model(folder)
    spec = dict(meta.get("parameters") or {})
    run_id = _run_of(str(model), store)
    catalog = items
    if items is not None and not isinstance(items, pd.DataFrame):
        catalog = _read_id_table(items, "--items", "item_id")
    notes = []
    if catalog is None:
        notes.append("No catalog was given (--items): factors are labelled by their context levels only.")
    gain = _recorded_gain(store, run_id)
    stab = None
    if tensor is not None:
        data = tensor if hasattr(tensor, "coords") else load_tensor(tensor)
        if tuple(data.mode_names) != tuple(result.mode_names):
            raise ValueError(f"--tensor: its modes {tuple(data.mode_names)} differ from the model's "
                             f"{tuple(result.mode_names)}.")
        if spec.get("method") != "cp":
            notes.append("Stability and core consistency are measured for CP models (Tucker factors are defined "
                         "only up to rotation, so their columns cannot be matched one to one).")
        else:
            echo(f"refitting {spec['method']} on the tensor for stability ({seeds} seeds, 2 halves of the users)")
            stab = stability(spec, data, seeds)
    comparisons = []
    users = np.arange(min(result.shape[0], MAX_COMPARE_USERS))
    if user is not None and segment is not None:
        raise ValueError("--user and --segment name the compared users twice; give one of them.")
    labels = {str(x): i for i, x in enumerate(result.vocabularies[0].labels)}
    if user is not None:
        if str(user) not in labels:
            raise ValueError(f"--user {user!r} is not a user of the model ({len(labels):,} users).")
        users = np.array([labels[str(user)]])
    if segment is not None:
        users = _segment_rows(segment, labels)
    for a_text, b_text in compare:
        a, free_a = parse_setting(a_text, result)
        b, free_b = parse_setting(b_text, result)
        scorer = result
        names = list(result.mode_names)
        for mode in sorted(set(free_a) & set(free_b)):  # modes set on neither side: averaged over their levels
            n = names.index(mode)
            scorer = marginalize_mode(scorer, n, np.full(result.shape[n], 1.0 / result.shape[n]))
        if set(free_a) ^ set(free_b):
            raise ValueError(f"--compare {a_text!r} {b_text!r}: name the same modes on both sides "
                             f"(one side leaves {sorted(set(free_a) ^ set(free_b))} unset).")
        comparisons.append(compare_contexts(scorer, users, a, b, k=k, label_a=a_text, label_b=b_text,
                                            column_labels=_column_labels(result)))
    name = meta.get("extra", {}).get("name") or Path(str(model)).name
    if run_id is not None:
        run = store.call(store.client.get_run, run_id)
        name = f"{run.data.tags.get('threefold.model', name)} (run {run_id[:8]})"
    title = f"factor report: {name}"
    ranks = rank_trials(store, run_id)
    report = build_report(result, title=title, catalog=catalog, n_top=n_top, gain=gain, stability=stab,
                          comparisons=comparisons, notes=notes, ranks=ranks)
    path = report.write(out)
    echo(report.to_text())
    echo(f"report: {path}")
    if run_id is not None:
        store.call(store.client.log_artifacts, run_id, str(out), "explain")
        echo(f"logged as artifacts explain/ of run {run_id}")
    return report


def _column_labels(result) -> list[str]:
    if hasattr(result, "structure"):
        return list(result.structure.component_labels())
    return [f"item column {j}" for j in range(np.asarray(result.factors[1]).shape[1])]
