"""Every runnable example of the docs runs as written (README.md and docs/*.md; DEVELOPERS.md, "Runnable examples")."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from _tracking import ROOT, child_env

MARKER = "<!-- runnable -->"
BLOCK = re.compile(re.escape(MARKER) + r"\s*\n```bash\n(.*?)```", re.S)


def runnable_blocks() -> list[tuple[str, int, str]]:
    """(file, line, text) of every block marked runnable."""
    found = []
    for path in [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]:
        text = path.read_text(encoding="utf-8")
        for match in BLOCK.finditer(text):
            found.append((path.relative_to(ROOT).as_posix(), text[: match.start()].count("\n") + 1, match.group(1)))
    return found


def test_the_docs_hold_runnable_examples_and_every_marker_has_a_block():
    blocks = runnable_blocks()
    markers = sum(p.read_text(encoding="utf-8").count(MARKER) for p in [ROOT / "README.md", *(ROOT / "docs").glob("*.md")])
    assert len(blocks) == markers >= 2  # a marker not followed by a bash block is a mistake in the docs


@pytest.mark.parametrize("where, line, script", runnable_blocks(), ids=lambda v: v if isinstance(v, str) else str(v))
def test_a_runnable_example_exits_zero(where, line, script, tmp_path):
    for folder in ("data_samples", "experiments"):
        (tmp_path / folder).symlink_to(ROOT / folder, target_is_directory=True)
    env = child_env(PATH=f"{Path(sys.executable).parent}{os.pathsep}{os.environ.get('PATH', '')}")
    result = subprocess.run(["bash", "-euo", "pipefail", "-c", script], cwd=tmp_path, env=env, capture_output=True,
                            text=True, timeout=600)
    assert result.returncode == 0, f"{where}:{line}\n{script}\n{result.stdout[-2000:]}\n{result.stderr[-2000:]}"
