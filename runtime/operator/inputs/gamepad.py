"""Gamepad input through pygame 2's joystick API, with hot-plug.

Events are matched by their pygame name (JOYAXISMOTION …), never by number, and devices by
instance id: pygame's device index is not unique once pads come and go (REFERENCES §6).

- JOYDEVICEADDED (device_index): the pad is opened; the first one becomes the active pad,
  with its axes and buttons read at once, so a button already held when it is plugged in
  shows as held (and the safety gate makes the operator release it first). It counts as
  present only `SETTLE_S` after the first `read` that sees it: a pad's first input reports
  can arrive just after it is opened, and a button held through the plug-in must reach the
  gate as held at appearance, never as a fresh press.
- JOYDEVICEREMOVED (instance_id): if it was the active pad, the next `read` reports
  present=False exactly once even if another pad takes over, so the mapping and the
  safety gate always see the loss; a pad that comes back is a new device. While no pad is
  there the source's name says which one was unplugged; a pad that takes over later says
  how many were unplugged this session.
- Axis values are clamped to [−1, 1]: pygame scales events by 1/32767, so −32768 arrives
  as −1.0000305. Hats become the buttons "hat<N>:up|down|left|right".

How fast an unplug stops motion: the event reaches this source at the next event pump
(every 4 ms headless; the status window pumps every 4 ms between frames, so a frame being
drawn adds its drawing time), and the next control cycle after that reads present=False:
the gate commands zero within one pump period and one control period of the unplug
(tests/e2e/test_drive_pad.py measures it headless).

Threads: `handle_event` runs on the thread that owns pygame's event queue (the main
thread), `read` on the control thread; a lock keeps their view consistent.

Tests and tools without a physical pad call `attach(instance_id, ...)` to adopt a device
that pygame does not know; events posted to pygame's queue with that instance id then flow
through the same path as a real pad's. (tests/virtual_pad.py goes further: a pad made by
SDL itself, which this source opens like any other.)
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field

from ...control.mapping import Button, InputFrame, clamp_unit
from .pygame_init import init_events, pygame

SETTLE_S = 0.1   # a newly opened pad counts as present this long after it is first read (s)

# (k, v, name): the hat value (x, y) points `name` when its k-th component is v
_HAT_DIRECTIONS = ((1, 1, "up"), (1, -1, "down"), (0, -1, "left"), (0, 1, "right"))


def hat_buttons(hat: int, value: tuple[int, int]) -> set[str]:
    """A hat position (x, y), y = +1 up, as the set of its direction buttons."""
    return {f"hat{hat}:{name}" for k, v, name in _HAT_DIRECTIONS if value[k] == v}


@dataclass
class _Pad:
    instance_id: int
    name: str
    axes: list[float]
    pressed: set[Button] = field(default_factory=set)
    settle_s: float = 0.0          # present this long after the first read sees it (s)
    present_from_s: float | None = None
    buttons: int = 0               # how many buttons the device has


class GamepadSource:
    """The first gamepad present (hot-plug aware). See the module docstring."""

    def __init__(self, *, open_present: bool = True) -> None:
        init_events()
        self.name = "gamepad"
        self._lock = threading.Lock()
        self._joysticks: dict[int, pygame.joystick.JoystickType] = {}  # open, by instance id
        self._active: _Pad | None = None
        self._lost_pending = False
        self.unplugged = 0                 # active pads unplugged this session
        self.events_handled = 0
        if open_present:
            for index in range(pygame.joystick.get_count()):
                self._open(index)

    # -- the event side (main thread) ---------------------------------------------------

    def handle_event(self, event: pygame.event.Event) -> bool:
        """Take a pygame event; True if it was a joystick event this source used."""
        t = event.type
        if t == pygame.JOYDEVICEADDED:
            self._open(event.device_index)
            return True
        if t == pygame.JOYDEVICEREMOVED:
            self._remove(event.instance_id)
            return True
        if t not in (pygame.JOYAXISMOTION, pygame.JOYBUTTONDOWN, pygame.JOYBUTTONUP,
                     pygame.JOYHATMOTION):
            return False
        with self._lock:
            pad = self._active
            if pad is None or event.instance_id != pad.instance_id:
                return False
            if t == pygame.JOYAXISMOTION:
                if event.axis >= len(pad.axes):
                    pad.axes.extend([0.0] * (event.axis + 1 - len(pad.axes)))
                pad.axes[event.axis] = clamp_unit(float(event.value))
            elif t == pygame.JOYBUTTONDOWN:
                pad.pressed.add(event.button)
            elif t == pygame.JOYBUTTONUP:
                pad.pressed.discard(event.button)
            else:
                prefix = f"hat{event.hat}:"
                pad.pressed = {b for b in pad.pressed
                               if not (isinstance(b, str) and b.startswith(prefix))}
                pad.pressed |= hat_buttons(event.hat, event.value)
            self.events_handled += 1
        return True

    def pump(self) -> list[pygame.event.Event]:
        """Drain pygame's whole event queue, handle the joystick events, return the rest.

        For a caller without a window (headless): nothing is left to pile up in the queue.
        """
        return [e for e in pygame.event.get() if not self.handle_event(e)]

    def attach(self, instance_id: int, name: str = "synthetic pad", *, axes: int = 6,
               pressed: set[Button] | None = None) -> None:
        """Adopt a device by instance id (a pad pygame cannot open, e.g. in tests).

        It becomes the active pad if there is none. `pressed`: buttons held at attach time.
        """
        with self._lock:
            if self._active is None:
                self._active = _Pad(instance_id, name, [0.0] * axes, set(pressed or ()))
                self.name = f"pad {name!r} #{instance_id}"

    # -- the control side (any thread) ----------------------------------------------------

    def read(self, now_s: float) -> InputFrame:
        with self._lock:
            if self._lost_pending:
                self._lost_pending = False
                return InputFrame(device=self.name, present=False)
            pad = self._active
            if pad is None:
                return InputFrame(device=self.name, present=False)
            if pad.present_from_s is None:
                pad.present_from_s = now_s + pad.settle_s
            if now_s < pad.present_from_s:
                return InputFrame(device=self.name, present=False)
            return InputFrame(device=self.name, present=True, axes=tuple(pad.axes),
                              pressed=frozenset(pad.pressed))

    @property
    def button_count(self) -> int:
        """Buttons of the active pad (0 without one)."""
        with self._lock:
            return 0 if self._active is None else self._active.buttons

    @property
    def device_name(self) -> str | None:
        with self._lock:
            return None if self._active is None else self._active.name

    def close(self) -> None:
        with self._lock:
            for js in self._joysticks.values():
                js.quit()
            self._joysticks.clear()
            self._active = None

    # -- internals ----------------------------------------------------------------------

    def _open(self, device_index: int) -> None:
        try:
            js = pygame.joystick.Joystick(device_index)
        except pygame.error:
            return  # gone again before we could open it
        iid = js.get_instance_id()
        with self._lock:
            if iid in self._joysticks:
                return  # SDL also announces pads that were present at start
            self._joysticks[iid] = js
            if self._active is None:
                self._activate(iid, js)

    def _activate(self, iid: int, js: pygame.joystick.JoystickType) -> None:
        """Make an open pad the active one, reading its current state (lock held)."""
        pressed: set[Button] = {b for b in range(js.get_numbuttons()) if js.get_button(b)}
        for h in range(js.get_numhats()):
            pressed |= hat_buttons(h, js.get_hat(h))
        axes = [clamp_unit(js.get_axis(a)) for a in range(js.get_numaxes())]
        self._active = _Pad(iid, js.get_name(), axes, pressed, settle_s=SETTLE_S,
                            buttons=js.get_numbuttons())
        self.name = f"pad {js.get_name()!r} #{iid}"
        if self.unplugged:
            self.name += f" ({self.unplugged} unplugged before)"

    def _remove(self, instance_id: int) -> None:
        with self._lock:
            js = self._joysticks.pop(instance_id, None)
            if js is not None:
                js.quit()
            if self._active is None or self._active.instance_id != instance_id:
                return
            self.unplugged += 1
            self.name = f"no pad: {self._active.name!r} #{instance_id} unplugged"
            self._active = None
            self._lost_pending = True
            if self._joysticks:  # another pad is plugged in: it takes over
                iid, other = next(iter(self._joysticks.items()))
                self._activate(iid, other)
