"""Crash-safe bundles and tensor persistence (reliability targets for model files)."""

import json
import os
import subprocess
import sys
import textwrap
import zipfile

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal

from threefold.data.build import build_tensor
from threefold.core.bundle import BundleError, bundle_versions, read_bundle, write_bundle
from threefold.data.context import ColumnContext
from threefold.core.tensor_io import load_tensor, save_tensor


def small_tensor():
    events = pd.DataFrame({
        "user_id": ["007", "007", "010"], "item_id": ["a", "b", "a"], "timestamp": [10, 20, 30],
        "event": "click", "device": ["mobile", "desktop", None],
    })
    return build_tensor(events, [ColumnContext("device")])[0]


def test_tensor_round_trip_is_bit_identical(tmp_path):
    tensor = small_tensor()
    save_tensor(tensor, tmp_path / "t")
    loaded = load_tensor(tmp_path / "t")
    assert_array_equal(loaded.coords, tensor.coords)
    for name in ("clicks", "dwell", "skips", "last_seen"):
        assert_array_equal(getattr(loaded.evidence, name), getattr(tensor.evidence, name))
        assert getattr(loaded.evidence, name).dtype == getattr(tensor.evidence, name).dtype
    assert loaded.vocabularies == tensor.vocabularies and loaded.vocabularies[0].labels == ("007", "010")
    assert loaded.weighting == tensor.weighting


def test_a_flipped_byte_is_refused_naming_the_file(tmp_path):
    write_bundle(tmp_path / "b", "demo", {"a": 1}, {"x": np.arange(10.0)})
    target = tmp_path / "b" / "save-000001" / "arrays.npz"
    data = bytearray(target.read_bytes())
    data[len(data) // 2] ^= 0xFF
    target.write_bytes(bytes(data))
    with pytest.raises(BundleError, match=r"arrays\.npz does not match its SHA-256"):
        read_bundle(tmp_path / "b", "demo")


def test_a_truncated_file_and_altered_metadata_are_refused(tmp_path):
    write_bundle(tmp_path / "b", "demo", {"a": 1}, {"x": np.arange(10.0)})
    meta = tmp_path / "b" / "save-000001" / "meta.json"
    meta.write_text(json.dumps({"a": 2}))
    with pytest.raises(BundleError, match=r"meta\.json does not match"):
        read_bundle(tmp_path / "b", "demo")


def test_unknown_format_version_and_kind_are_refused(tmp_path):
    write_bundle(tmp_path / "b", "demo", {}, {"x": np.zeros(2)})
    with pytest.raises(BundleError, match="holds a 'demo', not a 'cp-model'"):
        read_bundle(tmp_path / "b", "cp-model")
    manifest = tmp_path / "b" / "save-000001" / "checksums.json"
    data = json.loads(manifest.read_text())
    data["format_version"] = 99
    manifest.write_text(json.dumps(data))
    with pytest.raises(BundleError, match="checksums.json does not match the checksum"):
        read_bundle(tmp_path / "b", "demo")


def test_object_arrays_are_refused_and_no_pickle_is_written(tmp_path):
    with pytest.raises(BundleError, match="cannot be stored without pickle"):
        write_bundle(tmp_path / "b", "demo", {}, {"x": np.array([{"a": 1}], dtype=object)})
    write_bundle(tmp_path / "c", "demo", {}, {"labels": np.array(["007", "x"])})
    with zipfile.ZipFile(tmp_path / "c" / "save-000001" / "arrays.npz") as archive:
        for name in archive.namelist():
            header = archive.read(name)[:128]
            assert b"'descr': '|O'" not in header  # numpy format header: no object dtype


def test_new_versions_switch_atomically_and_old_ones_are_pruned(tmp_path):
    for k in range(6):
        write_bundle(tmp_path / "b", "demo", {"k": k}, {"x": np.full(3, k)}, keep_versions=2)
    meta, arrays = read_bundle(tmp_path / "b", "demo")
    assert meta == {"k": 5} and arrays["x"][0] == 5
    assert bundle_versions(tmp_path / "b") == ["save-000004", "save-000005", "save-000006"]


def test_a_save_killed_midway_leaves_the_previous_version_loadable(tmp_path):
    # Reliability target: kill the process during a save; the previous model stays loadable.
    write_bundle(tmp_path / "b", "demo", {"k": "old"}, {"x": np.zeros(5)})
    script = textwrap.dedent(f"""
        import os, numpy as np
        import threefold.core.bundle as b
        real = b._fsync_dir
        calls = []
        def dying(path):
            calls.append(path)
            if len(calls) == 2:   # after the new version folder is renamed, before the pointer switch
                os._exit(9)
            real(path)
        b._fsync_dir = dying
        b.write_bundle({str(tmp_path / 'b')!r}, "demo", {{"k": "new"}}, {{"x": np.ones(5)}})
    """)
    result = subprocess.run([sys.executable, "-c", script])
    assert result.returncode == 9
    meta, arrays = read_bundle(tmp_path / "b", "demo")
    assert meta == {"k": "old"}
    assert_array_equal(arrays["x"], np.zeros(5))
    # a later save still succeeds and becomes current
    write_bundle(tmp_path / "b", "demo", {"k": "newer"}, {"x": np.ones(5)})
    assert read_bundle(tmp_path / "b", "demo")[0] == {"k": "newer"}
    assert not [p for p in os.listdir(tmp_path / "b") if p.startswith(".selected.txt-")]


def test_a_symbolic_link_is_refused_without_reading_its_target(tmp_path):
    write_bundle(tmp_path / "b", "demo", {"k": 1}, {"x": np.arange(3)})
    secret = tmp_path / "secret.txt"
    secret.write_text("site password 12345")
    pointer = tmp_path / "b" / "selected.txt"
    pointer.unlink()
    pointer.symlink_to(secret)
    with pytest.raises(BundleError, match=r"selected\.txt is a symbolic link; .* refused \(its target was not read\)") as caught:
        read_bundle(tmp_path / "b", "demo")
    assert "12345" not in str(caught.value)
    write_bundle(tmp_path / "c", "demo", {"k": 1}, {"x": np.arange(3)})
    meta = tmp_path / "c" / "save-000001" / "meta.json"
    target = tmp_path / "meta-copy.json"
    target.write_bytes(meta.read_bytes())
    meta.unlink()
    meta.symlink_to(target)  # same bytes, so the checksum alone would pass
    with pytest.raises(BundleError, match=r"meta\.json is a symbolic link"):
        read_bundle(tmp_path / "c", "demo")


def test_a_signed_bundle_refuses_a_recomputed_manifest(tmp_path, monkeypatch):
    import hashlib
    import hmac

    monkeypatch.setenv("THREEFOLD_SIGNING_KEY", "site key")
    folder = write_bundle(tmp_path / "b", "demo", {"user": "u1"}, {"x": np.arange(3)})
    # the signature is HMAC-SHA256 of the manifest's bytes (RFC 2104), recomputed here with the standard library
    expected = hmac.new(b"site key", (folder / "checksums.json").read_bytes(), hashlib.sha256).hexdigest()
    assert (folder / "signature.txt").read_text().strip() == expected
    assert read_bundle(tmp_path / "b", "demo")[0] == {"user": "u1"}
    # an editor changes meta.json and recomputes every checksum, the pointer's included
    (folder / "meta.json").write_text(json.dumps({"user": "u2"}))
    manifest = json.loads((folder / "checksums.json").read_text())
    manifest["files"]["meta.json"] = hashlib.sha256((folder / "meta.json").read_bytes()).hexdigest()
    (folder / "checksums.json").write_text(json.dumps(manifest))
    digest = hashlib.sha256((folder / "checksums.json").read_bytes()).hexdigest()
    (tmp_path / "b" / "selected.txt").write_text(f"save-000001 {digest}\n")
    with pytest.raises(BundleError, match=r"signature\.txt does not match .* under this site's key"):
        read_bundle(tmp_path / "b", "demo")
    monkeypatch.delenv("THREEFOLD_SIGNING_KEY")
    assert read_bundle(tmp_path / "b", "demo")[0] == {"user": "u2"}  # without a key only the checksums count
    unsigned = write_bundle(tmp_path / "u", "demo", {}, {})
    monkeypatch.setenv("THREEFOLD_SIGNING_KEY", "site key")
    with pytest.raises(BundleError, match=r"is not signed, and this site signs its bundles"):
        read_bundle(tmp_path / "u", "demo")
    assert unsigned.name == "save-000001"


def test_bundles_of_the_earlier_layout_still_load_and_a_new_save_numbers_on(tmp_path):
    # the earlier layout, written here by hand: CURRENT, v000001/, MANIFEST.json
    import hashlib

    folder = tmp_path / "old" / "v000001"
    folder.mkdir(parents=True)
    (folder / "meta.json").write_text(json.dumps({"k": 1}))
    np.savez(folder / "arrays.npz", x=np.arange(4))
    files = {n: hashlib.sha256((folder / n).read_bytes()).hexdigest() for n in ("meta.json", "arrays.npz")}
    (folder / "MANIFEST.json").write_text(json.dumps({"format": "threefold-bundle", "format_version": 1,
                                                      "kind": "demo", "files": files}))
    digest = hashlib.sha256((folder / "MANIFEST.json").read_bytes()).hexdigest()
    (tmp_path / "old" / "CURRENT").write_text(f"v000001 {digest}\n")
    meta, arrays = read_bundle(tmp_path / "old", "demo")
    assert meta == {"k": 1} and list(arrays["x"]) == [0, 1, 2, 3]
    assert write_bundle(tmp_path / "old", "demo", {"k": 2}, {}).name == "save-000002"
    assert read_bundle(tmp_path / "old", "demo")[0] == {"k": 2}
    assert not (tmp_path / "old" / "CURRENT").exists()
