"""Joint-rate limits that keep the Cartesian direction (pure: no I/O, no clock; dt is an argument).

Each limit acts on the whole joint-rate vector with one factor in [0, 1], so the TCP keeps
moving in the commanded direction, only slower. Each factor is reported by name:

    joint_speed      |q̇_i| ≤ max_speed_i
    position_brake   a joint heading for a position limit can still stop before it, slowing
                     by at most max_accel_i·dt a period (`braking_speed`: the curve exact for
                     a sampled controller, → √(2·a_i·d_i) as dt → 0), judged from the pose
                     where the rates start to act (`start_pose`, one cycle of state lag)
    acceleration     |q̇_k − q̇_{k−1}| ≤ max_accel_i·dt per control period (the fraction of
                     the step taken)
    tcp_linear       ‖v_tcp‖ ≤ arm.tcp_max_linear_m_s
    tcp_angular      ‖ω_tcp‖ ≤ arm.tcp_max_angular_rad_s
    reduced_speed    ‖v_tcp‖ ≤ REDUCED_SPEED_M_S when reduced speed is on (ISO 10218-1)

Order. The velocity-level limits (joint speed, position brake, TCP caps, reduced speed)
scale this cycle's *target*, in that order. The acceleration limit then steps from the
previous rates toward the target (`acceleration_step`); its factor is the fraction of the
step taken, not a scaling of the target. Capping the target first means a steady motion at
a cap never tugs against the ramp. After the step the speed and position bounds still hold
(by construction), and the TCP caps are checked once more: the previous rates may be over a
cap at this pose (reduced speed switched on while moving), and the cap outranks the ramp.

Every bound at once. Against an arm that follows the rates (the one cycle of lag included),
all of them hold on every cycle together: the target is within the speed, braking and TCP
bounds; last cycle's rates slowed by a·dt are within this cycle's braking bound (the curve's
recursion, `braking_speed`); so a step of at most a·dt per joint from last cycle's rates
toward the target exists inside every bound, and `acceleration_step` takes it.
tests/runtime/control/test_bounds_property.py checks this on random arms. Two cases cannot
keep both, and the cycle names them (`CONFLICTS`, in `Limited.conflicts` and the solution's
report): a TCP cap against the ramp (reduced speed switched on while moving fast: the cap
wins, because the cap is the operator's protection and the ramp only the drive's comfort)
and a position limit against the ramp (the arm ran further than commanded: the position
wins, because a joint past its soft limit is closer to a hard stop).

The acceleration bound is per control period, or per the real time since the last command
where that was shorter (`step_s`: a cycle catching up after a late one), so an arm that
applies each command on arrival never sees more than max_accel; the statistics
(runtime/sessions/stats.py) judge commanded accelerations the same way. The braking curves
keep the nominal period.

Small vectors (n ≤ ~10) make numpy's per-call overhead (~1 µs) the cost, so the per-joint
loops and reductions below run on Python floats; the vector arithmetic stays in numpy.

Software limits are operational limits, not safety functions: a real arm needs its own
safety-rated speed monitoring, stops and enabling device (REFERENCES §4).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from operator import lt, mul
from typing import NamedTuple

import numpy as np
from numpy.typing import NDArray

from ..arm.model import Arm

Vector = NDArray[np.float64]

REDUCED_SPEED_M_S = 0.25
"""TCP speed cap in reduced-speed mode: 250 mm/s (ISO 10218-1:2011 5.6; 2025 5.5.3)."""

SCALE_NAMES = ("joint_speed", "position_brake", "acceleration", "tcp_linear", "tcp_angular",
               "reduced_speed")

_FAR = 1e150  # stands in for an infinite distance (continuous joint): no inf/inf, no overflow


@dataclass(frozen=True, eq=False)
class JointBounds:
    """Per-joint bounds the limits work with (rad or m, per s, per s²).

    low/high are the position limits moved inwards by the arm's limit margin: a joint is
    braked so that it stops at low/high, never beyond.
    """

    low: Vector
    high: Vector
    speed: Vector
    accel: Vector
    # The same as Python floats, for the per-joint loops (n ≤ ~10: cheaper than numpy calls)
    low_f: tuple[float, ...]
    high_f: tuple[float, ...]
    speed_f: tuple[float, ...]
    accel_f: tuple[float, ...]
    inv_speed: tuple[float, ...]  # 1/max_speed
    inv_accel: tuple[float, ...]  # 1/max_accel

    @staticmethod
    @lru_cache(maxsize=32)
    def of(arm: Arm) -> "JointBounds":
        low, high = arm.lower + arm.limit_margin, arm.upper - arm.limit_margin
        speed, accel = arm.max_speed.astype(float), arm.max_accel.astype(float)
        return JointBounds(low=low, high=high, speed=speed, accel=accel,
                           low_f=tuple(low.tolist()), high_f=tuple(high.tolist()),
                           speed_f=tuple(speed.tolist()), accel_f=tuple(accel.tolist()),
                           inv_speed=tuple((1.0 / speed).tolist()),
                           inv_accel=tuple((1.0 / accel).tolist()))

    @lru_cache(maxsize=8)
    def braking_zone(self, dt_s: float) -> tuple[list[float], list[float]]:
        """(low + r, high − r): a joint strictly between them cannot meet a limit this cycle.

        r_i = max_speed_i·(dt + T/2) + max_accel_i·dt², T = max_j max_speed_j/max_accel_j,
        bounds the distance joint i covers while the whole speed-limited vector brakes as one
        (`braking_factor`: S ≤ v²/(2a) + v·dt/2 + a·dt²/8 for the sampled stop),
        so the brake, the joint-limit re-solve and the position part of the acceleration
        limit can be skipped for a pose clear of every bound: the common case.
        """
        reach = self.speed * (dt_s + 0.5 * float((self.speed / self.accel).max())) + \
            self.accel * (dt_s * dt_s)
        return (self.low + reach).tolist(), (self.high - reach).tolist()


class Limited(NamedTuple):
    """Output of `apply_limits`: the rates, their TCP twist J·q̇, every factor by name, and
    the names of the bounds that had to give way this cycle (`CONFLICTS`), usually none."""

    rates: Vector
    twist: Vector
    scales: dict[str, float]
    conflicts: tuple[str, ...] = ()


CONFLICTS = ("tcp_cap_over_acceleration", "position_over_acceleration")
"""When two bounds cannot both hold, which one wins (see the module docstring):

tcp_cap_over_acceleration   the arm moves faster than a TCP cap allows at this pose (reduced
                            speed switched on while moving fast): the cap wins, the rates
                            drop faster than max_accel.
position_over_acceleration  a joint is closer to its limit than its braking curve allows
                            (the arm did not move as commanded, or a late cycle let it run
                            on): the position limit wins, the joint slows faster than
                            max_accel. Never happens against an arm that follows the rates.
"""


# ----------------------------------------------------------------------------------------
# Single limits
# ----------------------------------------------------------------------------------------

def braking_speed(accel: Vector | float, distance: Vector | float, dt_s: float) -> Vector:
    """Largest rate from which a sampled controller can still stop within `distance`.

    The controller holds each commanded rate for one period dt (zero-order hold) and may
    change it by at most a·dt per period. The rate v commanded now is held for dt, then the
    fastest stop is v − a·dt, v − 2a·dt, … (each held for dt) until it reaches zero, which
    covers

        S(v) = dt · Σ_{j=0}^{m} (v − j·a·dt),  m = ⌈v/(a·dt)⌉ − 1,

    a continuous, increasing, piecewise-linear function of v. With u = a·dt and
    D = d/(a·dt²), S(v) ≤ d holds up to the v on the segment m for which
    m(m+1)/2 < D ≤ (m+1)(m+2)/2:

        v = d/((m+1)·dt) + u·m/2.

    Derived here for the discrete-time case, in the manner of A. Del Prete, "Joint position
    and velocity bounds in discrete-time acceleration/torque control of robot manipulators",
    IEEE RA-L 3(1), 2018 (REFERENCES §5); checked against a brute-force simulation of the
    stop in tests/runtime/control/test_limits.py. Why it is exact for the cycle, and the
    continuous √(2ad) is not: S(v) = v·dt + S(v − a·dt), so if v fits in d then v − a·dt
    fits in d − v·dt, the distance left one period later. A joint that follows this curve
    therefore never needs to slow by more than a·dt in a period, and stops at the limit,
    never past it. As dt → 0 (m ≈ √(2D)) it tends to √(2·a·d).

    `distance` is measured from where the rate starts to act (`start_pose`). 0 when d ≤ 0;
    very large (not inf) for an unlimited joint. With dt = 0 it is the textbook √(2·a·d).
    REFERENCES §5: a = 5 rad/s², d = 0.05 rad → 0.707107 rad/s (dt = 0).
    """
    d = np.minimum(np.maximum(distance, 0.0), _FAR)
    if dt_s == 0.0:
        return np.sqrt(2.0 * np.multiply(accel, d))
    step = np.multiply(accel, dt_s)                     # u = a·dt, rad/s per period
    big_d = d / (step * dt_s)                           # D = d/(a·dt²), periods²
    m = np.maximum(0.0, np.ceil(np.sqrt(2.0 * big_d + 0.25) - 1.5))
    # one step either way repairs the rounding of the square root
    m = np.where((m + 1.0) * (m + 2.0) * 0.5 < big_d, m + 1.0, m)
    m = np.where((m > 0.0) & (m * (m + 1.0) * 0.5 >= big_d), m - 1.0, m)
    return d / ((m + 1.0) * dt_s) + step * m * 0.5


def _braking_speed_1(accel: float, distance: float, dt_s: float) -> float:
    """`braking_speed` for one joint, on Python floats."""
    d = min(max(distance, 0.0), _FAR)
    if dt_s == 0.0:
        return math.sqrt(2.0 * accel * d)
    step = accel * dt_s
    big_d = d / (step * dt_s)
    m = max(0.0, math.ceil(math.sqrt(2.0 * big_d + 0.25) - 1.5))
    if (m + 1.0) * (m + 2.0) * 0.5 < big_d:
        m += 1.0
    elif m > 0.0 and m * (m + 1.0) * 0.5 >= big_d:
        m -= 1.0
    return d / ((m + 1.0) * dt_s) + step * m * 0.5


def stopping_distance(accel: float, rate: float, dt_s: float) -> float:
    """S(v): the distance covered from rate v (held one period, then slowed by a·dt a
    period) until it stops; the inverse of `braking_speed`."""
    v, step = abs(rate), accel * dt_s
    m = max(0.0, math.ceil(v / step) - 1.0)
    return dt_s * ((m + 1.0) * v - step * m * (m + 1.0) * 0.5)


def start_pose(q: Vector, prev_rates: Vector | None, dt_s: float, state_lag_cycles: int
               ) -> Vector:
    """Where the arm is when this cycle's rates begin to act (rad or m).

    The measured pose lags the arm by `state_lag_cycles` periods: with one cycle of lag the
    arm is still carrying out last cycle's rates while this cycle is computed, so it will be
    prev·dt further on. (Only 0 and 1 are used; with one cycle of lag only the last rates
    are in flight.)
    """
    if state_lag_cycles and prev_rates is not None:
        return q + prev_rates * dt_s
    return q


def _ahead(bounds: JointBounds, q: list[float], rates: list[float]) -> list[float]:
    """`distance_ahead` on Python floats."""
    return [high - x if r > 0.0 else x - low
            for x, r, low, high in zip(q, rates, bounds.low_f, bounds.high_f)]


def clear_of_limits(bounds: JointBounds, q: Vector, dt_s: float) -> bool:
    """True when no joint is within braking reach of a position limit (`braking_zone`)."""
    low, high = bounds.braking_zone(dt_s)
    ql = q.tolist()
    return all(map(lt, low, ql)) and all(map(lt, ql, high))


def distance_ahead(bounds: JointBounds, q: Vector, rates: Vector) -> Vector:
    """Distance from q to the limit each joint is heading for (≤ 0 at or past it)."""
    return np.where(rates > 0.0, bounds.high - q, q - bounds.low)


def pushing_into_limits(bounds: JointBounds, q: Vector, rates: Vector, dt_s: float
                        ) -> NDArray[np.bool_]:
    """Joints at a position limit (within one period's braking distance, a·dt²) that the
    rates push further in. These are the ones the solver takes out and re-solves without."""
    r = rates.tolist()
    dt2 = dt_s * dt_s
    return np.array([v != 0.0 and d <= a * dt2 for d, v, a in
                     zip(_ahead(bounds, q.tolist(), r), r, bounds.accel_f)], dtype=bool)


def _worst_ratio(values: Vector, inv_limits: tuple[float, ...]) -> float:
    """max_i |values_i| / limit_i."""
    return float(max(map(mul, map(abs, values.tolist()), inv_limits)))


def speed_factor(bounds: JointBounds, rates: Vector) -> float:
    """Largest c ≤ 1 with |c·q̇_i| ≤ max_speed_i for every joint."""
    worst = _worst_ratio(rates, bounds.inv_speed)
    return 1.0 if worst <= 1.0 else 1.0 / worst


def braking_factor(bounds: JointBounds, q: Vector, rates: Vector, dt_s: float) -> float:
    """Largest c ≤ 1 such that the whole vector c·q̇ can brake to a stop, keeping its direction,
    before any joint passes its limit (q: the pose where the rates start to act).

    Braking the vector as one: its scale c can fall by at most dt/T a period with
    T = max_j |q̇_j|/a_j (the slowest joint to stop sets the pace), so joint i slows by at
    most a_i·dt. With τ_i = d_i/|q̇_i| (time to the limit at the current rate), c is the
    sampled braking curve of a scalar with deceleration 1/T: c_i = braking_speed(1/T, τ_i, dt).
    Joint i then covers |q̇_i|·S(c) = S_i(c·|q̇_i|) ≤ d_i, and follows its own braking curve
    (its effective deceleration |q̇_i|/T ≤ a_i), so the acceleration limit can follow the
    braking ramp without conflict.
    """
    r = rates.tolist()
    T = max(map(mul, map(abs, r), bounds.inv_accel))
    if T == 0.0:
        return 1.0
    # τ on Python floats: an absurd distance over a tiny rate is inf, not an overflow warning.
    tau = min((d / abs(v) for d, v in zip(_ahead(bounds, q.tolist(), r), r) if v != 0.0),
              default=math.inf)
    if tau <= 0.0:
        return 0.0
    if tau >= dt_s + 0.5 * T + 0.125 * dt_s * dt_s / T:  # S(1) ≤ τ: c = 1 stops in time
        return 1.0
    return min(1.0, _braking_speed_1(1.0 / T, tau, dt_s))


def rate_bounds(bounds: JointBounds, q: Vector, dt_s: float) -> tuple[Vector, Vector]:
    """Per-joint interval [lo, hi] of rates allowed at q: the speed limit and, toward each
    position limit, `braking_speed` (one-period latency form)."""
    hi = np.minimum(bounds.speed, braking_speed(bounds.accel, bounds.high - q, dt_s))
    lo = -np.minimum(bounds.speed, braking_speed(bounds.accel, q - bounds.low, dt_s))
    return lo, hi


def acceleration_step(bounds: JointBounds, q: Vector, prev: Vector, target: Vector,
                      dt_s: float, *, clear: bool, start: float = 1.0,
                      step_s: float | None = None) -> tuple[Vector, float]:
    """This cycle's rates on the way from `prev` (last cycle's, within the speed limits) to
    `target` (within every velocity-level limit), and the fraction of that step taken.

    Why a step and not a scaling of the target: the acceleration limit bounds the change
    q̇_k − q̇_{k−1}, and shrinking the target alone cannot bring a fast arm to rest (the
    change from q̇_{k−1} to c·q̇_k is at least |q̇_{k−1}| when c → 0). One fraction s for all
    joints, q̇_k = q̇_{k−1} + s·(target − q̇_{k−1}), keeps the direction of the change:
    starting, stopping and speeding up or down along a direction stay on it, and a change of
    direction turns the motion gradually, as a real arm's must.

    s is the largest value with |s·Δ_i| ≤ a_i·dt for every joint. The speed and position
    bounds hold for any s as long as prev is within this cycle's [lo, hi] (`rate_bounds`).
    It may not be: a joint braking toward its limit while the command turns needs its own
    deceleration, which one small s would not give it. Then each joint steps on its own
    instead, its change clipped to ±a_i·dt and the result into [lo, hi]: the direction is
    not kept for those cycles, every bound is (the two are compatible: from a rate within
    last cycle's bounds, slowing by a_i·dt always meets this cycle's brake, REFERENCES §5
    latency form). `clear` (no joint near a position limit, `clear_of_limits`) skips that
    check.

    `start` ≤ 1 is the factor that brings prev within the TCP caps at this pose (prev was
    capped at last cycle's pose; the arm has moved since): the step then runs from
    start·prev, with s the largest value that keeps the whole change from prev within
    ±a_i·dt. If even s = 0 cannot (reduced speed switched on while moving fast), the cap
    wins and the change exceeds a_i·dt.

    `step_s` ≤ dt is the time since the last command went out when that is shorter than a
    period (a cycle that follows a late one): the change is then held to a_i·step_s, so an
    arm that applies each command as it arrives never sees more than max_accel. The
    position bounds stay those of the nominal period.
    """
    step_s = dt_s if step_s is None else step_s
    delta = target - prev
    worst = _worst_ratio(delta, bounds.inv_accel) / step_s
    if worst <= 1.0:
        return target, 1.0
    s = 1.0 / worst
    if not clear and _box_entry(bounds, q, prev, delta, dt_s) > s:
        lo, hi = rate_bounds(bounds, q, dt_s)
        return _per_joint_step(bounds, prev, target, lo, hi, step_s)
    if start >= 1.0:
        return prev + s * delta, s
    origin = prev * start
    step = target - origin
    s = min(1.0, max(0.0, min(
        ((a * step_s - math.copysign(1.0, d) * c) / abs(d) for a, c, d in
         zip(bounds.accel.tolist(), (prev * (start - 1.0)).tolist(), step.tolist()) if d != 0.0),
        default=1.0)))
    return origin + s * step, s


def _box_entry(bounds: JointBounds, q: Vector, prev: Vector, delta: Vector, dt_s: float
               ) -> float:
    """Smallest s with prev + s·delta within this cycle's speed and braking bounds, given that
    prev + delta (the target) is."""
    p, d = prev.tolist(), delta.tolist()
    needed = 0.0
    for p_i, d_i, ahead, speed, accel in zip(p, d, _ahead(bounds, q.tolist(), p),
                                             bounds.speed_f, bounds.accel_f):
        excess = abs(p_i) - min(speed, _braking_speed_1(accel, ahead, dt_s))
        if excess > 0.0:
            needed = max(needed, 1.0 if d_i == 0.0 else min(1.0, excess / abs(d_i)))
    return needed


def _per_joint_step(bounds: JointBounds, prev: Vector, target: Vector, lo: Vector, hi: Vector,
                    dt_s: float) -> tuple[Vector, float]:
    """Each joint ramps alone toward its target, then into [lo, hi]; the smallest fraction of
    a joint's own step is reported."""
    step = bounds.accel * dt_s
    rates = np.minimum(np.maximum(np.minimum(np.maximum(target, prev - step), prev + step), lo),
                       hi)
    fractions = [(r - p) / (t - p) for r, p, t in zip(rates.tolist(), prev.tolist(),
                                                     target.tolist()) if t != p]
    return rates, min(1.0, max(0.0, min(fractions, default=1.0)))


def cap_factor(value: float, cap: float) -> float:
    """Largest c ≤ 1 with c·value ≤ cap (value, cap ≥ 0)."""
    return 1.0 if value <= cap else cap / value


def tcp_caps(arm: Arm, twist: Vector, reduced: bool) -> tuple[float, float, float]:
    """Factors of the TCP linear cap, the angular cap and the reduced-speed cap, in turn."""
    vx, vy, vz, wx, wy, wz = twist.tolist()
    linear = math.sqrt(vx * vx + vy * vy + vz * vz)
    f_lin = cap_factor(linear, arm.tcp_max_linear_m_s)
    f_ang = cap_factor(math.sqrt(wx * wx + wy * wy + wz * wz) * f_lin, arm.tcp_max_angular_rad_s)
    f_red = cap_factor(linear * f_lin * f_ang, REDUCED_SPEED_M_S) if reduced else 1.0
    return f_lin, f_ang, f_red


# ----------------------------------------------------------------------------------------
# All limits, in order
# ----------------------------------------------------------------------------------------

def apply_limits(arm: Arm, q: Vector, rates: Vector, J: NDArray[np.float64], *,
                 reduced: bool = False, prev_rates: Vector | None = None,
                 dt_s: float, clear: bool | None = None,
                 step_s: float | None = None) -> Limited:
    """Bring `rates` (the solver's joint rates) within every limit of `arm`.

    q is the pose where the rates start to act (`start_pose`: the measured pose moved on by
    the rates still in flight); the position limits are judged from it. J is the 6×n
    geometric Jacobian at the measured pose (TCP reference point; only norms of J·q̇ are
    used, so any axes do): the TCP caps hold at the pose the controller knows. `prev_rates`
    are the rates sent last cycle; None means no history (a
    one-off query such as `jogwire probe`) and skips the acceleration limit; the control
    loop starts from zeros. Returns the limited rates, their TCP twist and the factor of each
    limit (1.0 when it did not bind), named as in SCALE_NAMES. `clear` is
    `clear_of_limits(…)` if the caller has it already. `step_s`: the time since the last
    command when shorter than dt_s (`acceleration_step`); None: a full period.
    """
    step_s = dt_s if step_s is None else step_s
    b = JointBounds.of(arm)
    if clear is None:
        clear = clear_of_limits(b, q, dt_s)
    f_speed = speed_factor(b, rates)
    r = rates * f_speed if f_speed < 1.0 else rates
    f_brake = 1.0 if clear else braking_factor(b, q, r, dt_s)
    if f_brake < 1.0:
        r = r * f_brake
    twist = J.dot(r)  # the method: cheaper than np.dot or @ on small arrays
    f_lin, f_ang, f_red = tcp_caps(arm, twist, reduced)
    c = f_lin * f_ang * f_red
    if c < 1.0:
        r = r * c
        twist = twist * c
    f_acc = 1.0
    conflicts: tuple[str, ...] = ()
    if prev_rates is not None:
        prev = prev_rates  # within the speed limits if it is what we sent; clip otherwise
        if _worst_ratio(prev, b.inv_speed) > 1.0:
            prev = np.minimum(np.maximum(prev, -b.speed), b.speed)
        target = r
        r, f_acc = acceleration_step(b, q, prev, target, dt_s, clear=clear, step_s=step_s)
        if f_acc < 1.0:
            # prev was capped at last cycle's pose; here it may be over a cap (the pose moved,
            # or reduced speed was just switched on): start the step from it brought within.
            start = math.prod(tcp_caps(arm, J.dot(prev), reduced))
            if start < 1.0:
                r, f_acc = acceleration_step(b, q, prev, target, dt_s, clear=clear, start=start,
                                             step_s=step_s)
            twist = J.dot(r)
            # Safety net (per-joint steps, round-off): the cap outranks the ramp.
            g_lin, g_ang, g_red = tcp_caps(arm, twist, reduced)
            g = g_lin * g_ang * g_red
            if g < 1.0:
                r = r * g
                twist = twist * g
                f_lin, f_ang, f_red = f_lin * g_lin, f_ang * g_ang, f_red * g_red
            # 1e-9: distances to a limit are differences of positions of a few rad, so the
            # braking curve carries round-off of ~1e-12 relative to a·dt near the limit
            if _worst_ratio(r - prev, b.inv_accel) > step_s * (1.0 + 1e-9):
                capped = start < 1.0 or g < 1.0
                conflicts = ("tcp_cap_over_acceleration" if capped else
                             "position_over_acceleration",)
    scales = {"joint_speed": f_speed, "position_brake": f_brake, "acceleration": f_acc,
              "tcp_linear": f_lin, "tcp_angular": f_ang, "reduced_speed": f_red}
    return Limited(r, twist, scales, conflicts)


def binding_limit(scales: dict[str, float], conflicts: tuple[str, ...] = ()) -> str | None:
    """What limited this cycle, by name: the bound that won a conflict (`CONFLICTS`) if two
    could not both hold, else the smallest factor below 1 (the first in order on a tie), or
    None. The cycle's log record keeps this name, so a conflict is an event of the log."""
    if conflicts:
        return conflicts[0]
    name, smallest = None, 1.0
    for key, value in scales.items():
        if value < smallest:
            name, smallest = key, value
    return name
