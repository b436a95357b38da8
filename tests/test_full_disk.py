"""A full disk: saves fail cleanly and the previous version stays current (a real small tmpfs).

Mounting needs the right to mount (root in a container, usually); elsewhere the
tests are skipped with that reason.
"""

from __future__ import annotations

import errno
import subprocess

import numpy as np
import pytest

from threefold import cli
from threefold.core.bundle import read_bundle, write_bundle
from threefold.core.tensor_io import load_tensor

from _tracking import SAMPLE


@pytest.fixture()
def small_disk(tmp_path):
    mount = tmp_path / "disk"
    mount.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=4m", "tmpfs", str(mount)], capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here ({done.stderr.strip() or 'mount failed'})")
    try:
        yield mount
    finally:
        subprocess.run(["umount", str(mount)], capture_output=True)


def _fill(disk, leave: int = 0) -> None:
    """Fill the disk up to ``leave`` free bytes."""
    import os

    free = os.statvfs(disk).f_bavail * os.statvfs(disk).f_frsize
    with open(disk / "filler", "wb") as handle:
        handle.write(b"\0" * max(free - leave, 0))


def test_a_bundle_save_on_a_full_disk_leaves_the_previous_version_current(small_disk):
    write_bundle(small_disk / "b", "demo", {"v": 1}, {"x": np.arange(1000)})
    with pytest.raises(OSError) as caught:
        write_bundle(small_disk / "b", "demo", {"v": 2}, {"x": np.zeros(2_000_000)})  # 16 MB on a 4 MB disk
    assert caught.value.errno in (errno.ENOSPC, errno.EDQUOT)
    meta, arrays = read_bundle(small_disk / "b", "demo")
    assert meta == {"v": 1} and arrays["x"].size == 1000
    assert sorted(p.name for p in (small_disk / "b").iterdir()) == ["save-000001", "selected.txt"]  # no debris


def test_build_on_a_full_disk_is_one_clear_error_and_the_previous_tensor_loads(small_disk, capsys):
    events = str(SAMPLE / "events.parquet")
    assert cli.main(["build", events, str(small_disk / "t"), "--context", "device"]) == 0
    first = load_tensor(small_disk / "t")
    _fill(small_disk, leave=4096)
    capsys.readouterr()
    assert cli.main(["build", events, str(small_disk / "t"), "--context", "daypart"]) == 1
    err = capsys.readouterr().err
    assert "threefold build: error: no space left on the device" in err and "Traceback" not in err
    again = load_tensor(small_disk / "t")
    assert again.mode_names == first.mode_names and again.nnz == first.nnz
