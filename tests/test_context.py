"""Context derivation: dayparts in local time across daylight-saving changes, crosses, unknown levels."""

from datetime import datetime, timezone

import pandas as pd
import pytest

from threefold.data.context import ColumnContext, CrossedContext, Daypart, WeekPart, context_levels, derive_contexts, parse_context


def epoch(text: str) -> int:
    return int(datetime.fromisoformat(text).astimezone(timezone.utc).timestamp())


def test_daypart_follows_local_wall_clock_across_daylight_saving_changes():
    # Source: the IANA tz database (via zoneinfo): Europe/Paris switches to CEST (UTC+2)
    # on 2026-03-29 and back to CET (UTC+1) on 2026-10-25 (EU rule: last Sundays of March and October).
    part = Daypart(timezone="Europe/Paris", starts=(8.0, 12.0), labels=("morning", "rest"))
    events = pd.DataFrame({"timestamp": [
        epoch("2026-03-28T06:30:00+00:00"),  # 07:30 CET  -> before 08:00
        epoch("2026-03-30T06:30:00+00:00"),  # 08:30 CEST -> morning
        epoch("2026-03-30T05:30:00+00:00"),  # 07:30 CEST -> before 08:00
        epoch("2026-10-26T07:30:00+00:00"),  # 08:30 CET  -> morning
        epoch("2026-10-24T06:30:00+00:00"),  # 08:30 CEST -> morning
    ]})
    assert list(part.labels_for(events)) == ["rest", "morning", "rest", "morning", "morning"]


def test_daypart_bins_wrap_past_midnight():
    part = Daypart(timezone="UTC", starts=(6.0, 18.0), labels=("day", "night"))
    events = pd.DataFrame({"timestamp": [epoch(f"2026-01-05T{h:02d}:00:00+00:00") for h in (0, 5, 6, 17, 18, 23)]})
    assert list(part.labels_for(events)) == ["night", "night", "day", "day", "night", "night"]


def test_week_part_in_local_time():
    # 2026-01-02 23:30 UTC is Saturday 2026-01-03 08:30 in Asia/Tokyo (UTC+9, no daylight saving).
    events = pd.DataFrame({"timestamp": [epoch("2026-01-02T23:30:00+00:00")]})
    assert list(WeekPart(timezone="UTC").labels_for(events)) == ["weekday"]
    assert list(WeekPart(timezone="Asia/Tokyo").labels_for(events)) == ["weekend"]
    assert list(WeekPart(timezone="Asia/Tokyo", levels_kind="day_name").labels_for(events)) == ["saturday"]


def test_missing_values_map_to_unknown_and_crosses_keep_parts():
    events = pd.DataFrame({"timestamp": [0, 0, 0, 0], "device": ["mobile", None, "", "desktop"], "page_tone": ["calm", "calm", None, "urgent"]})
    frame = derive_contexts(events, [ColumnContext("device"), CrossedContext((ColumnContext("device"), ColumnContext("page_tone")))])
    assert list(frame["device"]) == ["mobile", "unknown", "unknown", "desktop"]
    assert list(frame["device*page_tone"]) == ["mobile|calm", "unknown|calm", "unknown|unknown", "desktop|urgent"]
    assert context_levels(ColumnContext("device"), frame["device"].unique()) == ("desktop", "mobile", "unknown")


def test_parse_context_forms():
    assert parse_context("daypart", timezone="Europe/Paris") == Daypart(timezone="Europe/Paris")
    assert parse_context("device") == ColumnContext("device")
    crossed = parse_context("device*week_part")
    assert isinstance(crossed, CrossedContext) and crossed.mode_name == "device*week_part"
    with pytest.raises(ValueError, match="not a valid mode or column name"):
        parse_context("device*")


def test_context_errors_are_clear():
    with pytest.raises(ValueError, match="Unknown IANA time zone 'Mars/Olympus'"):
        Daypart(timezone="Mars/Olympus")
    with pytest.raises(ValueError, match="increase strictly"):
        Daypart(starts=(9.0, 5.0), labels=("a", "b"))
    with pytest.raises(KeyError, match="Context column 'tone' is not in the events"):
        derive_contexts(pd.DataFrame({"timestamp": [0]}), [ColumnContext("tone")])
    with pytest.raises(ValueError, match="reserved mode names"):
        derive_contexts(pd.DataFrame({"timestamp": [0], "item": ["x"]}), [ColumnContext("item")])


def test_a_repeated_daypart_label_says_how_to_write_a_bin_across_midnight():
    with pytest.raises(ValueError, match=r"hours before the first start belong to the last bin"):
        Daypart(starts=(0, 5, 21), labels=("night", "day", "night"))
    # the rule itself: 02:00 and 23:00 UTC both fall in the last bin, 'night' (common practice for dayparts)
    bins = Daypart(starts=(5, 21), labels=("day", "night")).labels_for(
        pd.DataFrame({"timestamp": [2 * 3600, 23 * 3600, 12 * 3600]}))
    assert list(bins) == ["night", "night", "day"]
