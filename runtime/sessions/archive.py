"""Keeping a sessions folder within bounds: drop the oldest logs, never the current one.

A lab that records every session wants the folder capped by size, by age, or both.
`prune_sessions` removes session logs (`*.jwlog` directly in the folder, nothing else)
oldest first until both caps hold, skips the session being recorded, and returns what it
removed and why, so the caller can say so. A file it cannot remove is reported, not fatal.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from .catalog import session_files

BYTES_PER_MB = 1_000_000
SECONDS_PER_DAY = 86_400.0


@dataclass(frozen=True)
class Removal:
    """A session log the cap removed (or failed to remove: `error` says why)."""

    path: Path
    size_bytes: int
    reason: str
    error: str | None = None


@dataclass(frozen=True)
class ArchiveCap:
    """At most `max_bytes` of session logs, none older than `max_age_s`; None: no cap."""

    max_bytes: int | None = None
    max_age_s: float | None = None

    def __post_init__(self) -> None:
        if self.max_bytes is not None and self.max_bytes < 0:
            raise ValueError(f"max_bytes must be ≥ 0, got {self.max_bytes}")
        if self.max_age_s is not None and not self.max_age_s > 0:
            raise ValueError(f"max_age_s must be positive, got {self.max_age_s}")

    @property
    def active(self) -> bool:
        return self.max_bytes is not None or self.max_age_s is not None


def prune_sessions(folder: str | Path, cap: ArchiveCap, *, keep: Path | None, now_s: float
                   ) -> list[Removal]:
    """Remove the oldest session logs in `folder` until `cap` holds; never `keep`.
    `now_s` is wall-clock time (s since the epoch) for the age cap."""
    if not cap.active:
        return []
    folder = Path(folder)
    logs = []
    for path in session_files(folder):
        try:
            st = path.stat()
        except OSError:
            continue                                 # gone meanwhile: nothing to do
        logs.append((st.st_mtime, path.name, path, st.st_size))
    logs.sort()                                      # oldest first (then by name)
    total = sum(size for *_, size in logs)
    removed = []
    for mtime, _, path, size in logs:
        if keep is not None and _same(path, keep):
            continue
        reason = _reason(cap, now_s - mtime, total)
        if reason is None:
            continue
        try:
            path.unlink()
        except OSError as exc:
            removed.append(Removal(path, size, reason, exc.strerror or str(exc)))
            continue
        total -= size
        removed.append(Removal(path, size, reason))
    return removed


def _reason(cap: ArchiveCap, age_s: float, total_bytes: int) -> str | None:
    if cap.max_age_s is not None and age_s > cap.max_age_s:
        return f"older than {cap.max_age_s / SECONDS_PER_DAY:g} days"
    if cap.max_bytes is not None and total_bytes > cap.max_bytes:
        return f"the folder was over {cap.max_bytes / BYTES_PER_MB:g} MB"
    return None


def _same(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return a.resolve() == b.resolve()
