"""Crash-safe, pickle-free folders of JSON metadata and NumPy arrays.

A *bundle* is how threefold persists tensors and models::

    ROOT/
      selected.txt            "save-000003 <sha256 of save-000003/checksums.json>"
      save-000003/
        checksums.json        format, format_version, kind, sha256 of every other file
        signature.txt         HMAC-SHA256 of checksums.json, when the site signs its bundles
        meta.json             the caller's JSON metadata
        arrays.npz            the caller's arrays (loaded with allow_pickle=False)
      save-000002/ ...        older versions stay until pruned

Bundles written by earlier versions (pointer ``CURRENT``, folders ``v000001``,
manifest ``MANIFEST.json``) are read as they are; a new save into such a folder
writes the new names and numbers on.

Saving never overwrites in place: the new version is written to a temporary
folder, every file and the folder are synced, the folder is renamed to the next
version name, and only then the small ``CURRENT`` pointer is replaced atomically
(``os.replace`` of a synced temporary file). A save killed at any point leaves
the previous version loadable. Loading checks the pointer, the manifest, the
format version and the SHA-256 of every file before any array is used, and
names the file that differs. A symbolic link anywhere in the bundle (the folder,
the pointer, a version folder, a file) is refused without being followed.

**Signatures.** Checksums catch corruption, not an editor who recomputes them.
A site that sets a key (:data:`KEY_VARIABLE`, or a file named by
:data:`KEY_FILE_VARIABLE`) signs every bundle it saves, and then refuses to load
one whose signature is missing or wrong: HMAC-SHA256 (RFC 2104, FIPS 198-1) of
the manifest's bytes, which list the SHA-256 of every other file.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import os
import re
import shutil
import uuid
from pathlib import Path
from typing import Mapping

import numpy as np

__all__ = ["BundleError", "sha256_file", "write_bundle", "read_bundle", "bundle_fingerprint", "bundle_versions",
           "is_bundle", "signing_key", "FORMAT_NAME", "FORMAT_VERSION", "KEY_VARIABLE", "KEY_FILE_VARIABLE"]

FORMAT_NAME = "threefold-bundle"
FORMAT_VERSION = 1
POINTER, MANIFEST, SIGNATURE = "selected.txt", "checksums.json", "signature.txt"
_LEGACY_POINTER, _LEGACY_MANIFEST = "CURRENT", "MANIFEST.json"
_VERSION = re.compile(r"^(?:save-|v)(\d{6})$")  # save-000001; v000001 in bundles of earlier versions
#: Environment variable holding the signing key (text), or naming a file that holds it.
KEY_VARIABLE, KEY_FILE_VARIABLE = "THREEFOLD_SIGNING_KEY", "THREEFOLD_SIGNING_KEY_FILE"


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
    """Names of the complete version folders under ``root``, oldest first (by number)."""
    root = Path(root)
    if not root.is_dir():
        return []
    names = [p.name for p in root.iterdir() if _VERSION.match(p.name) and p.is_dir() and not p.is_symlink()]
    return sorted(names, key=lambda name: int(_VERSION.match(name).group(1)))


def is_bundle(root: str | os.PathLike) -> bool:
    """Whether ``root`` has a bundle pointer (of this version or an earlier one)."""
    root = Path(root)
    return (root / POINTER).is_file() or (root / _LEGACY_POINTER).is_file()


def signing_key() -> bytes | None:
    """The site's signing key from the environment, or None when bundles are not signed.

    Raises
    ------
    BundleError
        When the key file named by :data:`KEY_FILE_VARIABLE` cannot be read or a key is empty.
    """
    text = os.environ.get(KEY_VARIABLE)
    if text is None and os.environ.get(KEY_FILE_VARIABLE):
        try:
            text = Path(os.environ[KEY_FILE_VARIABLE]).read_text(encoding="utf-8")
        except OSError as error:
            raise BundleError(f"{KEY_FILE_VARIABLE}={os.environ[KEY_FILE_VARIABLE]!r}: cannot read the signing key "
                              f"({error.strerror}).") from None
    if text is None:
        return None
    key = text.strip().encode("utf-8")
    if not key:
        raise BundleError(f"The signing key ({KEY_VARIABLE} or {KEY_FILE_VARIABLE}) is empty.")
    return key


def _signature(key: bytes, manifest_path: Path) -> str:
    return hmac.new(key, manifest_path.read_bytes(), hashlib.sha256).hexdigest()


def _refuse_links(*paths: Path) -> None:
    for path in paths:
        if path.is_symlink():
            raise BundleError(f"{path} is a symbolic link; a bundle holds only its own files, so it is refused "
                              "(its target was not read).")


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
    _refuse_links(root)
    key = signing_key()
    staging = root / f".staging-{uuid.uuid4().hex}"
    staging.mkdir()
    try:
        (staging / "meta.json").write_text(json.dumps(metadata, indent=2, sort_keys=True, default=_json_default))
        np.savez(staging / "arrays.npz", **{k: np.asarray(v) for k, v in arrays.items()})
        files = {name: sha256_file(staging / name) for name in ("meta.json", "arrays.npz")}
        manifest = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "kind": kind, "files": files}
        (staging / MANIFEST).write_text(json.dumps(manifest, indent=2, sort_keys=True))
        written = ["meta.json", "arrays.npz", MANIFEST]
        if key is not None:
            (staging / SIGNATURE).write_text(_signature(key, staging / MANIFEST) + "\n")
            written.append(SIGNATURE)
        for name in written:
            _fsync_file(staging / name)
        _fsync_dir(staging)
        existing = bundle_versions(root)
        number = int(_VERSION.match(existing[-1]).group(1)) + 1 if existing else 1
        final = root / f"save-{number:06d}"
        os.rename(staging, final)
        _fsync_dir(root)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    pointer = root / f".{POINTER}-{uuid.uuid4().hex}"
    try:
        pointer.write_text(f"{final.name} {sha256_file(final / MANIFEST)}\n")
        _fsync_file(pointer)
        os.replace(pointer, root / POINTER)
    except BaseException:  # e.g. a full disk: the new version is left unselected, the previous one stays current
        pointer.unlink(missing_ok=True)
        shutil.rmtree(final, ignore_errors=True)
        raise
    (root / _LEGACY_POINTER).unlink(missing_ok=True)  # an earlier version's pointer would name an older save
    _fsync_dir(root)
    for old in bundle_versions(root)[: -max(2, keep_versions + 1)]:
        shutil.rmtree(root / old, ignore_errors=True)
    return final


def _current(root: Path) -> tuple[Path, str, str]:
    """The pointer file, the current version's name and its manifest's SHA-256 (links refused unread)."""
    _refuse_links(root)
    pointer = root / POINTER if (root / POINTER).exists() or (root / POINTER).is_symlink() else root / _LEGACY_POINTER
    _refuse_links(pointer)
    if not pointer.is_file():
        raise BundleError(f"{root} is not a threefold bundle (no {POINTER} pointer).")
    text = pointer.read_text(encoding="utf-8", errors="replace")
    parts = text.split()
    if len(parts) != 2 or not _VERSION.match(parts[0]) or not re.fullmatch(r"[0-9a-f]{64}", parts[1]):
        raise BundleError(f"{pointer} is malformed (expected a version folder name and a SHA-256).")
    return pointer, parts[0], parts[1]


def bundle_fingerprint(root: str | os.PathLike) -> str:
    """The SHA-256 of a bundle's current manifest (from its pointer): one id for its whole content."""
    return _current(Path(root))[2]


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
        format version or kind, a symbolic link, or (with a signing key set) a
        missing or wrong signature.
    """
    root = Path(root)
    pointer, version, manifest_hash = _current(root)
    folder = root / version
    manifest_path = folder / MANIFEST
    if not manifest_path.exists() and not manifest_path.is_symlink():
        manifest_path = folder / _LEGACY_MANIFEST
    _refuse_links(folder, manifest_path)
    if not manifest_path.is_file():
        raise BundleError(f"{manifest_path} is missing.")
    if sha256_file(manifest_path) != manifest_hash:
        raise BundleError(f"{manifest_path} does not match the checksum recorded in {pointer}: the file was altered.")
    key = signing_key()
    if key is not None:
        signature = folder / SIGNATURE
        _refuse_links(signature)
        if not signature.is_file():
            raise BundleError(f"{folder} is not signed, and this site signs its bundles ({KEY_VARIABLE} is set): "
                              "refused. Save it again where the key is set.")
        if not hmac.compare_digest(signature.read_text().strip(), _signature(key, manifest_path)):
            raise BundleError(f"{signature} does not match {manifest_path} under this site's key: the bundle was "
                              "altered (its checksums recomputed) or signed with another key.")
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
        _refuse_links(path)
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
