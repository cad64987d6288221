"""A drive session in-process, without sockets or a window: which input it picks, its session
statistics, and the loop body run against an ideal arm on a fake clock — how every way of
stopping ends with zero rates the arm side has applied."""

from __future__ import annotations

import math

import numpy as np
import pytest

from runtime.arm.cell import load_cell
from runtime.arm.kinematics import tcp_pose
from runtime.arm.load import load_arm
from runtime.control.loop import FixedRateLoop
from runtime.control.pads import load_pad
from runtime.control.settings import RunSettings
from runtime.errors import ConfigError
from runtime.link.protocol import CellHello, Contact, State, cell_hello_for
from runtime.link.transport import Inbox
from runtime.operator.inputs.script import ScriptSource, load_script
from runtime.operator.terminal import format_drive_summary, status_line
from runtime.sessions.drive import SETTLE_TIMEOUT_S, DriveSession, build_summary, enter_realtime
from runtime.sessions.drive_stats import LogHistogram
from runtime.sessions.drive_ui import MainThread, plan_input

RATE_HZ = 500.0


@pytest.mark.parametrize("requested, headless, display, pads, spec, window", [
    (None, False, True, 1, "gamepad", True),          # a pad and a display: the usual desk
    (None, False, True, 0, "keyboard", True),         # no pad: keys in the window
    (None, False, False, 0, "script:square", False),  # a server, CI, a container
    (None, True, True, 0, "script:square", False),    # --headless, no pad
    (None, True, False, 2, "gamepad", False),         # a pad works without a window too
    ("script:x.toml", False, True, 1, "script:x.toml", True),
    ("network:tcp://127.0.0.1:5", True, False, 0, "network:tcp://127.0.0.1:5", False),
])
def test_plan_input_picks_the_input_and_says_why(requested, headless, display, pads, spec,
                                                 window):
    plan = plan_input(requested, headless=headless, display=display, pads=pads)
    assert (plan.spec, plan.window) == (spec, window)
    if requested is None and spec.startswith("script"):
        assert "demo script 'square' headless" in plan.note


@pytest.mark.parametrize("headless, display", [(True, True), (False, False)])
def test_keyboard_without_a_window_is_refused(headless, display):
    with pytest.raises(ConfigError, match="keyboard input needs the status window"):
        plan_input("keyboard", headless=headless, display=display, pads=0)


def test_log_histogram_percentiles_against_numpy(fake_clock):
    """Log-binned percentiles agree with numpy's nearest-rank ones (the outside reference) to
    half a bin: a bin spans a factor 10^(1/100), 2.3 %."""
    rng = np.random.default_rng(7)
    x = rng.lognormal(mean=math.log(1e-3), sigma=0.8, size=19999)   # ~1 ms, long tail
    h = LogHistogram()
    for v in x:
        h.add(float(v))
    for p in (1, 50, 90, 99, 99.9):
        assert h.percentile(p) == pytest.approx(np.percentile(x, p, method="inverted_cdf"),
                                                rel=0.012)
    assert h.max == x.max() and h.n == len(x)
    assert LogHistogram().percentile(50) is None


class IdealArm:
    """An in-memory arm side: follows each rates message exactly for the time until the next
    receive (explicit Euler), answers with a state echoing the rates it applied."""

    def __init__(self, arm, clock, *, alive: bool = True) -> None:
        self.arm, self.clock, self.alive = arm, clock, alive
        self.q = arm.home().copy()
        self.qd = np.zeros(arm.n)
        self.applied = None
        self.sent = []
        self.t = clock()
        self.seq = 0
        self.dropped, self.send_dropped = {}, 0

    deaf = (math.inf, math.inf)     # (from, to) clock readings: rates sent then are lost

    def send(self, msg) -> bool:
        self.sent.append(msg)
        if not self.deaf[0] <= msg.t_ns * 1e-9 < self.deaf[1]:
            self.applied = msg
        return True

    def receive(self, timeout_s: float = 0.0) -> Inbox:
        now = self.clock()
        self.q = self.q + self.qd * (now - self.t)
        self.t = now
        self.qd = np.zeros(self.arm.n) if self.applied is None else np.array(self.applied.qd)
        if not self.alive:
            return Inbox()
        self.seq += 1
        a = self.applied
        return Inbox(state=State(seq=self.seq, t_ns=int(now * 1e9), q=self.q, qd=self.qd,
                                 applied_seq=a.seq if a else 0, echo_ns=a.t_ns if a else 0,
                                 status="tracking"))


def make_session(fake_clock, script="square", *, duration_s=None, alive=True):
    arm = load_arm("elbow6")
    clock = fake_clock(start_s=50.0, read_cost_s=2e-6)
    client = IdealArm(arm, clock, alive=alive)
    source = ScriptSource(load_script(script, arm))
    drive = DriveSession(arm=arm, pad=load_pad("keyboard"),
                         settings=RunSettings(rate_hz=RATE_HZ, stale_after_s=0.1),
                         source=source, client=client, recorder=None, clock=clock,
                         duration_s=duration_s, same_clock=True, target="ideal")
    loop = FixedRateLoop(RATE_HZ, clock=clock, sleep=clock.sleep)
    return drive, loop, client, arm


def test_a_stop_request_mid_motion_holds_zero_until_the_arm_is_at_rest(fake_clock):
    drive, loop, arm_side, arm = make_session(fake_clock)
    t_stop = 1.5                                      # 1 s into the first leg (+x, 5 cm/s)

    def body(tick):
        if drive.t0 is not None and tick.start_s - drive.t0 >= t_stop and not drive.ending:
            drive.request_end("stopped by SIGINT")    # once, like one Ctrl-C
        return drive.body(tick)

    stats = loop.run(body, duration_s=10.0)
    assert drive.end_reason == "stopped by SIGINT"
    assert drive.stop_outcome.startswith("zero rates applied; arm measured at rest")
    assert stats.cycles < 1.5 * RATE_HZ + 5           # it ended within a few cycles
    last = arm_side.sent[-1]
    assert not any(last.qd) and last.seq == drive.seq
    # moved ~1 s at 5 cm/s along +x before the stop (the ideal arm integrates exactly)
    moved = tcp_pose(arm, arm_side.q)[:3, 3] - tcp_pose(arm, arm.home())[:3, 3]
    assert moved[0] == pytest.approx(0.05 * (t_stop - 0.5), abs=2e-3)
    assert drive.stats.round_trip.n > 0 and drive.stats.gate_cycles["moving"] > 0


def test_the_script_end_and_the_duration_end_the_session(fake_clock):
    drive, loop, _, _ = make_session(fake_clock, "square")
    loop.run(drive.body, duration_s=30.0)
    assert drive.end_reason == "the script finished"
    drive, loop, _, _ = make_session(fake_clock, "square", duration_s=2.0)
    loop.run(drive.body, duration_s=30.0)
    assert drive.end_reason == "--duration 2 s reached"


def test_without_arm_state_the_session_ends_after_the_settling_time(fake_clock):
    drive, loop, arm_side, _ = make_session(fake_clock, alive=False)
    drive.request_end("stopped by SIGTERM")
    stats = loop.run(drive.body, duration_s=5.0)
    assert stats.cycles == pytest.approx(SETTLE_TIMEOUT_S * RATE_HZ, abs=2)
    assert all(not any(m.qd) for m in arm_side.sent)              # zero all along
    assert "no fresh arm state within 1 s" in drive.stop_outcome


def test_summary_reads_as_a_report(fake_clock):
    drive, loop, _, _ = make_session(fake_clock, duration_s=1.5)
    timing = loop.run(drive.body, duration_s=30.0)
    m = build_summary(drive, timing, priority="normal", input_name="script square",
                      target="ideal", recorder_stats=None, session_path=None, arm_side_log="",
                      started_s=0.0, ended_s=1.5)
    text = format_drive_summary(m)
    assert "--duration 1.5 s reached after 1.5 s" in text
    assert "base_yaw" in text and "not recorded" in text
    assert m["tcp_peak_m_s"] == pytest.approx(0.05, rel=1e-6)   # the square's 5 cm/s


def test_summary_lists_a_stop_apart_from_the_commanded_accelerations(fake_clock):
    """A stop mid-motion steps the rates to zero in one cycle: the summary lists it with the
    braking it would ask, and judges accelerations without it (runtime.sessions.stats, the
    analysis inspect and preflight use), so none is above max_accel."""
    drive, loop, _, arm = make_session(fake_clock)

    def body(tick):
        if drive.t0 is not None and tick.start_s - drive.t0 >= 1.5 and not drive.ending:
            drive.request_end("stopped by SIGINT")
        return drive.body(tick)

    timing = loop.run(body, duration_s=10.0)
    m = build_summary(drive, timing, priority="normal", input_name="script square",
                      target="ideal", recorder_stats=None, session_path=None, arm_side_log="",
                      started_s=0.0, ended_s=2.0)
    (stop,) = m["stops"]
    assert stop["tcp_speed"] == pytest.approx(0.05, rel=1e-6)     # the square's 5 cm/s
    worst = arm.joint_names.index(stop["joint"])
    assert stop["asked_decel"] > arm.max_accel[worst]              # a step, not a ramp
    for j in m["joints"]:
        assert j["peak_accel"] <= j["max_accel"] * (1 + 1e-9), j["name"]
        assert not j["over_max_accel"] and not j["over_rated_accel"]
    assert any(j["peak_accel"] > 0 for j in m["joints"])           # it did accelerate
    text = format_drive_summary(m)
    assert "stops     1 while moving" in text and "above max" not in text


def test_rates_lost_on_the_way_stop_motion_until_enable_is_pressed_again(fake_clock):
    """The arm side keeps sending states but applies none of our rates for longer than
    stale_after: motion is held, and stays held when rates get through again, because
    enable was held throughout (the square script never lets go until its end)."""
    drive, loop, arm_side, _ = make_session(fake_clock)
    t0 = 50.0
    arm_side.deaf = (t0 + 1.0, t0 + 1.3)
    reasons = {}

    def body(tick):
        keep = drive.body(tick)
        reasons.setdefault(round(tick.start_s - t0, 1), drive.latest.gate_reason
                           if drive.latest else "")
        return keep

    loop.run(body, duration_s=4.0)
    moving = [m for m in arm_side.sent if any(m.qd)]
    assert moving and max(m.t_ns for m in moving) * 1e-9 < t0 + 1.3   # nothing after
    assert any("applied none of our rates" in r for r in reasons.values())
    assert any("release enable and press again" in r for r in reasons.values())


def test_realtime_refused_falls_back_to_normal_priority(monkeypatch):
    import errno
    import os

    def refuse(*_):
        raise PermissionError(errno.EPERM, "Operation not permitted")

    monkeypatch.setattr(os, "sched_setscheduler", refuse, raising=False)
    got = enter_realtime(50)
    assert got.startswith("normal (real-time refused: Operation not permitted")
    assert "CAP_SYS_NICE" in got


class ArmInCell(IdealArm):
    """The ideal arm that answers our workcell and reports one contact at `touch_at`."""

    touch_at = 52.0    # clock reading (the fake clock starts at 50 s)
    asked = False

    def send(self, msg) -> bool:
        if isinstance(msg, CellHello):
            self.asked = True
            return True
        return super().send(msg)

    def receive(self, timeout_s: float = 0.0) -> Inbox:
        inbox = super().receive(timeout_s)
        if self.asked and not getattr(self, "answered", False):
            self.answered = True
            inbox.cell = CellHello("bench", cell_hello_for(self.cell).digest)
        if inbox.state is not None and self.clock() >= self.touch_at and \
                not getattr(self, "touched", False):
            self.touched = True
            inbox.contacts.append(Contact(inbox.state.seq, inbox.state.t_ns, ["gripper"],
                                          ["fixture"], [0.002], 1))
        return inbox


def test_a_drive_in_a_workcell_reports_its_nearest_pair_and_the_contacts(fake_clock):
    arm = load_arm("elbow6")
    cell = load_cell("bench", arm)
    clock = fake_clock(start_s=50.0, read_cost_s=2e-6)
    client = ArmInCell(arm, clock)
    client.cell = cell
    drive = DriveSession(arm=arm, pad=load_pad("keyboard"),
                         settings=RunSettings(rate_hz=RATE_HZ, stale_after_s=0.1),
                         source=ScriptSource(load_script("bench_plunge", arm)), client=client,
                         recorder=None, clock=clock, duration_s=None, same_clock=True,
                         target="ideal", cell=cell)
    client.send(drive.cell_hello)
    loop = FixedRateLoop(RATE_HZ, clock=clock, sleep=clock.sleep)
    timing = loop.run(drive.body, duration_s=30.0)
    m = build_summary(drive, timing, priority="normal", input_name="script bench_plunge",
                      target="ideal", recorder_stats=None, session_path=None, arm_side_log="",
                      started_s=0.0, ended_s=5.0)
    d_s = cell.clearance.safety_distance_m
    # The ideal arm follows the rates exactly: the damper's own guarantee, d ≥ d_s.
    assert m["min_clearance_m"] >= d_s - 1e-9 and m["clearance_pair"] == ["gripper", "bench"]
    assert m["contacts_measured"] and m["cell"] == "bench"
    assert m["contacts"] == [{"a": "gripper", "b": "fixture", "t_s": pytest.approx(2.0, abs=0.01),
                              "depth_m": 0.002, "steps": 1}]
    text = format_drive_summary(m)
    assert "clearance workcell bench: nearest gripper–bench" in text
    assert "CONTACT gripper–fixture from 2.0 s, 2.0 mm deep" in text
    snap = MainThread(drive, loop, None, None).snapshot()   # the pair measured there
    assert snap.cell is not None and snap.clearance_pair == ("gripper", "bench")
    assert "nearest gripper–bench" in status_line(snap, timing)
