"""Shared test setup. Keep fixtures small; add yours below, do not rewrite others'."""

from __future__ import annotations

import os

import pytest

# Headless: SDL reads these when pygame initialises, which may happen while test modules are
# imported (collection), so they are set here at import time as well as in the fixture.
HEADLESS_ENV = {"SDL_VIDEODRIVER": "dummy", "SDL_AUDIODRIVER": "dummy"}
for _key, _value in HEADLESS_ENV.items():
    os.environ.setdefault(_key, _value)


@pytest.fixture(autouse=True, scope="session")
def headless_sdl() -> None:
    """No window and no sound device in tests, unless the environment asks otherwise."""
    for key, value in HEADLESS_ENV.items():
        os.environ.setdefault(key, value)


@pytest.fixture
def virtual_pads():
    """Make virtual pads in this process (tests/virtual_pad.py): `virtual_pads(**kwargs)`
    returns a plugged-in `VirtualPad`. All are unplugged and pygame's event queue cleared at
    the end, so no device outlives its test."""
    from virtual_pad import VirtualPad

    from runtime.operator.inputs.pygame_init import init_events, pygame
    init_events()
    pygame.event.clear()
    made: list[VirtualPad] = []

    def make(**kwargs) -> VirtualPad:
        pad = VirtualPad(**kwargs)
        pad.plug()
        made.append(pad)
        return pad

    yield make
    for pad in made:
        pad.unplug()
    init_events()              # (a window closed in the test quits SDL's video and events)
    pygame.event.clear()
