"""Open-loop re-runs: recorded inputs, poses, ages and holds fed back through the control cycle.

The sessions here are recorded the way `jogwire drive` records them (absolute loop clock,
state a little old, a hold from the caller, an overrun streak, a twin-stick pad with toggle
buttons), against an ideal arm that integrates the rates (q += q̇·dt). Same software and
settings must give the recorded rates bit for bit; a changed arm must show its difference.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from runtime.errors import LogError
from runtime.operator.inputs.script import ScriptSource, load_script
from runtime.control.mapping import InputFrame, load_pad
from runtime.arm.model import load_arm
from runtime.control.cycle import ControlCycle
from runtime.sessions.log_writer import SessionRecorder
from runtime.sessions.log_schema import cycle_record
from runtime.sessions.log_reader import read_session
from runtime.sessions.rerun import (RecordedInputs, continuous_records, cycle_settings, inputs_of,
                           rerun_open_loop)
from runtime.control.safety import BLOCKED, SafetySettings

RATE_HZ = 500.0
DT = 1.0 / RATE_HZ
T0 = 1234.5          # the loop clock at the first cycle (drive uses perf_counter)
LATENCY_S = 0.0013   # age of the newest state when a cycle runs


def pad_frame(k: int) -> InputFrame:
    """A twin-stick pad: enable (4) held from 0.1 s, the left stick pushed up and to the
    side, the frame toggle (3) tapped at 0.6 s, stick released at 1.0 s."""
    t = k * DT
    pressed = set()
    if t >= 0.1:
        pressed.add(4)
    if 0.6 <= t < 0.62:
        pressed.add(3)
    axes = (-0.4, -0.7, 0.0, 0.2, 0.0, 0.0) if 0.1 <= t < 1.0 else (0.0,) * 6
    return InputFrame(device="pad 'test' #0", present=True, axes=axes,
                      pressed=frozenset(pressed))


def record_session(path: Path, arm, frames, settings: dict, n: int) -> list:
    """Run the cycle as the drive loop does and record it; returns the rates sent."""
    safety = SafetySettings(stale_after_s=settings["stale_after_s"])
    cycle = ControlCycle(arm, load_pad(settings["pad"]), rate_hz=RATE_HZ, safety=safety,
                         reduced_locked=settings["reduced_locked"])
    q = arm.home()
    sent = []
    with SessionRecorder.start(path, arm, settings) as rec:
        for k in range(n):
            now = T0 + k * DT
            stamp = now - LATENCY_S
            if 300 <= k < 320:
                stamp = now - 0.2               # the state stream stalls: stale
            hold = "target not ready" if 150 <= k < 160 else None
            streak = 3 if 200 <= k < 203 else 0
            frame = frames(k)
            out = cycle.step(frame, now, q, stamp, overrun_streak=streak, hold=hold)
            rec.record(cycle_record(k, now - T0, frame, out, q, state_age_s=now - stamp,
                                    overrun_streak=streak, period_s=DT, compute_s=1e-4,
                                    overrun=False))
            sent.append(out.rates.copy())
            q = q + out.rates * DT
    return sent


SETTINGS = {"command": "drive", "pad": "twinstick", "rate_hz": RATE_HZ, "reduced_locked": False,
            "stale_after_s": 0.05, "overrun_limit": 5}


@pytest.fixture(scope="module")
def pad_session(tmp_path_factory):
    path = tmp_path_factory.mktemp("rerun") / "pad.jwlog"
    arm = load_arm("elbow6")
    record_session(path, arm, pad_frame, SETTINGS, 700)
    return path


def rerun(path: Path, arm=None):
    session = read_session(path)
    records, damage = continuous_records(session)
    assert damage is None
    cycle = cycle_settings(session.header.settings).control_cycle(arm or session.header.arm)
    return rerun_open_loop(cycle, records, inputs_of(records)), records


def test_same_software_and_settings_reproduce_every_rate(pad_session):
    diff, records = rerun(pad_session)
    assert diff.cycles == 700
    # The acceptance bound is 1e-12; the same arithmetic on the same inputs gives 0 exactly.
    assert diff.largest <= 1e-12
    assert diff.largest == 0.0 and diff.differing_cycles == 0 and diff.state_mismatches == 0
    # The session exercised what a re-run must reproduce: a hold, stale state, motion.
    states = {r.safety_state for r in records}
    assert BLOCKED in states and "moving" in states
    assert any("stale" in r.enable_reason for r in records)
    assert any(r.enable_reason == "target not ready" for r in records)
    assert np.abs(diff.rates).max() > 0.05


def test_a_slower_arm_shows_where_it_differs(pad_session):
    """The same session against elbow6 with every software max acceleration quartered: the
    starts and stops ramp more slowly, so the re-run differs there, and nowhere by more
    than the speeds involved."""
    arm = load_arm("elbow6")
    slow = arm.with_changes(joints=tuple(
        j.__class__(**{**vars(j), "max_accel": 0.25 * j.max_accel}) for j in arm.joints))
    diff, records = rerun(pad_session, slow)
    assert diff.largest > 1e-3
    assert diff.first_difference_t_s is not None
    recorded_peak = np.abs(np.array([r.rates for r in records])).max(axis=0)
    assert np.all(diff.max_abs <= recorded_peak + 1e-12)


def test_a_scripted_session_reruns_exactly(tmp_path):
    arm = load_arm("reach7")
    source = ScriptSource(load_script("square", arm))
    settings = dict(SETTINGS, pad="keyboard")
    path = tmp_path / "square.jwlog"
    sent = record_session(path, arm, lambda k: source.read(T0 + k * DT), settings, 1500)
    diff, records = rerun(path)
    assert diff.largest == 0.0
    assert np.array_equal(diff.rates, np.array(sent))


def test_settings_without_a_rate_cannot_be_rerun():
    with pytest.raises(LogError, match="rate_hz"):
        cycle_settings({"pad": "keyboard"})
    with pytest.raises(LogError, match="malformed"):
        cycle_settings({"rate_hz": 500, "stale_after_s": "soon"})
    # An unknown pad falls back to the keyboard mapping (scripted input does not use it).
    assert cycle_settings({"rate_hz": 250, "pad": "no-such-pad"}).pad.name == "keyboard"


def test_the_state_lag_is_read_with_a_default_of_one_cycle():
    assert cycle_settings({"rate_hz": 500}).state_lag_cycles == 1   # a drive session
    assert cycle_settings({"rate_hz": 500, "state_lag_cycles": 0}).state_lag_cycles == 0
    for bad in (2, True, "1"):
        with pytest.raises(LogError, match="state_lag_cycles"):
            cycle_settings({"rate_hz": 500, "state_lag_cycles": bad})


def test_records_without_input_frames_cannot_be_rerun(pad_session):
    session = read_session(pad_session)
    stripped = [r.__class__(**{**vars(r), "input": None}) for r in session.records[:3]]
    with pytest.raises(LogError, match="no recorded input frame"):
        inputs_of(stripped)


def test_a_gap_in_the_log_cuts_the_rerun_before_it(pad_session):
    session = read_session(pad_session)
    holed = session.__class__(path=session.path, header=session.header,
                              records=session.records[:100] + session.records[101:],
                              end=session.end, problems=session.problems)
    records, damage = continuous_records(holed)
    assert len(records) == 100 and "after cycle 99" in damage


def test_recorded_inputs_are_resampled_without_repeats_or_skips():
    """A recorded loop with ±0.4 ms jitter, replayed on the nominal 2 ms grid: each new
    cycle gets the next recorded frame (the nearest record before t + dt/2)."""
    class Rec:
        def __init__(self, t):
            self.t_s = t
    rng = np.random.default_rng(7)
    times = [0.0] + [k * DT + rng.uniform(-4e-4, 4e-4) for k in range(1, 50)]
    frames = [InputFrame(device=str(k), present=True) for k in range(50)]
    inputs = RecordedInputs([Rec(t) for t in times], frames, DT)
    assert [inputs.frame_at(k, k * DT).device for k in range(50)] == [str(k) for k in range(50)]
    assert inputs.duration_s == pytest.approx(times[-1] + DT)
    assert inputs.frame_at(0, -1.0).device == "0"         # before the first: the first
