"""A one-line progress bar for long commands (preflight, replay), drawn on stderr.

Drawn only on a terminal: redirected to a file or a pipe, a redrawn line would be noise,
so nothing is written there. Redraws at most every `min_interval_s`.
"""

from __future__ import annotations

import sys
import time
from typing import Callable, TextIO

BAR_CELLS = 28


def format_bar(label: str, fraction: float, detail: str = "") -> str:
    """`label [#########...........]  45 %  detail` (fraction clipped to 0…1)."""
    f = min(max(fraction, 0.0), 1.0)
    filled = int(round(f * BAR_CELLS))
    bar = "#" * filled + "." * (BAR_CELLS - filled)
    return f"{label} [{bar}] {100 * f:3.0f} %" + (f"  {detail}" if detail else "")


class Progress:
    """Progress of `total` units of simulated (or recorded) time, in seconds."""

    def __init__(self, label: str, total_s: float, *, stream: TextIO | None = None,
                 clock: Callable[[], float] = time.monotonic, min_interval_s: float = 0.1,
                 enabled: bool | None = None) -> None:
        self.label = label
        self.total_s = total_s
        self.stream = stream if stream is not None else sys.stderr
        self.clock = clock
        self.min_interval_s = min_interval_s
        self.enabled = _is_terminal(self.stream) if enabled is None else enabled
        self._first: tuple[float, float] | None = None   # (wall, done) at the first update
        self._last = -float("inf")
        self._width = 0

    def update(self, done_s: float, *, force: bool = False) -> None:
        """`done_s` of `total_s` done; redraw if enough wall time has passed. The speed is
        measured from the first update (start-up before it does not count)."""
        if not self.enabled:
            return
        now = self.clock()
        if self._first is None:
            self._first = (now, done_s)
        if not force and now - self._last < self.min_interval_s:
            return
        self._last = now
        wall, done = now - self._first[0], done_s - self._first[1]
        detail = f"{done_s:.1f}/{self.total_s:.1f} s"
        if wall > 0.2 and done > 0:
            speed = done / wall
            eta = (self.total_s - done_s) / speed
            detail += f"  {speed:.1f}x real time  {eta:.0f} s left"
        self._draw(format_bar(self.label, done_s / self.total_s if self.total_s else 1.0,
                              detail))

    def _draw(self, line: str) -> None:
        pad = max(0, self._width - len(line))
        self.stream.write("\r" + line + " " * pad)
        self.stream.flush()
        self._width = len(line)

    def close(self) -> None:
        """Clear the bar (the caller prints its own summary)."""
        if self.enabled and self._width:
            self.stream.write("\r" + " " * self._width + "\r")
            self.stream.flush()
            self._width = 0


def _is_terminal(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False
