"""The whole control cycle (mapper → safety gate → solver → limits) against plain kinematics.

The arm here is ideal: q integrates the commanded rates exactly (explicit Euler at the loop
period), so the TCP must follow ∫ twist dt as the textbook rate-control law says
(resolved-motion rate control, Whitney 1969).
"""

from __future__ import annotations

import numpy as np
import pytest

from runtime.operator.inputs.script import ScriptSource, load_script
from runtime.arm.kinematics import tcp_pose
from runtime.control.mapping import DirectCommand, InputFrame, load_pad
from runtime.arm.model import load_arm
from runtime.control.cycle import ControlCycle
from runtime.sessions.log_schema import frame_from_wire, frame_to_wire
from runtime.control.safety import MOVING, SafetySettings

RATE_HZ = 500.0


def run_script(arm, script, *, reduced=False):
    cycle = ControlCycle(arm, load_pad("keyboard"), rate_hz=RATE_HZ, reduced_locked=reduced)
    source = ScriptSource(script)
    q = arm.home()
    dt = 1.0 / RATE_HZ
    outputs, poses = [], []
    for k in range(int(script.duration_s * RATE_HZ) + 1):
        now = k * dt
        out = cycle.step(source.read(now), now, q.copy(), now)
        q = q + out.rates * dt
        outputs.append(out)
        poses.append(tcp_pose(arm, q)[:3, 3])
    return outputs, np.array(poses)


@pytest.mark.parametrize("arm_name", ["elbow6", "reach7", "scara4"])
def test_square_returns_to_start_and_stops(arm_name):
    arm = load_arm(arm_name)
    script = load_script("square", arm)
    outputs, poses = run_script(arm, script)
    start = tcp_pose(arm, arm.home())[:3, 3]
    # 4 legs of 2 s at 0.05 m/s: 0.10 m per leg; the ramp-up at a_max costs well under 1 mm.
    after_first_leg = poses[int((script.lead_in_s + 2.0) * RATE_HZ)]
    assert after_first_leg[0] - start[0] == pytest.approx(0.10, abs=2e-3)
    assert abs(after_first_leg[1] - start[1]) < 2e-3
    assert np.linalg.norm(poses[-1] - start) < 3e-3
    # The script ends with enable released: zero rates at once (hold-to-move).
    assert not outputs[-1].verdict.allowed
    assert np.all(outputs[-1].rates == 0.0)
    assert any(o.verdict.state == MOVING for o in outputs)


def test_stale_state_commands_zero():
    arm = load_arm("elbow6")
    cycle = ControlCycle(arm, load_pad("keyboard"), rate_hz=RATE_HZ)
    go = InputFrame(device="test", present=True,
                    command=DirectCommand(twist=(0.05, 0, 0, 0, 0, 0)))
    off = InputFrame(device="test", present=True, command=DirectCommand(enable=False))
    q = arm.home()
    cycle.step(off, 0.0, q, 0.0)                       # released first: the press is fresh
    assert np.any(cycle.step(go, 0.002, q, 0.002).rates != 0.0)
    # The newest state is older than stale_after: the gate blocks and the rates are zero.
    out = cycle.step(go, 1.0, q, 0.002)
    assert not out.verdict.allowed and "stale" in out.verdict.reason
    assert np.all(out.rates == 0.0)


def test_a_slow_link_commands_zero_and_the_default_is_a_link_without_delay():
    arm = load_arm("elbow6")
    cycle = ControlCycle(arm, load_pad("keyboard"), rate_hz=RATE_HZ,
                         safety=SafetySettings(stale_after_s=0.1))
    go = InputFrame(device="test", present=True,
                    command=DirectCommand(twist=(0.05, 0, 0, 0, 0, 0)))
    off = InputFrame(device="test", present=True, command=DirectCommand(enable=False))
    q = arm.home()
    cycle.step(off, 0.0, q, 0.0)
    assert np.any(cycle.step(go, 0.002, q, 0.002).rates != 0.0)      # no round trip given
    out = cycle.step(go, 0.004, q, 0.004, round_trip_s=0.35)
    assert not out.verdict.allowed and "round trip 350 ms" in out.verdict.reason
    assert np.all(out.rates == 0.0)
    out = cycle.step(go, 0.006, q, 0.006, round_trip_s=None)
    assert not out.verdict.allowed and "not measured" in out.verdict.reason


def test_input_frame_round_trips_through_plain_data():
    frame = InputFrame(device="pad", present=True, axes=(0.5, -1.0), pressed=frozenset({4, "space"}))
    assert frame_from_wire(frame_to_wire(frame)) == frame
    cmd = InputFrame(device="s", present=True,
                     command=DirectCommand(twist=(0.1, 0, 0, 0, 0, 0.2), frame="tool", joint=None))
    assert frame_from_wire(frame_to_wire(cmd)) == cmd


def test_cycle_record_keeps_what_a_rerun_needs(tmp_path):
    from runtime.sessions.log_writer import SessionRecorder
    from runtime.sessions.log_schema import cycle_record
    from runtime.sessions.log_reader import read_session
    arm = load_arm("elbow6")
    outputs_frames = []
    cycle = ControlCycle(arm, load_pad("keyboard"), rate_hz=RATE_HZ)
    source = ScriptSource(load_script("square", arm))
    q = arm.home()
    path = tmp_path / "s.jwlog"
    rec = SessionRecorder.start(path, arm, {"rate_hz": RATE_HZ})
    for k in range(600):
        now = k / RATE_HZ
        frame = source.read(now)
        out = cycle.step(frame, now, q, now)
        rec.record(cycle_record(k, now, frame, out, q, state_age_s=0.0, overrun_streak=0,
                                period_s=1 / RATE_HZ, compute_s=0.0, overrun=False))
        outputs_frames.append((frame, out))
        q = q + out.rates / RATE_HZ
    rec.close()
    session = read_session(path)
    assert len(session.records) == 600
    for r, (frame, out) in zip(session.records, outputs_frames):
        assert frame_from_wire(r.input) == frame
        assert r.rates == tuple(out.rates.tolist())
        assert r.safety_state == out.verdict.state
