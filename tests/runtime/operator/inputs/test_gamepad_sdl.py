"""Gamepad source against a pad that SDL itself delivers: a virtual joystick attached in this
process (tests/virtual_pad.py). Device arrival, opening, axis/button/hat reading, SDL's
game-controller layout and hot-unplug all come from SDL, not from posted events."""

from __future__ import annotations

import numpy as np
import pytest

from runtime.arm.model import load_arm
from runtime.control.mapping import Mapper, load_pad
from runtime.control.safety import BLOCKED, MOVING, READY, REARM, SafetyGate
from runtime.operator.inputs.gamepad import SETTLE_S, GamepadSource, pygame

STEP_S = 0.004     # one cycle of these tests (s)


@pytest.fixture
def source():
    src = GamepadSource()
    yield src
    src.close()


class Cycles:
    """source → Mapper → SafetyGate, pumping pygame's queue each cycle (arm state fresh)."""

    def __init__(self, source: GamepadSource, pad: str = "twinstick") -> None:
        self.source = source
        self.mapper = Mapper(load_pad(pad), load_arm("elbow6"))
        self.gate = SafetyGate()
        self.t = 0.0

    def step(self, seconds: float = STEP_S):
        """Run cycles for `seconds`; the last cycle's (frame, intent, verdict)."""
        end = self.t + seconds
        while True:
            self.source.pump()
            frame = self.source.read(self.t)
            intent = self.mapper.update(frame)
            verdict = self.gate.update(self.t, enable=intent.enable, stop=intent.stop,
                                       reset=intent.reset, present=intent.present,
                                       state_stamp_s=self.t)
            self.t += STEP_S
            if self.t >= end:
                return frame, intent, verdict


def test_arrival_reading_and_unplug_through_sdl(virtual_pads, source):
    pad = virtual_pads(axes=6, buttons=11, hats=1)
    c = Cycles(source)
    frame, _, verdict = c.step()
    assert source.name == f"pad 'jogwire test pad' #{pad.instance_id}"
    assert not frame.present and verdict.state == BLOCKED         # settling (SETTLE_S)
    frame, _, verdict = c.step(SETTLE_S)
    assert frame.present and verdict.state == READY
    pad.set_axis(1, -1.0)                # left stick full up
    pad.set_axis(3, 0.55)                # right stick 0.55 right
    pad.set_button(4, True)              # enable
    pad.set_hat(0, "up", "left")
    frame, intent, verdict = c.step()
    # SDL scales −1 to −32767, pygame's event to −32767/32767 = −1; 0.55 → 18022/32767
    assert frame.axes[1] == -1.0 and frame.axes[3] == pytest.approx(0.55, abs=2e-5)
    assert frame.pressed == {4, "hat0:up", "hat0:left"}
    assert verdict.state == MOVING and intent.twist[0] > 0 and intent.twist[5] < 0
    pad.unplug()                         # mid-motion
    frame, intent, verdict = c.step()
    assert not frame.present and not intent.twist.any() and verdict.state == BLOCKED
    assert "device lost" in verdict.reason
    assert source.name == f"no pad: 'jogwire test pad' #{pad.instance_id} unplugged"


@pytest.mark.parametrize("when", ["before the first pump", "one pump after the open"])
def test_replug_with_enable_held_needs_a_fresh_press(virtual_pads, source, when):
    """A pad plugged back in while enable is held must not move the arm, whether its held
    button shows at once or in a report just after it was opened (SETTLE_S)."""
    pad = virtual_pads()
    c = Cycles(source)
    c.step(SETTLE_S + STEP_S)
    pad.unplug()
    c.step()
    pad.plug()
    if when == "one pump after the open":
        c.step()                         # opened, nothing held yet
    pad.set_button(4, True)
    pad.set_axis(1, -1.0)
    states = {c.step()[2].state for _ in range(round(0.3 / STEP_S))}
    assert MOVING not in states and REARM in states
    assert source.name.endswith("(1 unplugged before)")
    pad.set_button(4, False)
    assert c.step()[2].state == READY
    pad.set_button(4, True)
    _, intent, verdict = c.step()
    assert verdict.state == MOVING and intent.twist[0] > 0


def test_sdl_game_controller_layout_matches_the_shipped_sdl_pad_file(virtual_pads):
    """SDL's own game-controller mapping of a controller-typed device (SDL_gamecontroller,
    read through pygame._sdl2.controller) names each index the way twinstick_sdl.toml's
    comments and bindings use it: the outside reference for that file's indices."""
    from pygame._sdl2 import controller
    pad = virtual_pads(axes=6, buttons=15, hats=0, controller=True)
    controller.init()
    index = next(i for i in range(pygame.joystick.get_count())
                 if pygame.joystick.Joystick(i).get_instance_id() == pad.instance_id)
    assert controller.is_controller(index)
    sdl = {k: int(v[1:]) for k, v in controller.Controller(index).get_mapping().items()
           if k != "crc"}
    shipped = load_pad("twinstick_sdl")
    b = shipped.buttons
    assert (b.enable, b.shift, b.stop, b.reset) == \
        ((sdl["leftshoulder"],), (sdl["rightshoulder"],), (sdl["b"],), (sdl["start"],))
    assert (b.frame, b.mode, b.reduced) == ((sdl["y"],), (sdl["x"],), (sdl["back"],))
    assert (b.faster, b.slower, b.joint_prev, b.joint_next) == \
        ((sdl["dpup"],), (sdl["dpdown"],), (sdl["dpleft"],), (sdl["dpright"],))
    axis_of = {(a.drive, a.layer): a.axis for a in shipped.axes}
    assert axis_of[("vx", "main")] == sdl["lefty"] and axis_of[("vy", "main")] == sdl["leftx"]
    assert axis_of[("vz", "main")] == sdl["righty"] and axis_of[("wz", "any")] == sdl["rightx"]
    assert set(shipped.sticks) == {(sdl["leftx"], sdl["lefty"]), (sdl["rightx"], sdl["righty"])}


def test_the_sdl_pad_file_drives_a_controller_typed_pad(virtual_pads, source):
    pad = virtual_pads(axes=6, buttons=15, hats=0, controller=True)
    c = Cycles(source, "twinstick_sdl")
    frame, _, _ = c.step(SETTLE_S + STEP_S)
    assert frame.axes[4] == pytest.approx(-1.0, abs=1e-4)     # a released trigger: −32768
    pad.set_axis(3, -1.0)                # right stick up
    pad.set_button(9, True)              # left shoulder
    pad.set_button(11, True)             # d-pad up: one preset faster
    _, intent, verdict = c.step()
    preset = load_pad("twinstick_sdl").start_preset + 1
    expected = load_pad("twinstick_sdl").presets[preset] * load_arm("elbow6").tcp_max_linear_m_s
    assert verdict.state == MOVING and intent.preset == preset
    np.testing.assert_allclose(intent.twist, [0, 0, expected, 0, 0, 0], atol=1e-12)
