"""A virtual gamepad inside the process under test, made by SDL itself (tests only).

SDL can attach a virtual joystick (SDL_JoystickAttachVirtualEx, SDL 2.24+); pygame 2.6 bundles
SDL 2.28 and this module reaches that library with ctypes. To SDL and pygame the device is a
joystick like any other: attaching it sends JOYDEVICEADDED, pygame opens it, values set here
arrive as JOYAXISMOTION / JOYBUTTONDOWN / JOYHATMOTION at the next event pump (SDL applies
them in SDL_JoystickUpdate), and detaching it sends JOYDEVICEREMOVED. So the whole gamepad
path — device arrival, opening, reading, hot-unplug — runs as it does with a real pad.

With `controller=True` the device is typed as a game controller and SDL gives it its own
game-controller mapping (leftx a0, lefty a1, rightx a2, righty a3, the triggers a4 a5, the
buttons in SDL's order): the layout of configs/pads/twinstick_sdl.toml. SDL sets a
controller's trigger axes to −32768 (released) when it opens the device.

Values are the device's own integers: axes −32768…32767, buttons 0/1, hats a bit mask
(SDL_HAT_UP 1, RIGHT 2, DOWN 4, LEFT 8; SDL_joystick.h). `set_axis` takes −1…1 and scales
by 32767 (−1 → −32767), the way a pad at full travel commonly reports.
"""

from __future__ import annotations

import ctypes
import glob
import os
import threading
import time

from runtime.operator.inputs.pygame_init import init_events, pygame

HAT_BITS = {"up": 1, "right": 2, "down": 4, "left": 8}   # SDL_joystick.h
SDL_JOYSTICK_TYPE_UNKNOWN, SDL_JOYSTICK_TYPE_GAMECONTROLLER = 0, 1
_DESC_VERSION = 1                                        # SDL_VIRTUAL_JOYSTICK_DESC_VERSION


class _Desc(ctypes.Structure):
    """SDL_VirtualJoystickDesc (SDL 2.24+, version 1)."""

    _fields_ = [("version", ctypes.c_uint16), ("type", ctypes.c_uint16),
                ("naxes", ctypes.c_uint16), ("nbuttons", ctypes.c_uint16),
                ("nhats", ctypes.c_uint16), ("vendor_id", ctypes.c_uint16),
                ("product_id", ctypes.c_uint16), ("padding", ctypes.c_uint16),
                ("button_mask", ctypes.c_uint32), ("axis_mask", ctypes.c_uint32),
                ("name", ctypes.c_char_p), ("userdata", ctypes.c_void_p)] + \
        [(callback, ctypes.c_void_p) for callback in
         ("Update", "SetPlayerIndex", "Rumble", "RumbleTriggers", "SetLED", "SendEffect")]


_sdl: ctypes.CDLL | None = None
_lock = threading.Lock()


def sdl_library() -> ctypes.CDLL:
    """pygame's own SDL2 (the copy already loaded in this process), with the prototypes."""
    global _sdl
    with _lock:
        if _sdl is None:
            libs = os.path.join(os.path.dirname(pygame.__file__), os.pardir, "pygame.libs")
            found = sorted(glob.glob(os.path.join(libs, "libSDL2-2*.so*")))
            if not found:
                raise RuntimeError(f"pygame's bundled SDL2 not found in {libs}")
            lib = ctypes.CDLL(found[0])
            c_int, c_void_p = ctypes.c_int, ctypes.c_void_p
            for name, args, result in (
                    ("SDL_JoystickAttachVirtualEx", [ctypes.POINTER(_Desc)], c_int),
                    ("SDL_JoystickDetachVirtual", [c_int], c_int),
                    ("SDL_JoystickIsVirtual", [c_int], c_int),
                    ("SDL_NumJoysticks", [], c_int),
                    ("SDL_JoystickGetDeviceInstanceID", [c_int], ctypes.c_int32),
                    ("SDL_JoystickOpen", [c_int], c_void_p),
                    ("SDL_JoystickClose", [c_void_p], None),
                    ("SDL_JoystickInstanceID", [c_void_p], ctypes.c_int32),
                    ("SDL_JoystickSetVirtualAxis", [c_void_p, c_int, ctypes.c_int16], c_int),
                    ("SDL_JoystickSetVirtualButton", [c_void_p, c_int, ctypes.c_uint8], c_int),
                    ("SDL_JoystickSetVirtualHat", [c_void_p, c_int, ctypes.c_uint8], c_int),
                    ("SDL_GameControllerAddMapping", [ctypes.c_char_p], c_int),
                    ("SDL_GetError", [], ctypes.c_char_p)):
                fn = getattr(lib, name)
                fn.argtypes, fn.restype = args, result
            _sdl = lib
    return _sdl


def add_controller_mapping(mapping: str) -> None:
    """Teach SDL a game-controller mapping ("GUID,name,a:b0,…"), as its database would."""
    if sdl_library().SDL_GameControllerAddMapping(mapping.encode()) < 0:
        raise RuntimeError(f"SDL_GameControllerAddMapping: {sdl_library().SDL_GetError()!r}")


class VirtualPad:
    """One virtual pad: `plug()`, set its axes, buttons and hats, `unplug()`; again if you
    like (each plug is a new device with a new instance id, as with a real pad)."""

    def __init__(self, *, axes: int = 6, buttons: int = 11, hats: int = 1,
                 controller: bool = False, name: str = "jogwire test pad") -> None:
        self.axes, self.buttons, self.hats = axes, buttons, hats
        self.controller = controller
        self.name = name
        self.instance_id: int | None = None
        self._joystick: int | None = None       # SDL_Joystick*, our own reference
        self._lock = threading.Lock()

    @property
    def plugged(self) -> bool:
        return self._joystick is not None

    def plug(self) -> int:
        """Attach the device (SDL queues JOYDEVICEADDED); returns its instance id."""
        sdl = sdl_library()
        init_events()
        with self._lock:
            if self._joystick is not None:
                raise RuntimeError("the virtual pad is already plugged in")
            desc = _Desc(version=_DESC_VERSION,
                         type=SDL_JOYSTICK_TYPE_GAMECONTROLLER if self.controller
                         else SDL_JOYSTICK_TYPE_UNKNOWN,
                         naxes=self.axes, nbuttons=self.buttons, nhats=self.hats,
                         name=self.name.encode())
            index = sdl.SDL_JoystickAttachVirtualEx(ctypes.byref(desc))
            if index < 0:
                raise RuntimeError(f"SDL_JoystickAttachVirtualEx: {sdl.SDL_GetError()!r}")
            joystick = sdl.SDL_JoystickOpen(index)
            if not joystick:
                raise RuntimeError(f"SDL_JoystickOpen: {sdl.SDL_GetError()!r}")
            self._joystick = joystick
            self.instance_id = sdl.SDL_JoystickInstanceID(joystick)
            return self.instance_id

    def unplug(self) -> None:
        """Detach the device (SDL queues JOYDEVICEREMOVED). Nothing if not plugged in."""
        sdl = sdl_library()
        with self._lock:
            if self._joystick is None:
                return
            for index in range(sdl.SDL_NumJoysticks()):
                if sdl.SDL_JoystickGetDeviceInstanceID(index) == self.instance_id and \
                        sdl.SDL_JoystickIsVirtual(index):
                    sdl.SDL_JoystickDetachVirtual(index)
                    break
            sdl.SDL_JoystickClose(self._joystick)
            self._joystick = None

    def set_axis(self, axis: int, value: float) -> None:
        """Axis `axis` to `value` in −1…1 (×32767, rounded)."""
        raw = round(max(-1.0, min(1.0, value)) * 32767)
        self._call("SDL_JoystickSetVirtualAxis", axis, raw)

    def set_button(self, button: int, held: bool) -> None:
        self._call("SDL_JoystickSetVirtualButton", button, int(bool(held)))

    def set_hat(self, hat: int, *directions: str) -> None:
        """Hat `hat` to the given directions ("up", "left" …); none: centred."""
        self._call("SDL_JoystickSetVirtualHat", hat,
                   sum(HAT_BITS[d] for d in set(directions)))

    def release_all(self) -> None:
        for a in range(self.axes):
            self.set_axis(a, -1.0 if self.controller and a >= 4 else 0.0)
        for b in range(self.buttons):
            self.set_button(b, False)
        for h in range(self.hats):
            self.set_hat(h)

    def _call(self, name: str, index: int, value: int) -> None:
        with self._lock:
            if self._joystick is None:
                raise RuntimeError("the virtual pad is not plugged in")
            if getattr(sdl_library(), name)(self._joystick, index, value) < 0:
                raise RuntimeError(f"{name}: {sdl_library().SDL_GetError()!r}")


class Timeline:
    """Steps `(at_s, action)` played on a thread: `action(pad)` at `at_s` seconds after the
    start, which is when `start()` is called or, with `wait`, when `wait()` returns (for
    example once the command under test says it runs). `times` holds when each step ran
    (time.perf_counter, s)."""

    def __init__(self, pad: VirtualPad, steps: list[tuple[float, object]], *,
                 wait=None) -> None:
        self.pad = pad
        self.steps = sorted(steps, key=lambda s: s[0])
        self.wait = wait
        self.times: list[float] = []
        self.error: BaseException | None = None
        self.t0: float | None = None
        self._thread = threading.Thread(target=self._run, name="virtual-pad", daemon=True)

    def start(self) -> Timeline:
        self._thread.start()
        return self

    def join(self, timeout_s: float = 30.0) -> None:
        self._thread.join(timeout_s)
        if self.error is not None:
            raise self.error

    def _run(self) -> None:
        try:
            if self.wait is not None:
                self.wait()
            self.t0 = time.perf_counter()
            for at_s, action in self.steps:
                delay = self.t0 + at_s - time.perf_counter()
                if delay > 0:
                    time.sleep(delay)
                self.times.append(time.perf_counter())
                action(self.pad)
        except Exception as exc:  # noqa: BLE001  (re-raised by join() on the test's thread)
            self.error = exc


class Terminal:
    """Stands in for sys.stdout of a command run in this process: keeps every line and lets
    another thread wait for one (a virtual pad's hand that reacts to what the command says)."""

    def __init__(self) -> None:
        self.text = ""
        self._changed = threading.Condition()

    def write(self, s: str) -> int:
        with self._changed:
            self.text += s
            self._changed.notify_all()
        return len(s)

    def flush(self) -> None:
        pass

    def isatty(self) -> bool:
        return False

    def fileno(self) -> int:
        raise OSError("not a real terminal")

    def wait_for(self, needle: str, timeout_s: float = 30.0, *, start: int = 0) -> int:
        """Block until `needle` appears after offset `start`; its end offset."""
        deadline = time.monotonic() + timeout_s
        with self._changed:
            while (i := self.text.find(needle, start)) < 0:
                left = deadline - time.monotonic()
                if left <= 0:
                    raise TimeoutError(f"{needle!r} not printed within {timeout_s} s; "
                                       f"got:\n{self.text}")
                self._changed.wait(left)
            return i + len(needle)
