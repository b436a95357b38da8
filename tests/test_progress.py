"""Specifications of progress reporting: plain lines off a terminal, nothing when switched off."""

import io
import re

from threefold.core.progress import progress


def test_plain_lines_with_count_share_and_rate_when_not_a_terminal():
    stream = io.StringIO()
    with progress(1000, "score", "requests", stream=stream, interval=0.0) as bar:
        bar.update(250)
        bar.update(750)
    lines = stream.getvalue().splitlines()
    assert len(lines) == 3  # two updates and the closing line
    assert re.fullmatch(r"score: 250/1,000 requests \(25%\), [\d,]+ requests/s, \d+\.\d s", lines[0])
    assert lines[-1].startswith("score: 1,000/1,000 requests (100%)")


def test_switched_off_by_argument_or_environment(monkeypatch):
    stream = io.StringIO()
    with progress(10, "fit", "sweeps", stream=stream, enabled=False, interval=0.0) as bar:
        bar.update(10)
    monkeypatch.setenv("THREEFOLD_PROGRESS", "0")
    with progress(10, "fit", "sweeps", stream=stream, interval=0.0) as bar:
        bar.update(10)
    assert stream.getvalue() == ""


def test_unknown_total_and_no_line_for_an_empty_step():
    stream = io.StringIO()
    with progress(None, "stage", "requests", stream=stream, interval=60.0) as bar:
        bar.update(5)
    assert re.fullmatch(r"stage: 5 requests, [\d,]+ requests/s, \d+\.\d s\n", stream.getvalue())
    stream = io.StringIO()
    with progress(None, "stage", "requests", stream=stream):
        pass
    assert stream.getvalue() == ""
