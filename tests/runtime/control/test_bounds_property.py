"""Every bound at once, on every cycle, on random arms: the proof of the limit layer.

Hypothesis draws a serial arm (2–9 joints, revolute, prismatic and unlimited joints, a DH
table or arbitrary URDF-style joint origins, random limits, speeds, accelerations, TCP caps
and task directions), a control rate (100–2000 Hz), a start pose (joints at, near and away
from their limits; the zero pose of a DH arm is usually singular) and an operator's input
(twists, reversals, single-joint jogs, base and tool frames, reduced speed on and off,
enable released and pressed again). The pure control cycle runs against an ideal arm with
one cycle of state lag: each cycle works on the pose from before the rates still in flight,
and the arm integrates each command for exactly one period.

On every cycle, to 1e-9 relative (round-off), the commanded rates keep:
- joint speed |q̇_i| ≤ max_speed_i;
- acceleration |q̇_k − q̇_{k−1}| ≤ max_accel_i·dt, except an immediate stop (enable released:
  the zero command the arm side brakes from, docs/SAFETY.md) and a cycle that names
  `tcp_cap_over_acceleration` (reduced speed switched on while faster than the cap);
- the position limits: the arm never passes a soft limit (limit minus margin) it started
  inside of, and never moves further out of one it started outside of; each joint stays
  within its sampled braking curve (checked by a brute-force stop, not by the formula);
- the TCP caps (linear, angular) and reduced speed 0.25 m/s (ISO 10218-1:2011 5.6,
  REFERENCES §4) at the measured pose, where the Jacobian is evaluated;
- locked axes: no commanded motion along them.
`position_over_acceleration` never happens against an arm that follows the rates.
"""

from __future__ import annotations

import math
from collections import Counter

import numpy as np
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from runtime.arm.kinematics import geometric_jacobian, tcp_pose
from runtime.arm.model import TASK_AXES, Arm, DHRow, Joint, SolverSettings, chain_from_dh
from runtime.arm.transforms import make_transform
from runtime.control.cycle import ControlCycle
from runtime.control.intent import DirectCommand, InputFrame
from runtime.control.limits import REDUCED_SPEED_M_S, JointBounds, start_pose
from runtime.control.pads import load_pad
from runtime.control.settings import RunSettings

REL = 1e-9          # relative slack for round-off
ABS = 1e-12
PAD = load_pad("keyboard")   # direct commands carry their own intent; the pad is unused


# ----------------------------------------------------------------------------------------
# Random arms
# ----------------------------------------------------------------------------------------

finite = dict(allow_nan=False, allow_infinity=False)


@st.composite
def joint_spec(draw, i: int) -> dict:
    kind = draw(st.sampled_from(["revolute"] * 3 + ["prismatic"]))
    if kind == "revolute":
        unlimited = draw(st.integers(0, 7)) == 0
        lower = -math.inf if unlimited else draw(st.floats(-math.pi, -0.1, **finite))
        upper = math.inf if unlimited else draw(st.floats(0.1, math.pi, **finite))
        speed = draw(st.floats(0.2, 4.0, **finite))
        accel = draw(st.floats(1.0, 40.0, **finite))
    else:
        lower = draw(st.floats(-0.3, -0.02, **finite))
        upper = draw(st.floats(0.02, 0.5, **finite))
        speed = draw(st.floats(0.05, 1.0, **finite))
        accel = draw(st.floats(0.5, 10.0, **finite))
    return {"name": f"j{i}", "kind": kind, "lower": lower, "upper": upper,
            "max_speed": speed, "max_accel": accel, "rated_speed": speed,
            "rated_accel": accel, "effort": None}


@st.composite
def origins_for(draw, kinds: list[str]) -> tuple[list[np.ndarray], np.ndarray]:
    """Joint origins: a standard or modified DH table, or arbitrary URDF-style transforms."""
    style = draw(st.sampled_from(["dh", "mdh", "urdf"]))
    n = len(kinds)
    length = st.floats(-0.4, 0.4, **finite)
    angle = st.sampled_from([0.0, math.pi / 2, -math.pi / 2, math.pi]) | \
        st.floats(-math.pi, math.pi, **finite)
    if style in ("dh", "mdh"):
        rows = [DHRow(d=draw(length), a=draw(length), alpha=draw(angle),
                      theta=draw(angle)) for _ in range(n)]
        origins, flange = chain_from_dh(rows, kinds, modified=style == "mdh")
        return origins, flange
    origins = [make_transform(xyz_m=[draw(length) for _ in range(3)],
                              rpy_rad=[draw(angle) for _ in range(3)]) for _ in range(n)]
    flange = make_transform(xyz_m=[draw(length) for _ in range(3)])
    return origins, flange


@st.composite
def arms(draw) -> Arm:
    n = draw(st.integers(2, 9))
    specs = [draw(joint_spec(i)) for i in range(n)]
    origins, flange = draw(origins_for([s["kind"] for s in specs]))
    joints = tuple(Joint(origin=o, **s) for s, o in zip(specs, origins))
    task = tuple(draw(st.lists(st.booleans(), min_size=6, max_size=6)))
    if not any(task):
        task = (True,) * 6
    return Arm(name="random", joints=joints, base=np.eye(4), flange=flange, tool=np.eye(4),
               task_axes=task,
               tcp_max_linear_m_s=draw(st.floats(0.1, 2.0, **finite)),
               tcp_max_angular_rad_s=draw(st.floats(0.3, 4.0, **finite)),
               solver=SolverSettings(nullspace_gain=draw(st.sampled_from([0.0, 0.5, 5.0]))))


@st.composite
def start_poses(draw, arm: Arm) -> np.ndarray:
    b = JointBounds.of(arm)
    q = np.zeros(arm.n)
    for i in range(arm.n):
        low, high = b.low[i], b.high[i]
        if not (math.isfinite(low) and math.isfinite(high)):
            q[i] = draw(st.floats(-4.0, 4.0, **finite))
            continue
        spot = draw(st.sampled_from(["zero", "low", "high", "near_low", "near_high",
                                     "inside", "inside"]))
        q[i] = {"zero": 0.0, "low": low, "high": high,
                "near_low": low + 1e-4 * (high - low), "near_high": high - 1e-4 * (high - low),
                "inside": low + draw(st.floats(0.0, 1.0)) * (high - low)}[spot]
    return q


@st.composite
def segments(draw, arm: Arm) -> list[tuple[DirectCommand, int]]:
    """Operator input: a few held commands, each for some cycles."""
    out = []
    for _ in range(draw(st.integers(1, 6))):
        kind = draw(st.sampled_from(["twist", "twist", "reverse", "jog", "release"]))
        frame = draw(st.sampled_from(["base", "tool"]))
        reduced = draw(st.booleans())
        if kind in ("twist", "reverse"):
            lin = draw(st.floats(0.0, 1.5))
            ang = draw(st.floats(0.0, 3.0))
            d = np.array(draw(st.lists(st.floats(-1.0, 1.0, **finite), min_size=6,
                                       max_size=6)))
            twist = np.concatenate([d[:3] * lin, d[3:] * ang])
            if kind == "reverse" and out and out[-1][0].joint is None:
                twist = -np.array(out[-1][0].twist)
            cmd = DirectCommand(twist=tuple(twist.tolist()), frame=frame, reduced=reduced)
        elif kind == "jog":
            j = draw(st.integers(0, arm.n - 1))
            rate = draw(st.floats(-2.0, 2.0, **finite)) * arm.joints[j].max_speed
            cmd = DirectCommand(joint=j, joint_rate=rate, reduced=reduced)
        else:
            cmd = DirectCommand(enable=False)
        out.append((cmd, draw(st.integers(1, 60))))
    return out


@st.composite
def runs(draw):
    arm = draw(arms())
    return (arm, draw(st.integers(100, 2000)), draw(start_poses(arm)), draw(segments(arm)),
            tuple(draw(st.sets(st.sampled_from(["vx", "vz", "wx", "wz"]), max_size=2))))


# ----------------------------------------------------------------------------------------
# The checks
# ----------------------------------------------------------------------------------------

def brute_force_stop(a: float, v: float, dt: float) -> float:
    """Travel from rate v held one period, then slowed by exactly a·dt a period, simulated."""
    travelled, n = 0.0, 0
    while v > 0.0 and n < 100_000:
        travelled += v * dt
        v -= a * dt
        n += 1
    return travelled


def check_braking(b: JointBounds, p_start: np.ndarray, rates: np.ndarray, dt: float) -> None:
    """Each joint heading for a limit can still stop before it (a simulated stop)."""
    for i, r in enumerate(rates.tolist()):
        if r == 0.0:
            continue
        room = b.high[i] - p_start[i] if r > 0 else p_start[i] - b.low[i]
        if not math.isfinite(room):
            continue
        travel = brute_force_stop(b.accel_f[i], abs(r), dt)
        assert travel <= max(room, 0.0) * (1 + REL) + 1e-12, \
            f"joint {i}: a stop from {r} needs {travel}, {room} left"


def check_cycle(arm: Arm, b: JointBounds, q_meas: np.ndarray, p_start: np.ndarray,
                rates: np.ndarray, prev: np.ndarray, dt: float, out, locked) -> None:
    assert np.isfinite(rates).all()
    assert (np.abs(rates) <= b.speed * (1 + REL) + ABS).all(), "joint speed"
    s = out.solution
    if s is None:                        # motion not allowed: an immediate zero (a stop)
        assert not rates.any()
        return
    assert "position_over_acceleration" not in s.conflicts
    if "tcp_cap_over_acceleration" not in s.conflicts:
        assert (np.abs(rates - prev) <= b.accel * dt * (1 + REL) + ABS).all(), "acceleration"
    check_braking(b, p_start, rates, dt)
    tcp = geometric_jacobian(arm, q_meas) @ rates
    linear, angular = np.linalg.norm(tcp[:3]), np.linalg.norm(tcp[3:])
    assert linear <= arm.tcp_max_linear_m_s * (1 + REL) + ABS, "TCP linear cap"
    assert angular <= arm.tcp_max_angular_rad_s * (1 + REL) + ABS, "TCP angular cap"
    if out.intent.reduced:
        assert linear <= REDUCED_SPEED_M_S * (1 + REL) + ABS, "reduced speed"
    if out.intent.mode != "joint" and locked:
        # the command after locks, in the axes it was given in (tool: rotate back)
        R = tcp_pose(arm, q_meas)[:3, :3]
        v = s.commanded_twist
        given_axes = np.concatenate([R.T @ v[:3], R.T @ v[3:]]) \
            if out.intent.frame == "tool" else v
        for axis in locked:
            assert abs(given_axes[TASK_AXES.index(axis)]) <= 1e-12 * (1 + np.abs(v).max())


@settings(max_examples=250, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(run=runs())
def test_every_bound_holds_on_every_cycle_on_random_arms(run) -> None:
    run_and_check(run)


def run_and_check(run, tally: Counter[str] | None = None) -> int:
    """Drive one random arm through its input against the ideal lagged arm, checking every
    cycle; returns the number of cycles. `tally` counts the binding limits and named
    conflicts by cycle (benchmarks/soak_bounds.py prints them)."""
    arm, rate_hz, p0, commands, locked = run
    b = JointBounds.of(arm)
    cycle = ControlCycle(arm, PAD, RunSettings(rate_hz=rate_hz, stale_after_s=0.05,
                                               locked_axes=locked, state_lag_cycles=1))
    dt = cycle.dt_s
    p = p0.copy()                  # the arm's true pose
    q_meas = p0.copy()             # what the cycle sees: the pose before the rates in flight
    prev = np.zeros(arm.n)
    k = 0
    release = InputFrame(device="test", present=True, command=DirectCommand(enable=False))
    cycle.step(release, 0.0, q_meas, 0.0)  # enable starts released (hold-to-move)
    for command, count in commands:
        frame = InputFrame(device="test", present=True, command=command)
        for _ in range(count):
            k += 1
            now = k * dt
            out = cycle.step(frame, now, q_meas, now - dt)
            rates = out.rates
            p_start = start_pose(q_meas, prev, dt, 1)
            np.testing.assert_allclose(p_start, p, rtol=0, atol=1e-12)  # the lag model
            check_cycle(arm, b, q_meas, p_start, rates, prev, dt, out, locked)
            if out.solution is not None:
                names = [f"binding: {out.solution.binding_limit}"] + \
                    [f"conflict: {c}" for c in out.solution.conflicts]
                for name in names:
                    event(name)
                if tally is not None:
                    tally.update(names)
            q_meas = p.copy()
            p = p + rates * dt
            prev = rates
            # never past a soft limit it started inside of, never further out of one
            assert (p <= np.maximum(b.high, p0) + 1e-12).all()
            assert (p >= np.minimum(b.low, p0) - 1e-12).all()
    return k


def test_a_jittery_loop_keeps_max_accel_as_the_arm_sees_it() -> None:
    """A fixed-rate loop that runs late now and then catches up on its schedule: the cycle
    after a late one comes early. The change between commands stays within max_accel over
    the real time between them (Δv ≤ a·Δt, elementary kinematics), and the shared analysis
    (runtime.sessions.stats) finds no peak above max_accel."""
    from runtime.arm.load import load_arm
    from runtime.sessions.stats import MotionStats, above
    arm = load_arm("elbow6")
    b = JointBounds.of(arm)
    rate_hz = 500.0
    dt = 1.0 / rate_hz
    cycle = ControlCycle(arm, PAD, RunSettings(rate_hz=rate_hz, state_lag_cycles=1))
    rng = np.random.default_rng(4)
    q = arm.home()
    go = InputFrame(device="test", present=True, command=DirectCommand(
        twist=(0.3, -0.2, 0.25, 0.0, 0.0, 0.0)))
    cycle.step(InputFrame(device="test", present=True, command=DirectCommand(enable=False)),
               0.0, q, 0.0)
    times = [0.0]
    rates = [np.zeros(arm.n)]
    late = 0.0
    for k in range(1, 600):
        # every 25th cycle wakes up to 1.5 periods late; the next ones keep the schedule,
        # running at once (50 µs on) while they are behind it, as a fixed-rate loop does
        late = rng.uniform(0.2, 1.5) * dt if k % 25 == 0 else 0.0
        now = max(k * dt + late, times[-1] + 50e-6)
        out = cycle.step(go, now, q, now - dt)
        step = min(dt, now - times[-1])
        assert (np.abs(out.rates - rates[-1]) <= b.accel * step * (1 + REL) + ABS).all(), k
        q = q + out.rates * (now - times[-1])
        times.append(now)
        rates.append(out.rates)
    stats = MotionStats(arm.joint_names, arm.max_accel, rate_hz)
    stats.add(np.arange(len(times)), np.array(times), np.array(rates),
              np.ones(len(times), dtype=bool), ["moving"] * len(times), np.zeros(len(times)))
    assert not any(above(float(p), a) for p, a in zip(stats.peak_accel, arm.max_accel))
    assert stats.peak_accel.max() > 0.5 * arm.max_accel.min()     # it did accelerate
