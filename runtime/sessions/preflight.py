"""Preflight evaluation: the cycles of a run → a verdict with its reasons (pure: no I/O, no
clock).

A preflight run (`jogwire preflight`) steps the control cycle in lockstep with the
simulated arm. For each cycle k this module gets the cycle's record (what was commanded,
at which measured pose, with which limits binding) and the arm's state after the step
(measured q, q̇). It then proves the motion against the *hardware's ratings*, not against
the software limits jogwire obeys: a software limit set above the rating fails here even
though jogwire kept to it.

Fails (each gives a reason naming the joint, the value, the limit and the time):
  rated_speed     |q̇_i| above the joint's rated speed, commanded or measured
  rated_accel     |Δq̇_i|/dt above the rated acceleration, commanded or measured; a stop
                  (enable released, safety gate) is not a commanded acceleration: jogwire
                  sends zero at once and the arm side brakes (stops are listed instead)
  software_speed  jogwire itself commanded a joint rate above the arm's software max_speed,
  software_accel  or a change of rate per cycle above its max_accel (stops aside): a defect
                  of jogwire's limit layer, never of the motion, reported on its own so that
                  it cannot hide behind a rating set higher than the software limit
  position_limit  a joint came within its margin of a position limit (the arm's
                  limit_margin, plus 5 % of it for the brake's stopping precision): the
                  motion asks for more travel than the joint has
  tcp_speed       TCP linear speed above the cap: 0.25 m/s in reduced speed (ISO
                  10218-1:2011 5.6, REFERENCES §4), else the arm's tcp_limits.linear
  no_motion       the run never moved the arm: it proves nothing
  damaged_profile a recorded profile that could only be played in part (added by the
                  preflight command)
  contact, clearance, contact_unchecked
                  with a workcell: the simulated arm reported a contact, a pair came
                  closer than the safety distance, or the simulated arm did not confirm the
                  workcell (runtime/sessions/cell_check.py, added by the preflight command)
Reported, not failed: lowest σ_min, time under damping, tracking error, binding-limit
episodes, stops, steps the arm side had to limit, software limits above ratings.

Commanded values are checked exactly (a relative 1e-9 for rounding). Measured values get an
allowance for the simulated motors' velocity error: PyBullet's velocity motors follow a
command to within about 6e-4 rad/s, 0.2 % at speed (measured here on the shipped arms),
so a measured speed counts against a limit beyond 2 % of it plus VELOCITY_ERROR, and a
measured acceleration, the difference of two measured speeds one cycle apart, beyond 2 %
plus 2·VELOCITY_ERROR/dt. Software limits are operational limits, not safety functions
(docs/SAFETY.md).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any, Sequence

import numpy as np
from numpy.typing import NDArray

from ..arm.kinematics import geometric_jacobian, tcp_pose, twist_to_base
from ..arm.model import Arm
from ..control.limits import REDUCED_SPEED_M_S
from .stats import ROUNDING, MotionStats, Stop

Vector = NDArray[np.float64]

MEASURED_TOLERANCE = 0.02
"""Relative allowance on measured peaks: the simulated motors' velocity error (≈0.2 %)
with a margin."""

VELOCITY_ERROR = 1e-3
"""Absolute allowance on a measured joint speed (rad/s or m/s): the simulated motors'
velocity error, below 6e-4 measured here, with a margin."""

LIMIT_CONTACT_FRACTION = 0.05
"""A joint within margin·(1 + this) of a position limit has been braked onto its soft limit."""

REST_SPEED = 1e-3
"""|q̇| (rad/s or m/s) below which a joint counts as at rest (end of a stop)."""

FAIL_CODES = ("rated_speed", "rated_accel", "software_speed", "software_accel",
              "position_limit", "tcp_speed", "no_motion", "damaged_profile", "contact",
              "clearance", "contact_unchecked")


# ----------------------------------------------------------------------------------------
# Input: the trace of a run
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Trace:
    """Per-cycle arrays of a run (N cycles, n joints). SI units, base axes.

    q0, qd0          the arm's state before the first cycle
    q_used           the measured pose each cycle solved at (N, n)
    q, qd            the arm's state after each cycle's step (N, n)
    rates            the rates sent (N, n)
    twist_cmd        the commanded twist in base axes (N, 6); NaN in joint-jog cycles
    twist_rates      J(q_used)·rates, the twist of the rates sent (N, 6)
    """

    t: Vector
    q0: Vector
    qd0: Vector
    q_used: NDArray[np.float64]
    q: NDArray[np.float64]
    qd: NDArray[np.float64]
    rates: NDArray[np.float64]
    allowed: NDArray[np.bool_]
    reduced: NDArray[np.bool_]
    twist_cmd: NDArray[np.float64]
    twist_rates: NDArray[np.float64]
    sigma_min: Vector
    damping: Vector
    binding: NDArray[np.int_]            # index into binding_names, −1 when none bound
    binding_names: tuple[str, ...]
    limited: NDArray[np.bool_]           # the arm side reduced the rates on this step
    reasons: tuple[str, ...]             # the safety gate's reason per cycle

    @property
    def n_cycles(self) -> int:
        return len(self.t)


class TraceBuilder:
    """Collects a run cycle by cycle into a `Trace` (arrays grow as needed)."""

    def __init__(self, arm: Arm, q0: Sequence[float], qd0: Sequence[float],
                 capacity: int = 1024) -> None:
        self.arm = arm
        self.q0 = np.array(q0, dtype=float)
        self.qd0 = np.array(qd0, dtype=float)
        self._n = 0
        self._names: dict[str, int] = {}
        self._reasons: list[str] = []
        self._alloc(max(capacity, 16))

    def _alloc(self, size: int) -> None:
        n = self.arm.n
        shapes = {"t": (), "q_used": (n,), "q": (n,), "qd": (n,), "rates": (n,),
                  "twist_cmd": (6,), "twist_rates": (6,), "sigma_min": (), "damping": ()}
        flags = ("allowed", "reduced", "limited")
        old = getattr(self, "_arrays", None)
        self._arrays = {k: np.zeros((size, *s)) for k, s in shapes.items()}
        self._arrays.update({k: np.zeros(size, dtype=bool) for k in flags})
        self._arrays["binding"] = np.full(size, -1, dtype=int)
        if old is not None:        # states may be ahead of their cycles (`add_state`)
            for k, a in old.items():
                self._arrays[k][:len(a)] = a

    def add(self, rec: Any, q_after: Sequence[float], qd_after: Sequence[float],
            limited: bool = False, commanded_twist: Sequence[float] | None = None,
            joint_mode: bool = False) -> None:
        """One cycle: its `CycleRecord`, the arm's state after the step, and (if known) the
        commanded twist in base axes; else it is rotated from the record's frame."""
        self.add_cycle(rec, commanded_twist=commanded_twist, joint_mode=joint_mode)
        self.add_state(q_after, qd_after, limited)

    def add_cycle(self, rec: Any, *, commanded_twist: Sequence[float] | None = None,
                  joint_mode: bool = False) -> None:
        """The record of the next cycle (its state after the step follows in `add_state`)."""
        k = self._n
        if k == len(self._arrays["t"]):
            self._alloc(2 * k)
        a = self._arrays
        a["t"][k] = rec.t_s
        a["q_used"][k] = rec.q
        a["rates"][k] = rec.rates
        a["allowed"][k] = rec.enabled
        a["reduced"][k] = rec.reduced
        a["twist_rates"][k] = rec.achieved_twist
        a["sigma_min"][k] = rec.sigma_min
        a["damping"][k] = rec.damping
        if joint_mode:
            a["twist_cmd"][k] = math.nan
        elif commanded_twist is not None:
            a["twist_cmd"][k] = commanded_twist
        else:
            v = np.array(rec.twist, dtype=float)
            a["twist_cmd"][k] = twist_to_base(v, tcp_pose(self.arm, np.array(rec.q))) \
                if rec.frame == "tool" else v
        if rec.binding_limit is not None:
            a["binding"][k] = self._names.setdefault(rec.binding_limit, len(self._names))
        self._reasons.append(rec.enable_reason)
        self._n += 1

    def add_cycles(self, block: Any, commanded_twists: NDArray[np.float64]) -> None:
        """The next `block.n` cycles at once, from their records gathered into columns (a
        `log_blocks.CycleBlock`, not imported: its module reaches files and clocks), with
        each cycle's commanded twist in base axes (n, 6) (NaN in joint jogs): what
        `add_cycle` does for each record, in a few array copies."""
        k, n = self._n, block.n
        while k + n > len(self._arrays["t"]):
            self._alloc(2 * len(self._arrays["t"]))
        a, rows, joints = self._arrays, slice(k, k + n), self.arm.n
        a["t"][rows] = block["t_s"]
        a["q_used"][rows] = block.matrix("q", joints)
        a["rates"][rows] = block.matrix("rates", joints)
        a["allowed"][rows] = block["enabled"]
        a["reduced"][rows] = block["reduced"]
        a["twist_rates"][rows] = block.matrix("achieved_twist", 6)
        a["sigma_min"][rows] = block["sigma_min"]
        a["damping"][rows] = block["damping"]
        a["twist_cmd"][rows] = commanded_twists
        binding = block["binding_limit"]          # names numbered in order of first binding
        index = [-1 if name is None else self._names.setdefault(name, len(self._names))
                 for name in binding.table]
        a["binding"][rows] = np.array(index, dtype=int)[binding.codes] if n else -1
        self._reasons += block["enable_reason"].tolist()
        self._n += n

    def add_state(self, q_after: Sequence[float], qd_after: Sequence[float],
                  limited: bool = False, *, cycle: int | None = None) -> None:
        """The arm's state after the step of cycle number `cycle` (default: the cycle
        added last). A run whose states lag its cycles adds them later, and one that adds
        its cycles in blocks may add a state before its cycle."""
        k = self._n - 1 if cycle is None else cycle
        if k < 0:
            raise IndexError(f"no cycle {k} to add a state to")
        while k >= len(self._arrays["t"]):
            self._alloc(2 * len(self._arrays["t"]))
        a = self._arrays
        a["q"][k] = q_after
        a["qd"][k] = qd_after
        a["limited"][k] = limited

    def build(self) -> Trace:
        n = self._n
        a = {k: v[:n].copy() for k, v in self._arrays.items()}
        return Trace(q0=self.q0, qd0=self.qd0, binding_names=tuple(self._names),
                     reasons=tuple(self._reasons), **a)


# ----------------------------------------------------------------------------------------
# Output
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Finding:
    """One reason for a failed verdict."""

    code: str                 # one of FAIL_CODES
    joint: str | None         # the joint concerned, None for the TCP or the whole run
    value: float | None       # the offending value (SI)
    limit: float | None       # the limit it broke (SI)
    t_s: float | None         # when (s from the start of the run)
    source: str               # "commanded", "measured" or "" (both / not applicable)
    message: str


@dataclass(frozen=True)
class JointReport:
    """Peaks of one joint (SI: rad or m, per s, per s²; accelerations exclude stops)."""

    name: str
    kind: str
    peak_speed: float               # commanded |q̇|
    peak_speed_t_s: float | None
    peak_speed_measured: float      # the simulated arm's |q̇|
    max_speed: float                # software limit (what jogwire commands)
    rated_speed: float              # hardware rating (what preflight proves against)
    peak_accel: float               # commanded |Δq̇|/dt
    peak_accel_t_s: float | None
    peak_accel_measured: float
    max_accel: float
    rated_accel: float
    min_limit_distance: float       # closest measured approach to a position limit
    min_limit_distance_t_s: float | None
    limit_margin: float
    limit_side: str                 # "lower" or "upper": the limit of the closest approach

    @property
    def unit(self) -> str:
        return "rad" if self.kind == "revolute" else "m"


@dataclass(frozen=True)
class LimitEpisode:
    """A run of consecutive cycles in which the same limit bound."""

    limit: str
    t_start_s: float
    t_end_s: float
    cycles: int


@dataclass(frozen=True, eq=False)
class Series:
    """Time series for the plots (N cycles; per-joint arrays (N, n)). Speeds and
    accelerations are absolute values; accelerations are NaN in stop windows."""

    t: Vector
    speed_cmd: NDArray[np.float64]
    speed_meas: NDArray[np.float64]
    accel_cmd: NDArray[np.float64]
    accel_meas: NDArray[np.float64]
    limit_distance: NDArray[np.float64]
    tcp_cmd: Vector
    tcp_meas: Vector
    tcp_cap: Vector
    sigma_min: Vector
    damping: Vector
    tracking_linear: Vector       # |commanded − measured|, linear task rows (m/s); NaN when idle
    tracking_angular: Vector      # the same, angular rows (rad/s)
    allowed: NDArray[np.bool_]
    binding: NDArray[np.int_]
    binding_names: tuple[str, ...]
    stop_window: NDArray[np.bool_]


@dataclass(frozen=True, eq=False)
class PreflightResult:
    verdict: str                        # "pass" or "fail"
    findings: tuple[Finding, ...]
    notes: tuple[str, ...]
    joints: tuple[JointReport, ...]
    reduced: bool                       # reduced speed locked on for the run
    tcp_cap: float                      # m/s, the cap of the run (0.25 when reduced)
    tcp_cap_normal: float               # the arm's tcp_limits.linear
    tcp_peak_speed: float               # commanded, m/s
    tcp_peak_speed_t_s: float | None
    tcp_peak_speed_measured: float
    tcp_peak_speed_reduced: float | None  # commanded peak over reduced-speed cycles
    tcp_peak_angular_speed: float       # commanded, rad/s
    tcp_angular_cap: float
    min_sigma: float | None
    min_sigma_t_s: float | None
    damping_threshold: float
    time_damped_s: float
    time_enabled_s: float
    tracking_linear_peak: float         # m/s, commanded vs measured twist
    tracking_linear_rms: float
    tracking_angular_peak: float        # rad/s
    following_linear_peak: float        # m/s, twist of the rates sent vs measured
    limit_episodes: tuple[LimitEpisode, ...]
    stops: tuple[Stop, ...]
    limited_cycles: int                 # steps the arm side had to limit
    cycles: int
    duration_s: float
    rate_hz: float
    series: Series = field(repr=False)
    cell: Any = None                    # cell_check.CellVerdict with a workcell, else None

    @property
    def passed(self) -> bool:
        return self.verdict == "pass"

    @property
    def reasons(self) -> tuple[str, ...]:
        return tuple(f.message for f in self.findings)

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready summary (SI units; None where a value does not exist)."""
        episodes: dict[str, list[int | float]] = {}
        for e in self.limit_episodes:
            c = episodes.setdefault(e.limit, [0, 0, 0.0])
            c[0] += e.cycles
            c[1] += 1
            c[2] += e.t_end_s - e.t_start_s + 1.0 / self.rate_hz
        return {
            "verdict": self.verdict,
            "reasons": list(self.reasons),
            "findings": [vars(f) for f in self.findings],
            "notes": list(self.notes),
            "joints": [dict(vars(j), unit=j.unit) for j in self.joints],
            "reduced": self.reduced,
            "tcp_peak_speed": self.tcp_peak_speed,
            "tcp_peak_speed_t_s": self.tcp_peak_speed_t_s,
            "tcp_peak_speed_measured": self.tcp_peak_speed_measured,
            "tcp_peak_speed_reduced": self.tcp_peak_speed_reduced,
            "tcp_cap": self.tcp_cap,
            "tcp_cap_normal": self.tcp_cap_normal,
            "tcp_peak_angular_speed": self.tcp_peak_angular_speed,
            "tcp_angular_cap": self.tcp_angular_cap,
            "min_sigma": self.min_sigma,
            "min_sigma_t_s": self.min_sigma_t_s,
            "damping_threshold": self.damping_threshold,
            "time_damped_s": self.time_damped_s,
            "time_enabled_s": self.time_enabled_s,
            "tracking_error": {"linear_peak": self.tracking_linear_peak,
                               "linear_rms": self.tracking_linear_rms,
                               "angular_peak": self.tracking_angular_peak,
                               "following_linear_peak": self.following_linear_peak},
            "limit_events": [{"limit": name, "cycles": c, "episodes": e, "time_s": s}
                             for name, (c, e, s) in episodes.items()],
            "limit_episodes": [vars(e) for e in self.limit_episodes],
            "stops": [s.as_dict() for s in self.stops],
            "limited_cycles": self.limited_cycles,
            "cycles": self.cycles,
            "duration_s": self.duration_s,
            "rate_hz": self.rate_hz,
            **(self.cell.as_dict() if self.cell is not None else
               {"cell": None, "min_clearance": None, "clearance_pair": None, "contacts": []}),
        }


# ----------------------------------------------------------------------------------------
# Evaluation
# ----------------------------------------------------------------------------------------

def evaluate(arm: Arm, trace: Trace, *, rate_hz: float, reduced: bool = False,
             measured_tolerance: float = MEASURED_TOLERANCE) -> PreflightResult:
    """The verdict on one run. `reduced`: reduced speed was locked on for the whole run
    (the cap is then 0.25 m/s throughout; cycles flagged reduced get it anyway)."""
    dt = 1.0 / rate_hz
    t = trace.t
    speed_cmd, speed_meas = np.abs(trace.rates), np.abs(trace.qd)
    motion = MotionStats(arm.joint_names, arm.max_accel, rate_hz)
    accel_cmd = motion.add(np.arange(len(t)), t, trace.rates, trace.allowed, trace.reasons,
                           np.linalg.norm(trace.twist_rates[:, :3], axis=1))
    stops = tuple(motion.stops)
    window = _stop_windows(trace, stops)
    accel_meas = _accel(trace.qd, trace.qd0, dt)
    accel_meas[window] = math.nan
    distance, side = _limit_distance(arm, trace.q)
    reduced_cap = min(REDUCED_SPEED_M_S, arm.tcp_max_linear_m_s)
    cap = np.where(trace.reduced | reduced, reduced_cap, arm.tcp_max_linear_m_s)
    tcp_cmd = np.linalg.norm(trace.twist_rates[:, :3], axis=1)
    twist_meas = _measured_twists(arm, trace.q, trace.qd)
    tcp_meas = np.linalg.norm(twist_meas[:, :3], axis=1)
    lin, ang = _tracking(arm, trace.twist_cmd, twist_meas, trace.allowed)
    follow, _ = _tracking(arm, trace.twist_rates, twist_meas, trace.allowed)

    joints = tuple(_joint_report(arm, i, t, speed_cmd, speed_meas, accel_cmd, accel_meas,
                                 distance, side) for i in range(arm.n))
    findings = _joint_findings(arm, joints, speed_meas, accel_meas, t, measured_tolerance, dt)
    findings += _tcp_findings(t, tcp_cmd, tcp_meas, cap, reduced_cap, measured_tolerance)
    findings += _motion_findings(trace)
    sigma = np.where(np.isfinite(trace.sigma_min), trace.sigma_min, np.inf)
    i_sigma = int(np.argmin(sigma)) if len(t) else 0
    has_sigma = bool(len(t)) and math.isfinite(sigma[i_sigma])
    series = Series(t=t, speed_cmd=speed_cmd, speed_meas=speed_meas, accel_cmd=accel_cmd,
                    accel_meas=accel_meas, limit_distance=distance, tcp_cmd=tcp_cmd,
                    tcp_meas=tcp_meas, tcp_cap=cap, sigma_min=trace.sigma_min,
                    damping=trace.damping, tracking_linear=lin, tracking_angular=ang,
                    allowed=trace.allowed, binding=trace.binding,
                    binding_names=trace.binding_names, stop_window=window)
    i_tcp = _argmax(tcp_cmd)
    reduced_cycles = trace.reduced | reduced
    result = PreflightResult(
        verdict="fail" if findings else "pass", findings=tuple(findings), notes=(),
        joints=joints, reduced=reduced,
        tcp_cap=reduced_cap if reduced else arm.tcp_max_linear_m_s,
        tcp_cap_normal=arm.tcp_max_linear_m_s,
        tcp_peak_speed=_max(tcp_cmd), tcp_peak_speed_t_s=_at(t, i_tcp),
        tcp_peak_speed_measured=_max(tcp_meas),
        tcp_peak_speed_reduced=_max(tcp_cmd[reduced_cycles]) if reduced_cycles.any() else None,
        tcp_peak_angular_speed=_max(np.linalg.norm(trace.twist_rates[:, 3:], axis=1)),
        tcp_angular_cap=arm.tcp_max_angular_rad_s,
        min_sigma=float(sigma[i_sigma]) if has_sigma else None,
        min_sigma_t_s=float(t[i_sigma]) if has_sigma else None,
        damping_threshold=arm.solver.damping_threshold,
        time_damped_s=float(np.count_nonzero(trace.damping > 0.0)) * dt,
        time_enabled_s=float(np.count_nonzero(trace.allowed)) * dt,
        tracking_linear_peak=_max(lin), tracking_linear_rms=_rms(lin),
        tracking_angular_peak=_max(ang), following_linear_peak=_max(follow),
        limit_episodes=_episodes(t, trace.binding, trace.binding_names, dt), stops=stops,
        limited_cycles=int(np.count_nonzero(trace.limited)), cycles=len(t),
        duration_s=float(len(t)) * dt, rate_hz=rate_hz, series=series)
    return _with_notes(arm, result)


def _accel(rates: NDArray[np.float64], before: Vector, dt: float) -> NDArray[np.float64]:
    """|Δ rates|/dt per cycle, the first against `before`."""
    return np.abs(np.diff(np.vstack((before, rates)), axis=0)) / dt


def _stop_windows(trace: Trace, stops: tuple[Stop, ...]) -> NDArray[np.bool_]:
    """Each stop's window: from the stop until the arm is measured at rest (or motion is
    allowed again). The measured accelerations there are the arm side's braking."""
    n = trace.n_cycles
    window = np.zeros(n, dtype=bool)
    at_rest = np.all(np.abs(trace.qd) < REST_SPEED, axis=1)
    starts = np.searchsorted(trace.t, [stop.t_s for stop in stops])
    for k in starts.tolist():
        j = k
        while j < n and not trace.allowed[j]:
            window[j] = True
            if at_rest[j]:
                break
            j += 1
    return window


def _limit_distance(arm: Arm, q: NDArray[np.float64]
                    ) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Distance to the nearer position limit (N, n), and True where that is the upper."""
    below, above = q - arm.lower, arm.upper - q
    return np.minimum(below, above), above < below


def _measured_twists(arm: Arm, q: NDArray[np.float64], qd: NDArray[np.float64]
                     ) -> NDArray[np.float64]:
    """J(q_k)·q̇_k for every cycle: the TCP twist the simulated arm had (base axes)."""
    out = np.empty((len(q), 6))
    for k in range(len(q)):
        out[k] = geometric_jacobian(arm, q[k]) @ qd[k]
    return out


def _tracking(arm: Arm, reference: NDArray[np.float64], measured: NDArray[np.float64],
              allowed: NDArray[np.bool_]) -> tuple[Vector, Vector]:
    """‖reference − measured‖ over the arm's linear and angular task rows, per cycle; NaN
    where motion was not allowed or there is no reference (joint jog)."""
    e = reference - measured
    lin_rows = arm.task_mask & np.array([True] * 3 + [False] * 3)
    ang_rows = arm.task_mask & ~np.array([True] * 3 + [False] * 3)
    lin = np.linalg.norm(e[:, lin_rows], axis=1)
    ang = np.linalg.norm(e[:, ang_rows], axis=1)
    idle = ~allowed | np.any(np.isnan(reference), axis=1)
    lin[idle] = ang[idle] = math.nan
    return lin, ang


def _joint_report(arm: Arm, i: int, t: Vector, speed_cmd, speed_meas, accel_cmd, accel_meas,
                  distance, side) -> JointReport:
    j = arm.joints[i]
    k_speed, k_accel = _argmax(speed_cmd[:, i]), _argmax(accel_cmd[:, i])
    k_dist = int(np.argmin(distance[:, i])) if len(t) else None
    return JointReport(
        name=j.name, kind=j.kind,
        peak_speed=_max(speed_cmd[:, i]), peak_speed_t_s=_at(t, k_speed),
        peak_speed_measured=_max(speed_meas[:, i]),
        max_speed=j.max_speed, rated_speed=j.rated_speed,
        peak_accel=_max(accel_cmd[:, i]), peak_accel_t_s=_at(t, k_accel),
        peak_accel_measured=_max(accel_meas[:, i]),
        max_accel=j.max_accel, rated_accel=j.rated_accel,
        min_limit_distance=float(distance[k_dist, i]) if k_dist is not None else math.inf,
        min_limit_distance_t_s=_at(t, k_dist),
        limit_margin=float(arm.limit_margin[i]),
        limit_side="upper" if k_dist is not None and side[k_dist, i] else "lower")


def _joint_findings(arm: Arm, joints: tuple[JointReport, ...], speed_meas, accel_meas,
                    t: Vector, tol: float, dt: float) -> list[Finding]:
    out: list[Finding] = []
    for i, (j, rep) in enumerate(zip(arm.joints, joints)):
        for what, cmd, cmd_t, meas, rated, soft, noise in (
                ("speed", rep.peak_speed, rep.peak_speed_t_s, speed_meas[:, i],
                 j.rated_speed, j.max_speed, VELOCITY_ERROR),
                ("accel", rep.peak_accel, rep.peak_accel_t_s, accel_meas[:, i],
                 j.rated_accel, j.max_accel, 2.0 * VELOCITY_ERROR / dt)):
            code = f"rated_{what}"
            noun = "speed" if what == "speed" else "acceleration"
            per = "/s" if what == "speed" else "/s²"
            if cmd > soft * (1.0 + ROUNDING):
                out.append(Finding(f"software_{what}", j.name, cmd, soft, cmd_t, "commanded",
                                   f"{j.name}: jogwire exceeded its own limit: commanded "
                                   f"{noun} {fmt(cmd, j.kind, per)} is above the software "
                                   f"max {fmt(soft, j.kind, per)} at t = {cmd_t:.2f} s"))
            if cmd > rated * (1.0 + ROUNDING):
                why = (f" (its software max {fmt(soft, j.kind, per)} is above the rating)"
                       if soft > rated else "")
                out.append(Finding(code, j.name, cmd, rated, cmd_t, "commanded",
                                   f"{j.name}: commanded {noun} {fmt(cmd, j.kind, per)} "
                                   f"exceeds its rated {fmt(rated, j.kind, per)} at "
                                   f"t = {cmd_t:.2f} s{why}"))
                continue
            k = _argmax(meas)
            allowance = rated * tol + noise
            if k is not None and meas[k] > rated + allowance:
                out.append(Finding(code, j.name, float(meas[k]), rated, float(t[k]),
                                   "measured",
                                   f"{j.name}: measured {noun} {fmt(meas[k], j.kind, per)} "
                                   f"exceeds its rated {fmt(rated, j.kind, per)} by more "
                                   f"than the simulator's tracking allowance "
                                   f"({fmt(allowance, j.kind, per)}) at t = {t[k]:.2f} s"))
        reach = rep.limit_margin * (1.0 + LIMIT_CONTACT_FRACTION)
        if rep.min_limit_distance < reach:
            out.append(Finding("position_limit", j.name, rep.min_limit_distance,
                               rep.limit_margin, rep.min_limit_distance_t_s, "measured",
                               f"{j.name}: ran into its {rep.limit_side} position limit "
                               f"at t = {rep.min_limit_distance_t_s:.2f} s (closest approach "
                               f"{fmt(rep.min_limit_distance, j.kind)}, margin "
                               f"{fmt(rep.limit_margin, j.kind)}): the motion needs more "
                               f"travel than the joint has"))
    return out


def _tcp_findings(t: Vector, tcp_cmd: Vector, tcp_meas: Vector, cap: Vector,
                  reduced_cap: float, tol: float) -> list[Finding]:
    out = []
    for source, values, allowance in (("commanded", tcp_cmd, ROUNDING),
                                      ("measured", tcp_meas, tol)):
        over = values - cap * (1.0 + allowance)
        k = _argmax(over)
        if k is not None and over[k] > 0.0:
            which = " (reduced speed, ISO 10218-1)" if cap[k] == reduced_cap else ""
            out.append(Finding("tcp_speed", None, float(values[k]), float(cap[k]),
                               float(t[k]), source,
                               f"TCP: {source} linear speed {values[k]:.3f} m/s exceeds the "
                               f"cap {cap[k]:.3f} m/s{which} at t = {t[k]:.2f} s"))
            break   # one reason is enough: the commanded one explains the measured one
    return out


def _motion_findings(trace: Trace) -> list[Finding]:
    if trace.n_cycles and trace.allowed.any() and np.any(trace.rates != 0.0):
        return []
    if trace.n_cycles and trace.allowed.any():
        why = "motion was enabled but no rates were ever commanded"
    else:
        first = trace.reasons[-1] if trace.reasons else "no cycles ran"
        why = f"the safety gate never allowed motion ({first})"
    return [Finding("no_motion", None, None, None, None, "",
                    f"the run never moved the arm: {why}; it proves nothing")]


def _episodes(t: Vector, binding: NDArray[np.int_], names: tuple[str, ...], dt: float
              ) -> tuple[LimitEpisode, ...]:
    out = []
    k, n = 0, len(binding)
    while k < n:
        code = int(binding[k])
        j = k
        while j + 1 < n and binding[j + 1] == code:
            j += 1
        if code >= 0:
            out.append(LimitEpisode(names[code], float(t[k]), float(t[j]), j - k + 1))
        k = j + 1
    return tuple(out)


def _with_notes(arm: Arm, r: PreflightResult) -> PreflightResult:
    """The reported-only observations, as sentences."""
    notes = []
    for j, rep in zip(arm.joints, r.joints):
        if j.max_speed > j.rated_speed:
            notes.append(f"{j.name}: software max speed {fmt(j.max_speed, j.kind, '/s')} is "
                         f"above its rated {fmt(j.rated_speed, j.kind, '/s')}")
        if j.max_accel > j.rated_accel:
            notes.append(f"{j.name}: software max acceleration "
                         f"{fmt(j.max_accel, j.kind, '/s²')} is above its rated "
                         f"{fmt(j.rated_accel, j.kind, '/s²')}")
    if r.min_sigma is not None:
        notes.append(f"lowest σ_min {r.min_sigma:.4g} at t = {r.min_sigma_t_s:.2f} s "
                     f"(damping starts below {r.damping_threshold:g}); damping active "
                     f"{r.time_damped_s:.2f} s")
    if r.time_enabled_s > 0.0:
        notes.append(f"tracking error (command vs measured twist) peak "
                     f"{1e3 * r.tracking_linear_peak:.1f} mm/s, RMS "
                     f"{1e3 * r.tracking_linear_rms:.1f} mm/s, angular peak "
                     f"{math.degrees(r.tracking_angular_peak):.2f} deg/s; it includes the "
                     f"slowing the limits chose")
    bound: dict[str, int] = {}
    for e in r.limit_episodes:
        bound[e.limit] = bound.get(e.limit, 0) + e.cycles
    if bound:
        notes.append("limits that bound: " + ", ".join(
            f"{name} {cycles / r.rate_hz:.2f} s" for name, cycles in
            sorted(bound.items(), key=lambda kv: -kv[1])))
    kinds = dict(zip(arm.joint_names, (j.kind for j in arm.joints)))
    for s in r.stops:
        notes.append(f"stop at t = {s.t_s:.2f} s from {s.tcp_speed:.3f} m/s ({s.reason}): "
                     f"zero at once asks {s.joint} for "
                     f"{fmt(s.asked_decel, kinds.get(s.joint, 'revolute'), '/s²')} in one "
                     f"cycle; the arm side brakes at its own rate, not counted above")
    if r.limited_cycles:
        notes.append(f"the arm side reduced the rates at its own limits on "
                     f"{r.limited_cycles} steps")
    return replace(r, notes=tuple(notes))


# ----------------------------------------------------------------------------------------
# Small helpers
# ----------------------------------------------------------------------------------------

def fmt(value: float, kind: str, per: str = "") -> str:
    """A joint quantity for people: degrees for revolute joints, metres for prismatic."""
    if kind == "revolute":
        return f"{math.degrees(value):.2f} deg{per}"
    return f"{value:.4f} m{per}"


def _argmax(values: Vector) -> int | None:
    if len(values) == 0 or np.all(np.isnan(values)):
        return None
    return int(np.nanargmax(values))


def _max(values: Vector) -> float:
    k = _argmax(values)
    return 0.0 if k is None else float(values[k])


def _at(t: Vector, k: int | None) -> float | None:
    return None if k is None else float(t[k])


def _rms(values: Vector) -> float:
    finite = values[np.isfinite(values)]
    return float(np.sqrt(np.mean(finite * finite))) if finite.size else 0.0
