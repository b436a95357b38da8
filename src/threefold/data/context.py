"""Context modes derived from events: daypart, part of the week, categorical columns, crosses.

Each context specification turns the events into one string label per row; the
labels become the levels of one tensor mode. A missing value (NaN, None, empty
string) becomes the explicit level :data:`~threefold.core.vocabulary.UNKNOWN`, never
a crash and never a silent merge with another level.

Dayparts and the part of the week are computed from the UTC timestamp in a
configured IANA time zone (``zoneinfo``), so a local bin like "07:00–10:00"
stays the same wall-clock interval across daylight-saving changes.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Sequence, Union
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd

from threefold.core.vocabulary import UNKNOWN

__all__ = [
    "Daypart",
    "WeekPart",
    "ColumnContext",
    "CrossedContext",
    "ContextSpec",
    "derive_contexts",
    "context_levels",
    "parse_context",
    "factorize_labels",
    "DEFAULT_DAYPART_STARTS",
    "DEFAULT_DAYPART_LABELS",
]

#: Local start hours of the default dayparts; the last bin wraps past midnight.
DEFAULT_DAYPART_STARTS: tuple[float, ...] = (5.0, 9.0, 12.0, 17.0, 21.0)
DEFAULT_DAYPART_LABELS: tuple[str, ...] = ("early", "morning", "afternoon", "evening", "night")

_CROSS_SEPARATOR = "|"


def _zone(name: str) -> ZoneInfo:
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(f"Unknown IANA time zone {name!r} (e.g. 'UTC', 'Europe/Paris', 'America/Chicago').") from None


_OFFSET_GRID = 900  # UTC-offset changes fall on quarter hours in every IANA zone


def _local_seconds(timestamps: pd.Series | np.ndarray, timezone: str) -> np.ndarray:
    """Local wall-clock time of int64 epoch seconds (UTC), as seconds since 1970-01-01 local.

    The zone's UTC offset is looked up once per distinct quarter hour that
    occurs in the log (via ``zoneinfo``) instead of once per event, so a
    ten-million-row log costs a few arrays of int64, not a column of datetimes,
    and the memory follows the rows, never the time span between the earliest
    and the latest timestamp.

    Returns
    -------
    ndarray of shape (n,), int64
    """
    seconds = np.asarray(timestamps, dtype=np.int64)
    if seconds.size == 0:
        return seconds.copy()
    slot = seconds // _OFFSET_GRID
    start = int(slot.min())
    span = int(slot.max()) - start + 1
    if span <= 2 * seconds.size + 100_000:  # a dense table no larger than the rows: one pass, no sort
        slots, where = start + np.arange(span, dtype=np.int64), slot - start
    else:  # a few rows far apart in time: only the quarter hours that occur
        slots, where = np.unique(slot, return_inverse=True)
    grid = slots * _OFFSET_GRID
    local = pd.to_datetime(grid, unit="s", utc=True).tz_convert(_zone(timezone))
    offsets = (local.tz_localize(None).as_unit("s").asi8 - grid).astype(np.int64)
    return seconds + offsets[where.reshape(-1)]


@dataclass(frozen=True)
class Daypart:
    """Bins of local time of day.

    Parameters
    ----------
    timezone : str, default="UTC"
        IANA zone the bins are read in.
    starts : sequence of float, default=(5, 9, 12, 17, 21)
        Local start hour of each bin (fractions allowed: 7.5 is 07:30), strictly
        increasing in [0, 24). Hours before the first start belong to the last bin.
    labels : sequence of str, default=("early", "morning", "afternoon", "evening", "night")
        One label per bin.
    name : str, default="daypart"
        Mode name.
    """

    timezone: str = "UTC"
    starts: tuple[float, ...] = DEFAULT_DAYPART_STARTS
    labels: tuple[str, ...] = DEFAULT_DAYPART_LABELS
    name: str = "daypart"

    def __post_init__(self) -> None:
        _zone(self.timezone)
        starts = tuple(float(s) for s in self.starts)
        object.__setattr__(self, "starts", starts)
        object.__setattr__(self, "labels", tuple(str(x) for x in self.labels))
        if len(starts) != len(self.labels) or not starts:
            raise ValueError(f"Daypart needs one label per start hour; got {len(starts)} starts and {len(self.labels)} labels.")
        if any(b <= a for a, b in zip(starts, starts[1:])) or starts[0] < 0 or starts[-1] >= 24:
            raise ValueError(f"Daypart starts must increase strictly within [0, 24); got {starts}.")
        if UNKNOWN in self.labels or len(set(self.labels)) != len(self.labels):
            raise ValueError(
                f"Daypart labels must be unique and not {UNKNOWN!r}; got {self.labels}. A bin that runs across "
                "midnight needs no repeated label: the hours before the first start belong to the last bin "
                "(starts 5, 9, 12, 17, 21 with labels early, morning, afternoon, evening, night make 'night' "
                "21:00 to 05:00).")

    @property
    def levels(self) -> tuple[str, ...]:
        """Labels in bin order, then ``unknown``."""
        return self.labels + (UNKNOWN,)

    def codes_for(self, events: pd.DataFrame) -> tuple[np.ndarray, tuple[str, ...]]:
        """Daypart code of every event row (``timestamp`` in int64 epoch seconds) and the labels they index."""
        hours = (_local_seconds(events["timestamp"], self.timezone) % 86_400) / 3600.0
        bins = np.searchsorted(np.asarray(self.starts), hours, side="right") - 1
        bins[bins < 0] = len(self.labels) - 1  # before the first start: the last bin, wrapping past midnight
        return bins.astype(np.int32), self.labels

    def labels_for(self, events: pd.DataFrame) -> pd.Series:
        """One daypart label per event row."""
        return _labels_from_codes(*self.codes_for(events), events.index)


@dataclass(frozen=True)
class WeekPart:
    """Part of the week in local time: ``weekday``/``weekend`` or the day's name.

    Parameters
    ----------
    timezone : str, default="UTC"
    levels_kind : {"weekday_weekend", "day_name"}, default="weekday_weekend"
    name : str, default="week_part"
    """

    timezone: str = "UTC"
    levels_kind: str = "weekday_weekend"
    name: str = "week_part"

    def __post_init__(self) -> None:
        _zone(self.timezone)
        if self.levels_kind not in ("weekday_weekend", "day_name"):
            raise ValueError(
                f"The 'levels_kind' parameter of WeekPart must be one of 'weekday_weekend', 'day_name'. "
                f"Got {self.levels_kind!r} instead."
            )

    @property
    def levels(self) -> tuple[str, ...]:
        if self.levels_kind == "weekday_weekend":
            return ("weekday", "weekend", UNKNOWN)
        return ("monday", "tuesday", "wednesday", "thursday", "friday", "saturday", "sunday", UNKNOWN)

    def codes_for(self, events: pd.DataFrame) -> tuple[np.ndarray, tuple[str, ...]]:
        """Code of every event row and the labels they index."""
        dow = (_local_seconds(events["timestamp"], self.timezone) // 86_400 + 3) % 7  # 1970-01-01 was a Thursday
        if self.levels_kind == "weekday_weekend":
            return (dow >= 5).astype(np.int32), ("weekday", "weekend")
        return dow.astype(np.int32), self.levels[:7]

    def labels_for(self, events: pd.DataFrame) -> pd.Series:
        return _labels_from_codes(*self.codes_for(events), events.index)


@dataclass(frozen=True)
class ColumnContext:
    """A categorical event column used as a context mode (e.g. ``device``)."""

    column: str
    name: str | None = None

    @property
    def mode_name(self) -> str:
        return self.name or self.column

    def codes_for(self, events: pd.DataFrame) -> tuple[np.ndarray, tuple[str, ...]]:
        """Code of every event row and the labels they index (missing or blank values: ``unknown``)."""
        if self.column not in events.columns:
            raise KeyError(f"Context column {self.column!r} is not in the events; columns are {list(events.columns)}.")
        return factorize_labels(events[self.column])

    def labels_for(self, events: pd.DataFrame) -> pd.Series:
        return _labels_from_codes(*self.codes_for(events), events.index)


@dataclass(frozen=True)
class CrossedContext:
    """Several context specifications crossed into one mode (labels joined by ``|``)."""

    parts: tuple["ContextSpec", ...]
    name: str | None = None

    def __post_init__(self) -> None:
        if len(self.parts) < 2:
            raise ValueError("A crossed context needs at least two parts.")

    @property
    def mode_name(self) -> str:
        return self.name or "*".join(spec_name(p) for p in self.parts)

    def codes_for(self, events: pd.DataFrame) -> tuple[np.ndarray, tuple[str, ...]]:
        """Code of every event row and the crossed labels (``"mobile|evening"``) they index."""
        combined = np.zeros(len(events), dtype=np.int64)
        part_labels = []
        for part in self.parts:
            codes, labels = part.codes_for(events)
            combined = combined * len(labels) + codes
            part_labels.append(labels)
        codes, uniques = pd.factorize(combined)
        pieces = []
        for labels in reversed(part_labels):
            pieces.append(np.asarray(labels, dtype=object)[uniques % len(labels)])
            uniques = uniques // len(labels)
        crossed = tuple(_CROSS_SEPARATOR.join(parts) for parts in zip(*reversed(pieces)))
        return codes.astype(np.int32), crossed

    def labels_for(self, events: pd.DataFrame) -> pd.Series:
        return _labels_from_codes(*self.codes_for(events), events.index)


ContextSpec = Union[Daypart, WeekPart, ColumnContext, CrossedContext]


def spec_name(spec: ContextSpec) -> str:
    """Mode name of a context specification."""
    return spec.name if isinstance(spec, (Daypart, WeekPart)) else spec.mode_name


def factorize_labels(values: pd.Series) -> tuple[np.ndarray, tuple[str, ...]]:
    """Codes and distinct labels of a column, with missing or blank values as ``unknown``.

    Returns
    -------
    codes : ndarray of shape (n,), int32
    labels : tuple of str
        Distinct labels in order of first appearance; ``unknown`` is included
        only when some value was missing or blank (or literally ``unknown``).
    """
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    labels = [str(u).strip() for u in uniques]
    labels = [UNKNOWN if label == "" else label for label in labels]
    if (codes < 0).any():
        labels.append(UNKNOWN)
        codes = np.where(codes < 0, len(labels) - 1, codes)
    # blank values and literal 'unknown' collapse onto one level
    distinct, remap = np.unique(np.asarray(labels, dtype=object), return_inverse=True)
    return remap[codes].astype(np.int32), tuple(str(x) for x in distinct)


def _labels_from_codes(codes: np.ndarray, labels: tuple[str, ...], index: pd.Index) -> pd.Series:
    return pd.Series(np.asarray(labels, dtype=object)[codes], index=index, dtype=object)


def derive_contexts(events: pd.DataFrame, specs: Sequence[ContextSpec]) -> pd.DataFrame:
    """Context labels of every event row, one column per context mode.

    Parameters
    ----------
    events : DataFrame
        Normalized events; ``timestamp`` as int64 epoch seconds (UTC).
    specs : sequence of ContextSpec

    Returns
    -------
    DataFrame of shape (n_events, len(specs)), object (str) columns named by mode
    """
    names = [spec_name(s) for s in specs]
    if len(set(names)) != len(names):
        raise ValueError(f"Context mode names must be unique, got {names}.")
    if {"user", "item"} & set(names):
        raise ValueError("'user' and 'item' are reserved mode names; rename the context mode.")
    return pd.DataFrame({name: spec.labels_for(events) for name, spec in zip(names, specs)}, index=events.index)


def context_levels(spec: ContextSpec, observed: Sequence[str]) -> tuple[str, ...]:
    """Level order of a context mode: declared levels for time bins, sorted observed labels otherwise; ``unknown`` last."""
    if isinstance(spec, (Daypart, WeekPart)):
        return spec.levels
    seen = sorted({str(v) for v in observed} - {UNKNOWN})
    return tuple(seen) + (UNKNOWN,)


_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


def parse_context(
    text: str,
    *,
    timezone: str = "UTC",
    daypart_starts: Sequence[float] = DEFAULT_DAYPART_STARTS,
    daypart_labels: Sequence[str] = DEFAULT_DAYPART_LABELS,
) -> ContextSpec:
    """Context specification from its config / command-line form.

    ``"daypart"`` and ``"week_part"`` are derived from the timestamp; any other
    name is an event column; ``"device*page_tone"`` crosses several into one mode.
    """
    parts = [p.strip() for p in text.split("*")]
    for p in parts:
        if not _NAME.match(p):
            raise ValueError(f"Context {text!r}: {p!r} is not a valid mode or column name.")

    def one(name: str) -> ContextSpec:
        if name == "daypart":
            return Daypart(timezone=timezone, starts=tuple(daypart_starts), labels=tuple(daypart_labels))
        if name == "week_part":
            return WeekPart(timezone=timezone)
        return ColumnContext(column=name)

    return one(parts[0]) if len(parts) == 1 else CrossedContext(parts=tuple(one(p) for p in parts))
