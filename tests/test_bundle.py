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
    target = tmp_path / "b" / "v000001" / "arrays.npz"
    data = bytearray(target.read_bytes())
    data[len(data) // 2] ^= 0xFF
    target.write_bytes(bytes(data))
    with pytest.raises(BundleError, match=r"arrays\.npz does not match its SHA-256"):
        read_bundle(tmp_path / "b", "demo")


def test_a_truncated_file_and_altered_metadata_are_refused(tmp_path):
    write_bundle(tmp_path / "b", "demo", {"a": 1}, {"x": np.arange(10.0)})
    meta = tmp_path / "b" / "v000001" / "meta.json"
    meta.write_text(json.dumps({"a": 2}))
    with pytest.raises(BundleError, match=r"meta\.json does not match"):
        read_bundle(tmp_path / "b", "demo")


def test_unknown_format_version_and_kind_are_refused(tmp_path):
    write_bundle(tmp_path / "b", "demo", {}, {"x": np.zeros(2)})
    with pytest.raises(BundleError, match="holds a 'demo', not a 'cp-model'"):
        read_bundle(tmp_path / "b", "cp-model")
    manifest = tmp_path / "b" / "v000001" / "MANIFEST.json"
    data = json.loads(manifest.read_text())
    data["format_version"] = 99
    manifest.write_text(json.dumps(data))
    with pytest.raises(BundleError, match="MANIFEST.json does not match the checksum"):
        read_bundle(tmp_path / "b", "demo")


def test_object_arrays_are_refused_and_no_pickle_is_written(tmp_path):
    with pytest.raises(BundleError, match="cannot be stored without pickle"):
        write_bundle(tmp_path / "b", "demo", {}, {"x": np.array([{"a": 1}], dtype=object)})
    write_bundle(tmp_path / "c", "demo", {}, {"labels": np.array(["007", "x"])})
    with zipfile.ZipFile(tmp_path / "c" / "v000001" / "arrays.npz") as archive:
        for name in archive.namelist():
            header = archive.read(name)[:128]
            assert b"'descr': '|O'" not in header  # numpy format header: no object dtype


def test_new_versions_switch_atomically_and_old_ones_are_pruned(tmp_path):
    for k in range(6):
        write_bundle(tmp_path / "b", "demo", {"k": k}, {"x": np.full(3, k)}, keep_versions=2)
    meta, arrays = read_bundle(tmp_path / "b", "demo")
    assert meta == {"k": 5} and arrays["x"][0] == 5
    assert bundle_versions(tmp_path / "b") == ["v000004", "v000005", "v000006"]


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
    assert not [p for p in os.listdir(tmp_path / "b") if p.startswith(".CURRENT-")]
