"""Shared helpers for benchmark scripts: run a contender in its own process, measure wall time and peak memory."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap


def run_child(code: str, timeout: float = 3600.0, env: dict | None = None) -> dict:
    """Run ``code`` in a fresh Python process; it must print one JSON object on its last line.

    The child's peak resident memory is added as ``peak_rss_bytes``: ``VmHWM`` of
    ``/proc/self/status``, which belongs to the child's own address space. (``ru_maxrss``
    would not do: on Linux it carries the parent's high-water mark across fork and exec.) Returns the parsed dict, or ``{"error": ...}`` on failure or timeout.
    """
    wrapped = textwrap.dedent(code) + textwrap.dedent("""
        import json as _j
        _out = dict(RESULT)
        _hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM:")][0]
        _out["peak_rss_bytes"] = int(_hwm.split()[1]) * 1024
        print(_j.dumps(_out))
    """)
    try:
        proc = subprocess.run([sys.executable, "-c", wrapped], capture_output=True, text=True, timeout=timeout,
                              env={**os.environ, **(env or {})})
    except subprocess.TimeoutExpired:
        return {"error": f"timed out after {timeout:.0f} s"}
    if proc.returncode != 0:
        return {"error": proc.stderr.strip().splitlines()[-1] if proc.stderr.strip() else f"exit {proc.returncode}"}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def gib(n_bytes: float) -> str:
    return f"{n_bytes / 2**30:.2f} GiB"
