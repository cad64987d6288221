"""Keyboard input: keys held in the status window, by their pygame names.

Key-hold semantics: a key counts as held from its KEYDOWN to its KEYUP (pygame's key repeat
stays off), so holding the enable key is the same gesture as holding the pad's enable
button. Keys reach only the focused window: when the window loses the focus the keyboard
counts as absent (motion stops and enable must be pressed again once the focus is back),
because a KEYUP that happens elsewhere would never arrive.
"""

from __future__ import annotations

import threading

from ...control.intent import InputFrame
from .pygame_init import init_events, pygame


class KeyboardSource:
    """Keys held in the focused pygame window. Feed it events with `handle_event`."""

    def __init__(self) -> None:
        init_events()
        self.name = "keyboard"
        self._lock = threading.Lock()
        self._held: set[str] = set()
        self._focused = True  # the window is focused when it opens; SDL says so if not

    def handle_event(self, event: pygame.event.Event) -> bool:
        t = event.type
        with self._lock:
            if t == pygame.KEYDOWN:
                self._held.add(pygame.key.name(event.key))
            elif t == pygame.KEYUP:
                self._held.discard(pygame.key.name(event.key))
            elif t == pygame.WINDOWFOCUSLOST:
                self._focused = False
                self._held.clear()
            elif t == pygame.WINDOWFOCUSGAINED:
                self._focused = True
                self._held.clear()
            else:
                return False
        return True

    def read(self, now_s: float) -> InputFrame:
        with self._lock:
            return InputFrame(device=self.name, present=self._focused,
                              pressed=frozenset(self._held))

    def close(self) -> None:
        with self._lock:
            self._held.clear()
