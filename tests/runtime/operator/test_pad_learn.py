"""The pad-learning procedure as a pure state machine, fed frames on a made-up clock."""

from __future__ import annotations

import pytest

from runtime.control.mapping import InputFrame, load_pad
from runtime.errors import ConfigError
from runtime.operator.pad_learn import (
    BUTTON_STEPS,
    DEADZONE_MAX,
    DEADZONE_MIN,
    PadLearner,
    write_pad_file,
)

DT = 0.01
# a raw pad in the shipped twinstick's order: axes 2 and 5 are triggers resting at −1
REST = (0.0, 0.0, -1.0, 0.0, 0.0, -1.0)


STICKS_UP_RIGHT = ((1, -1.0), (0, 1.0), (4, -1.0), (3, 1.0))   # left up, left right, right …


class Hand:
    """Feeds a learner the frames of a pad held in a given state for a given time; the
    sticks rest at `rest` when let go."""

    def __init__(self, learner: PadLearner, rest: tuple[float, ...] = REST) -> None:
        self.learner, self.t, self.rest = learner, 0.0, rest

    def hold(self, seconds: float, axes=None, pressed=()) -> None:
        axes = self.rest if axes is None else axes
        frame = InputFrame("pad 'test' #0", True, axes=tuple(axes), pressed=frozenset(pressed))
        end = self.t + seconds
        while self.t < end:
            self.learner.feed(self.t, frame)
            self.t += DT

    def stick(self, axis: int, value: float, seconds: float = 0.4) -> None:
        axes = list(self.rest)
        axes[axis] = value
        self.hold(seconds, axes)
        self.hold(0.3)                      # let go

    def all_sticks(self) -> None:
        for axis, value in STICKS_UP_RIGHT:
            self.stick(axis, value)

    def press(self, button) -> None:
        self.hold(0.05, pressed=(button,))
        self.hold(0.05)

    def required_buttons_only(self) -> None:
        """Enable, stop and reset; every optional action left out (enable pressed)."""
        for button in (4, 1, 7) + (4,) * (len(BUTTON_STEPS) - 3):
            self.press(button)


def learned_twinstick(learner: PadLearner, *, skip: tuple[str, ...] = ()):
    hand = Hand(learner)
    hand.hold(learner.rest_s + DT)
    hand.all_sticks()
    buttons = {"enable": 4, "stop": 1, "reset": 7, "shift": 5, "frame": 3, "mode": 2,
               "reduced": 6, "faster": "hat0:up", "slower": "hat0:down",
               "joint_next": "hat0:right", "joint_prev": "hat0:left"}
    for action, _, _ in BUTTON_STEPS:
        hand.press(4 if action in skip else buttons[action])
    return hand


def test_the_procedure_finds_sticks_signs_and_buttons_and_leaves_out_skipped_ones():
    learner = PadLearner()
    learned_twinstick(learner, skip=("shift", "joint_prev"))
    assert learner.done and learner.failed is None
    got = learner.result()
    assert (got.left.x, got.left.y, got.left.right_sign, got.left.up_sign) == (0, 1, 1.0, -1.0)
    assert (got.right.x, got.right.y, got.right.up_sign) == (3, 4, -1.0)
    assert got.buttons["enable"] == 4 and got.buttons["faster"] == "hat0:up"
    assert "shift" not in got.buttons and "joint_prev" not in got.buttons
    assert any(n.startswith("shift: left out") for n in learner.notes)
    assert got.deadzone == DEADZONE_MIN                       # a noiseless pad: the floor
    assert got.rest[2] == -1.0                                # the trigger's resting value


def test_a_trigger_is_no_stick_and_an_axis_is_not_taken_twice():
    learner = PadLearner()
    hand = Hand(learner)
    hand.hold(learner.rest_s + DT)
    axes = list(REST)
    axes[2] = 1.0                           # a trigger pulled fully: 2.0 from its rest
    hand.hold(0.5, axes)
    assert "LEFT stick fully UP" in learner.prompt         # not taken as a stick
    hand.stick(1, -1.0)                     # left up
    hand.stick(1, 1.0)                      # the same axis again for "left right"
    assert "axis 1 is already the LEFT UP axis" in learner.prompt
    hand.stick(0, 1.0)
    assert "RIGHT stick fully UP" in learner.prompt


def test_a_button_cannot_serve_two_actions():
    learner = PadLearner()
    hand = Hand(learner)
    hand.hold(learner.rest_s + DT)
    hand.all_sticks()
    hand.press(4)                           # enable
    hand.press(4)                           # stop is required: enable does not skip it
    assert "button 4 is already ENABLE; press another" in learner.prompt
    hand.press(1)
    assert "for RESET" in learner.prompt


def test_a_held_button_restarts_the_rest_and_noise_sets_the_dead_zone():
    learner = PadLearner()
    hand = Hand(learner)
    hand.hold(0.5, pressed=(4,))
    hand.hold(learner.rest_s - 0.2)         # not yet a full rest since the release
    assert "leave the pad alone" in learner.prompt
    # drift: the left stick rests at (0.03, −0.04), |·| = 0.05 → dead zone 0.10
    hand.rest = (0.03, -0.04, -1.0, 0.0, 0.0, -1.0)
    hand.hold(0.3)
    hand.all_sticks()
    hand.required_buttons_only()
    assert learner.result().rest_deflection == pytest.approx(0.05)
    assert learner.result().deadzone == pytest.approx(0.10)


def test_a_badly_drifting_stick_is_capped_and_said():
    learner = PadLearner()
    hand = Hand(learner, rest=(0.2, 0.0, -1.0, 0.0, 0.0, -1.0))
    hand.hold(learner.rest_s + DT)
    hand.all_sticks()
    hand.required_buttons_only()
    assert learner.result().deadzone == DEADZONE_MAX
    assert "drift a lot" in learner.result().drift_note


def test_timeouts_leave_out_optional_steps_and_fail_required_ones():
    learner = PadLearner(step_timeout_s=1.0)
    hand = Hand(learner)
    hand.hold(learner.rest_s + DT)
    hand.all_sticks()
    hand.press(4)
    hand.hold(1.2)                          # nothing for STOP
    assert learner.done and "step 'stop': nothing usable in 1 s" in learner.failed
    assert learner.prompt.startswith("failed:")

    learner = PadLearner(step_timeout_s=1.0)
    hand = Hand(learner)
    hand.hold(learner.rest_s + DT)
    hand.all_sticks()
    for button in (4, 1, 7):
        hand.press(button)
    hand.hold(8 * 1.05)                     # every optional step times out
    assert learner.done and learner.failed is None
    assert set(learner.result().buttons) == {"enable", "stop", "reset"}


def test_an_absent_pad_pauses_the_procedure():
    learner = PadLearner()
    learner.feed(0.0, InputFrame("gamepad", False))
    learner.feed(5.0, InputFrame("gamepad", False))
    assert learner.step == (1, 16) and not learner.done


def test_the_written_file_loads_and_keeps_what_was_there(tmp_path):
    learner = PadLearner()
    learned_twinstick(learner, skip=("shift",))
    path = write_pad_file(learner.result(), tmp_path / "mine.toml")
    pad = load_pad(path)
    assert pad.name == "mine" and not pad.buttons.shift
    assert all(b.layer != "shift" for b in pad.axes)         # no shift: no shift bindings
    with pytest.raises(ConfigError, match="exists"):
        write_pad_file(learner.result(), path)
    with pytest.raises(ConfigError, match=r"\.toml"):
        write_pad_file(learner.result(), tmp_path / "mine.txt")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine.toml"]
