"""The validation report: problems with their severity and wording, console and JSON forms."""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace
from typing import Literal

import numpy as np

from threefold.core.defaults import SUSPICIOUS_CODES

__all__ = ["Problem", "ValidationReport", "describe", "iso_utc", "SUSPICIOUS_CODES"]

Severity = Literal["error", "warning"]

# code -> (severity, message); "{tz}" is the time zone given, "{detail}" a code-specific value.
_CATALOG: dict[str, tuple[Severity, str]] = {
    "missing_column": ("error", "required column is missing"),
    "bad_id_type": ("error", "id column stored as {detail}; ids must be text or integers (a float cannot hold every id)"),
    "missing_id": ("error", "empty or missing id (blank, null, 'nan', 'none' or 'null'); rows dropped"),
    "unparseable_timestamp": ("error", "time missing or not ISO-8601 with a UTC offset nor integer epoch seconds; rows dropped"),
    "naive_timestamp": ("error", "time without UTC offset and no timezone given (pass a timezone); rows dropped"),
    "dst_ambiguous": ("warning", "local time occurs twice in {tz} (clocks turned back); read with the offset before the change"),
    "dst_nonexistent": ("warning", "local time does not exist in {tz} (clocks turned forward); read with the offset before the change"),
    "future_timestamp": ("warning", "time later than the check time {detail} (clock drift, or epoch milliseconds?); rows kept"),
    "implausible_timestamp": ("error", "time before 1970-01-01 or from 2100-01-01 on (UTC): epoch milliseconds or microseconds? "
                                       "Timestamps are epoch seconds; rows dropped"),
    "outlying_timestamp": ("error", "time far outside the bulk of the log (1% to 99% of events: {detail}): a clock "
                                    "reset, a test row or a wrong unit? Count is rows, rows are each day's first. "
                                    "Fix the export, or allow them (allow=[\"outlying_timestamp\"], "
                                    "--allow outlying_timestamp); rows kept"),
    "unknown_event": ("error", "event is not 'impression' or 'click' (found {detail}); rows dropped"),
    "bad_dwell": ("error", "dwell_seconds is not a finite number; value cleared, rows kept"),
    "negative_dwell": ("error", "negative dwell_seconds; value cleared, rows kept"),
    "bad_position": ("error", "position is not an integer from 1 to 10,000; value cleared, rows kept"),
    "case_variant_id": ("error", "ids that differ only in letter case ('A12' and 'a12'), which would count as "
                                 "different users or items; count is ids, rows are each spelling's first row. Fix "
                                 "the export, or allow them (allow=[\"case_variant_id\"], --allow case_variant_id); rows kept"),
    "duplicate_row": ("warning", "exact duplicate of an earlier row (every column equal after parsing); rows dropped"),
    "unmatched_click": ("warning", "click with no matching impression ({detail}); rows kept"),
    "activity_outlier": ("warning", "users with more than {detail} events (likely automated); count is users, rows are each one's first row; rows kept"),
    "catalog_missing_item": ("warning", "item not in the items catalog ({detail} distinct items); rows kept"),
    "duplicate_item": ("error", "item_id repeated in the items catalog; later rows ignored"),
    "expires_before_published": ("warning", "expires_at earlier than published_at"),
}
_MATCH_RULE = {
    "request_id": "same request_id and item_id; a click without request_id: same user_id and item_id at or before it",
    "user_id": "same user_id and item_id at or before the click",
}


def iso_utc(seconds: int | None) -> str | None:
    """``2024-03-10T07:30:00Z`` for epoch seconds (years beyond 9999 too), or None."""
    if seconds is None:
        return None
    return str(np.datetime_as_string(np.datetime64(int(seconds), "s"), unit="s")) + "Z"  # any year


@dataclass(frozen=True)
class Problem:
    """One kind of problem found in one column.

    Attributes
    ----------
    code : str
        Stable identifier, e.g. ``"missing_id"`` (listed in ``docs/data-format.md``).
    severity : {"error", "warning"}
    column : str
        The column concerned (``"*"`` for whole-row problems such as duplicates).
    count : int
        Number of offending rows (users for ``activity_outlier``; 0 for a
        missing column).
    rows : tuple of int
        The first (up to ten) offending 1-based data rows, ascending.
    message : str
    source : {"events", "items"}
        Which file the rows belong to.
    """

    code: str
    severity: Severity
    column: str
    count: int
    rows: tuple[int, ...]
    message: str
    source: str = "events"

    def as_error(self) -> "Problem":
        return replace(self, severity="error")


def describe(code: str, column: str, count: int, rows, *, source: str = "events",
             timezone: str | None = None, detail: object = None) -> Problem:
    """Build a :class:`Problem` with the catalog's severity and wording."""
    severity, text = _CATALOG[code]
    if code == "missing_id" and column == "request_id":
        severity, text = "warning", "empty request_id; its clicks are matched by user and item instead; rows kept"
    if code == "naive_timestamp" and timezone is not None:
        severity, text = "warning", "time without UTC offset, read as local time in {tz}"
    if code == "unknown_event":
        detail = ", ".join(f"{v!r} x{n}" for v, n in sorted(detail.items(), key=lambda kv: (-kv[1], kv[0]))[:5])
    if code == "unmatched_click":
        detail = _MATCH_RULE[detail]
    if code == "activity_outlier":
        detail = f"{detail:,.0f}"
    return Problem(code, severity, column, int(count), tuple(int(r) for r in rows),
                   text.format(tz=timezone, detail=detail), source)


@dataclass(frozen=True)
class ValidationReport:
    """Result of :func:`threefold.data.validate.validate_events`.

    Attributes
    ----------
    summary : dict
        JSON-able summary: ``rows_read``, ``rows_kept``, ``rows_dropped`` (by
        reason), ``values_cleared`` (by column), ``users``, ``items``,
        ``requests``, ``time_min``/``time_max`` (ISO-8601 UTC), ``events`` (by
        value), ``clicks_per_impression``, ``by_position`` (impressions, clicks
        and clicks per impression at each position), ``context`` (per context
        column: ``coverage``, the share of kept rows with a value, and
        ``levels``, the number of distinct values, capped at 10,000),
        ``activity_outliers``, and ``catalog`` when an items file was checked.
    problems : tuple of Problem
        Errors first, then warnings.
    """

    summary: dict
    problems: tuple[Problem, ...]

    @property
    def ok(self) -> bool:
        """True when no problem is an error."""
        return not self.errors

    @property
    def errors(self) -> tuple[Problem, ...]:
        return tuple(p for p in self.problems if p.severity == "error")

    @property
    def warnings(self) -> tuple[Problem, ...]:
        return tuple(p for p in self.problems if p.severity == "warning")

    def problem(self, code: str, column: str | None = None, source: str = "events") -> Problem | None:
        """The problem with this code (and column), or None."""
        for p in self.problems:
            if p.code == code and (column is None or p.column == column) and p.source == source:
                return p
        return None

    def to_dict(self) -> dict:
        """JSON-serializable form: ``ok``, ``errors``, ``warnings`` (counts), ``summary``, ``problems``."""
        return {
            "ok": self.ok, "errors": len(self.errors), "warnings": len(self.warnings),
            "summary": self.summary,
            "problems": [dict(asdict(p), rows=list(p.rows)) for p in self.problems],
        }

    def to_text(self, max_positions: int = 20) -> str:
        """Readable console report."""
        s = self.summary
        verdict = "OK" if self.ok else "FAILED"
        lines = [
            f"threefold validate: {s['source']} ({s['format']}, {len(s['columns'])} columns)",
            f"Result: {verdict} - {len(self.errors)} error(s), {len(self.warnings)} warning(s)",
            "",
        ]
        if "rows_read" in s:
            lines += _summary_lines(s, max_positions)
        lines.append("Problems" if self.problems else "Problems: none")
        for p in self.problems:
            what = ("user" if p.code == "activity_outlier" else "row") + ("" if p.count == 1 else "s")
            lines.append(f"  {p.severity.upper():<8}{p.source:<7}{p.column:<16}{p.code:<26}{p.count:>10,} {what}")
            lines.append(f"          {p.message}")
            if p.rows:
                lines.append(f"          first rows: {', '.join(str(r) for r in p.rows)}")
        return "\n".join(lines)


def _summary_lines(s: dict, max_positions: int) -> list[str]:
    dropped = ", ".join(f"{k} {v:,}" for k, v in s["rows_dropped"].items())
    cleared = ", ".join(f"{k} {v:,}" for k, v in s["values_cleared"].items())
    events = " | ".join(f"{k} {v:,}" for k, v in s["events"].items())
    if not s["has_event_column"]:
        events += " (no event column: every row is a click)"
    if s["clicks_per_impression"] is not None:
        events += f" | clicks per impression {s['clicks_per_impression']:.3f}"
    out = [
        "Summary",
        f"  rows            {s['rows_read']:,} read, {s['rows_kept']:,} kept, "
        f"{s['rows_read'] - s['rows_kept']:,} dropped" + (f" ({dropped})" if dropped else ""),
    ]
    if cleared:
        out.append(f"  values cleared  {cleared}")
    out += [f"  users           {s['users']:,}", f"  items           {s['items']:,}"]
    if s.get("catalog") and "items" in s["catalog"]:
        out[-1] += f" (catalog: {s['catalog']['items']:,} items in {s['catalog']['rows']:,} rows)"
    if s["requests"] is not None:
        out.append(f"  requests        {s['requests']:,}")
    out += [
        f"  time range      {s['time_min'] or '-'} .. {s['time_max'] or '-'}"
        + (f" (local times read in {s['timezone']})" if s["timezone"] else ""),
        f"  events          {events}",
        f"  outliers        {s['activity_outliers'].get('users', 0):,} user(s) with more than "
        f"{s['activity_outliers']['threshold']:,.0f} events ({s['activity_outliers'].get('events', 0):,} events in all)",
        "",
    ]
    if s["by_position"]:
        out += ["Clicks per impression by position", "  position  impressions      clicks  per impression"]
        for row in s["by_position"][:max_positions]:
            ratio = "-" if row["clicks_per_impression"] is None else f"{row['clicks_per_impression']:.3f}"
            out.append(f"  {row['position']:>8}  {row['impressions']:>11,}  {row['clicks']:>10,}  {ratio:>14}")
        if len(s["by_position"]) > max_positions:
            out.append(f"  ... {len(s['by_position']) - max_positions} more positions (see to_dict())")
        out.append("")
    if s["context"]:
        out += ["Context coverage", "  column                coverage    levels"]
        for name, c in s["context"].items():
            levels = f">{c['levels']:,}" if c["levels_capped"] else f"{c['levels']:,}"
            out.append(f"  {name:<20}  {100 * c['coverage']:>7.1f}%  {levels:>8}")
        out.append("")
    return out
