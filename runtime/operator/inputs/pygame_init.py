"""pygame set up once, with only the subsystems jogwire uses (no audio).

Environment defaults are set before pygame is imported, because SDL reads them at init:
- PYGAME_HIDE_SUPPORT_PROMPT: no banner on stdout;
- SDL_JOYSTICK_ALLOW_BACKGROUND_EVENTS=1: pad events keep coming while the status window
  is not focused (SDL's default is to drop them; REFERENCES §6).
A headless caller sets SDL_VIDEODRIVER=dummy itself before calling `init_events`.
"""

from __future__ import annotations

import os
import sys

os.environ.setdefault("PYGAME_HIDE_SUPPORT_PROMPT", "1")
os.environ.setdefault("SDL_JOYSTICK_ALLOW_BACKGROUND_EVENTS", "1")

import pygame  # noqa: E402  (after the environment above)


def init_events() -> None:
    """Initialise pygame's video subsystem (it owns the event queue) and the joysticks."""
    if not pygame.display.get_init():
        pygame.display.init()
    if not pygame.joystick.get_init():
        pygame.joystick.init()


def init_fonts() -> None:
    if not pygame.font.get_init():
        pygame.font.init()


def display_available() -> bool:
    """Whether a window can be shown: not under SDL's dummy driver, and on Linux/BSD only
    with an X11 or Wayland display to talk to (checked without opening anything)."""
    if os.environ.get("SDL_VIDEODRIVER", "").lower() in ("dummy", "offscreen"):
        return False
    if sys.platform.startswith(("linux", "freebsd", "openbsd", "netbsd")):
        return bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))
    return True


def pads_present() -> int:
    """How many joysticks SDL sees right now."""
    init_events()
    return pygame.joystick.get_count()
