"""A folder of session logs as a table: find the session you want (`jogwire inspect DIR`).

One row per log: when it started, the arm, how long it ran and moved, the peak TCP speed,
the lowest σ_min, the closest clearance where the log records one, the limit episodes and
whether it closed cleanly. Filters on the arm, a date range and "had a limit event" read
only the header where they can, and rows are cached in the folder (CACHE_NAME, keyed by
each file's size and modification time), so a large archive is listed quickly after the
first time. A log that cannot be read is listed with the reason (unless a filter is
given: it can match none).
"""

from __future__ import annotations

import contextlib
import json
import os
from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from pathlib import Path
from typing import Any

from ..errors import ConfigError, LogError
from .log_reader import SessionReader
from .log_schema import SESSION_SUFFIX, software_version
from .summary import summarise

CACHE_NAME = ".jogwire-catalog.json"   # in the sessions folder: rows already computed
CACHE_VERSION = 1


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


def catalog(folder: str | Path, filt: CatalogFilter = CatalogFilter(), *,
            use_cache: bool = True) -> list[dict[str, Any]]:
    """One row per session log in `folder` that passes `filt`, oldest first. Rows are
    kept in the folder's CACHE_NAME, by file size and modification time, so listing a
    large archive again reads only the logs that are new or changed."""
    folder = Path(folder)
    cached = _load_cache(folder) if use_cache else {}
    kept: dict[str, dict[str, Any]] = {}
    rows = []
    for path in session_files(folder):
        stamp = _stamp(path)
        entry = cached.get(path.name)
        row: dict[str, Any] | None
        if entry is not None and entry.get("stamp") == stamp:
            row = dict(entry["row"], file=str(path))
        else:
            row = _row_of(path, filt)
        if row is None:                     # the header shows it cannot pass: not read
            continue
        if "error" not in row:             # an unreadable log is tried afresh each time
            kept[path.name] = {"stamp": stamp, "row": row}
        if _admits(row, filt):
            rows.append(row)
    if use_cache and kept != cached:
        _save_cache(folder, kept)
    return rows


def _row_of(path: Path, filt: CatalogFilter) -> dict[str, Any] | None:
    """The row of one log; None when its header alone shows that `filt` rejects it."""
    try:
        with SessionReader(path) as reader:
            header = reader.header
        started = datetime.fromisoformat(header.started_at)
    except (LogError, ValueError) as exc:
        return {"file": str(path), "error": str(exc)}
    if not filt.admits_header(header.arm.name, started):
        return None
    return session_row(summarise(path))


def _admits(row: dict[str, Any], filt: CatalogFilter) -> bool:
    if "error" in row:
        return filt == CatalogFilter()      # an unreadable log matches no filter
    return (filt.admits_header(row["arm"], datetime.fromisoformat(row["started_at"]))
            and (not filt.limit_events or row["limit_episodes"] > 0))


# ----------------------------------------------------------------------------------------
# The folder's cache of rows
# ----------------------------------------------------------------------------------------

def _stamp(path: Path) -> list[int]:
    try:
        st = path.stat()
    except OSError:
        return []
    return [st.st_size, st.st_mtime_ns]


def _cache_id() -> dict[str, Any]:
    """Rows are valid for this cache layout and this software (its statistics)."""
    return {"cache": CACHE_VERSION, "software_version": software_version()}


def _load_cache(folder: Path) -> dict[str, dict[str, Any]]:
    try:
        data = json.loads((folder / CACHE_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(data, dict) or data.get("id") != _cache_id():
        return {}
    entries = data.get("sessions")
    return entries if isinstance(entries, dict) else {}


def _save_cache(folder: Path, entries: dict[str, dict[str, Any]]) -> None:
    """Write the cache whole (a temporary file renamed over it); a folder that cannot be
    written is simply listed uncached next time."""
    target = folder / CACHE_NAME
    temporary = folder / f"{CACHE_NAME}.{os.getpid()}.tmp"
    try:
        temporary.write_text(json.dumps({"id": _cache_id(), "sessions": entries},
                                        allow_nan=False), encoding="utf-8")
        os.replace(temporary, target)
    except (OSError, ValueError, TypeError):
        with contextlib.suppress(OSError):
            temporary.unlink()


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
