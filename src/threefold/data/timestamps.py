"""Timestamp parsing for event logs: every accepted form to int64 epoch seconds (UTC).

Accepted forms
--------------
* ISO-8601 date and time with a UTC offset: ``2024-03-10T07:30:00+00:00``,
  ``...Z``, ``...+0530``, ``...-05``; ``T`` or a space between date and time;
  minutes, seconds and up to nine fractional digits optional;
* integer epoch seconds (``1710055800``, optional minus sign, within int64);
* in Parquet: integer or floating epoch seconds, or a timestamp type with a
  time zone.
Fractional seconds are floored to the second below (toward the past).

Naive timestamps (an ISO date-time without offset, a date alone, or a Parquet
timestamp type without a time zone) are local wall-clock times. They are an
error unless a time zone is given; then they are localized in that zone with the
IANA tz database through the standard library's :mod:`zoneinfo` (PEP 615).

Daylight-saving rule: a wall time that happens twice (clocks turned back,
*ambiguous*) or never (clocks turned forward, *nonexistent*) is read with the
UTC offset in force just before the change. This is Python's ``fold=0`` rule
(PEP 495): in America/New_York, 2024-11-03 01:30 becomes 05:30 UTC (the first
of the two 01:30s, still daylight time) and 2024-03-10 02:30 becomes 07:30 UTC
(read with standard time, i.e. 03:30 daylight time). Both are counted.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["ParsedTimestamps", "parse_timestamps", "check_timezone", "to_epoch_seconds", "to_seconds", "duration_rule",
           "instant_rule"]

# The accepted forms, written to match what Arrow's strict ISO-8601 cast accepts,
# so that the fast path (one cast of a whole chunk) and the slow path (per-form
# parsing of a mixed chunk) agree value by value.
_TIME = r"[T ]\d{2}(:\d{2}(:\d{2}(\.\d{1,9})?)?)?"
_AWARE = r"^\d{4}-\d{2}-\d{2}" + _TIME + r"(Z|[+-]\d{2}(:?\d{2})?)$"
_NAIVE = r"^\d{4}-\d{2}-\d{2}(" + _TIME + r")?$"
_EPOCH = r"^-?\d{1,19}$"
_EPOCH_START = datetime(1970, 1, 1)


def check_timezone(timezone: str | None) -> ZoneInfo | None:
    """The :class:`zoneinfo.ZoneInfo` of an IANA zone name, or ``None``; clear error if unknown."""
    if timezone is None:
        return None
    if not isinstance(timezone, str) or not timezone:
        raise ValueError(f"The 'timezone' parameter must be an IANA time zone name such as 'Europe/Paris'. Got {timezone!r} instead.")
    try:
        return ZoneInfo(timezone)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(
            f"The 'timezone' parameter must be an IANA time zone name such as 'Europe/Paris'. Got {timezone!r} instead."
        ) from None


@dataclass(frozen=True)
class ParsedTimestamps:
    """Result of :func:`parse_timestamps`; every array has shape (n,).

    Attributes
    ----------
    seconds : ndarray, int64
        Epoch seconds UTC; 0 where ``valid`` is False.
    valid : ndarray, bool
        Parsed (and localized when naive).
    unparseable : ndarray, bool
        Missing, blank or in no accepted form.
    naive : ndarray, bool
        Parsed wall-clock times without offset (localized when a zone was given,
        otherwise invalid).
    ambiguous, nonexistent : ndarray, bool
        Naive times that fall in a daylight-saving fold or gap of the zone.
    """

    seconds: np.ndarray
    valid: np.ndarray
    unparseable: np.ndarray
    naive: np.ndarray
    ambiguous: np.ndarray
    nonexistent: np.ndarray


def _datetimes_to_seconds(values: pd.Series | pd.DatetimeIndex) -> tuple[np.ndarray, np.ndarray]:
    """Floor datetime64 values (naive, or converted to UTC) to int64 seconds; also the NaT mask."""
    index = pd.DatetimeIndex(values)
    if index.tz is not None:
        index = index.tz_convert("UTC").tz_localize(None)
    missing = np.asarray(index.isna())
    seconds = index.to_numpy().astype("datetime64[s]").astype(np.int64)  # numpy floors
    return np.where(missing, 0, seconds), missing


def _localize(wall: np.ndarray, zone: ZoneInfo) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Wall-clock seconds in ``zone`` to epoch seconds with the fold=0 rule; plus ambiguous/nonexistent masks."""
    index = pd.DatetimeIndex(wall.astype("datetime64[s]")).tz_localize(zone, ambiguous="NaT", nonexistent="NaT")
    seconds, special = _datetimes_to_seconds(index)
    ambiguous = np.zeros(wall.size, dtype=bool)
    nonexistent = np.zeros(wall.size, dtype=bool)
    if special.any():
        uniques, inverse = np.unique(wall[special], return_inverse=True)
        resolved = np.empty(uniques.size, dtype=np.int64)
        exists = np.empty(uniques.size, dtype=bool)
        for k, w in enumerate(uniques):
            local = _EPOCH_START + timedelta(seconds=int(w))
            instant = int(local.replace(tzinfo=zone).timestamp())  # fold=0 (PEP 495)
            resolved[k] = instant
            exists[k] = datetime.fromtimestamp(instant, zone).replace(tzinfo=None) == local
        seconds[special] = resolved[inverse]
        ambiguous[special] = exists[inverse]
        nonexistent[special] = ~exists[inverse]
    return seconds, ambiguous, nonexistent


def _match(values: pa.Array, pattern: str) -> np.ndarray:
    return pc.match_substring_regex(values, pattern).fill_null(False).to_numpy(zero_copy_only=False)


def _cast_all(values: pa.Array, target: pa.DataType) -> pa.Array | None:
    """Arrow's strict cast of the whole array, or None when any value does not fit."""
    try:
        return pc.cast(values, target)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None


def _parse_strings(values: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """Epoch seconds (aware and epoch forms) or wall seconds (naive form), and the form of each string.

    Returns ``seconds`` (int64) and ``form`` (int8: 0 unparseable, 1 aware or
    epoch, 2 naive). A column entirely in one form is parsed by one strict
    Arrow cast (ISO-8601 with offset, integer, or ISO-8601 without offset);
    anything else is classified by regular expressions and parsed by pandas.
    """
    n = len(values)
    if values.null_count == 0:
        for target, code in ((pa.timestamp("ns", tz="UTC"), 1), (pa.int64(), 1), (pa.timestamp("ns"), 2)):
            cast = _cast_all(values, target)
            if cast is not None:
                if pa.types.is_integer(target):
                    return cast.to_numpy(), np.ones(n, dtype=np.int8)
                seconds, missing = _datetimes_to_seconds(cast.to_pandas())
                return seconds, np.where(missing, 0, code).astype(np.int8)
    values = pc.utf8_trim_whitespace(values)
    seconds = np.zeros(n, dtype=np.int64)
    form = np.zeros(n, dtype=np.int8)
    aware = _match(values, _AWARE)
    epoch = _match(values, _EPOCH)
    naive = _match(values, _NAIVE)
    if epoch.any():
        digits = values.filter(pa.array(epoch))
        cast = _cast_all(digits, pa.int64())
        if cast is None:  # some 19-digit value beyond the int64 range
            numbers = [int(d) for d in digits.to_pylist()]
            fits = np.array([-(2**63) <= v < 2**63 for v in numbers])
            epoch[np.flatnonzero(epoch)[~fits]] = False
            cast = pa.array([v for v, ok in zip(numbers, fits) if ok], pa.int64())
        seconds[epoch] = cast.to_numpy()
        form[epoch] = 1
    for mask, utc, code in ((aware, True, 1), (naive, False, 2)):
        if mask.any():
            # Digits beyond microseconds cannot change the floored second; dropping
            # them keeps pandas at microsecond resolution (years 1..9999).
            text = pc.replace_substring_regex(values.filter(pa.array(mask)), r"(\.\d{6})\d+", r"\1").to_pandas()
            parsed = pd.to_datetime(text, format="ISO8601", utc=utc, errors="coerce")
            sec, missing = _datetimes_to_seconds(parsed)
            seconds[mask] = sec
            form[np.flatnonzero(mask)[~missing]] = code
    return seconds, form


def _parse_column(values: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """Dispatch on the Arrow type: seconds and form (0 unparseable, 1 aware/epoch, 2 naive)."""
    kind = values.type
    n = len(values)
    if pa.types.is_dictionary(kind):
        values = values.dictionary_decode()
        kind = values.type
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return _parse_strings(values)
    if pa.types.is_null(kind):
        return np.zeros(n, dtype=np.int64), np.zeros(n, dtype=np.int8)
    if pa.types.is_integer(kind):
        valid = values.is_valid().to_numpy(zero_copy_only=False)
        seconds = values.cast(pa.int64()).fill_null(0).to_numpy()
        return seconds, valid.astype(np.int8)
    if pa.types.is_floating(kind):
        raw = values.cast(pa.float64()).fill_null(np.nan).to_numpy(zero_copy_only=False)
        valid = np.isfinite(raw) & (np.abs(raw) < 2.0**62)
        seconds = np.where(valid, np.floor(np.where(valid, raw, 0.0)), 0).astype(np.int64)
        return seconds, valid.astype(np.int8)
    if pa.types.is_timestamp(kind) or pa.types.is_date(kind):
        aware = pa.types.is_timestamp(kind) and kind.tz is not None
        if aware:
            values = pc.cast(values, pa.timestamp(kind.unit, tz="UTC"))
        as_pandas = values if aware else values.cast(pa.timestamp("us"), safe=False)  # sub-microseconds dropped
        seconds, missing = _datetimes_to_seconds(as_pandas.to_pandas())
        form = np.where(missing, 0, 1 if aware else 2).astype(np.int8)
        return seconds, form
    raise ValueError(f"Timestamps of Arrow type {kind} are not supported; use ISO-8601 strings or epoch seconds.")


def parse_timestamps(values: pa.Array | pa.ChunkedArray, zone: ZoneInfo | None) -> ParsedTimestamps:
    """Parse one chunk of a timestamp column.

    Parameters
    ----------
    values : pyarrow Array of shape (n,)
        Strings (any accepted form), integers or floats (epoch seconds), or a
        timestamp or date type.
    zone : ZoneInfo or None
        Zone that naive timestamps are local to; ``None`` makes them invalid.

    Returns
    -------
    ParsedTimestamps
    """
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    seconds, form = _parse_column(values)
    naive = form == 2
    ambiguous = np.zeros(form.size, dtype=bool)
    nonexistent = np.zeros(form.size, dtype=bool)
    valid = form == 1
    if zone is not None and naive.any():
        local, amb, gap = _localize(seconds[naive], zone)
        seconds[naive] = local
        ambiguous[naive] = amb
        nonexistent[naive] = gap
        valid = valid | naive
    seconds = np.where(valid, seconds, 0)
    return ParsedTimestamps(
        seconds=seconds,
        valid=valid,
        unparseable=form == 0,
        naive=naive,
        ambiguous=ambiguous,
        nonexistent=nonexistent,
    )


def to_epoch_seconds(value: int | str | pd.Timestamp, name: str = "time") -> int:
    """Epoch seconds (UTC) of an int, or of an ISO-8601 string / Timestamp with a UTC offset."""
    if isinstance(value, (bool, np.bool_)):
        raise ValueError(f"The {name!r} parameter must be epoch seconds or an ISO-8601 time. Got {value!r} instead.")
    if isinstance(value, (int, np.integer)):
        return int(value)
    try:
        stamp = pd.Timestamp(value)
    except (TypeError, ValueError):
        raise ValueError(f"The {name!r} parameter must be epoch seconds or an ISO-8601 time. Got {value!r} instead.") from None
    if stamp.tzinfo is None:
        raise ValueError(f"The {name!r} parameter {value!r} has no UTC offset; write e.g. '2026-03-30T00:00:00+00:00'.")
    return int(stamp.tz_convert("UTC").as_unit("s").value // 1_000_000_000)


def to_seconds(value: int | str | pd.Timedelta, name: str = "window") -> int:
    """Seconds of an int, or of a duration string such as ``"24h"`` or ``"2D"`` (pandas Timedelta)."""
    if isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_)):
        seconds = int(value)
    else:
        try:
            seconds = int(pd.Timedelta(value).total_seconds())
        except (TypeError, ValueError):
            raise ValueError(f"The {name!r} parameter must be seconds or a duration like '24h'. Got {value!r} instead.") from None
    if seconds <= 0:
        raise ValueError(f"The {name!r} parameter must be a positive duration. Got {value!r} instead.")
    return seconds


def duration_rule(key, value, owner):
    """Parameter rule (:mod:`threefold.core.params`): seconds or a duration string such as ``"24h"``."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer, str)):
        raise ValueError(f"The {key!r} parameter of {owner} must be seconds or a duration like '24h'. Got {value!r} instead.")
    to_seconds(value, key)
    return value


def instant_rule(key, value, owner):
    """Parameter rule: epoch seconds or an ISO-8601 time with a UTC offset (a TOML date-time kept as ISO text)."""
    if isinstance(value, datetime):
        if value.tzinfo is None:
            raise ValueError(f"The {key!r} parameter of {owner} {value.isoformat()!r} has no UTC offset; "
                             "write e.g. 2026-03-30T00:00:00Z.")
        value = value.isoformat()
    if isinstance(value, bool) or not isinstance(value, (int, str)):
        raise ValueError(f"The {key!r} parameter of {owner} must be epoch seconds or an ISO-8601 time with a UTC "
                         f"offset. Got {value!r} instead.")
    to_epoch_seconds(value, key)
    return value
