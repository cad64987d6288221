"""Joint-rate limits: braking toward position limits, speed, acceleration, TCP caps and
reduced speed, each a uniform scaling of the whole vector.

Sources: REFERENCES §5 (braking: elementary kinematics, Flacco et al. 2015, Del Prete 2018
for the discrete-time setting; the sampled curve is checked against a brute-force simulation
of the stop), §4 (ISO 10218-1 reduced speed, 250 mm/s).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from runtime.arm.kinematics import geometric_jacobian
from runtime.arm.load import load_arm
from runtime.control.limits import (
    REDUCED_SPEED_M_S,
    SCALE_NAMES,
    JointBounds,
    acceleration_step,
    apply_limits,
    binding_limit,
    braking_factor,
    braking_speed,
    cap_factor,
    clear_of_limits,
    distance_ahead,
    speed_factor,
    start_pose,
    stopping_distance,
)
from runtime.control.solver import solve

ARMS = {name: load_arm(name) for name in ("elbow6", "reach7", "scara4", "planar3")}
TOL = 1e-9  # relative slack for round-off in the bound checks
DT_S = 0.002  # one cycle at 500 Hz, the drive's rate


# ----------------------------------------------------------------------------------------
# Single limits against their formulas
# ----------------------------------------------------------------------------------------

def test_braking_speed_check_values() -> None:
    # REFERENCES §5 (elementary kinematics, d = v²/(2a)): v = 1, a = 5 → d_stop = 0.1;
    # d = 0.05, a = 5 → √(2ad) = 0.707107 (the dt → 0 limit of the sampled curve).
    assert braking_speed(5.0, 0.1, 0.0) == pytest.approx(1.0, rel=1e-12)
    assert braking_speed(5.0, 0.05, 0.0) == pytest.approx(0.707107, abs=5e-7)
    # Sampled, dt = 4 ms (u = a·dt = 0.02 rad/s): the stop from v covers
    # dt·(v + (v−u) + (v−2u) + …); by hand, v = 0.697143 gives 34 terms of 0.004·… = 0.05.
    assert braking_speed(5.0, 0.05, 0.004) == pytest.approx(0.6971428571, abs=1e-9)
    # less than one period's travel left: stop within it (v·dt = d)
    assert braking_speed(5.0, 1e-5, 0.002) == pytest.approx(0.005, rel=1e-12)
    # at or past the limit (minus margin): no motion toward it
    assert braking_speed(5.0, 0.0, 0.002) == 0.0
    assert braking_speed(5.0, -0.3, 0.002) == 0.0
    # an unlimited joint: finite, very large
    assert 1e10 < braking_speed(5.0, math.inf, 0.002) < math.inf


def brute_force_stop(a: float, v: float, dt: float) -> float:
    """Distance covered from rate v held one period, then slowed by exactly a·dt a period
    (simulated cycle by cycle, no formula): the outside reference for the sampled curve."""
    travelled = 0.0
    while v > 0.0:
        travelled += v * dt
        v -= a * dt
    return travelled


def brute_force_braking_speed(a: float, d: float, dt: float) -> float:
    """Largest v whose simulated stop stays within d, by bisection on the simulation."""
    lo, hi = 0.0, d / dt + a * dt + 1.0
    for _ in range(100):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if brute_force_stop(a, mid, dt) <= d else (lo, mid)
    return lo


@settings(max_examples=150, deadline=None)
@given(a=st.floats(0.1, 100.0), d=st.floats(0.0, 0.5), dt=st.floats(2e-4, 0.02))
def test_braking_speed_matches_a_brute_force_stop(a: float, d: float, dt: float) -> None:
    # Outside-the-formula reference: the simulated stop (at most a few thousand periods).
    v = float(braking_speed(a, d, dt))
    assert v == pytest.approx(brute_force_braking_speed(a, d, dt), rel=1e-9, abs=1e-12)
    assert brute_force_stop(a, v, dt) <= d * (1 + 1e-12) + 1e-15
    assert stopping_distance(a, v, dt) == pytest.approx(brute_force_stop(a, v, dt), rel=1e-9,
                                                        abs=1e-15)


@settings(max_examples=100, deadline=None)
@given(a=st.floats(0.01, 1e4), d=st.floats(1e-6, 10.0), dt=st.floats(1e-5, 0.05))
def test_following_the_curve_never_asks_more_than_max_accel(a: float, d: float,
                                                            dt: float) -> None:
    # The recursion that makes the curve exact for a sampled controller: one period on, the
    # rate allowed at the distance left is never below this one's minus a·dt.
    v = float(braking_speed(a, d, dt))
    v_next = float(braking_speed(a, d - v * dt, dt))
    assert v - v_next <= a * dt * (1 + 1e-9) + 1e-12


def test_braking_speed_tends_to_the_continuous_curve() -> None:
    # √(2ad) (REFERENCES §5) as dt → 0
    for dt in (1e-4, 1e-6, 1e-8):
        assert braking_speed(5.0, 0.05, dt) == pytest.approx(math.sqrt(0.5), rel=3 * dt ** 0.5)


def test_start_pose_moves_on_by_the_rates_in_flight() -> None:
    q, prev = np.array([0.1, -0.2]), np.array([1.0, -2.0])
    np.testing.assert_array_equal(start_pose(q, prev, 0.002, 1), q + prev * 0.002)
    np.testing.assert_array_equal(start_pose(q, prev, 0.002, 0), q)
    np.testing.assert_array_equal(start_pose(q, None, 0.002, 1), q)


def test_speed_factor() -> None:
    b = JointBounds.of(ARMS["planar3"])
    rates = b.speed * np.array([0.5, -2.0, 1.0])
    assert speed_factor(b, rates) == pytest.approx(0.5)
    assert speed_factor(b, rates * 0.4) == 1.0
    assert speed_factor(b, np.zeros(3)) == 1.0


def test_braking_factor_keeps_every_joint_within_its_own_braking_speed() -> None:
    arm = ARMS["planar3"]
    b = JointBounds.of(arm)
    q = b.high - np.array([0.02, 0.5, 1.0])  # joint 1 close to its upper limit
    rates = np.array([1.0, 0.5, -0.2])
    dt = 0.002
    c = braking_factor(b, q, rates, dt)
    assert 0.0 < c < 1.0
    limit = braking_speed(b.accel, distance_ahead(b, q, rates), dt)
    assert (np.abs(c * rates) <= limit * (1 + TOL)).all()
    # Moving away from the limit is free; at the limit, motion toward it is zero.
    assert braking_factor(b, q, -rates, dt) == 1.0
    assert braking_factor(b, b.high.copy(), rates, dt) == 0.0
    assert braking_factor(b, b.high + 0.01, rates, dt) == 0.0


def test_single_joint_brakes_to_its_limit_and_never_passes() -> None:
    # One joint driven at full speed toward its limit, closed loop q += q̇·dt with the
    # acceleration limit on: it stops at high (= upper − margin), never beyond, and its
    # deceleration stays within max_accel (the brake and the ramp agree, limits.py).
    arm = ARMS["planar3"]
    b = JointBounds.of(arm)
    J = geometric_jacobian(arm, arm.home())
    dt = 0.002
    q = arm.home().copy()
    q[0] = b.high[0] - 0.3
    prev = np.zeros(3)
    command = np.array([b.speed[0], 0.0, 0.0])
    trace = []
    for _ in range(1500):
        out = apply_limits(arm, q, command, J, prev_rates=prev, dt_s=dt)
        assert abs(out.rates[0] - prev[0]) <= b.accel[0] * dt * (1 + TOL)
        q = q + out.rates * dt
        prev = out.rates
        trace.append(q[0])
    assert max(trace) <= b.high[0] + 1e-12
    assert trace[-1] == pytest.approx(b.high[0], abs=1e-4)  # it does get there


def test_a_cycle_that_comes_early_changes_the_rates_by_max_accel_over_its_real_spacing(
        ) -> None:
    # A cycle 0.7 ms after the last (catching up after a late one, 2 ms period): the change
    # is held to a·0.7 ms, so an arm applying each command on arrival never sees more than
    # max_accel (elementary kinematics: Δv = a·Δt); a full period allows a·dt as before.
    arm = ARMS["elbow6"]
    b = JointBounds.of(arm)
    q, J = arm.home(), geometric_jacobian(arm, arm.home())
    target = 0.5 * b.speed
    early = apply_limits(arm, q, target, J, prev_rates=np.zeros(6), dt_s=0.002, step_s=0.0007)
    assert (np.abs(early.rates) <= b.accel * 0.0007 * (1 + TOL)).all()
    assert np.isclose(np.abs(early.rates) / (b.accel * 0.0007), 1.0).any()
    full = apply_limits(arm, q, target, J, prev_rates=np.zeros(6), dt_s=0.002)
    np.testing.assert_allclose(full.rates, early.rates * (0.002 / 0.0007), rtol=1e-12)


def test_acceleration_step_ramps_up_and_down_at_max_accel() -> None:
    # Start from rest and stop to rest: every joint's change per cycle ≤ a·dt, and the
    # direction of the change is kept (one fraction for the whole vector).
    arm = ARMS["elbow6"]
    b = JointBounds.of(arm)
    q, dt = arm.home(), 0.001
    target = 0.3 * b.speed * np.array([1, -1, 0.5, 0.2, -0.7, 1])
    rates, s = acceleration_step(b, q, np.zeros(6), target, dt, clear=True)
    np.testing.assert_allclose(rates, s * target)
    assert (np.abs(rates) <= b.accel * dt * (1 + TOL)).all()
    assert np.isclose(np.abs(rates) / (b.accel * dt), 1.0).any()  # as fast as allowed
    # Decelerating to a stop also respects a_max: ceil(v/(a·dt)) cycles, not one.
    prev, cycles = target.copy(), 0
    while prev.any():
        new, s = acceleration_step(b, q, prev, np.zeros(6), dt, clear=True)
        assert (np.abs(new - prev) <= b.accel * dt * (1 + TOL)).all()
        np.testing.assert_allclose(new, (1 - s) * prev)  # straight down the same direction
        prev, cycles = new, cycles + 1
    assert cycles == math.ceil((np.abs(target) / (b.accel * dt)).max() - 1e-9)


def test_cap_factors_and_reduced_speed_constant() -> None:
    # ISO 10218-1 reduced speed: 250 mm/s (REFERENCES §4).
    assert REDUCED_SPEED_M_S == 0.25
    assert cap_factor(0.5, 0.25) == 0.5 and cap_factor(0.1, 0.25) == 1.0
    assert cap_factor(0.0, 0.0) == 1.0


def test_binding_limit_names_the_smallest_factor() -> None:
    ones = dict.fromkeys(SCALE_NAMES, 1.0)
    assert binding_limit(ones) is None
    assert binding_limit({**ones, "tcp_linear": 0.4, "joint_speed": 0.6}) == "tcp_linear"
    assert binding_limit({**ones, "joint_speed": 0.5, "reduced_speed": 0.5}) == "joint_speed"


def test_reduced_speed_switched_on_while_moving_caps_at_once() -> None:
    # The cap outranks the acceleration ramp: from 0.5 m/s, the first reduced cycle is
    # already at ≤ 0.25 m/s at the TCP.
    arm = ARMS["elbow6"]
    q = arm.home()
    fast = solve(arm, q, [0.5, 0, 0, 0, 0, 0], dt_s=0.002)
    assert np.linalg.norm(fast.achieved_twist[:3]) == pytest.approx(0.5, rel=1e-9)
    s = solve(arm, q, [0.5, 0, 0, 0, 0, 0], reduced=True, prev_rates=fast.rates, dt_s=0.002)
    assert s.conflicts == ("tcp_cap_over_acceleration",)  # named: the cap won
    assert s.binding_limit == "tcp_cap_over_acceleration"  # and logged as the cycle's limit
    assert np.linalg.norm(s.achieved_twist[:3]) <= REDUCED_SPEED_M_S * (1 + TOL)
    assert s.scales["reduced_speed"] <= 0.5 * (1 + TOL)


def test_clear_of_limits() -> None:
    arm = ARMS["reach7"]
    b = JointBounds.of(arm)
    assert clear_of_limits(b, arm.home(), 0.002)
    q = arm.home().copy()
    q[3] = b.low[3] + 0.01
    assert not clear_of_limits(b, q, 0.002)


# ----------------------------------------------------------------------------------------
# Properties of whole solves (hypothesis): every limit holds, cycle after cycle
# ----------------------------------------------------------------------------------------

@st.composite
def sessions(draw):
    """A demo arm, a start pose (some joints at or near a limit), a few twist segments."""
    arm = ARMS[draw(st.sampled_from(sorted(ARMS)))]
    b = JointBounds.of(arm)
    spots = st.one_of(st.floats(0.0, 1.0), st.sampled_from([0.0, 1.0, 0.001, 0.999]))
    fractions = np.array(draw(st.lists(spots, min_size=arm.n, max_size=arm.n)))
    q0 = b.low + fractions * (b.high - b.low)
    segments = []
    for _ in range(draw(st.integers(1, 3))):
        twist = np.array(draw(st.lists(st.floats(-1.0, 1.0), min_size=6, max_size=6)))
        twist[3:] *= 3.0
        segments.append(twist)
    frame = draw(st.sampled_from(["base", "tool"]))
    reduced = draw(st.booleans())
    locked = tuple(draw(st.sets(st.sampled_from(["vz", "wx", "wy", "wz"]), max_size=3)))
    dt = draw(st.sampled_from([0.001, 0.002, 0.004]))
    return arm, q0, segments, frame, reduced, locked, dt


def check_cycle(arm, q, s, prev, dt, reduced) -> None:
    b = JointBounds.of(arm)
    r = s.rates
    assert np.isfinite(r).all() and np.isfinite(s.achieved_twist).all()
    assert all(0.0 <= f <= 1.0 for f in s.scales.values())
    # joint speed
    assert (np.abs(r) <= b.speed * (1 + TOL)).all()
    # braking toward position limits, the sampled curve (REFERENCES §5)
    allowed = braking_speed(b.accel, distance_ahead(b, q, r), dt)
    assert (np.abs(r) <= allowed * (1 + TOL) + 1e-12).all()
    # acceleration per cycle
    if prev is not None:
        assert (np.abs(r - prev) <= b.accel * dt * (1 + TOL) + 1e-12).all()
    # TCP caps; reduced speed 0.25 m/s (ISO 10218-1, REFERENCES §4)
    tcp = geometric_jacobian(arm, q) @ r
    np.testing.assert_allclose(s.achieved_twist, tcp, atol=1e-12)
    linear, angular = np.linalg.norm(tcp[:3]), np.linalg.norm(tcp[3:])
    assert linear <= arm.tcp_max_linear_m_s * (1 + TOL)
    assert angular <= arm.tcp_max_angular_rad_s * (1 + TOL)
    if reduced:
        assert linear <= REDUCED_SPEED_M_S * (1 + TOL)


@settings(max_examples=100, deadline=None)
@given(session=sessions())
def test_every_limit_holds_on_every_cycle(session) -> None:
    arm, q0, segments, frame, reduced, locked, dt = session
    b = JointBounds.of(arm)
    q, prev = q0.copy(), np.zeros(arm.n)
    check_cycle(arm, q, solve(arm, q, segments[0], frame=frame, reduced=reduced,
                              locked=locked, dt_s=dt, state_lag_cycles=0),
                None, dt, reduced)  # no history
    for twist in segments:
        for _ in range(15):
            s = solve(arm, q, twist, frame=frame, reduced=reduced, locked=locked,
                      prev_rates=prev, dt_s=dt, state_lag_cycles=0)  # q += q̇·dt: no lag
            check_cycle(arm, q, s, prev, dt, reduced)
            q = q + s.rates * dt
            prev = s.rates
            # never past a limit (minus margin) it started inside of
            assert (q <= np.maximum(b.high, q0) + 1e-12).all()
            assert (q >= np.minimum(b.low, q0) - 1e-12).all()
