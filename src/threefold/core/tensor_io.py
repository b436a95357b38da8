"""Save and load a :class:`~threefold.core.tensor.SparseTensor` as a pickle-free bundle.

The tensor keeps its raw evidence (or stored values), its weighting and its
vocabularies, so a saved tensor can be re-weighted and trained on later without
re-reading the log. See :mod:`threefold.core.bundle` for the crash-safe layout.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from threefold.core.bundle import BundleError, read_bundle, write_bundle
from threefold.core.feedback import CellEvidence, FeedbackWeighting
from threefold.core.tensor import SparseTensor
from threefold.core.vocabulary import Vocabulary

__all__ = ["save_tensor", "load_tensor"]

_KIND = "sparse-tensor"


def save_tensor(tensor: SparseTensor, path: str | os.PathLike, *, extra: dict | None = None) -> Path:
    """Write ``tensor`` as a new version of the bundle at ``path``; returns the version folder.

    ``extra`` is stored alongside as JSON metadata (e.g. the build report).
    """
    arrays: dict[str, np.ndarray] = {"coords": tensor.coords}
    if tensor.evidence is not None:
        ev = tensor.evidence
        arrays.update(clicks=ev.clicks, dwell=ev.dwell, skips=ev.skips, last_seen=ev.last_seen)
    else:
        arrays.update(preference=tensor.stored_preference, confidence=tensor.stored_confidence)
    for n, vocab in enumerate(tensor.vocabularies):
        if vocab is not None:
            arrays[f"labels_{n}"] = np.asarray(vocab.labels, dtype=str)
    metadata = {
        "shape": list(tensor.shape),
        "mode_names": list(tensor.mode_names),
        "dtype": tensor.dtype.name,
        "weighting": tensor.weighting.to_dict(),
        "has_evidence": tensor.evidence is not None,
        "time_origin": None if tensor.evidence is None else int(tensor.evidence.time_origin),
        "labeled_modes": [n for n, v in enumerate(tensor.vocabularies) if v is not None],
        "extra": extra or {},
    }
    return write_bundle(path, _KIND, metadata, arrays)


def load_tensor(path: str | os.PathLike) -> SparseTensor:
    """Read a tensor written by :func:`save_tensor`, verifying every checksum first."""
    meta, arrays = read_bundle(path, _KIND)
    names = tuple(meta["mode_names"])
    vocabs = tuple(
        Vocabulary(tuple(str(x) for x in arrays[f"labels_{n}"]), name=names[n]) if n in meta["labeled_modes"] else None
        for n in range(len(names))
    )
    common = dict(
        coords=arrays["coords"],
        shape=tuple(meta["shape"]),
        mode_names=names,
        vocabularies=vocabs,
        weighting=FeedbackWeighting(**meta["weighting"]),
        dtype=np.dtype(meta["dtype"]),
    )
    if meta["has_evidence"]:
        evidence = CellEvidence(
            clicks=arrays["clicks"], dwell=arrays["dwell"], skips=arrays["skips"],
            last_seen=arrays["last_seen"], time_origin=int(meta["time_origin"]),
        )
        return SparseTensor(evidence=evidence, **common)
    if "preference" not in arrays:
        raise BundleError(f"{path}: the tensor has neither evidence nor stored values.")
    return SparseTensor(stored_preference=arrays["preference"], stored_confidence=arrays["confidence"], **common)
