"""Keyboard source: key events through pygame's queue (dummy driver) to the intent."""

from __future__ import annotations

import os

os.environ.setdefault("SDL_VIDEODRIVER", "dummy")
os.environ.setdefault("SDL_AUDIODRIVER", "dummy")

import pytest  # noqa: E402

from runtime.arm.load import load_arm  # noqa: E402
from runtime.control.mapping import Mapper  # noqa: E402
from runtime.control.pads import load_pad  # noqa: E402
from runtime.control.safety import BLOCKED, MOVING, READY, SafetyGate  # noqa: E402
from runtime.operator.inputs.keyboard import KeyboardSource  # noqa: E402
from runtime.operator.inputs.pygame_init import pygame  # noqa: E402


@pytest.fixture
def keys():
    src = KeyboardSource()
    pygame.event.clear()
    yield src
    pygame.event.clear()


def pump(src: KeyboardSource) -> None:
    for e in pygame.event.get():
        src.handle_event(e)


def key(kind: str, k: int) -> None:
    assert pygame.event.post(pygame.event.Event(getattr(pygame, kind), key=k))


def test_held_keys_drive_and_release_stops(keys):
    arm = load_arm("elbow6")
    mapper, gate = Mapper(load_pad("keyboard"), arm), SafetyGate()

    def cycle(t):
        pump(keys)
        it = mapper.update(keys.read(t))
        return it, gate.update(t, enable=it.enable, stop=it.stop, reset=it.reset,
                               present=it.present, state_stamp_s=t)

    assert cycle(0.0)[1].state == READY
    key("KEYDOWN", pygame.K_SPACE)
    key("KEYDOWN", pygame.K_w)
    it, v = cycle(0.01)
    assert v.state == MOVING and it.twist[0] > 0
    it, v = cycle(0.02)                                   # still held: still moving
    assert v.state == MOVING and it.twist[0] > 0
    key("KEYUP", pygame.K_SPACE)
    assert cycle(0.03)[1].state == READY
    key("KEYDOWN", pygame.K_SPACE)
    assert cycle(0.04)[1].state == MOVING
    # the window loses the focus: the keyboard is gone, and the held keys with it
    assert pygame.event.post(pygame.event.Event(pygame.WINDOWFOCUSLOST))
    it, v = cycle(0.05)
    assert v.state == BLOCKED and not it.twist.any()
    assert pygame.event.post(pygame.event.Event(pygame.WINDOWFOCUSGAINED))
    it, v = cycle(0.06)
    assert v.state == READY and not it.enable             # a fresh press is needed
    key("KEYDOWN", pygame.K_SPACE)
    assert cycle(0.07)[1].state == MOVING


def test_other_events_are_not_taken(keys):
    assert not keys.handle_event(pygame.event.Event(pygame.MOUSEMOTION, pos=(1, 2)))
    assert keys.handle_event(pygame.event.Event(pygame.KEYDOWN, key=pygame.K_a))
    assert keys.read(0.0).pressed == {"a"}
