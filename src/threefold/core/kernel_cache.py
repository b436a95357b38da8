"""Is this machine's numba kernel cache filled? A first run compiles the kernels once and says so.

numba compiles a kernel the first time it is called with new argument types and,
with ``cache=True``, writes it under ``NUMBA_CACHE_DIR`` (which
:mod:`threefold` points at ``$XDG_CACHE_HOME/threefold/numba`` unless it is
set). Later processes load it in milliseconds. The first run pays the compile:
about 50 s on 2 cores for everything the demo uses (docs/performance.md,
"Compiling the kernels"). This module needs no numba import: it looks for the
cache's index files of the largest kernels.
"""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["cache_folder", "kernels_cached", "first_run_notice", "COMPILING_COMMANDS"]

#: Index-file prefixes of the kernels that take longest to compile (CP row solves, Tucker rows, top-K).
_LARGEST = ("kernels.solve_rows-", "rows._rows_kernel-", "topk._select_rows_parallel-")
#: Commands that run the kernels (and so compile them on a machine's first run).
COMPILING_COMMANDS = frozenset({"demo", "train", "sweep", "select", "gain", "score", "refresh", "explain", "loop"})


def cache_folder() -> Path | None:
    """The folder numba caches compiled kernels in, or None when it uses its default (beside the code)."""
    value = os.environ.get("NUMBA_CACHE_DIR")
    return Path(value) if value else None


def kernels_cached(folder: Path | None = None) -> bool:
    """True when the cache holds an index of each of the largest kernels (of any version of the code)."""
    folder = cache_folder() if folder is None else folder
    if folder is None or not folder.is_dir():
        return False
    return all(any(folder.glob(f"*/{prefix}*.nbi")) for prefix in _LARGEST)


def first_run_notice(command: str) -> str | None:
    """One line for a command about to compile kernels on this machine for the first time, else None."""
    if command not in COMPILING_COMMANDS or kernels_cached():
        return None
    where = cache_folder() or "numba's default cache"
    return (f"first run on this machine: the numerical kernels compile as they are first used (about a minute "
            f"on 2 cores, once); they are cached in {where} and load instantly in every later run")
