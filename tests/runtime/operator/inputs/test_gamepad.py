"""Gamepad source: events posted into pygame's own queue (SDL dummy drivers, no window)
flow through the real input path — queue → GamepadSource → Mapper → SafetyGate — to the
expected twist. pygame.event.post works under the dummy driver without display.set_mode
(REFERENCES §6); CI has no joystick, so the source adopts a synthetic instance id.
"""

from __future__ import annotations

import os

os.environ.setdefault("SDL_VIDEODRIVER", "dummy")
os.environ.setdefault("SDL_AUDIODRIVER", "dummy")

import numpy as np  # noqa: E402
import pytest  # noqa: E402

from runtime.operator.inputs.gamepad import SETTLE_S, GamepadSource, hat_buttons, pygame  # noqa: E402
from runtime.operator.inputs.pygame_init import display_available  # noqa: E402
from runtime.control.mapping import Mapper, load_pad  # noqa: E402
from runtime.arm.model import load_arm  # noqa: E402
from runtime.control.safety import BLOCKED, MOVING, READY, REARM, SafetyGate  # noqa: E402

PAD_ID = 4242  # an instance id no real device has in this process


@pytest.fixture
def source():
    src = GamepadSource(open_present=False)
    pygame.event.clear()
    src.attach(PAD_ID, "synthetic pad", axes=6)
    yield src
    src.close()
    pygame.event.clear()


@pytest.fixture(scope="module")
def arm():
    return load_arm("elbow6")


def post(kind: str, **attrs) -> None:
    assert pygame.event.post(pygame.event.Event(getattr(pygame, kind), **attrs))


class Pipeline:
    """The drive cycle's input half: source → mapper → gate (arm state always fresh)."""

    def __init__(self, source: GamepadSource, arm) -> None:
        self.source, self.mapper, self.gate = source, Mapper(load_pad("twinstick"), arm), \
            SafetyGate()
        self.t = 0.0

    def cycle(self):
        self.source.pump()
        frame = self.source.read(self.t)
        intent = self.mapper.update(frame)
        v = self.gate.update(self.t, enable=intent.enable, stop=intent.stop,
                             reset=intent.reset, present=intent.present, state_stamp_s=self.t)
        self.t += 0.002
        return frame, intent, v


def test_axis_and_button_events_reach_the_twist(source, arm):
    p = Pipeline(source, arm)
    _, _, v = p.cycle()
    assert v.state == READY
    post("JOYAXISMOTION", instance_id=PAD_ID, axis=1, value=-32768 / 32767)  # full up, overrange
    post("JOYAXISMOTION", instance_id=PAD_ID, axis=3, value=0.55)            # right stick right
    post("JOYBUTTONDOWN", instance_id=PAD_ID, button=4)                      # enable
    frame, intent, v = p.cycle()
    assert frame.present and frame.axes[1] == -1.0 and 4 in frame.pressed   # clamped
    pad = load_pad("twinstick")
    frac = pad.presets[pad.start_preset]
    # left stick full up → +vx at the preset; right stick 0.55 → dz 0.1 → 0.5 → expo 0.3125
    np.testing.assert_allclose(intent.twist, [frac * arm.tcp_max_linear_m_s, 0, 0, 0, 0,
                                              -0.3125 * frac * arm.tcp_max_angular_rad_s],
                               atol=1e-12)
    assert v.state == MOVING and v.allowed
    post("JOYBUTTONUP", instance_id=PAD_ID, button=4)
    _, intent, v = p.cycle()
    assert v.state == READY and not v.allowed            # release → no motion at once


def test_events_of_other_devices_are_ignored(source, arm):
    p = Pipeline(source, arm)
    p.cycle()
    post("JOYAXISMOTION", instance_id=PAD_ID + 1, axis=1, value=-1.0)
    post("JOYBUTTONDOWN", instance_id=PAD_ID + 1, button=4)
    frame, intent, v = p.cycle()
    assert not intent.twist.any() and not intent.enable and v.state == READY


def test_hat_events_step_the_speed_preset(source, arm):
    p = Pipeline(source, arm)
    _, intent, _ = p.cycle()
    start = intent.preset
    post("JOYHATMOTION", instance_id=PAD_ID, hat=0, value=(0, 1))
    frame, intent, _ = p.cycle()
    assert "hat0:up" in frame.pressed and intent.preset == start + 1
    post("JOYHATMOTION", instance_id=PAD_ID, hat=0, value=(1, 0))
    frame, intent, _ = p.cycle()
    assert "hat0:up" not in frame.pressed and "hat0:right" in frame.pressed
    assert intent.joint == 1


def test_hot_unplug_mid_motion_then_replug_needs_a_fresh_press(source, arm):
    p = Pipeline(source, arm)
    p.cycle()
    post("JOYAXISMOTION", instance_id=PAD_ID, axis=1, value=-1.0)
    post("JOYBUTTONDOWN", instance_id=PAD_ID, button=4)
    assert p.cycle()[2].state == MOVING
    post("JOYDEVICEREMOVED", instance_id=PAD_ID)                # pulled out mid-motion
    frame, intent, v = p.cycle()
    assert not frame.present and not intent.twist.any() and v.state == BLOCKED
    assert "device lost" in v.reason
    # plugged back in with enable still held and the stick still pushed
    source.attach(PAD_ID + 7, "synthetic pad", pressed={4})
    post("JOYAXISMOTION", instance_id=PAD_ID + 7, axis=1, value=-1.0)
    _, intent, v = p.cycle()
    assert intent.enable and v.state == REARM and not v.allowed
    post("JOYBUTTONUP", instance_id=PAD_ID + 7, button=4)
    post("JOYBUTTONDOWN", instance_id=PAD_ID + 7, button=4)
    p.cycle()   # both events land in one pump: still held, still a stale press
    post("JOYBUTTONUP", instance_id=PAD_ID + 7, button=4)
    assert p.cycle()[2].state == READY
    post("JOYBUTTONDOWN", instance_id=PAD_ID + 7, button=4)
    _, intent, v = p.cycle()
    assert v.state == MOVING and intent.twist[0] > 0


def test_a_removal_is_seen_even_if_another_pad_takes_over_at_once(source):
    source._joysticks[999] = _FakeOpenPad()      # a second pad that is already open
    post("JOYDEVICEREMOVED", instance_id=PAD_ID)
    source.pump()
    assert source.read(0.0).present is False     # the loss is reported once …
    assert source.read(0.002).present is False   # … the other pad settles (SETTLE_S) …
    frame = source.read(0.002 + SETTLE_S)
    assert frame.present and frame.pressed == {4}  # … with its state read when it was opened
    assert frame.device == "pad 'second pad' #999 (1 unplugged before)"


def test_an_unopenable_device_index_is_ignored(source):
    post("JOYDEVICEADDED", device_index=99)       # no such device on this machine
    assert source.pump() == []
    assert source.read(0.0).present


def test_pump_returns_the_events_it_does_not_use(source):
    post("USEREVENT", code=5)
    left = source.pump()
    assert [e.type for e in left] == [pygame.USEREVENT]


def test_no_display_under_the_dummy_driver():
    assert not display_available()   # so `jogwire drive` knows to run headless


def test_hat_positions_as_buttons():
    assert hat_buttons(0, (0, 0)) == set()
    assert hat_buttons(1, (-1, 1)) == {"hat1:left", "hat1:up"}
    assert hat_buttons(0, (1, -1)) == {"hat0:right", "hat0:down"}


class _FakeOpenPad:
    """Stands in for a second physical pad pygame has opened (only what _activate reads)."""

    def get_numbuttons(self):
        return 6

    def get_button(self, b):
        return b == 4

    def get_numhats(self):
        return 0

    def get_numaxes(self):
        return 2

    def get_axis(self, a):
        return 0.0

    def get_name(self):
        return "second pad"

    def quit(self):
        pass
