"""The preflight evaluation (runtime.sessions.preflight) on hand-made traces with known answers.

Each trace is a joint-1 motion of the shipped planar3 arm (rated limits = its software
limits: 120 deg/s, 400 deg/s²) built cycle by cycle, so every peak is arithmetic: a
trapezoid of speed v and ramp a has peak speed v and peak |Δv/Δt| = a.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from runtime.arm.kinematics import geometric_jacobian, tcp_pose
from runtime.control.limits import REDUCED_SPEED_M_S
from runtime.arm.model import load_arm
from runtime.sessions.preflight import MEASURED_TOLERANCE, TraceBuilder, evaluate
from runtime.sessions.log_schema import CycleRecord

RATE_HZ = 500.0
DT = 1.0 / RATE_HZ


@pytest.fixture(scope="module")
def arm():
    return load_arm("planar3")


def record(k: int, q, rates, twist_rates=(0.0,) * 6, *, enabled=True, reduced=False,
           binding=None, frame="base", twist=(0.0,) * 6, reason="enable held",
           sigma=0.2, damping=0.0) -> CycleRecord:
    return CycleRecord(
        cycle=k, t_s=k * DT, axes=(), buttons=(), enabled=enabled, enable_reason=reason,
        twist=tuple(twist), frame=frame, q=tuple(q), rates=tuple(rates), damping=damping,
        sigma_min=sigma, manipulability=0.1, achieved_twist=tuple(twist_rates),
        tracking_error=0.0, scales={}, binding_limit=binding, period_s=DT, compute_s=0.0,
        overrun=False, reduced=reduced)


def with_j1(arm, **changes):
    """The arm with joint 1's fields changed (e.g. a lower rated_speed)."""
    j1 = arm.joints[0]
    return arm.with_changes(joints=(j1.__class__(**{**vars(j1), **changes}),) + arm.joints[1:])


def trapezoid(v: float, a: float, hold_s: float) -> list[float]:
    """Joint rates of a trapezoid: ramp at a to v, hold, ramp down to 0 (per cycle)."""
    ramp = [min(v, a * DT * (k + 1)) for k in range(int(math.ceil(v / (a * DT))))]
    return [0.0] * 10 + ramp + [v] * int(hold_s * RATE_HZ) + ramp[::-1][1:] + [0.0] * 10


def run_joint1(arm, profile: list[float], *, measured_scale: float = 1.0, q0=None,
               **record_options):
    """Joint 1 follows `profile` on an ideal arm; the 'measured' rate is scaled."""
    q = np.array(arm.home() if q0 is None else q0, dtype=float)
    trace = TraceBuilder(arm, q, np.zeros(arm.n))
    for k, v in enumerate(profile):
        rates = np.zeros(arm.n)
        rates[0] = v
        J = geometric_jacobian(arm, q)
        rec = record(k, q, rates, J @ rates, **record_options)
        q = q + rates * DT
        trace.add(rec, q, rates * measured_scale, commanded_twist=J @ rates)
    return trace.build()


def test_a_motion_within_the_ratings_passes_with_hand_computed_peaks(arm):
    v, a = math.radians(60.0), math.radians(300.0)
    result = evaluate(arm, run_joint1(arm, trapezoid(v, a, 0.5)), rate_hz=RATE_HZ)
    assert result.verdict == "pass" and result.findings == ()
    j1 = result.joints[0]
    assert j1.peak_speed == pytest.approx(v, rel=1e-12)
    assert j1.peak_accel == pytest.approx(a, rel=1e-9)
    assert j1.peak_speed_measured == pytest.approx(v, rel=1e-12)
    assert result.joints[1].peak_speed == 0.0
    # TCP speed of a pure joint-1 turn: v·r, r the TCP's distance from the axis.
    r = np.linalg.norm(tcp_pose(arm, arm.home())[:2, 3])
    assert result.tcp_peak_speed == pytest.approx(v * r, rel=1e-3)


def test_a_rated_speed_below_the_software_limit_fails_naming_the_joint(arm):
    """jogwire obeys the software max (120 deg/s); the hardware is rated 50 deg/s."""
    low = with_j1(arm, rated_speed=math.radians(50.0))
    result = evaluate(low, run_joint1(low, trapezoid(math.radians(60.0), math.radians(300.0),
                                                     0.2)), rate_hz=RATE_HZ)
    assert result.verdict == "fail"
    (f,) = result.findings
    assert (f.code, f.joint, f.source) == ("rated_speed", "j1", "commanded")
    assert f.value == pytest.approx(math.radians(60.0)) and f.limit == pytest.approx(
        math.radians(50.0))
    assert "j1" in f.message and "60.00 deg/s" in f.message and "50.00 deg/s" in f.message
    assert any("software max speed" in n for n in result.notes)


@pytest.mark.parametrize("over, fails", [(0.5 * MEASURED_TOLERANCE, False),
                                         (2.0 * MEASURED_TOLERANCE, True)])
def test_measured_speed_counts_beyond_the_tracking_allowance(arm, over, fails):
    """Allowance = 2 % of the rating + VELOCITY_ERROR (1e-3 rad/s, 0.14 % of 40 deg/s)."""
    arm = with_j1(arm, rated_speed=math.radians(40.0))
    v = arm.joints[0].rated_speed                        # commanded exactly at the rating
    result = evaluate(arm, run_joint1(arm, trapezoid(v, math.radians(300.0), 0.2),
                                      measured_scale=1.0 + over), rate_hz=RATE_HZ)
    assert (result.verdict == "fail") is fails
    if fails:
        assert [(f.code, f.source) for f in result.findings] == [("rated_speed", "measured")]


def test_a_stop_is_not_counted_as_a_commanded_deceleration(arm):
    """Enable released at 40 deg/s: the rates drop to zero in one cycle (v/dt = 20 000
    deg/s², far above the rating); that is the arm side's stop, listed, not a fail."""
    v = math.radians(40.0)
    profile = trapezoid(v, math.radians(300.0), 0.5)
    cut = profile.index(v) + 50
    trace_rates = profile[:cut] + [0.0] * 30
    q = np.array(arm.home())
    trace = TraceBuilder(arm, q, np.zeros(arm.n))
    for k, rate in enumerate(trace_rates):
        enabled = k < cut
        rates = np.array([rate, 0.0, 0.0])
        J = geometric_jacobian(arm, q)
        trace.add(record(k, q, rates, J @ rates, enabled=enabled,
                         reason="enable held" if enabled else "hold enable to move"),
                  q + rates * DT, rates, commanded_twist=J @ rates)
        q = q + rates * DT
    result = evaluate(arm, trace.build(), rate_hz=RATE_HZ)
    assert result.verdict == "pass"
    assert len(result.stops) == 1 and result.stops[0].t_s == pytest.approx(cut * DT)
    assert result.stops[0].reason == "hold enable to move"
    # the step to zero, listed with what it asks of an arm that followed it literally
    assert (result.stops[0].joint, result.stops[0].asked_decel) == ("j1", pytest.approx(v / DT))
    assert result.joints[0].peak_accel == pytest.approx(math.radians(300.0), rel=1e-9)
    assert math.isnan(result.series.accel_cmd[cut, 0])


def test_an_acceleration_above_the_rating_fails(arm):
    a = 1.5 * arm.joints[0].rated_accel
    result = evaluate(arm, run_joint1(arm, trapezoid(math.radians(60.0), a, 0.2)),
                      rate_hz=RATE_HZ)
    # a trace no limit layer would command: above the software max_accel too, and that is
    # its own finding (jogwire exceeded its own limit), apart from the rated one
    assert a > arm.joints[0].max_accel
    assert [(f.code, f.joint) for f in result.findings] == [("software_accel", "j1"),
                                                            ("rated_accel", "j1")]
    assert result.joints[0].peak_accel == pytest.approx(a, rel=1e-9)


def test_coming_within_the_margin_of_a_limit_fails(arm):
    """Joint 1 ends 0.5° from its upper limit (170°); the margin is 1°."""
    upper = arm.joints[0].upper
    v = math.radians(20.0)
    profile = trapezoid(v, math.radians(300.0), 0.5)
    travel = sum(profile) * DT
    q0 = arm.home().copy()
    q0[0] = upper - math.radians(0.5) - travel
    result = evaluate(arm, run_joint1(arm, profile, q0=q0), rate_hz=RATE_HZ)
    (f,) = result.findings
    assert (f.code, f.joint) == ("position_limit", "j1")
    assert result.joints[0].limit_side == "upper"
    assert result.joints[0].min_limit_distance == pytest.approx(math.radians(0.5), abs=1e-9)
    assert "upper position limit" in f.message


def test_the_reduced_speed_cap_is_0_25_m_s(arm):
    """A TCP at 0.3 m/s: fine at the arm's 1 m/s cap, a fail where reduced speed is on
    (250 mm/s, ISO 10218-1:2011 5.6, REFERENCES §4)."""
    r = np.linalg.norm(tcp_pose(arm, arm.home())[:2, 3])
    v = 0.3 / r
    profile = trapezoid(v, math.radians(300.0), 0.2)
    assert evaluate(arm, run_joint1(arm, profile), rate_hz=RATE_HZ).verdict == "pass"
    result = evaluate(arm, run_joint1(arm, profile, reduced=True), rate_hz=RATE_HZ)
    (f,) = result.findings
    assert f.code == "tcp_speed" and f.limit == REDUCED_SPEED_M_S
    assert "reduced speed" in f.message
    locked = evaluate(arm, run_joint1(arm, profile), rate_hz=RATE_HZ, reduced=True)
    assert locked.tcp_cap == REDUCED_SPEED_M_S and locked.verdict == "fail"


def test_a_run_that_never_moves_proves_nothing(arm):
    trace = TraceBuilder(arm, arm.home(), np.zeros(arm.n))
    for k in range(50):
        trace.add(record(k, arm.home(), np.zeros(arm.n), enabled=False,
                         reason="release enable and press again"), arm.home(), np.zeros(arm.n))
    result = evaluate(arm, trace.build(), rate_hz=RATE_HZ)
    (f,) = result.findings
    assert f.code == "no_motion" and "release enable" in f.message


def test_binding_limit_episodes_and_damping_time(arm):
    trace = TraceBuilder(arm, arm.home(), np.zeros(arm.n))
    pattern = [None] * 5 + ["acceleration"] * 3 + [None] * 2 + ["reduced_speed"] * 4 + \
        ["acceleration"] * 2
    for k, name in enumerate(pattern):
        rates = np.array([0.1, 0.0, 0.0])
        trace.add(record(k, arm.home(), rates, binding=name, damping=0.01 if k < 4 else 0.0,
                         sigma=0.02 if k == 3 else 0.2), arm.home(), rates)
    result = evaluate(arm, trace.build(), rate_hz=RATE_HZ)
    assert [(e.limit, e.cycles) for e in result.limit_episodes] == \
        [("acceleration", 3), ("reduced_speed", 4), ("acceleration", 2)]
    assert result.limit_episodes[1].t_start_s == pytest.approx(10 * DT)
    assert result.time_damped_s == pytest.approx(4 * DT)
    assert result.min_sigma == 0.02 and result.min_sigma_t_s == pytest.approx(3 * DT)
    events = {e["limit"]: e for e in result.as_dict()["limit_events"]}
    assert events["acceleration"]["cycles"] == 5 and events["acceleration"]["episodes"] == 2


def test_a_tool_frame_command_is_compared_in_base_axes(arm):
    """A record commanding +x in tool axes: the builder rotates it by the TCP's rotation."""
    q = arm.home()
    trace = TraceBuilder(arm, q, np.zeros(arm.n))
    trace.add(record(0, q, np.zeros(arm.n), frame="tool", twist=(0.1, 0, 0, 0, 0, 0)), q,
              np.zeros(arm.n))
    R = tcp_pose(arm, q)[:3, :3]
    assert np.allclose(trace.build().twist_cmd[0, :3], R @ [0.1, 0.0, 0.0], atol=1e-15)


def test_the_summary_has_the_documented_keys(arm):
    d = evaluate(arm, run_joint1(arm, trapezoid(0.5, 3.0, 0.1)), rate_hz=RATE_HZ).as_dict()
    for key in ("verdict", "reasons", "joints", "tcp_peak_speed", "tcp_cap", "min_sigma"):
        assert key in d
    for key in ("name", "peak_speed", "rated_speed", "peak_accel", "rated_accel",
                "min_limit_distance"):
        assert key in d["joints"][0]
