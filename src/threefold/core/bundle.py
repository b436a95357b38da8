"""Crash-safe, pickle-free folders of JSON metadata and NumPy arrays.

A *bundle* is how threefold persists tensors and models::

    ROOT/
      CURRENT                 "v000003 <sha256 of v000003/MANIFEST.json>"
      v000003/
        MANIFEST.json         format, format_version, kind, sha256 of every other file
        meta.json             the caller's JSON metadata
        arrays.npz            the caller's arrays (loaded with allow_pickle=False)
      v000002/ ...            older versions stay until pruned

Saving never overwrites in place: the new version is written to a temporary
folder, every file and the folder are synced, the folder is renamed to the next
version name, and only then the small ``CURRENT`` pointer is replaced atomically
(``os.replace`` of a synced temporary file). A save killed at any point leaves
the previous version loadable. Loading checks the pointer, the manifest, the
format version and the SHA-256 of every file before any array is used, and
names the file that differs.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import uuid
from pathlib import Path
from typing import Mapping

import numpy as np

__all__ = ["BundleError", "sha256_file", "write_bundle", "read_bundle", "bundle_fingerprint", "bundle_versions", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "threefold-bundle"
FORMAT_VERSION = 1
_VERSION = re.compile(r"^v(\d{6})$")


class BundleError(ValueError):
    """A bundle is missing, corrupt, or of another format version."""


def sha256_file(path: Path) -> str:
    """Hex SHA-256 of a file, read in 1 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _fsync_file(path: Path) -> None:
    with open(path, "rb") as handle:
        os.fsync(handle.fileno())


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def bundle_versions(root: str | os.PathLike) -> list[str]:
    """Names of the complete version folders under ``root``, oldest first."""
    root = Path(root)
    if not root.is_dir():
        return []
    return sorted(p.name for p in root.iterdir() if p.is_dir() and _VERSION.match(p.name))


def write_bundle(
    root: str | os.PathLike,
    kind: str,
    metadata: Mapping,
    arrays: Mapping[str, np.ndarray],
    *,
    keep_versions: int = 3,
) -> Path:
    """Write a new version of the bundle at ``root`` and make it current.

    Parameters
    ----------
    root : path
        Bundle folder (created if missing).
    kind : str
        What the bundle holds (e.g. ``"sparse-tensor"``, ``"cp-model"``); checked on load.
    metadata : mapping
        JSON-serializable metadata.
    arrays : mapping of str to ndarray
        Numeric or string arrays; object arrays are refused (they would need pickle).
    keep_versions : int, default=3
        Older complete versions kept after the switch (at least the previous one).

    Returns
    -------
    Path of the new version folder.
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    for name, array in arrays.items():
        if np.asarray(array).dtype == object:
            raise BundleError(f"Array {name!r} has dtype object, which cannot be stored without pickle.")
    staging = root / f".staging-{uuid.uuid4().hex}"
    staging.mkdir()
    try:
        (staging / "meta.json").write_text(json.dumps(metadata, indent=2, sort_keys=True, default=_json_default))
        np.savez(staging / "arrays.npz", **{k: np.asarray(v) for k, v in arrays.items()})
        files = {name: sha256_file(staging / name) for name in ("meta.json", "arrays.npz")}
        manifest = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "kind": kind, "files": files}
        (staging / "MANIFEST.json").write_text(json.dumps(manifest, indent=2, sort_keys=True))
        for name in ("meta.json", "arrays.npz", "MANIFEST.json"):
            _fsync_file(staging / name)
        _fsync_dir(staging)
        existing = bundle_versions(root)
        number = int(existing[-1][1:]) + 1 if existing else 1
        final = root / f"v{number:06d}"
        os.rename(staging, final)
        _fsync_dir(root)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    pointer = root / f".CURRENT-{uuid.uuid4().hex}"
    pointer.write_text(f"{final.name} {sha256_file(final / 'MANIFEST.json')}\n")
    _fsync_file(pointer)
    os.replace(pointer, root / "CURRENT")
    _fsync_dir(root)
    for old in bundle_versions(root)[: -max(2, keep_versions + 1)]:
        shutil.rmtree(root / old, ignore_errors=True)
    return final


def bundle_fingerprint(root: str | os.PathLike) -> str:
    """The SHA-256 of a bundle's current manifest (from its ``CURRENT`` pointer): one id for its whole content."""
    pointer = Path(root) / "CURRENT"
    if not pointer.is_file():
        raise BundleError(f"{root} is not a threefold bundle (no CURRENT pointer).")
    parts = pointer.read_text().split()
    if len(parts) != 2 or not _VERSION.match(parts[0]):
        raise BundleError(f"{pointer} is malformed: {pointer.read_text()!r}.")
    return parts[1]


def read_bundle(root: str | os.PathLike, kind: str) -> tuple[dict, dict[str, np.ndarray]]:
    """Read and verify the current version of a bundle.

    Parameters
    ----------
    root : path
    kind : str
        Expected kind; a bundle of another kind is refused.

    Returns
    -------
    metadata : dict
    arrays : dict of str to ndarray

    Raises
    ------
    BundleError
        Missing pointer or files, checksum mismatch (naming the file), other
        format version or kind.
    """
    root = Path(root)
    pointer = root / "CURRENT"
    if not pointer.is_file():
        raise BundleError(f"{root} is not a threefold bundle (no CURRENT pointer).")
    parts = pointer.read_text().split()
    if len(parts) != 2 or not _VERSION.match(parts[0]):
        raise BundleError(f"{pointer} is malformed: {pointer.read_text()!r}.")
    version, manifest_hash = parts
    folder = root / version
    manifest_path = folder / "MANIFEST.json"
    if not manifest_path.is_file():
        raise BundleError(f"{manifest_path} is missing.")
    if sha256_file(manifest_path) != manifest_hash:
        raise BundleError(f"{manifest_path} does not match the checksum recorded in {pointer}: the file was altered.")
    manifest = json.loads(manifest_path.read_text())
    if manifest.get("format") != FORMAT_NAME:
        raise BundleError(f"{manifest_path} has format {manifest.get('format')!r}, expected {FORMAT_NAME!r}.")
    if manifest.get("format_version") != FORMAT_VERSION:
        raise BundleError(
            f"{folder} has format version {manifest.get('format_version')!r}; this threefold reads version "
            f"{FORMAT_VERSION}. Re-save it with a matching threefold version."
        )
    if manifest.get("kind") != kind:
        raise BundleError(f"{folder} holds a {manifest.get('kind')!r}, not a {kind!r}.")
    for name, expected in manifest["files"].items():
        path = folder / name
        if not path.is_file():
            raise BundleError(f"{path} is missing.")
        if sha256_file(path) != expected:
            raise BundleError(f"{path} does not match its SHA-256 in the manifest: the file was altered or truncated.")
    metadata = json.loads((folder / "meta.json").read_text())
    with np.load(folder / "arrays.npz", allow_pickle=False) as data:
        arrays = {name: data[name] for name in data.files}
    return metadata, arrays


def _json_default(value):
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} is not JSON-serializable.")
