"""Model files: bit-identical round trips, refusal of altered or foreign folders, crash-safe saves, no pickle."""

import json
import re
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from threefold.core.bundle import write_bundle
from threefold.models.tucker.implicit import fit_implicit_tucker
from threefold.models.model_io import MODEL_FORMAT_VERSION, ModelFileError, load_model, read_model_metadata, save_model

from _tracking import ROOT, child_env, tiny_cp, tiny_events

PICKLE_OPCODES = re.compile(rb"\A\x80[\x02-\x05]")  # PROTO opcode of pickle protocols 2-5 (pickle module docs)


def assert_same_model(a, b):
    assert type(a) is type(b) and a.mode_names == b.mode_names and a.vocabularies == b.vocabularies
    for fa, fb in zip(a.factors, b.factors):
        assert_array_equal(fa, fb)
        assert fa.dtype == fb.dtype
    assert a.history == b.history and a.stop_reason == b.stop_reason and a.w0 == b.w0 and a.reg == b.reg


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_cp_round_trip_is_bit_identical(tmp_path, dtype):
    result, _ = tiny_cp(dtype=dtype)
    save_model(result, tmp_path / "m", parameters={"rank": 3}, training_fingerprint={"sha256": "abc"},
               extra={"note": "x"}, extra_arrays={"published_at": np.arange(15, dtype=np.int64)})
    loaded, meta, extra = load_model(tmp_path / "m")
    assert_same_model(result, loaded)
    assert_array_equal(loaded.weights, result.weights)
    assert_array_equal(loaded.column_norms, result.column_norms)
    assert str(loaded.structure) == str(result.structure) == "user*item:2 + item*device:1"
    assert meta["parameters"] == {"rank": 3} and meta["training_fingerprint"] == {"sha256": "abc"}
    assert meta["model_type"] == "cp" and meta["model_format_version"] == MODEL_FORMAT_VERSION
    assert_array_equal(extra["published_at"], np.arange(15))
    users, contexts = np.array([0, 3, 7]), np.array([[1, 0], [2, 1], [4, 0]])
    assert_array_equal(loaded.score(users, contexts), result.score(users, contexts))


def test_tucker_round_trip_is_bit_identical(tmp_path):
    from threefold.data.build import build_tensor
    from threefold.data.context import parse_context

    tensor, _ = build_tensor(tiny_events(1), [parse_context("device")], negatives="none", dtype=np.float64)
    result = fit_implicit_tucker(tensor, rank=[2, 2, 2], max_sweeps=2, tol=0, random_state=0)
    save_model(result, tmp_path / "t")
    loaded, meta, _ = load_model(tmp_path / "t")
    assert_same_model(result, loaded)
    assert_array_equal(loaded.core, result.core)
    assert loaded.method == "implicit" and meta["model_type"] == "tucker"


def test_an_altered_array_or_metadata_file_is_refused_naming_the_file(tmp_path):
    result, _ = tiny_cp()
    version = save_model(result, tmp_path / "m")
    arrays = version / "arrays.npz"
    data = bytearray(arrays.read_bytes())
    data[len(data) // 2] ^= 0x01
    arrays.write_bytes(bytes(data))
    with pytest.raises(ModelFileError, match=r"arrays\.npz does not match its SHA-256 in the manifest"):
        load_model(tmp_path / "m")

    version = save_model(result, tmp_path / "n")
    meta = version / "meta.json"
    content = json.loads(meta.read_text())
    content["reg"] = 0.5
    meta.write_text(json.dumps(content))
    with pytest.raises(ModelFileError, match=r"meta\.json does not match its SHA-256"):
        load_model(tmp_path / "n")
    truncated = save_model(result, tmp_path / "o") / "arrays.npz"
    truncated.write_bytes(truncated.read_bytes()[:100])
    with pytest.raises(ModelFileError, match=r"arrays\.npz does not match its SHA-256"):
        read_model_metadata(tmp_path / "o")


def test_another_model_format_version_is_refused_with_both_versions(tmp_path):
    write_bundle(tmp_path / "future", "threefold-model", {"model_format_version": 99, "model_type": "cp"},
                 {"x": np.zeros(2)})
    with pytest.raises(ModelFileError, match=r"model format version 99; this threefold reads version 1"):
        load_model(tmp_path / "future")
    write_bundle(tmp_path / "tensor", "sparse-tensor", {}, {"x": np.zeros(2)})
    with pytest.raises(ModelFileError, match=r"holds a 'sparse-tensor', not a 'threefold-model'"):
        load_model(tmp_path / "tensor")


def test_a_save_killed_at_random_points_leaves_a_complete_model(tmp_path):
    """Reliability target: kill -9 during saves; the current model is always one of the saved ones, whole."""
    first, _ = tiny_cp(seed=1)
    second, _ = tiny_cp(seed=2)
    for name, model in (("first", first), ("second", second)):
        save_model(model, tmp_path / name)
    target = tmp_path / "model"
    save_model(first, target)
    script = textwrap.dedent(f"""
        import sys
        from threefold.models.model_io import load_model, save_model
        models = [load_model({str(tmp_path / 'first')!r})[0], load_model({str(tmp_path / 'second')!r})[0]]
        print("ready", flush=True)
        for i in range(100000):
            save_model(models[i % 2], {str(target)!r}, keep_versions=1)
    """)
    rng = np.random.default_rng(7)
    for delay in rng.uniform(0.05, 0.6, size=4):
        child = subprocess.Popen([sys.executable, "-c", script], env=child_env(), stdout=subprocess.PIPE, text=True)
        assert child.stdout.readline().strip() == "ready"
        time.sleep(delay)
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=60)
        loaded, _, _ = load_model(target)
        assert any(np.array_equal(loaded.factors[0], m.factors[0]) for m in (first, second))
        assert_same_model(loaded, first if np.array_equal(loaded.factors[0], first.factors[0]) else second)
    save_model(second, target)  # leftover staging folders do not block the next save
    assert_same_model(load_model(target)[0], second)


def test_a_model_folder_holds_no_pickle(tmp_path):
    result, _ = tiny_cp()
    save_model(result, tmp_path / "m", extra_arrays={"published_at": np.arange(15)})
    files = [p for p in (tmp_path / "m").rglob("*") if p.is_file()]
    assert {p.suffix for p in files} <= {".json", ".npz", ".txt"}  # .txt: the version pointer
    for path in files:
        assert not PICKLE_OPCODES.match(path.read_bytes()), path
        if path.suffix == ".npz":
            with np.load(path, allow_pickle=False) as data:  # raises on any object (pickled) member
                assert all(data[name].dtype != object for name in data.files)


def test_no_pickle_in_the_load_path():
    """Lint: no module of the package imports a pickle-based serializer (models load without unpickling)."""
    banned = re.compile(r"^\s*(import|from)\s+(pickle|cPickle|joblib|cloudpickle|dill|shelve)\b|allow_pickle\s*=\s*True",
                        re.MULTILINE)
    modules = sorted((ROOT / "src" / "threefold").rglob("*.py"))
    assert len(modules) > 40
    for path in modules:
        assert not banned.search(path.read_text()), path.name
