"""Pad mapping: dead zone, response curves, twist scaling, toggles, pad files.

Check values: REFERENCES §6 (Sutphin 2013 radial dead zone; the cubic expo and power curves
are common practice, their values verified by hand arithmetic below).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from runtime.arm.load import load_arm
from runtime.control.intent import DirectCommand, InputFrame
from runtime.control.limits import REDUCED_SPEED_M_S
from runtime.control.mapping import Mapper
from runtime.control.pads import load_pad, pad_names
from runtime.control.shaping import (
    Shaping,
    clamp_unit,
    deadzone_axial,
    deadzone_radial,
    expo_curve,
    power_curve,
)
from runtime.errors import ConfigError

unit = st.floats(-1.0, 1.0)


# -- shaping against its formulas ---------------------------------------------------------

@pytest.mark.parametrize("xy, expected", [
    # REFERENCES §6, dz = 0.1 (Sutphin 2013, radial dead zone scaled to stay continuous)
    ((0.05, 0.0), (0.0, 0.0)),
    ((0.55, 0.0), (0.5, 0.0)),
    ((1.0, 0.0), (1.0, 0.0)),
    ((0.6, 0.8), (0.6, 0.8)),
])
def test_radial_deadzone_reference_values(xy, expected):
    assert deadzone_radial(*xy, 0.1) == pytest.approx(expected, abs=1e-12)


def test_radial_deadzone_keeps_the_direction_of_a_diagonal():
    # the reason to prefer radial over axial (Sutphin 2013): 45° in, 45° out
    x, y = deadzone_radial(0.3, 0.3, 0.1)
    assert x == pytest.approx(y)
    assert math.hypot(x, y) == pytest.approx((math.hypot(0.3, 0.3) - 0.1) / 0.9)
    # an axial dead zone would have turned (0.3, 0.08) into a pure x motion
    assert deadzone_axial(0.08, 0.1) == 0.0
    assert deadzone_radial(0.3, 0.08, 0.1)[1] > 0.0


@pytest.mark.parametrize("e, x, expected", [
    (0.5, 0.5, 0.3125),     # REFERENCES §6 [V]: (1 − 0.5)·0.5 + 0.5·0.125
    (0.5, -0.5, -0.3125),
    (0.0, 0.7, 0.7),        # e = 0 is linear
    (1.0, 0.5, 0.125),      # e = 1 is the pure cube
])
def test_expo_curve_reference_values(e, x, expected):
    assert expo_curve(x, e) == pytest.approx(expected)


@pytest.mark.parametrize("gamma, x, expected", [
    (2.0, 0.5, 0.25), (2.0, -0.5, -0.25), (3.0, -0.2, -0.008), (1.0, 0.3, 0.3),
])
def test_power_curve_is_sign_preserving(gamma, x, expected):
    assert power_curve(x, gamma) == pytest.approx(expected)


@settings(max_examples=200, deadline=None)
@given(x=unit, e=st.floats(0.0, 1.0), dz=st.floats(0.0, 0.45))
def test_axis_shaping_is_the_composition_of_its_formulas(x, e, dz):
    s = Shaping(deadzone=dz, curve="expo", expo=e)
    m = abs(x)
    rescaled = 0.0 if m <= dz else math.copysign((m - dz) / (1 - dz), x)
    assert s.axis(x) == pytest.approx(expo_curve(rescaled, e), abs=1e-12)
    assert -1.0 <= s.axis(x) <= 1.0
    assert s.axis(-x) == pytest.approx(-s.axis(x), abs=1e-12)  # odd


@settings(max_examples=200, deadline=None)
@given(x=unit, y=unit, e=st.floats(0.0, 1.0))
def test_stick_shaping_curves_the_magnitude_and_keeps_the_direction(x, y, e):
    s = Shaping(deadzone=0.1, curve="expo", expo=e)
    sx, sy = s.stick(x, y)
    dx, dy = deadzone_radial(x, y, 0.1)
    r = math.hypot(dx, dy)
    assert math.hypot(sx, sy) == pytest.approx(expo_curve(r, e), abs=1e-12)
    if r > 1e-9:
        assert sx * dy - sy * dx == pytest.approx(0.0, abs=1e-12)  # parallel
        assert sx * dx + sy * dy >= 0.0                            # same way


def test_full_deflection_reaches_full_scale_and_overrange_is_clamped():
    s = Shaping(deadzone=0.1, curve="power", power=2.0)
    assert s.axis(1.0) == pytest.approx(1.0)
    # pygame scales events by 1/32767, so −32768 arrives as −1.0000305 (REFERENCES §6)
    assert clamp_unit(-32768 / 32767) == -1.0
    assert s.axis(-32768 / 32767) == pytest.approx(-1.0)
    assert math.hypot(*s.stick(1.0, 1.0)) == pytest.approx(1.0)


# -- the mapper ---------------------------------------------------------------------------

@pytest.fixture(scope="module")
def arm():
    return load_arm("elbow6")


@pytest.fixture(scope="module")
def pad():
    return load_pad("twinstick")


def frame(axes=(), pressed=(), present=True):
    return InputFrame(device="test", present=present, axes=tuple(axes),
                      pressed=frozenset(pressed))


def axes_with(**values):
    a = [0.0] * 6
    for k, v in values.items():
        a[int(k[1:])] = v
    return a


def test_left_stick_up_is_plus_x_at_the_preset_speed(arm, pad):
    m = Mapper(pad, arm)
    it = m.update(frame(axes_with(a1=-1.0), {4}))
    lin = pad.presets[pad.start_preset] * arm.tcp_max_linear_m_s
    np.testing.assert_allclose(it.twist, [lin, 0, 0, 0, 0, 0], atol=1e-12)
    assert it.enable and it.present and it.mode == "cartesian" and it.frame == "base"


def test_half_stick_gives_the_expo_of_the_rescaled_value(arm, pad):
    m = Mapper(pad, arm)
    raw = -0.55  # dz 0.1 → 0.5 after the rescale; expo 0.5 → 0.3125 (REFERENCES §6)
    it = m.update(frame(axes_with(a4=raw)))
    lin = pad.presets[pad.start_preset] * arm.tcp_max_linear_m_s
    assert it.twist[2] == pytest.approx(0.3125 * lin)
    assert np.count_nonzero(it.twist) == 1


def test_drift_inside_the_deadzone_gives_zero(arm, pad):
    m = Mapper(pad, arm)
    it = m.update(frame([0.06, -0.07, 0.0, 0.05, 0.04, 0.0], {4}))
    assert not it.twist.any()


def test_shift_layer_turns_the_left_stick_into_rotation(arm, pad):
    m = Mapper(pad, arm)
    it = m.update(frame(axes_with(a1=-1.0, a3=1.0), {5}))
    ang = pad.presets[pad.start_preset] * arm.tcp_max_angular_rad_s
    np.testing.assert_allclose(it.twist, [0, 0, 0, 0, ang, -ang], atol=1e-12)
    assert it.shift


def test_toggle_buttons_flip_once_per_press(arm, pad):
    m = Mapper(pad, arm)
    m.update(frame())
    for _ in range(5):                       # Y held for five cycles: one flip
        it = m.update(frame(pressed={3}))
    assert it.frame == "tool"
    it = m.update(frame())
    it = m.update(frame(pressed={3}))        # released and pressed again: flips back
    assert it.frame == "base"


def test_buttons_held_when_the_device_appears_do_not_toggle(arm, pad):
    m = Mapper(pad, arm)
    assert m.update(frame(pressed={3, 2, 6})).frame == "base"    # first frame is the baseline
    m.update(frame(present=False))                                 # unplugged …
    it = m.update(frame(pressed={3, 2, 6}))                        # … back with them held
    assert (it.frame, it.mode, it.reduced) == ("base", "cartesian", False)


def test_speed_presets_step_and_clamp(arm, pad):
    m = Mapper(pad, arm)
    m.update(frame())
    for _ in range(10):
        m.update(frame(pressed={"hat0:up"}))
        it = m.update(frame())
    assert it.preset == len(pad.presets) - 1 and it.speed_fraction == pad.presets[-1]
    for _ in range(10):
        m.update(frame(pressed={"hat0:down"}))
        it = m.update(frame())
    assert it.preset == 0


def test_reduced_speed_scales_the_full_stick_to_the_cap(arm, pad):
    m = Mapper(pad, arm)
    m.update(frame())
    for _ in range(3):                                # top preset: 1.0 × 1 m/s
        m.update(frame(pressed={"hat0:up"}))
        m.update(frame())
    m.update(frame(pressed={6}))                      # reduced on
    it = m.update(frame(axes_with(a1=-1.0, a3=1.0)))
    assert it.reduced
    # 250 mm/s, ISO 10218-1 (REFERENCES §4)
    assert it.twist[0] == pytest.approx(REDUCED_SPEED_M_S)
    assert it.twist[5] == pytest.approx(-arm.tcp_max_angular_rad_s * REDUCED_SPEED_M_S)


def test_reduced_locked_cannot_be_toggled_off(arm, pad):
    m = Mapper(pad, arm, reduced_locked=True)
    m.update(frame())
    it = m.update(frame(pressed={6}))
    assert it.reduced


def test_joint_mode_drives_the_selected_joint(arm, pad):
    m = Mapper(pad, arm)
    m.update(frame())
    m.update(frame(pressed={2}))                      # X: joint mode
    m.update(frame(pressed={"hat0:right"}))
    m.update(frame())
    m.update(frame(pressed={"hat0:right"}))           # joint 2
    it = m.update(frame(axes_with(a1=-1.0)))
    assert it.mode == "joint" and it.joint == 2
    assert it.joint_rate == pytest.approx(pad.presets[pad.start_preset] * arm.max_speed[2])
    assert not it.twist.any()
    m.update(frame(pressed={"hat0:left"}))
    m.update(frame())
    m.update(frame(pressed={"hat0:left"}))
    m.update(frame())
    it = m.update(frame(pressed={"hat0:left"}))       # wraps round to the last joint
    assert it.joint == arm.n - 1


def test_twist_outside_the_arms_task_is_zeroed():
    planar = load_arm("planar3")                       # task vx vy wz
    m = Mapper(load_pad("twinstick"), planar)
    it = m.update(frame([0.0, -1.0, 0.0, 1.0, -1.0, 0.0]))
    assert it.twist[0] > 0 and it.twist[5] < 0 and it.twist[2] == 0.0


def test_keyboard_keys_give_the_same_intents(arm):
    m = Mapper(load_pad("keyboard"), arm)
    m.update(frame())
    it = m.update(frame(pressed={"space", "w", "a", "u"}))
    lin = load_pad("keyboard").presets[0] * arm.tcp_max_linear_m_s
    ang = load_pad("keyboard").presets[0] * arm.tcp_max_angular_rad_s
    np.testing.assert_allclose(it.twist, [lin, lin, 0, 0, 0, ang], atol=1e-12)
    assert it.enable
    it = m.update(frame(pressed={"w", "s", "escape"}))  # opposite keys cancel
    assert not it.twist.any() and it.stop and not it.enable


def test_direct_commands_pass_through(arm, pad):
    m = Mapper(pad, arm)
    c = DirectCommand(twist=(0.01, 0, 0, 0, 0, 0.1), frame="tool", reduced=True)
    it = m.update(InputFrame(device="script", present=True, command=c))
    np.testing.assert_allclose(it.twist, c.twist)
    assert it.direct and it.frame == "tool" and it.reduced and it.enable
    j = m.update(InputFrame(device="script", present=True,
                            command=DirectCommand(joint=1, joint_rate=0.2)))
    assert j.mode == "joint" and j.joint == 1 and j.joint_rate == 0.2 and not j.twist.any()


def test_absent_device_means_no_enable_and_no_motion(arm, pad):
    it = Mapper(pad, arm).update(frame(axes_with(a1=-1.0), {4}, present=False))
    assert not it.present and not it.enable and not it.twist.any()


# -- pad files ----------------------------------------------------------------------------

def test_every_shipped_pad_loads():
    names = pad_names()
    assert {"twinstick", "twinstick_sdl", "keyboard"} <= set(names)
    for name in names:
        p = load_pad(name)
        assert p.buttons.enable and p.buttons.stop and p.buttons.reset


GOOD = """\
name = "t"
device = "gamepad"
sticks = [[0, 1]]

[buttons]
enable = 4
stop = 1
reset = 7

[[axis]]
index = 1
drive = "vx"
sign = -1
"""


def write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "pad.toml"
    p.write_text(text, encoding="utf-8")
    return p


@pytest.mark.parametrize("old, new, field, line", [
    ('sign = -1', 'sign = -2', "axis[0].sign", 13),
    ('drive = "vx"', 'drive = "vq"', "axis[0].drive", 12),
    ('stop = 1', 'stop = 4', "buttons.stop", 7),                    # enable's button again
    ('reset = 7', 'resett = 7', "buttons.resett", 8),               # typo
    ('sticks = [[0, 1]]', 'sticks = [[0, 0]]', "sticks", 3),
    ('device = "gamepad"', 'device = "wheel"', "device", 2),
    ('index = 1', 'index = -1', "axis[0].index", 11),
    ('enable = 4', 'enable = "hat0:sideways"', "buttons.enable", 6),
])
def test_bad_pad_files_name_file_line_and_field(tmp_path, old, new, field, line):
    assert old in GOOD
    path = write(tmp_path, GOOD.replace(old, new))
    with pytest.raises(ConfigError) as err:
        load_pad(path)
    assert err.value.field == field
    assert err.value.line == line
    assert err.value.path == str(path)
    assert f"{path}:{line}" in str(err.value)


def test_a_pad_without_enable_is_refused(tmp_path):
    with pytest.raises(ConfigError, match="enable"):
        load_pad(write(tmp_path, GOOD.replace("enable = 4\n", "")))


def test_action_buttons_cannot_double_as_axis_keys(tmp_path):
    text = GOOD.replace("index = 1", 'plus = "hat0:up"').replace("reset = 7",
                                                                 'reset = "hat0:up"')
    with pytest.raises(ConfigError) as err:
        load_pad(write(tmp_path, text))
    assert err.value.field == "axis[0].plus"


def test_unknown_pad_name_lists_the_shipped_ones():
    with pytest.raises(ConfigError, match="twinstick"):
        load_pad("no_such_pad")


def test_input_frames_give_loggable_buttons():
    f = frame(pressed={4, 0, "hat0:up"})
    assert f.button_flags(6) == (True, False, False, False, True, False)
    assert f.pressed_names() == ["0", "4", "hat0:up"]
