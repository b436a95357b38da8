"""Serve a saved model to any MLflow client: ranked lists per request, with defined fallbacks.

:class:`Recommender` ranks items for a DataFrame of requests; :class:`RecommenderPyfunc`
wraps it as an MLflow pyfunc model *written as code* (models-from-code: MLflow
runs ``_pyfunc_entry.py`` on load and unpickles nothing), reading the model
folder of :mod:`threefold.models.model_io` that is logged beside it. Any MLflow client::

    model = mlflow.pyfunc.load_model("models:/m-...")
    model.predict(requests, params={"k": 10})

Input rows, output columns and the status flags are those of
:class:`threefold.ranking.recommender.Recommender`.
"""

from __future__ import annotations

import os
from pathlib import Path

import mlflow
import numpy as np
import pandas as pd

from threefold.data.context import spec_name
from threefold.ranking.recommender import DEFAULT_K, OUTPUT_COLUMNS, Recommender, context_specs, raw_columns

__all__ = ["Recommender", "RecommenderPyfunc", "OUTPUT_COLUMNS", "signature_for", "pyfunc_entry_path", "log_pyfunc",
           "check_entry_code",
           "log_model_folder",
           "model_folder"]


#: The models-from-code file's name, in the package and at the root of a logged model.
ENTRY_FILE = "_pyfunc_entry.py"


def pyfunc_entry_path() -> Path:
    """The models-from-code file MLflow copies into the logged model and runs on load."""
    return Path(__file__).with_name(ENTRY_FILE)


def signature_for(serving: dict):
    """The MLflow signature of a served model: its input columns, the ``k`` parameter, the output columns."""
    from mlflow.models import ModelSignature
    from mlflow.types.schema import AnyType, ColSpec, ParamSchema, ParamSpec, Schema

    specs = context_specs(serving)
    optional = ["item_id"] + [spec_name(s) for s in specs] + [c for s in specs for c in raw_columns(s)]
    # timestamp and k: any type, parsed by the recommender (ISO 8601 text or epoch seconds, as the event reader)
    inputs = [ColSpec("string", "request_id"), ColSpec("string", "user_id"),
              ColSpec(AnyType(), "timestamp", required=False), ColSpec(AnyType(), "k", required=False)]
    inputs += [ColSpec("string", name, required=False) for name in dict.fromkeys(optional)]
    outputs = [ColSpec("string", "request_id"), ColSpec("string", "user_id"), ColSpec("long", "rank"),
               ColSpec("string", "item_id", required=False), ColSpec("double", "score", required=False)]
    outputs += [ColSpec("string", spec_name(s), required=False) for s in specs]
    outputs += [ColSpec("string", "user_status"), ColSpec("string", "item_status", required=False),
                ColSpec("string", "status")]
    return ModelSignature(inputs=Schema(inputs), outputs=Schema(outputs), params=ParamSchema([ParamSpec("k", "long", DEFAULT_K), ParamSpec("explain", "string", "none")]))


def log_pyfunc(store, result, serving: dict, *, published: np.ndarray | None = None, expires: np.ndarray | None = None,
               parameters: dict | None = None, training_fingerprint: dict | None = None, name: str = "model",
               extra: dict | None = None, extra_arrays: dict | None = None) -> str:
    """Save ``result`` as a model folder and log it as a pyfunc model of the active run.

    Parameters
    ----------
    store : threefold.tracking.store.RunStore
    result : CPResult or TuckerResult
    serving : dict
        ``contexts``, ``timezone``, ``daypart_starts``, ``daypart_labels``: how
        requests' context levels are derived (as in the config's ``[build]``);
        ``build`` and ``trained_until`` for refreshes.
    published, expires : ndarray of shape (n_items,), int64, or None
        Live interval of each item (see :class:`Recommender`).
    parameters, training_fingerprint : dict or None
        Recorded in the model folder's metadata.
    name : str, default="model"
    extra, extra_arrays : dict or None
        More metadata and arrays of the model folder.

    Returns
    -------
    str
        The model URI MLflow returns (``models:/...``).
    """
    import tempfile

    from threefold.models.model_io import save_model

    arrays = {k: v for k, v in (("published_at", published), ("expires_at", expires)) if v is not None}
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "model"
        save_model(result, folder, parameters=parameters, training_fingerprint=training_fingerprint,
                   extra={**(extra or {}), "serving": serving, "name": name},
                   extra_arrays={**arrays, **(extra_arrays or {})})
        return log_model_folder(store, folder, serving, name=name)


def log_model_folder(store, folder: str | os.PathLike, serving: dict, *, name: str = "model") -> str:
    """Log an existing model folder as a pyfunc model of the active run; returns the model URI."""
    import importlib.metadata
    import shutil
    import tempfile
    import warnings

    from threefold import __version__

    requirements = [f"threefold=={__version__}"] + [f"{lib}=={importlib.metadata.version(lib)}" for lib in
                                                    ("mlflow", "numpy", "pandas", "scipy", "numba", "pyarrow")]
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(folder)
        if folder.name != "model":  # MLflow stores a folder artifact under its own name: artifacts/model
            shutil.copytree(folder, Path(tmp) / "model")
            folder = Path(tmp) / "model"
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # MLflow's advice on type hints and input examples
            info = store.call(mlflow.pyfunc.log_model, name=name, python_model=str(pyfunc_entry_path()),
                              artifacts={"model": str(folder)}, signature=signature_for(serving),
                              pip_requirements=requirements)
    return info.model_uri


class RecommenderPyfunc(mlflow.pyfunc.PythonModel):
    """MLflow pyfunc model around :class:`Recommender`; its model folder is the ``model`` artifact."""

    def load_context(self, context) -> None:
        self.recommender = Recommender.from_folder(context.artifacts["model"])

    def predict(self, context, model_input: pd.DataFrame, params: dict | None = None) -> pd.DataFrame:
        k = (params or {}).get("k", DEFAULT_K)
        explain = (params or {}).get("explain", "none")
        return self.recommender.recommend(model_input, k=int(k) if isinstance(k, (int, np.integer)) else k,
                                          explain=explain)


def check_entry_code(logged: Path) -> None:
    """Refuse a downloaded MLflow model whose models-from-code entry file is not this threefold's.

    ``mlflow.pyfunc.load_model`` runs that file; threefold's own loaders
    (``score``, ``refresh``, ``explain``) only read the model folder, but they
    check the file first so that an edited copy is noticed before anything
    serves the model. The file is compared, by SHA-256, with the one installed
    with threefold, without importing it.
    """
    from threefold.core.bundle import sha256_file

    entry = logged / ENTRY_FILE
    if entry.is_symlink() or not entry.is_file():
        raise ValueError(f"{entry} is missing or a symbolic link: not a model logged by threefold; refused.")
    if sha256_file(entry) != sha256_file(pyfunc_entry_path()):
        raise ValueError(f"{entry} differs from the entry code of this threefold ({pyfunc_entry_path()}): it was "
                         "edited, or logged by another threefold version. Refused: MLflow would run it on load. "
                         "Log the model again with this version (docs/experiments.md, the trust boundary).")


def model_folder(model: str | os.PathLike, *, store=None, download_to: str | os.PathLike | None = None) -> Path:
    """The local model folder behind a model folder path, a run id, or an MLflow model URI.

    Parameters
    ----------
    model : str or path
        * a model folder written by :func:`threefold.models.model_io.save_model`;
        * a downloaded MLflow model (a folder with ``MLmodel`` and ``artifacts/model``);
        * ``runs:/<run id>/<name>`` or ``models:/<name or id>/<version>``: any MLflow model URI;
        * a run id of ``threefold train`` (full, or a unique prefix of 6+ characters):
          the model logged by that run (its ``threefold.model_uri`` tag).
    store : RunStore or None
        Needed for run ids and URIs (:func:`threefold.tracking.store.open_store`).
    download_to : path or None
        Where a model from the store is downloaded (default: a new temporary folder).

    Raises
    ------
    ValueError
        When ``model`` is none of these, or names no model.
    """
    import tempfile

    from threefold.core.bundle import is_bundle
    from threefold.ranking.batch import local_model_folder

    path = Path(model)
    if path.is_dir():
        if (path / "MLmodel").is_file():
            check_entry_code(path)
        return local_model_folder(path)
    text = str(model)
    if store is None:
        raise ValueError(f"{text!r} is not a folder; a run id or model URI needs the run store (--store).")
    if "://" in text or text.startswith(("runs:/", "models:/")):
        uri = text
    else:
        from threefold.tracking.runs import resolve_run

        if not all(c in "0123456789abcdef" for c in text) or len(text) < 6:
            raise ValueError(f"{text!r} is not a model folder, a run id or an MLflow model URI "
                             "(runs:/<run id>/model, models:/<name>/<version>).")
        run = resolve_run(store, text)
        uri = run.data.tags.get("threefold.model_uri")
        if not uri:
            raise ValueError(f"Run {run.info.run_id} logged no model (no threefold.model_uri tag); "
                             "baselines and parent runs have none. Pick a model's run (`threefold runs`).")
    from mlflow.exceptions import MlflowException

    os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")  # our own progress reporting only
    target = Path(download_to) if download_to is not None else Path(tempfile.mkdtemp(prefix="threefold-model-"))
    target.mkdir(parents=True, exist_ok=True)
    try:
        local = Path(store.call(mlflow.artifacts.download_artifacts, artifact_uri=uri, dst_path=str(target)))
    except (MlflowException, OSError) as error:
        raise ValueError(f"Could not fetch the model {uri!r} from {store.location.tracking_uri}: "
                         f"{getattr(error, 'message', error)}") from None
    if (local / "MLmodel").is_file():
        check_entry_code(local)
        return local_model_folder(local)
    for candidate in (local / "model", local):
        if is_bundle(candidate):
            return candidate
    raise ValueError(f"The MLflow model {uri!r} holds no threefold model folder (artifacts/model).")
