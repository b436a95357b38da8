"""Save and load fitted CP and Tucker models as pickle-free, checksummed bundles.

A model folder is a :mod:`threefold.core.bundle`: versioned subfolders holding
``meta.json`` (format version, model type, modes, vocabularies, fit parameters,
training-data fingerprint, the caller's extra metadata) and ``arrays.npz``
(factors, weights or core, fit history), every file listed with its SHA-256 in
``checksums.json``; a small ``selected.txt`` pointer is switched atomically after the
new version is synced, so an interrupted save leaves the previous model
loadable. Loading verifies every checksum, the bundle format and this module's
model format version before any array is used, reads arrays with
``allow_pickle=False``, and rebuilds the result container (which validates
shapes again). Nothing in the folder or the load path uses pickle.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Mapping

import numpy as np

from threefold.core.bundle import BundleError, read_bundle, write_bundle
from threefold.models.cp.model import CPResult
from threefold.models.fitloop import SweepRecord
from threefold.models.tucker.hooi import HOOIResult
from threefold.models.tucker.implicit import ImplicitTuckerResult
from threefold.models.tucker.result import TuckerResult
from threefold.core.vocabulary import Vocabulary

__all__ = ["MODEL_FORMAT_VERSION", "ModelFileError", "save_model", "load_model", "read_model_metadata"]

#: Version of the model layout inside a bundle; a model of another version is refused on load.
MODEL_FORMAT_VERSION = 1
_KIND = "threefold-model"
_HISTORY_FIELDS = ("sweep", "loss", "fit", "seconds")


class ModelFileError(BundleError):
    """A model folder is missing, altered, or of another format version or model type."""


#: Result classes by the model type (and Tucker method) a model file records.
RESULT_CLASSES = {"cp": CPResult, "tucker/hooi": HOOIResult, "tucker/implicit": ImplicitTuckerResult}


def _history_array(history) -> np.ndarray:
    return np.array([[getattr(r, f) for f in _HISTORY_FIELDS] for r in history], dtype=np.float64).reshape(-1, 4)


def _history(array: np.ndarray) -> tuple[SweepRecord, ...]:
    return tuple(SweepRecord(int(r[0]), float(r[1]), float(r[2]), float(r[3])) for r in array)


def save_model(
    result: CPResult | TuckerResult,
    path: str | os.PathLike,
    *,
    parameters: Mapping | None = None,
    training_fingerprint: Mapping | None = None,
    extra: Mapping | None = None,
    extra_arrays: Mapping[str, np.ndarray] | None = None,
) -> Path:
    """Write a fitted model as a new version of the model folder at ``path``.

    Parameters
    ----------
    result : CPResult or TuckerResult
        A fitted model (an estimator's ``result_``).
    path : path
        Model folder; created if missing. An existing model stays current until
        the new version is complete.
    parameters : mapping, optional
        The fit parameters (JSON-serializable), recorded as they were given.
    training_fingerprint : mapping, optional
        What the model was trained on (file checksums, row counts, time range).
    extra : mapping, optional
        More JSON metadata (e.g. the context specifications used to build the tensor).
    extra_arrays : mapping of str to ndarray, optional
        More arrays (numeric or fixed-width strings), returned by :func:`load_model`
        under the same names.

    Returns
    -------
    Path of the new version folder.
    """
    if not isinstance(result, (CPResult, TuckerResult)):
        raise TypeError(f"save_model needs a CPResult or TuckerResult, got {type(result).__name__}; "
                        "pass an estimator's result_.")
    model_type, arrays, specifics = result.file_contents()
    for n, factor in enumerate(result.factors):
        arrays[f"factor_{n}"] = factor
    arrays["history"] = _history_array(result.history)
    for name, array in (extra_arrays or {}).items():
        arrays[f"extra_{name}"] = np.asarray(array)
    if any(v is None for v in result.vocabularies):
        raise ValueError("save_model needs a vocabulary for every mode, to map ids to factor rows on load.")
    metadata = {
        "model_format_version": MODEL_FORMAT_VERSION,
        "model_type": model_type,
        "mode_names": list(result.mode_names),
        "shape": list(result.shape),
        "dtype": result.factors[0].dtype.name,
        "vocabularies": [v.to_json() for v in result.vocabularies],
        "stop_reason": result.stop_reason,
        "w0": float(result.w0),
        "reg": float(result.reg),
        **specifics,
        "parameters": dict(parameters or {}),
        "training_fingerprint": dict(training_fingerprint or {}),
        "extra": dict(extra or {}),
    }
    return write_bundle(path, _KIND, metadata, arrays)


def read_model_metadata(path: str | os.PathLike) -> dict:
    """The verified JSON metadata of the current model version (checksums checked)."""
    return _read(path)[0]


def _read(path) -> tuple[dict, dict[str, np.ndarray]]:
    try:
        meta, arrays = read_bundle(path, _KIND)
    except BundleError as error:
        raise ModelFileError(f"Cannot load the model at {path}: {error}") from None
    version = meta.get("model_format_version")
    if version != MODEL_FORMAT_VERSION:
        raise ModelFileError(
            f"The model at {path} has model format version {version!r}; this threefold reads version "
            f"{MODEL_FORMAT_VERSION}. Load it with the threefold version that wrote it, or retrain."
        )
    return meta, arrays


def load_model(path: str | os.PathLike) -> tuple[CPResult | TuckerResult, dict, dict[str, np.ndarray]]:
    """Read and verify a model written by :func:`save_model`.

    Returns
    -------
    result : CPResult or TuckerResult
    metadata : dict
        The JSON metadata (``parameters``, ``training_fingerprint``, ``extra``, ...).
    extra_arrays : dict of str to ndarray

    Raises
    ------
    ModelFileError
        When the pointer, manifest or a file's checksum does not match (naming
        the file), or the format version or model type is not this module's.
    """
    meta, arrays = _read(path)
    ndim = len(meta["mode_names"])
    missing = [f"factor_{n}" for n in range(ndim) if f"factor_{n}" not in arrays] + [
        name for name in ("history",) + (("weights", "column_norms") if meta["model_type"] == "cp" else ("core",))
        if name not in arrays]
    if missing:
        raise ModelFileError(f"The model at {path} lacks the array(s) {missing}.")
    factors = tuple(arrays[f"factor_{n}"] for n in range(ndim))
    vocabularies = tuple(Vocabulary.from_json(v) for v in meta["vocabularies"])
    common = dict(factors=factors, mode_names=tuple(meta["mode_names"]), vocabularies=vocabularies,
                  history=_history(arrays["history"]), stop_reason=meta["stop_reason"], w0=meta["w0"], reg=meta["reg"])
    kind = meta["model_type"] if meta["model_type"] != "tucker" else f"tucker/{meta.get('method')}"
    if kind not in RESULT_CLASSES:
        raise ModelFileError(f"The model at {path} has the unknown model type {kind!r}.")
    result = RESULT_CLASSES[kind].from_file_contents(meta, arrays, common)
    if list(result.shape) != list(meta["shape"]):
        raise ModelFileError(f"The model at {path} records shape {meta['shape']} but its factors give {list(result.shape)}.")
    extra = {name[len("extra_"):]: array for name, array in arrays.items() if name.startswith("extra_")}
    return result, meta, extra
