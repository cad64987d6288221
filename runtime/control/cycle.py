"""One control cycle, end to end, with no I/O and no clock: input frame → joint rates.

    InputFrame ─► Mapper ─► SafetyGate ─► solve (DLS + limits) ─► rates
       (raw)      (intent)   (allowed?)    or joint jog + limits

`ControlCycle` is what `jogwire drive` runs at its loop rate, what `jogwire preflight` runs in
lockstep with the simulated arm and what `jogwire replay --rerun` feeds recorded inputs
through. Everything that varies between those — time, the measured pose and its age, the
loop's overrun streak, the link's round trip — is an argument, so the same inputs always give
the same rates.

The cycle length `dt_s` is the nominal period (1 / rate), not a measured one: the limits
then hold for the commanded profile whatever the scheduler did, and a re-run reproduces the
recorded rates exactly.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..arm.cell import Cell
from ..arm.kinematics import analyse_pose
from ..arm.model import Arm
from .clearance import ClearanceLimit
from .intent import InputFrame, Intent
from .limits import apply_limits, binding_limit, start_pose
from .mapping import Mapper
from .pads import PadMapping
from .safety import SafetyGate, Verdict
from .settings import STATE_LAGS, RunSettings
from .solver import Solution, solve

Vector = NDArray[np.float64]

__all__ = ["STATE_LAGS", "ControlCycle", "CycleOutput"]


@dataclass(frozen=True, eq=False)
class CycleOutput:
    """What one cycle decided. `solution` is None when motion was not allowed."""

    rates: Vector
    intent: Intent
    verdict: Verdict
    solution: Solution | None


class ControlCycle:
    """Mapper, safety gate and solver for one arm, with the rates sent last cycle."""

    def __init__(self, arm: Arm, pad: PadMapping, settings: RunSettings,
                 cell: Cell | None = None) -> None:
        self.arm = arm
        self.settings = settings
        self.dt_s = settings.dt_s
        # how far q lags the arm (limits.start_pose): as set for a lockstep run, else one cycle
        self.state_lag_cycles = settings.effective_state_lag
        self.locked = settings.locked_axes
        # With a workcell the velocity damper keeps every pair clear (control/clearance.py).
        self.clearance = None if cell is None else ClearanceLimit.of(arm, cell)
        self.mapper = Mapper(pad, arm, reduced_locked=settings.reduced_locked)
        self.gate = SafetyGate(settings.safety())
        self._last_now_s: float | None = None    # the previous cycle's time (s)
        self.prev_rates = np.zeros(arm.n)

    def step(self, frame: InputFrame, now_s: float, q: Vector | None,
             state_stamp_s: float | None, *, overrun_streak: int = 0,
             round_trip_s: float | None = 0.0, hold: str | None = None) -> CycleOutput:
        """One cycle at time now_s (s, loop clock) with the newest measured pose q.

        state_stamp_s: when q was received (same clock), None before the first state.
        round_trip_s: the link's measured round trip (s), None before one was measured; the
            default 0.0 is a link without delay (preflight's lockstep, re-runs).
        hold: a reason from the caller that forbids motion (target not ready, …).
        """
        step_s = self._step_s(now_s)
        intent = self.mapper.update(frame)
        verdict = self.gate.update(now_s, enable=intent.enable, stop=intent.stop,
                                   reset=intent.reset, present=intent.present,
                                   state_stamp_s=state_stamp_s, overrun_streak=overrun_streak,
                                   round_trip_s=round_trip_s, hold=hold)
        if not verdict.allowed or q is None:
            # Hold-to-move: zero at once. The arm side brakes at its rated deceleration.
            self.prev_rates = np.zeros(self.arm.n)
            return CycleOutput(self.prev_rates, intent, verdict, None)
        if intent.mode == "joint":
            solution = self._jog_joint(q, intent, step_s)
        else:
            solution = solve(self.arm, q, intent.twist, frame=intent.frame,
                             locked=self.locked, reduced=intent.reduced,
                             prev_rates=self.prev_rates, dt_s=self.dt_s,
                             state_lag_cycles=self.state_lag_cycles,
                             clearance=self.clearance, step_s=step_s)
        self.prev_rates = solution.rates
        return CycleOutput(solution.rates, intent, verdict, solution)

    def _step_s(self, now_s: float) -> float:
        """The time since the last cycle when it is shorter than a period (a cycle that
        catches up after a late one), else the period: what the acceleration limit holds
        over, so that an arm applying each command on arrival never sees more than
        max_accel. A fixed-rate run (preflight, re-runs at t = k·dt) always gets dt."""
        last, self._last_now_s = self._last_now_s, now_s
        if last is None or not 0.0 < now_s - last < self.dt_s * (1.0 - 1e-9):
            return self.dt_s      # (a clock that did not move is no shorter cycle)
        return now_s - last

    def _jog_joint(self, q: Vector, intent: Intent, step_s: float) -> Solution:
        """Single-joint jog: one joint's rate, through the same limits as a Cartesian move."""
        rates = np.zeros(self.arm.n)
        rates[intent.joint] = intent.joint_rate
        pose = analyse_pose(self.arm, q)
        q_start = start_pose(q, self.prev_rates, self.dt_s, self.state_lag_cycles)
        limited = apply_limits(self.arm, q_start, rates, pose.jacobian, reduced=intent.reduced,
                               prev_rates=self.prev_rates, dt_s=self.dt_s, step_s=step_s)
        return Solution(
            rates=limited.rates, damping=0.0, sigma_min=float(pose.singular_values[-1]),
            manipulability=pose.manipulability, commanded_twist=pose.jacobian @ rates,
            achieved_twist=limited.twist, tracking_error=0.0, tracking_error_linear=0.0,
            tracking_error_angular=0.0, scales=limited.scales,
            binding_limit=binding_limit(limited.scales, limited.conflicts), saturated_joints=(),
            conflicts=limited.conflicts)

