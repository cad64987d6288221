"""A drive session's statistics, gathered by the loop thread cycle by cycle in bounded
memory: whole-session percentiles of durations, gate time, binding limits, peak speeds."""

from __future__ import annotations

import math
from collections import Counter

import numpy as np

from ..arm.model import Arm
from ..control.cycle import CycleOutput
from ..link.protocol import Contact, State
from .stats import MotionStats

__all__ = ["LogHistogram", "RunStats"]



class LogHistogram:
    """Durations (s) in log-spaced bins from 100 ns to 100 s: whole-session percentiles in
    bounded memory, each to within one bin (BINS_PER_DECADE = 100: 2.3 %); max is exact."""

    LOW_S = 1e-7
    DECADES = 9
    BINS_PER_DECADE = 100

    def __init__(self) -> None:
        self.counts = [0] * (self.DECADES * self.BINS_PER_DECADE + 2)
        self.n = 0
        self.max = -math.inf
        self._log_low = math.log10(self.LOW_S)

    def add(self, x: float) -> None:
        if x <= self.LOW_S:
            i = 0
        else:
            i = min(int((math.log10(x) - self._log_low) * self.BINS_PER_DECADE) + 1,
                    len(self.counts) - 1)
        self.counts[i] += 1
        self.n += 1
        if x > self.max:
            self.max = x

    def percentile(self, p: float) -> float | None:
        """The p-th percentile (0–100), nearest rank: the geometric centre of the bin that
        holds the ceil(p·n/100)-th smallest value, at most the max."""
        if self.n == 0:
            return None
        rank = max(1, math.ceil(p / 100.0 * self.n - 1e-9))   # 99.9 % of 20000 is 19980
        seen = 0
        for i, c in enumerate(self.counts):
            seen += c
            if seen >= rank:
                break
        if i == 0:
            return min(self.LOW_S, self.max)
        centre = 10 ** (self._log_low + (i - 0.5) / self.BINS_PER_DECADE)
        return min(centre, self.max)

    def summary(self) -> dict[str, float | int | None]:
        return {"count": self.n, "p50_s": self.percentile(50), "p99_s": self.percentile(99),
                "max_s": self.max if self.n else None}


class RunStats:
    """What the summary reports, gathered by the loop thread cycle by cycle."""

    def __init__(self, arm: Arm, rate_hz: float) -> None:
        self.gate_cycles: Counter[str] = Counter()
        # accelerations and stops: the analysis inspect and preflight use (sessions/stats.py)
        self.motion = MotionStats(arm.joint_names, arm.max_accel, rate_hz)
        self.limits: dict[str, list[int]] = {}         # name → [cycles, episodes]
        self._last_limit: str | None = None
        self.peak_commanded = np.zeros(arm.n)          # |rates| sent (rad/s or m/s)
        self.peak_measured = np.zeros(arm.n)           # |q̇| in the arm side's states
        self.tcp_peak_m_s = 0.0                        # ‖J·rates‖ linear, base frame
        self.tcp_peak_rad_s = 0.0
        self.read_to_send = LogHistogram()             # input read → rates on the wire
        self.round_trip = LogHistogram()               # rates sent → first state applying them
        self.round_trip_over = 0                       # cycles with the median over the limit
        self.round_trip_worst_s: float | None = None   # highest median a cycle saw
        self.state_age = LogHistogram()                # age of q when a cycle uses it
        self.arm_limited = 0                           # states in which the arm side limited
        self.states = 0
        self.min_clearance_m: float | None = None      # nearest pair over the session
        self.min_clearance_pair: tuple[str, str] | None = None
        self.min_clearance_t_s: float | None = None
        self.contacts: dict[tuple[str, str], list[float]] = {}  # pair → [first t, depth, steps]

    def add_cycle(self, out: CycleOutput, index: int, t_s: float) -> None:
        """One cycle: its number and time (s since the start) as the log records them."""
        self.gate_cycles[out.verdict.state] += 1
        np.maximum(self.peak_commanded, np.abs(out.rates), out=self.peak_commanded)
        sol = out.solution
        name = None if sol is None else sol.binding_limit
        if name is not None:
            counts = self.limits.setdefault(name, [0, 0])
            counts[0] += 1
            if name != self._last_limit:
                counts[1] += 1
        self._last_limit = name
        linear = 0.0
        if sol is not None:
            a = sol.achieved_twist
            linear = math.sqrt(a[0]**2 + a[1]**2 + a[2]**2)
            self.tcp_peak_m_s = max(self.tcp_peak_m_s, linear)
            self.tcp_peak_rad_s = max(self.tcp_peak_rad_s,
                                      math.sqrt(a[3]**2 + a[4]**2 + a[5]**2))
        self.motion.add_cycle(index, t_s, out.rates, out.verdict.allowed, out.verdict.reason,
                              linear)

    def add_clearance(self, out: CycleOutput, t_s: float) -> None:
        """The nearest pair the cycle's solve measured (with a workcell), session low."""
        report = None if out.solution is None else out.solution.clearance
        if report is not None and (self.min_clearance_m is None or
                                   report.min_distance_m < self.min_clearance_m):
            self.min_clearance_m = report.min_distance_m
            self.min_clearance_pair = report.nearest_pair
            self.min_clearance_t_s = t_s

    def add_contact(self, contact: Contact, t_s: float) -> None:
        """One step's contact report from the arm side (docs/PROTOCOL.md §5a)."""
        for a, b, depth in contact.pairs:
            c = self.contacts.setdefault((a, b), [t_s, 0.0, 0])
            c[1] = max(c[1], depth)
            c[2] += 1

    def add_round_trip(self, level_s: float | None, limit_s: float) -> None:
        """One cycle's round-trip median (s, None before the first) against the limit."""
        if level_s is not None:
            self.round_trip_over += level_s > limit_s
            self.round_trip_worst_s = max(level_s, self.round_trip_worst_s or 0.0)

    def add_state(self, state: State, qd: np.ndarray) -> None:
        self.states += 1
        self.arm_limited += state.limited
        np.maximum(self.peak_measured, np.abs(qd), out=self.peak_measured)
