"""Progress of long steps: a bar with a rate on a terminal, plain log lines elsewhere.

Every long step of the tool (building, fitting sweeps, sweeps of trials, batch
scoring) reports through :func:`progress`, so a job looks the same whatever
runs it. On a terminal it draws a ``tqdm`` bar with the rate (``requests/s``);
when the stream is not a terminal (a scheduler's log, CI, a pipe) it writes one
plain line at most every ``interval`` seconds and a last line at the end::

    score: 250,000/1,000,000 requests (25%), 41,800 requests/s, 6.0 s

``THREEFOLD_PROGRESS=0`` silences both; ``THREEFOLD_PROGRESS=lines`` forces
lines on a terminal.
"""

from __future__ import annotations

import os
import sys
import time
from typing import TextIO

__all__ = ["Progress", "progress"]


class Progress:
    """A running count towards ``total`` (see :func:`progress`). Use as a context manager."""

    def __init__(self, total: int | None, desc: str, unit: str, stream: TextIO, mode: str, interval: float):
        self.total, self.desc, self.unit, self.stream, self.mode, self.interval = total, desc, unit, stream, mode, interval
        self.count = 0
        self._start = time.perf_counter()
        self._last = self._start
        self._bar = None
        if mode == "bar":
            from tqdm import tqdm

            self._bar = tqdm(total=total, desc=desc, unit=f" {unit}", unit_scale=True, file=stream, dynamic_ncols=True)

    def update(self, n: int = 1) -> None:
        """Add ``n`` to the count."""
        self.count += n
        if self._bar is not None:
            self._bar.update(n)
        elif self.mode == "lines":
            now = time.perf_counter()
            if now - self._last >= self.interval:
                self._last = now
                self._line(now)

    def _line(self, now: float) -> None:
        seconds = now - self._start
        of = f"/{self.total:,}" if self.total is not None else ""
        share = f" ({100 * self.count / self.total:.0f}%)" if self.total else ""
        rate = f", {self.count / seconds:,.0f} {self.unit}/s" if seconds > 0 else ""
        print(f"{self.desc}: {self.count:,}{of} {self.unit}{share}{rate}, {seconds:.1f} s", file=self.stream, flush=True)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None
        elif self.mode == "lines":
            if self.count:
                self._line(time.perf_counter())
            self.mode = "off"

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def progress(total: int | None, desc: str, unit: str = "items", *, enabled: bool = True,
             stream: TextIO | None = None, interval: float = 10.0) -> Progress:
    """A progress reporter for one long step.

    Parameters
    ----------
    total : int or None
        Expected count (None: unknown).
    desc : str
        What runs, e.g. ``"score"``.
    unit : str, default="items"
        What is counted, plural (``"requests"``).
    enabled : bool, default=True
        False reports nothing (library use with ``progress=False``).
    stream : text stream, default sys.stderr
    interval : float, default=10.0
        Seconds between plain lines when the stream is not a terminal.
    """
    stream = sys.stderr if stream is None else stream
    setting = os.environ.get("THREEFOLD_PROGRESS", "").strip().lower()
    if not enabled or setting in ("0", "off", "false", "no"):
        mode = "off"
    elif setting == "lines" or not getattr(stream, "isatty", lambda: False)():
        mode = "lines"
    else:
        mode = "bar"
    return Progress(total, desc, unit, stream, mode, interval)
