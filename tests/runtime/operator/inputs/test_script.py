"""Scripted input: the file format, the timeline, and its path through mapping and safety."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from runtime.arm.load import load_arm
from runtime.control.limits import REDUCED_SPEED_M_S
from runtime.control.mapping import Mapper
from runtime.control.pads import load_pad
from runtime.control.safety import MOVING, READY, SafetyGate
from runtime.errors import ConfigError
from runtime.operator.inputs import open_source, parse_input_spec
from runtime.operator.inputs.script import ScriptSource, load_script, profile_names


@pytest.fixture(scope="module")
def arm():
    return load_arm("elbow6")


def write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "script.toml"
    p.write_text(text, encoding="utf-8")
    return p


SCRIPT = """\
name = "probe"
angle_unit = "deg"
lead_in_s = 0.25

[[segment]]
duration_s = 1.0
twist = [0.1, 0, 0, 0, 0, 90]

[[segment]]
duration_s = 0.5
frame = "tool"
reduced = true

[[segment]]
duration_s = 0.5
joint = "elbow"
joint_rate = 30
"""


def test_timeline_units_and_tail(tmp_path, arm):
    s = load_script(write(tmp_path, SCRIPT), arm)
    assert s.duration_s == pytest.approx(2.25) and s.motion_s == pytest.approx(2.0)
    src = ScriptSource(s)
    assert not src.read(10.0).command.enable              # t = 0: lead-in, released
    c = src.read(10.3).command
    assert c.enable and c.twist[0] == 0.1 and c.twist[5] == pytest.approx(math.pi / 2)
    c = src.read(11.3).command
    assert c.frame == "tool" and c.reduced and not any(c.twist)
    c = src.read(11.8).command
    assert c.joint == 2 and c.joint_rate == pytest.approx(math.radians(30))
    assert not src.finished(12.2) and src.finished(12.25)
    assert not src.read(12.3).command.enable               # after the end: released


def test_segment_boundaries_belong_to_the_next_segment(tmp_path):
    src = ScriptSource(load_script(write(tmp_path, SCRIPT.split("[[segment]]\nduration_s = 0.5\n"
                                                                 "joint")[0])))
    src.read(0.0)
    assert src.command_at(0.25).twist[0] == 0.1           # first segment starts at lead-in
    assert src.command_at(1.25).frame == "tool"           # second starts where first ends


def test_repeat_plays_the_segments_again(tmp_path):
    text = SCRIPT.replace('lead_in_s = 0.25', 'lead_in_s = 0.25\nrepeat = 3').split(
        "[[segment]]\nduration_s = 0.5\njoint")[0]
    src = ScriptSource(load_script(write(tmp_path, text)))
    assert src.script.duration_s == pytest.approx(0.25 + 3 * 1.5)
    assert src.command_at(0.25 + 1.5 + 0.1).twist[0] == 0.1
    assert src.command_at(0.25 + 3.0 + 1.2).frame == "tool"


def test_a_script_drives_the_gate_like_an_operator(arm):
    """square.toml through mapper and gate: released in the lead-in, moving in the first
    segment, released (ready) after the end."""
    src = ScriptSource(load_script("square", arm))
    mapper, gate = Mapper(load_pad("twinstick"), arm), SafetyGate()
    states = {}
    for k in range(int(src.script.duration_s / 0.01) + 50):
        t = k * 0.01
        it = mapper.update(src.read(t))
        v = gate.update(t, enable=it.enable, stop=it.stop, reset=it.reset, present=it.present,
                        state_stamp_s=t)
        states[round(t, 2)] = (v.state, it.twist.copy())
    assert states[0.2][0] == READY
    assert states[1.0][0] == MOVING
    np.testing.assert_allclose(states[1.0][1], [0.05, 0, 0, 0, 0, 0])
    assert states[round(src.script.duration_s + 0.1, 2)][0] == READY


PUSHING_PROFILES = {"elbow_stretch", "wrist_limit", "bench_plunge"}


def test_every_shipped_profile_loads_and_closes_on_released_enable(arm):
    names = profile_names()
    assert {"square", "wrist_turn", "reduced_line"} <= set(names)
    for name in names:
        s = load_script(name, arm)
        assert s.lead_in_s > 0                                # the first press is fresh
        assert not s.segments[-1].command.enable              # ends with enable released
        if name in PUSHING_PROFILES:
            continue  # these drive into a singularity or a limit on purpose (preflight demos)
        # each profile comes back near where it started, once reduced speed has capped the
        # TCP at 0.25 m/s (ISO 10218-1, REFERENCES §4) as the limits stage will
        disp = np.zeros(3)
        for seg in s.segments:
            v = np.array(seg.command.twist[:3])
            if seg.command.reduced and np.linalg.norm(v) > REDUCED_SPEED_M_S:
                v *= REDUCED_SPEED_M_S / np.linalg.norm(v)
            disp += v * seg.duration_s * seg.command.enable
        assert np.linalg.norm(disp) < 0.01, name


@pytest.mark.parametrize("old, new, field, line", [
    ("duration_s = 1.0", "duration_s = -1.0", "segment[0].duration_s", 6),
    ("twist = [0.1, 0, 0, 0, 0, 90]", "twist = [0.1, 0, 0]", "segment[0].twist", 7),
    ("twist = [0.1, 0, 0, 0, 0, 90]", "twist = [0.1, 0, 0, 0, 0, nan]", "segment[0].twist", 7),
    ('frame = "tool"', 'frame = "world"', "segment[1].frame", 11),
    ("reduced = true", "reduced = 1", "segment[1].reduced", 12),
    ('joint = "elbow"', 'joint = "knee"', "segment[2].joint", 16),
    ('angle_unit = "deg"', 'angle_unit = "grad"', "angle_unit", 2),
    ("lead_in_s = 0.25", "lead_in = 0.25", "lead_in", 3),
    ("joint_rate = 30", "joint_rate = 30\ntwist = [0.1, 0, 0, 0, 0, 0]", "segment[2].twist", 18),
])
def test_bad_scripts_name_file_line_and_field(tmp_path, arm, old, new, field, line):
    assert old in SCRIPT
    path = write(tmp_path, SCRIPT.replace(old, new))
    with pytest.raises(ConfigError) as err:
        load_script(path, arm)
    assert (err.value.field, err.value.line, err.value.path) == (field, line, str(path))


def test_joint_segments_need_the_arm(tmp_path):
    with pytest.raises(ConfigError, match="needs the arm"):
        load_script(write(tmp_path, SCRIPT))


def test_input_specs():
    assert parse_input_spec("script:configs/profiles/square.toml") == \
        ("script", "configs/profiles/square.toml")
    assert parse_input_spec("gamepad") == ("gamepad", "")
    assert parse_input_spec("network:tcp://127.0.0.1:5601") == ("network", "tcp://127.0.0.1:5601")
    for bad in ("script", "joystick", "keyboard:x"):
        with pytest.raises(ConfigError):
            parse_input_spec(bad)


def test_open_source_builds_the_named_source(arm):
    src = open_source("script:square", arm=arm, stale_after_s=0.1)
    assert isinstance(src, ScriptSource) and src.script.name == "square"
    net = open_source("network:tcp://127.0.0.1:*", arm=arm, stale_after_s=0.1)
    try:
        assert net.name.startswith("network tcp://127.0.0.1:")
        assert not net.read(0.0).present
    finally:
        net.close()
