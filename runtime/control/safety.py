"""Hold-to-move gate: enable switch, watchdog and stop latch (pure; the caller passes now_s).

Motion is allowed only while the operator holds enable, pressed fresh, and nothing is wrong.
The gate has five states (names are ours):

    ready    enable released and nothing wrong: pressing enable starts motion
    moving   enable held after a fresh press, device present, arm state fresh → allowed
    rearm    enable held but not freshly pressed (held at start, held when the device
             appeared, held through a fault or a stop): release it, then press again
    blocked  something forbids motion whatever the operator does: no input device, no or
             stale arm state, a loop that keeps overrunning, a link whose round trip is too
             long for a stop to arrive in time, or a hold reason from the caller
    stopped  stop was pressed; latched until reset is pressed with enable (and stop) released

Every `update` returns a `Verdict(allowed, state, reason)`. Releasing enable zeroes motion in
the same cycle. Any fault makes the gate forget the press, so after the fault clears the
operator must release and press enable again — the same rule as a three-position enabling
device, where going back to the centre position must not restart motion (IEC 60204-1 10.9,
ISO 10218-1:2011 5.8.3, from memory; REFERENCES §4).

Round trip. Letting go of enable stops the arm only when the zero rates reach it, one
one-way delay later. Neither end can tell a steady delay from a quick link (the lateness
filters measure delay against the quickest message seen), but the runtime can measure the
round trip on its own clock, and the way to the arm is part of it. So motion is refused
while the link's round trip is above `max_round_trip_s` (default: stale_after_s, so a
release reaches the arm within the time its own watchdog allows), and before one has been
measured at all.

This is an operational interlock in software. It is not a safety function: a real arm needs
a safety-rated enabling device and stop (docs/SAFETY.md).
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from typing import NamedTuple

READY = "ready"
MOVING = "moving"
REARM = "rearm"
BLOCKED = "blocked"
STOPPED = "stopped"
STATES = (READY, MOVING, REARM, BLOCKED, STOPPED)

# The one default of stale_after (s) and of the overrun limit (cycles); a run's settings
# (`runtime.control.settings.RunSettings`) take them from here.
STALE_AFTER_S = 0.1
OVERRUN_LIMIT = 5


@dataclass(frozen=True)
class SafetySettings:
    """stale_after_s: arm state older than this (s) forbids motion.
    overrun_limit: this many overrunning loop cycles in a row forbid motion; so do this many
    in the last stale_after_s of loop time when they are a third or more of its cycles
    (`SafetyGate`, "Overruns").
    max_round_trip_s: a link round trip above this (s) forbids motion; None: stale_after_s
    (`round_trip_limit_s` is the value in force)."""

    stale_after_s: float = STALE_AFTER_S
    overrun_limit: int = OVERRUN_LIMIT
    max_round_trip_s: float | None = None

    def __post_init__(self) -> None:
        if not (math.isfinite(self.stale_after_s) and self.stale_after_s > 0):
            raise ValueError(f"stale_after_s must be positive, got {self.stale_after_s}")
        if self.overrun_limit < 1:
            raise ValueError(f"overrun_limit must be ≥ 1, got {self.overrun_limit}")
        rtt = self.max_round_trip_s
        if rtt is not None and not (math.isfinite(rtt) and rtt > 0):
            raise ValueError(f"max_round_trip_s must be positive, got {rtt}")

    @property
    def round_trip_limit_s(self) -> float:
        return self.stale_after_s if self.max_round_trip_s is None else self.max_round_trip_s


class Verdict(NamedTuple):
    allowed: bool
    state: str
    reason: str


class SafetyGate:
    """The hold-to-move state machine. One `update` per control cycle."""

    def __init__(self, settings: SafetySettings = SafetySettings()) -> None:
        self.settings = settings
        self._need_release = True          # a press counts only after a release
        self._rearm_cause = "enable was held at start"
        self._stopped = False
        self._prev_reset: bool | None = None  # None: no baseline yet (reset held ≠ pressed)
        self._seen_device = False
        self._recent: deque[tuple[float, bool]] = deque()  # (now_s, overran) in the window
        self._late = 0                                     # overran cycles in _recent
        self._state: str | None = None
        self.since_s = 0.0                  # when the current state was entered

    @property
    def state(self) -> str | None:
        return self._state

    def update(self, now_s: float, *, enable: bool, stop: bool = False, reset: bool = False,
               present: bool = True, state_stamp_s: float | None = None,
               overrun_streak: int = 0, round_trip_s: float | None = 0.0,
               hold: str | None = None) -> Verdict:
        """One cycle.

        enable / stop / reset: held levels from the operator's device.
        present: the input device is there (readings from an absent device are ignored).
        state_stamp_s: when the newest arm state was received (same clock as now_s), or None.
        overrun_streak: consecutive overrunning loop cycles up to now (call once per cycle:
            the gate also counts the overruns among the recent cycles).
        round_trip_s: the link's round trip (s) as measured now, None before one has been
            measured; the default 0.0 is a link without delay (preflight, re-runs).
        hold: a reason from the caller that forbids motion (e.g. target not ready), or None.
        """
        self._count_overrun(now_s, overrun_streak > 0)   # the cycle before this one overran
        block = self._block_reason(now_s, present, state_stamp_s, overrun_streak,
                                   round_trip_s, hold)
        self._latch_stop(present, enable, stop, reset)
        if block is not None or self._stopped:
            if not present:
                self._rearm_cause = "enable was held when the device appeared"
            elif not self._need_release:
                self._rearm_cause = f"enable held through: {block or 'stop'}"
            self._need_release = True
        elif present and not enable:
            self._need_release = False
        verdict = self._verdict(block, enable, stop)
        if verdict.state != self._state:
            self._state, self.since_s = verdict.state, now_s
        return verdict

    def _block_reason(self, now_s: float, present: bool, stamp_s: float | None,
                      overrun_streak: int, round_trip_s: float | None,
                      hold: str | None) -> str | None:
        s = self.settings
        if not present:
            return "input device lost" if self._seen_device else "no input device"
        self._seen_device = True
        if stamp_s is None:
            return "no arm state yet"
        age_s = now_s - stamp_s
        if age_s > s.stale_after_s:
            return (f"arm state stale: {age_s * 1e3:.0f} ms old "
                    f"(limit {s.stale_after_s * 1e3:.0f} ms)")
        if overrun_streak >= s.overrun_limit:
            return f"control loop overran {overrun_streak} cycles in a row"
        if self._late >= s.overrun_limit and 3 * self._late >= len(self._recent):
            return (f"control loop overran {self._late} of its last {len(self._recent)} "
                    f"cycles (in {s.stale_after_s * 1e3:.0f} ms)")
        if round_trip_s is None:
            return "link round trip not measured yet (no state has echoed our rates)"
        if not round_trip_s <= s.round_trip_limit_s:      # (NaN counts as over)
            return (f"link round trip {round_trip_s * 1e3:.0f} ms, over the "
                    f"{s.round_trip_limit_s * 1e3:.0f} ms limit: a stop would reach the arm "
                    "too late")
        return hold

    def _count_overrun(self, now_s: float, overran: bool) -> None:
        """Overruns. A starved loop skips to the next grid slot after a late cycle, so late
        and on-time cycles can alternate and the streak never grows. So the gate also counts
        the overrunning cycles of the last stale_after_s (the time the arm side itself
        tolerates old rates) and blocks when there are overrun_limit of them and they are a
        third or more of that window's cycles. A third is our choice: a starved loop
        alternating is at a half; one cycle in four late must pass whatever the phase (a
        window can then hold 5 of 17); and a busy desktop at normal priority runs a few per
        cent with bursts of several in a row (6 of 10 seen when motion starts), which must
        not stop it."""
        self._recent.append((now_s, overran))
        self._late += overran
        start = now_s - self.settings.stale_after_s
        while self._recent[0][0] < start:
            self._late -= self._recent.popleft()[1]

    def _latch_stop(self, present: bool, enable: bool, stop: bool, reset: bool) -> None:
        if not present:
            self._prev_reset = None  # a device that comes back sets a new baseline
            return
        pressed = reset and self._prev_reset is False
        self._prev_reset = reset
        if stop:
            self._stopped = True
            return
        if self._stopped and pressed and not enable:
            self._stopped = False

    def _verdict(self, block: str | None, enable: bool, stop: bool) -> Verdict:
        if self._stopped:
            if stop:
                why = "stop held"
            elif enable:
                why = "stop pressed: release enable, then press reset"
            else:
                why = "stop pressed: press reset to clear"
            return Verdict(False, STOPPED, why)
        if block is not None:
            return Verdict(False, BLOCKED, block)
        if not enable:
            return Verdict(False, READY, "hold enable to move")
        if self._need_release:
            return Verdict(False, REARM, f"release enable and press again ({self._rearm_cause})")
        return Verdict(True, MOVING, "enable held")
