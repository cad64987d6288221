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


class FakeClock:
    """A clock (s) that moves only when slept on, when work is simulated, by hand (`now`),
    or by `read_cost_s` on every reading (so a spin-wait ends, as a real one does)."""

    def __init__(self, start_s: float = 100.0, read_cost_s: float = 1e-6,
                 sleep_overshoot_s: float = 0.0) -> None:
        self.now = start_s
        self.read_cost_s = read_cost_s
        self.sleep_overshoot_s = sleep_overshoot_s
        self.sleeps = 0

    def __call__(self) -> float:
        self.now += self.read_cost_s
        return self.now

    def sleep(self, d: float) -> None:
        self.sleeps += 1
        self.now += d + self.sleep_overshoot_s

    def work(self, d: float) -> None:
        self.now += d


@pytest.fixture
def fake_clock() -> type[FakeClock]:
    """The fake clock class: `fake_clock(start_s=…, read_cost_s=…)` makes one."""
    return FakeClock
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
