"""The settings a control run is made with, in one frozen value validated once.

`RunSettings` is what every runner takes whole: `ControlCycle`, the drive session, a
preflight run, a re-run, and the argv of the simulated arm a drive starts. It is the one
place that holds the defaults of the rate and of `stale_after_s`, and the one way the
session log's header records them (`to_header`) and reads them back (`from_header`).

The header's settings are this run's settings plus what the command adds (input, pad,
target …), in one key order (`HEADER_ORDER`) so the same run writes the same bytes. A run
over a link records its round-trip limit; a lockstep run on the simulated arm has no link
and records its state lag instead (docs/SESSION_FORMAT.md).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

from ..errors import ConfigError, LogError
from .safety import OVERRUN_LIMIT, STALE_AFTER_S, SafetySettings

RATE_RANGE_HZ = (1.0, 2000.0)          # control loop rate
STALE_AFTER_RANGE_S = (0.005, 5.0)     # arm state (and, arm side, rates) older → stop
ROUND_TRIP_RANGE_S = (0.001, 5.0)
# How many cycles the measured pose a closed-loop run works on may lag behind the arm
# (runtime.sessions.lockstep.run_closed_loop).
STATE_LAGS = (0, 1)

# The key order of the header's settings: the command's entries and this run's settings.
HEADER_ORDER = ("command", "input", "profile", "pad", "pad_source", "rate_hz", "step_hz",
                "reduced_locked", "stale_after_s", "overrun_limit", "max_round_trip_s",
                "locked", "target", "target_kind", "target_arm", "clock", "duration_s",
                "state_lag_cycles")


@dataclass(frozen=True, kw_only=True)
class RunSettings:
    """rate_hz: control cycles per second (Hz); the cycle is `dt_s` = 1 / rate_hz.
    stale_after_s: arm state older than this (s) stops motion; the simulated arm a drive
        starts ramps to zero when our rates are older than this.
    max_round_trip_s: a link round trip above this (s) stops motion; None: stale_after_s
        (`round_trip_limit_s` is the value in force).
    overrun_limit: overrunning cycles in a row (or in a window, `SafetyGate`) that stop motion.
    reduced_locked: reduced speed on for the whole run.
    locked_axes: task axes held at zero ("x", "y", "z", "rx", "ry", "rz").
    state_lag_cycles: a closed-loop run on the simulated arm in lockstep: cycles the measured
        pose lags behind the arm (0 or 1); None for a run over a link (`effective_state_lag`
        is then 1).
    """

    rate_hz: float = 500.0
    stale_after_s: float = STALE_AFTER_S
    max_round_trip_s: float | None = None
    overrun_limit: int = OVERRUN_LIMIT
    reduced_locked: bool = False
    locked_axes: tuple[str, ...] = ()
    state_lag_cycles: int | None = None

    def __post_init__(self) -> None:
        _within(self.rate_hz, RATE_RANGE_HZ, "the control rate", "Hz", "rate")
        _within(self.stale_after_s, STALE_AFTER_RANGE_S, "stale_after", "s", "stale-after")
        if self.max_round_trip_s is not None:
            _within(self.max_round_trip_s, ROUND_TRIP_RANGE_S, "the round-trip limit", "s",
                    "max-round-trip")
        if isinstance(self.overrun_limit, bool) or not isinstance(self.overrun_limit, int) \
                or self.overrun_limit < 1:
            raise ConfigError(f"the overrun limit must be a whole number ≥ 1, got "
                              f"{self.overrun_limit!r}", field="overrun-limit")
        if not isinstance(self.reduced_locked, bool):
            raise ConfigError(f"reduced_locked must be true or false, got "
                              f"{self.reduced_locked!r}", field="reduced")
        if not all(isinstance(a, str) for a in self.locked_axes):
            raise ConfigError(f"locked axes must be names, got {self.locked_axes!r}",
                              field="locked")
        lag = self.state_lag_cycles
        if lag is not None and (isinstance(lag, bool) or lag not in STATE_LAGS):
            raise ConfigError(f"state_lag_cycles must be one of {STATE_LAGS}, got {lag!r}",
                              field="state-lag")

    @property
    def dt_s(self) -> float:
        """The nominal cycle (s): the limits and re-runs use it, not a measured period."""
        return 1.0 / self.rate_hz

    @property
    def round_trip_limit_s(self) -> float:
        """The round-trip limit in force (s): max_round_trip_s, else stale_after_s."""
        return self.stale_after_s if self.max_round_trip_s is None else self.max_round_trip_s

    @property
    def effective_state_lag(self) -> int:
        """Cycles the measured pose lags behind the arm, as the cycle's limits assume it
        (`limits.start_pose`) and a closed-loop re-run reproduces it: as set, else 1 (a run
        over a link sees its state at least a cycle late)."""
        return 1 if self.state_lag_cycles is None else self.state_lag_cycles

    def safety(self) -> SafetySettings:
        return SafetySettings(stale_after_s=self.stale_after_s,
                              overrun_limit=self.overrun_limit,
                              max_round_trip_s=self.max_round_trip_s)

    def to_header(self, **context: Any) -> dict[str, Any]:
        """The session header's settings: these settings and the command's `context`
        entries (input, pad, target …), in `HEADER_ORDER` (other keys after, as given)."""
        entries = dict(context)
        entries.update(rate_hz=self.rate_hz, reduced_locked=self.reduced_locked,
                       stale_after_s=self.stale_after_s, overrun_limit=self.overrun_limit)
        if self.state_lag_cycles is None:
            entries["max_round_trip_s"] = self.round_trip_limit_s
        else:
            entries["state_lag_cycles"] = self.state_lag_cycles
        if self.locked_axes:
            entries["locked"] = list(self.locked_axes)
        ordered = {k: entries.pop(k) for k in HEADER_ORDER if k in entries}
        ordered.update(entries)
        return ordered

    @classmethod
    def from_header(cls, settings: Mapping[str, Any], *, where: str = "session"
                    ) -> "RunSettings":
        """Read the settings back from a header; a missing rate or a bad value is a
        LogError naming `where`. Keys a header lacks take the defaults above."""
        rate = settings.get("rate_hz")
        if isinstance(rate, bool) or not isinstance(rate, (int, float)):
            raise LogError(f"{where}: the header settings have no usable rate_hz ({rate!r}); "
                           "a re-run needs the loop rate")
        try:
            rtt = settings.get("max_round_trip_s")
            lag = settings.get("state_lag_cycles")
            return cls(rate_hz=float(rate),
                       stale_after_s=_float(settings.get("stale_after_s", cls.stale_after_s)),
                       max_round_trip_s=None if rtt is None else _float(rtt),
                       overrun_limit=_int(settings.get("overrun_limit", cls.overrun_limit)),
                       reduced_locked=settings.get("reduced_locked", False),
                       locked_axes=tuple(str(a) for a in settings.get("locked", ()) or ()),
                       state_lag_cycles=lag)
        except (ConfigError, TypeError, ValueError) as exc:
            raise LogError(f"{where}: the header settings are malformed ({exc})") from None


def _within(value: float, bounds: tuple[float, float], what: str, unit: str,
            field: str) -> None:
    lo, hi = bounds
    if isinstance(value, bool) or not isinstance(value, (int, float)) or \
            not (math.isfinite(value) and lo <= value <= hi):
        shown = f"{value:g}" if isinstance(value, (int, float)) else repr(value)
        raise ConfigError(f"{what} must be between {lo:g} and {hi:g} {unit}, got {shown}",
                          field=field)


def _float(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise TypeError(f"{value!r} is not a number")
    return float(value)


def _int(value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise TypeError(f"{value!r} is not a whole number")
    return value
