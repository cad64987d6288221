"""Feeding a recorded session back through today's control cycle (no clock, no sockets;
the only file it reads is the pad mapping a session names).

Open loop (`jogwire replay --rerun`): each recorded cycle is stepped again with exactly
what it saw then: the input frame, the time, the measured pose and its age, the loop's
overrun streak, and any hold the session imposed (a cycle recorded as blocked for a reason
the inputs do not explain). The arm does not move in a re-run; the recorded poses are the
truth. With the same software and settings every rate comes out bit for bit as recorded;
a difference is what a change of software, arm or settings would have done on that exact
situation. Closed loop (in lockstep with the simulated arm) lives in `runtime.sessions.lockstep`;
`RecordedInputs` serves both.

The settings a re-run reads from the session header (docs/SESSION_FORMAT.md) are
`RunSettings.from_header`'s (rate_hz required) and pad / pad_source. A cycle the session blocked
for its link's round trip is re-run blocked for the recorded reason (a re-run has no link:
its round trip is 0).
"""

from __future__ import annotations

import bisect
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
from numpy.typing import NDArray

from ..arm.cell import Cell
from ..arm.model import Arm
from ..control.cycle import ControlCycle
from ..control.intent import InputFrame
from ..control.pads import PadMapping, load_pad
from ..control.safety import BLOCKED
from ..control.settings import RunSettings
from ..errors import ConfigError, LogError
from .log_reader import BAD_RECORD, CORRUPT, GAP, Session
from .log_schema import CycleRecord, frame_from_wire

Vector = NDArray[np.float64]

# Problems after which the recorded timeline has a hole: a re-run stops before it.
BREAKS = (GAP, CORRUPT, BAD_RECORD)


# ----------------------------------------------------------------------------------------
# What a session was run with
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class CycleSettings:
    """How to rebuild a session's ControlCycle: its run settings and its pad mapping."""

    run: RunSettings
    pad: PadMapping
    clearance: bool = True         # with a workcell: the velocity damper was in the solve

    def control_cycle(self, arm: Arm, cell: Cell | None = None) -> ControlCycle:
        """The session's control cycle; in `cell` with the damper if the session had it."""
        return ControlCycle(arm, self.pad, self.run, cell=cell if self.clearance else None)


def cycle_settings(settings: Mapping[str, Any], *, where: str = "session") -> CycleSettings:
    """Read the header settings a re-run needs (`RunSettings.from_header`: a missing rate
    or a bad value is a LogError), whether the velocity damper was on (`clearance`,
    preflight --no-clearance records false) and the pad mapping: the recorded file
    (pad_source) if it still exists, else the shipped mapping of that name, else the
    keyboard mapping (scripted and network input carry their commands in the frames and
    use the pad only for its start state)."""
    clearance = settings.get("clearance", True)
    if not isinstance(clearance, bool):
        raise LogError(f"{where}: the header settings are malformed (clearance is "
                       f"{clearance!r})")
    return CycleSettings(RunSettings.from_header(settings, where=where), _pad(settings),
                         clearance=clearance)


def _pad(settings: Mapping[str, Any]) -> PadMapping:
    for key in ("pad_source", "pad"):
        value = settings.get(key)
        if isinstance(value, str) and value:
            if key == "pad_source" and not Path(value).exists():
                continue
            try:
                return load_pad(value)
            except ConfigError:
                continue
    return load_pad("keyboard")


def continuous_records(session: Session) -> tuple[tuple[CycleRecord, ...], str | None]:
    """The records from the start up to the first hole in the timeline (cycle numbers not
    consecutive: records lost to damage), and a sentence on the hole (None if there is
    none). A torn tail or a missing end record is no hole: everything before it is kept."""
    records = session.records
    for k in range(1, len(records)):
        if records[k].cycle != records[k - 1].cycle + 1:
            first = next((p for p in session.problems if p.kind in BREAKS), None)
            return records[:k], (f"the log is damaged after cycle {records[k - 1].cycle} "
                                 f"(t = {records[k - 1].t_s:.3f} s; {first}); only the "
                                 f"{k} cycles before the damage are used")
    return records, None


def inputs_of(records: Sequence[CycleRecord], where: str = "session") -> list[InputFrame]:
    """The recorded input frame of every cycle; a log without them cannot be re-run."""
    frames = []
    for rec in records:
        if rec.input is None:
            raise LogError(f"{where}: cycle {rec.cycle} has no recorded input frame; this log "
                           f"was written before input frames were recorded and cannot be "
                           f"re-run")
        try:
            frames.append(frame_from_wire(rec.input))
        except (KeyError, TypeError, ValueError) as exc:
            raise LogError(f"{where}: cycle {rec.cycle}: the recorded input frame is "
                           f"malformed ({exc!r})") from None
    return frames


class RecordedInputs:
    """Recorded input frames played at new cycle times: at time t the frame of the record
    nearest before t + dt/2 (a recorded loop's jitter neither repeats nor skips inputs)."""

    def __init__(self, records: Sequence[CycleRecord], frames: Sequence[InputFrame],
                 dt_s: float) -> None:
        t0 = records[0].t_s
        self._times = [r.t_s - t0 for r in records]
        self._frames = list(frames)
        self._half = 0.5 * dt_s
        self.duration_s = self._times[-1] + dt_s

    def frame_at(self, k: int, t_s: float) -> InputFrame:
        i = bisect.bisect_right(self._times, t_s + self._half) - 1
        return self._frames[max(i, 0)]


# ----------------------------------------------------------------------------------------
# Open-loop re-run
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class RerunDiff:
    """Today's rates against the recorded ones, per joint (rad/s or m/s)."""

    joint_names: tuple[str, ...]
    max_abs: Vector               # largest |today − recorded| per joint
    max_abs_t_s: tuple[float | None, ...]
    cycles: int
    differing_cycles: int         # cycles where any joint differs at all
    first_difference_t_s: float | None
    state_mismatches: int         # cycles whose safety-gate state differs
    rates: NDArray[np.float64]    # today's rates (cycles, n)

    @property
    def largest(self) -> float:
        return float(self.max_abs.max()) if self.max_abs.size else 0.0

    def as_dict(self) -> dict[str, Any]:
        return {"cycles": self.cycles, "largest_difference": self.largest,
                "differing_cycles": self.differing_cycles,
                "first_difference_t_s": self.first_difference_t_s,
                "safety_state_mismatches": self.state_mismatches,
                "joints": [{"name": n, "max_abs_difference": float(d), "at_t_s": t}
                           for n, d, t in zip(self.joint_names, self.max_abs,
                                              self.max_abs_t_s)]}


def rerun_open_loop(cycle: ControlCycle, records: Sequence[CycleRecord],
                    frames: Sequence[InputFrame]) -> RerunDiff:
    """Step `cycle` once per record with what the record saw; compare the rates."""
    n = cycle.arm.n
    rates = np.zeros((len(records), n))
    recorded = np.zeros((len(records), n))
    mismatches = 0
    for k, (rec, frame) in enumerate(zip(records, frames)):
        q = np.array(rec.q) if rec.q else None
        stamp = None if rec.state_age_s is None or q is None else rec.t_s - rec.state_age_s
        hold = rec.enable_reason if rec.safety_state == BLOCKED else None
        out = cycle.step(frame, rec.t_s, q, stamp, overrun_streak=rec.overrun_streak,
                         hold=hold)
        rates[k] = out.rates
        recorded[k] = rec.rates
        if rec.safety_state and out.verdict.state != rec.safety_state:
            mismatches += 1
    diff = np.abs(rates - recorded)
    t = [r.t_s for r in records]
    worst = diff.argmax(axis=0) if len(records) else np.zeros(n, dtype=int)
    differs = np.flatnonzero(diff.max(axis=1) > 0.0) if len(records) else np.zeros(0, int)
    return RerunDiff(
        joint_names=cycle.arm.joint_names,
        max_abs=diff.max(axis=0) if len(records) else np.zeros(n),
        max_abs_t_s=tuple(float(t[i]) if len(records) and diff[i, j] > 0 else None
                          for j, i in enumerate(worst.tolist())),
        cycles=len(records), differing_cycles=int(differs.size),
        first_difference_t_s=float(t[differs[0]]) if differs.size else None,
        state_mismatches=mismatches, rates=rates)
