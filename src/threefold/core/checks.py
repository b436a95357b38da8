"""Small parameter validators with uniform messages (checked once, at the boundary).

Messages follow one pattern so that users of the Python API, the config files and
the command line read the same sentence::

    The 'rank' parameter of CPModel must be an int in the range [1, inf). Got 0 instead.
"""

from __future__ import annotations

import math
import numbers
from typing import Iterable

__all__ = ["check_number", "check_int", "check_choice"]


def _range_text(low: float | None, high: float | None, low_open: bool, high_open: bool) -> str:
    left = "(" if (low is None or low_open) else "["
    right = ")" if (high is None or high_open) else "]"
    lo = "-inf" if low is None else f"{low:g}"
    hi = "inf" if high is None else f"{high:g}"
    return f"{left}{lo}, {hi}{right}"


def check_number(
    name: str,
    value: object,
    *,
    low: float | None = None,
    high: float | None = None,
    low_open: bool = False,
    high_open: bool = False,
    owner: str = "",
) -> float:
    """Check that ``value`` is a finite real number in the given range; return it as float."""
    where = f" of {owner}" if owner else ""
    rng = _range_text(low, high, low_open, high_open)
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(float(value)):
        raise ValueError(f"The {name!r} parameter{where} must be a float in the range {rng}. Got {value!r} instead.")
    v = float(value)
    bad = (
        (low is not None and (v < low or (low_open and v == low)))
        or (high is not None and (v > high or (high_open and v == high)))
    )
    if bad:
        raise ValueError(f"The {name!r} parameter{where} must be a float in the range {rng}. Got {value!r} instead.")
    return v


def check_int(
    name: str, value: object, *, low: int | None = None, high: int | None = None, owner: str = ""
) -> int:
    """Check that ``value`` is an integer in ``[low, high]``; return it as int."""
    where = f" of {owner}" if owner else ""
    rng = _range_text(low, high, False, False)
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise ValueError(f"The {name!r} parameter{where} must be an int in the range {rng}. Got {value!r} instead.")
    v = int(value)
    if (low is not None and v < low) or (high is not None and v > high):
        raise ValueError(f"The {name!r} parameter{where} must be an int in the range {rng}. Got {value!r} instead.")
    return v


def check_choice(name: str, value: object, choices: Iterable[object], *, owner: str = "") -> object:
    """Check that ``value`` is one of ``choices``; return it."""
    where = f" of {owner}" if owner else ""
    options = tuple(choices)
    if value not in options:
        listed = ", ".join(repr(c) for c in options)
        raise ValueError(f"The {name!r} parameter{where} must be one of {listed}. Got {value!r} instead.")
    return value
