"""A folder of session logs as a table: find the session you want (`jogwire inspect DIR`).

One row per log: when it started, the arm, how long it ran and moved, the peak TCP speed,
the lowest σ_min, the closest clearance where the log records one, the limit episodes and
whether it closed cleanly. Filters on the arm, a date range and "had a limit event" read
only the header where they can, so a large archive is listed quickly. A log that cannot be
read is listed with the reason, never skipped in silence.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from pathlib import Path
from typing import Any

from ..errors import ConfigError, LogError
from .log_reader import SessionReader
from .log_schema import SESSION_SUFFIX
from .summary import summarise


@dataclass(frozen=True)
class CatalogFilter:
    """Which sessions to list; None lets everything through. Times are aware datetimes."""

    arm: str | None = None
    since: datetime | None = None      # started at or after
    until: datetime | None = None      # started before
    limit_events: bool = False         # only sessions in which some limit bound

    def admits_header(self, arm: str, started: datetime) -> bool:
        return ((self.arm is None or arm == self.arm)
                and (self.since is None or started >= self.since)
                and (self.until is None or started < self.until))


def parse_when(text: str, *, end_of_day: bool, field: str) -> datetime:
    """An ISO 8601 date or date-time from the command line, local time unless it has an
    offset. A bare date as an upper bound means the end of that day."""
    try:
        when = datetime.fromisoformat(text)
    except ValueError:
        raise ConfigError(f"{text!r} is not a date (YYYY-MM-DD) or date-time "
                          f"(YYYY-MM-DDTHH:MM)", field=field) from None
    if end_of_day and len(text) <= len("YYYY-MM-DD"):
        when = datetime.combine(date.fromisoformat(text) + timedelta(days=1), time())
    return when if when.tzinfo is not None else when.astimezone()


def session_files(folder: Path) -> list[Path]:
    """The session logs in `folder` (not its subfolders), oldest name first."""
    return sorted(p for p in folder.iterdir() if p.suffix == SESSION_SUFFIX and p.is_file())


def catalog(folder: str | Path, filt: CatalogFilter = CatalogFilter()) -> list[dict[str, Any]]:
    """One row per session log in `folder` that passes `filt`, oldest first."""
    folder = Path(folder)
    rows = []
    for path in session_files(folder):
        try:
            with SessionReader(path) as reader:
                header = reader.header
            started = datetime.fromisoformat(header.started_at)
        except (LogError, ValueError) as exc:
            if filt == CatalogFilter():
                rows.append({"file": str(path), "error": str(exc)})
            continue
        if not filt.admits_header(header.arm.name, started):
            continue
        row = session_row(summarise(path))
        if filt.limit_events and not row["limit_episodes"]:
            continue
        rows.append(row)
    return rows


def session_row(summary: dict[str, Any]) -> dict[str, Any]:
    """The catalog row of one session's summary (`summary.summarise`)."""
    return {
        "file": summary["file"],
        "started_at": summary["started_at"],
        "arm": summary["arm"],
        "format_version": summary["format_version"],
        "cycles": summary["cycles"],
        "duration_s": summary["duration_s"],
        "time_moving_s": summary["time_moving_s"],
        "tcp_peak_speed": summary["tcp_peak_speed"],
        "min_sigma": summary["min_sigma"],
        "min_clearance": summary.get("min_clearance"),   # None: the log records none
        "limit_episodes": sum(e["episodes"] for e in summary["limit_events"]),
        "limits": [e["limit"] for e in summary["limit_events"]],
        "closed_cleanly": summary["recorder"]["closed_cleanly"],
        "problems": len(summary["problems"]),
    }
