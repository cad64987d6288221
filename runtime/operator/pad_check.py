"""Check a gamepad against a pad file: which raw axis and button is which, and what intent
each produces under that file. Nothing moves: there is no arm link, only the mapping.

- `connected_pads()`: the pads SDL sees now, with SDL's own game-controller mapping where
  it knows one, and the shipped pad file whose indices that mapping matches.
- `pad_roles(pad)`: what each raw axis and button does under a pad file.
- `describe(frame, intent, roles, rest)`: the live reading as text (the headless mode and
  the window both show it); `PadCheckWindow` draws it with bars and button boxes.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from ..arm.model import Arm
from ..control.mapping import ACTIONS, Button, InputFrame, Intent, Mapper, PadMapping
from .inputs.gamepad import GamepadSource
from .inputs.pygame_init import init_events, init_fonts, pygame

MOVED = 0.05      # an axis counts as moved this far from where it rested (fraction of travel)

# The shipped pad files' indices as SDL game-controller names (their header comments): a pad
# whose SDL mapping puts these names at these indices fits that file as it is. twinstick's
# order is that of SDL's database entries for Xbox-360-style pads on Linux, from memory;
# twinstick_sdl's is SDL's own order (checked in tests/runtime/operator/inputs).
SHIPPED_LAYOUTS = {
    "twinstick": {"leftx": "a0", "lefty": "a1", "rightx": "a3", "righty": "a4",
                  "a": "b0", "b": "b1", "x": "b2", "y": "b3", "leftshoulder": "b4",
                  "rightshoulder": "b5", "back": "b6", "start": "b7",
                  "dpup": "h0.1", "dpdown": "h0.4", "dpleft": "h0.8", "dpright": "h0.2"},
    "twinstick_sdl": {"leftx": "a0", "lefty": "a1", "rightx": "a2", "righty": "a3",
                      "a": "b0", "b": "b1", "x": "b2", "y": "b3", "back": "b4", "start": "b6",
                      "leftshoulder": "b9", "rightshoulder": "b10", "dpup": "b11",
                      "dpdown": "b12", "dpleft": "b13", "dpright": "b14"},
}


@dataclass(frozen=True)
class PadInfo:
    """A pad as SDL reports it. `mapping`: SDL's game-controller mapping (name → "a0",
    "b4", "h0.1"), None where SDL knows none for this device."""

    index: int
    instance_id: int
    name: str
    guid: str
    axes: int
    buttons: int
    hats: int
    mapping: dict[str, str] | None

    @property
    def fits(self) -> str | None:
        """The shipped pad file whose indices SDL's mapping of this pad matches."""
        if not self.mapping:
            return None
        for name, layout in SHIPPED_LAYOUTS.items():
            if all(self.mapping.get(k) == v for k, v in layout.items()):
                return name
        return None


def connected_pads() -> list[PadInfo]:
    """Every joystick SDL sees now (opens each briefly to read it)."""
    init_events()
    pads = []
    for index in range(pygame.joystick.get_count()):
        try:
            js = pygame.joystick.Joystick(index)
        except pygame.error:
            continue                                  # gone again
        pads.append(PadInfo(index=index, instance_id=js.get_instance_id(), name=js.get_name(),
                            guid=js.get_guid(), axes=js.get_numaxes(),
                            buttons=js.get_numbuttons(), hats=js.get_numhats(),
                            mapping=_sdl_mapping(index)))
    return pads


def _sdl_mapping(index: int) -> dict[str, str] | None:
    from pygame._sdl2 import controller
    if not controller.get_init():
        controller.init()
    if not controller.is_controller(index):
        return None
    pad = controller.Controller(index)
    try:
        return {k: v for k, v in pad.get_mapping().items() if k != "crc"}
    finally:
        pad.quit()


def pad_file_for_first_pad(default: str) -> tuple[str, str]:
    """The shipped pad file for the first pad SDL sees (the one `jogwire drive` takes): the
    one its SDL game-controller mapping fits, else `default`; and a note for the user."""
    pads = connected_pads()
    if not pads:
        return default, ""
    first = pads[0]
    if first.fits:
        return first.fits, f"pad file {first.fits} (SDL's layout of {first.name!r} fits it)"
    return default, (f"pad file {default} (not known to fit {first.name!r}: check with "
                     f"`jogwire pads --pad {default}`, or teach it with `jogwire pads "
                     "--learn`)")


def format_pad_list(pads: list[PadInfo]) -> str:
    if not pads:
        return ("jogwire pads: no pad connected (plug one in; on Linux the device must be "
                "readable by you, e.g. /dev/input/event*)")
    plural = "s" if len(pads) > 1 else ""
    out = [f"jogwire pads: {len(pads)} pad{plural} connected (jogwire drive takes the first)"]
    for p in pads:
        out.append(f"  {p.index}  {p.name!r}  {p.axes} axes, {p.buttons} buttons, {p.hats} "
                   f"hat{'s' if p.hats != 1 else ''}  (instance {p.instance_id}, guid {p.guid})")
        if p.mapping is None:
            out.append("     SDL knows no game-controller mapping for it: teach it with "
                       "`jogwire pads --learn my_pad.toml`")
            continue
        named = ", ".join(f"{k} {v}" for k, v in sorted(p.mapping.items()))
        out.append(f"     SDL's game-controller mapping: {named}")
        if p.fits:
            out.append(f"     its indices fit the shipped pad file {p.fits!r}: check with "
                       f"`jogwire pads --pad {p.fits}`")
        else:
            out.append("     no shipped pad file fits its indices: `jogwire pads --learn "
                       "my_pad.toml`")
    return "\n".join(out)


# ----------------------------------------------------------------------------------------
# Roles under a pad file, and the live reading as text
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Roles:
    """What each raw axis and button does under one pad file."""

    axes: dict[int, tuple[str, ...]]       # axis → ("vx−", "shift: wy−", "joint−")
    buttons: dict[Button, tuple[str, ...]]  # button → ("enable",)
    sticks: dict[int, str]                 # axis → "stick 1 x"


def pad_roles(pad: PadMapping) -> Roles:
    axes: dict[int, list[str]] = {}
    for b in pad.axes:
        if b.axis is None:
            continue
        role = f"{b.drive}{'+' if b.sign > 0 else '−'}"
        if b.layer == "shift":
            role = "shift: " + role
        axes.setdefault(b.axis, []).append(role)
    buttons: dict[Button, list[str]] = {}
    for action in ACTIONS:
        for button in getattr(pad.buttons, action):
            buttons.setdefault(button, []).append(action)
    sticks = {}
    for k, (x, y) in enumerate(pad.sticks, start=1):
        sticks[x], sticks[y] = f"stick {k} x", f"stick {k} y"
    return Roles({a: tuple(r) for a, r in axes.items()},
                 {b: tuple(r) for b, r in buttons.items()}, sticks)


def _button_sort_key(b: Button) -> tuple[bool, str]:
    return isinstance(b, str), f"{b:>4}" if isinstance(b, int) else b


def describe_axes(frame: InputFrame, roles: Roles, rest: tuple[float, ...]) -> list[str]:
    """The axes that moved from rest, with their roles: "axis 1 −0.62 → vx−, shift: wy−"."""
    out = []
    for a, v in enumerate(frame.axes):
        r = rest[a] if a < len(rest) else 0.0
        if abs(v - r) > MOVED:
            role = ", ".join(roles.axes.get(a, ())) or "unused"
            out.append(f"axis {a} {v:+.2f} → {role}")
    return out


def describe_buttons(frame: InputFrame, roles: Roles) -> list[str]:
    return [f"{b} → {', '.join(roles.buttons.get(b, ())) or 'unused'}"
            for b in sorted(frame.pressed, key=_button_sort_key)]


def describe_intent(intent: Intent, arm: Arm) -> str:
    """The intent in words: linear speeds in m/s, angular ones and revolute joints in °/s."""
    if not intent.present:
        return "no pad"
    held = [name.upper() for name, on in (("enable", intent.enable), ("stop", intent.stop),
                                          ("reset", intent.reset), ("shift", intent.shift))
            if on]
    state = (f"{intent.mode}, {intent.frame} frame, preset {intent.preset + 1} "
             f"({100 * intent.speed_fraction:g} %), reduced {'on' if intent.reduced else 'off'}")
    if intent.mode == "joint":
        joint = arm.joints[intent.joint]
        rate = f"{math.degrees(intent.joint_rate):+.1f} °/s" if joint.is_revolute else \
            f"{intent.joint_rate:+.3f} m/s"
        motion = f"joint {joint.name} {rate}" if intent.joint_rate else "no motion"
    else:
        parts = [f"{n} {v:+.3f} m/s" for n, v in zip(("vx", "vy", "vz"), intent.twist[:3])
                 if v] + [f"{n} {math.degrees(v):+.1f} °/s"
                          for n, v in zip(("wx", "wy", "wz"), intent.twist[3:]) if v]
        motion = ", ".join(parts) or "no motion"
    return " ".join(held + [motion]) + f"  [{state}]"


def describe(frame: InputFrame, intent: Intent, roles: Roles, rest: tuple[float, ...],
             arm: Arm) -> str:
    """One line: moved axes | held buttons | intent."""
    if not frame.present:
        return f"{frame.device}: waiting for a pad"
    axes = "; ".join(describe_axes(frame, roles, rest)) or "sticks at rest"
    buttons = "; ".join(describe_buttons(frame, roles)) or "nothing held"
    return f"{axes} | {buttons} | intent: {describe_intent(intent, arm)}"


# ----------------------------------------------------------------------------------------
# The window
# ----------------------------------------------------------------------------------------

GROUND, PANEL, TEXT, MUTED = (20, 24, 31), (31, 37, 48), (226, 231, 239), (142, 152, 168)
ON, USED, FREE = (46, 176, 134), (84, 128, 204), (72, 82, 100)
WINDOW_SIZE = (980, 600)


class PadCheckWindow:
    """A plain window: every axis as a bar with its role, every button as a box (lit while
    held) with its action, and the intent. Open and draw on the main thread."""

    def __init__(self, title: str, pad_file: str) -> None:
        self.title = title
        self.pad_file = pad_file
        self.screen: pygame.Surface | None = None
        self._fonts: dict[int, pygame.font.Font] = {}

    def open(self) -> None:
        init_events()
        init_fonts()
        pygame.display.set_caption(self.title)
        self.screen = pygame.display.set_mode(WINDOW_SIZE)

    def close(self) -> None:
        if self.screen is not None:
            pygame.display.quit()
            self.screen = None

    def _text(self, text: str, pos: tuple[int, int], size: int = 18,
              colour: tuple[int, int, int] = TEXT) -> None:
        font = self._fonts.get(size) or self._fonts.setdefault(size, pygame.font.Font(None, size))
        self.screen.blit(font.render(text, True, colour), pos)

    def draw(self, frame: InputFrame, intent: Intent, roles: Roles, rest: tuple[float, ...],
             buttons: int, arm: Arm) -> None:
        s = self.screen
        s.fill(GROUND)
        self._text(frame.device if frame.present else f"{frame.device}: waiting for a pad",
                   (20, 14), 30)
        self._text(f"pad file {self.pad_file}  ·  nothing moves here: this only shows the "
                   "mapping", (20, 44), 20, MUTED)
        pygame.draw.rect(s, PANEL, (12, 72, 560, 420), border_radius=6)
        self._text("AXES", (24, 80), 18, MUTED)
        for a, v in enumerate(frame.axes[:12]):
            y = 104 + a * 32
            r = rest[a] if a < len(rest) else 0.0
            moved = abs(v - r) > MOVED
            self._text(f"axis {a}", (24, y), 20)
            bar = pygame.Rect(100, y + 2, 200, 14)
            pygame.draw.rect(s, FREE, bar, border_radius=3)
            mid = bar.centerx
            end = mid + round(max(-1.0, min(1.0, v)) * bar.width / 2)
            pygame.draw.rect(s, ON if moved else (USED if a in roles.axes else MUTED),
                             (min(mid, end), bar.y, max(abs(end - mid), 2), bar.height))
            label = ", ".join(roles.axes.get(a, ())) or "unused"
            stick = roles.sticks.get(a, "")
            self._text(f"{v:+.2f}  {label}" + (f"  ({stick})" if stick else ""), (312, y),
                       20, TEXT if a in roles.axes else MUTED)
        pygame.draw.rect(s, PANEL, (584, 72, 384, 420), border_radius=6)
        self._text("BUTTONS", (596, 80), 18, MUTED)
        names = list(range(buttons)) + sorted(
            {b for b in roles.buttons if isinstance(b, str)} | {b for b in frame.pressed
                                                                 if isinstance(b, str)})
        for k, b in enumerate(names[:26]):
            x, y = 596 + (k % 2) * 186, 104 + (k // 2) * 29
            held = b in frame.pressed
            pygame.draw.rect(s, ON if held else (USED if b in roles.buttons else FREE),
                             (x, y, 22, 20), border_radius=4)
            label = ", ".join(roles.buttons.get(b, ())) or "—"
            self._text(f"{b}  {label}", (x + 30, y + 2), 19, TEXT if held else MUTED)
        self._text("INTENT", (20, 506), 18, MUTED)
        self._text(describe_intent(intent, arm), (20, 530), 22)
        self._text("Esc or close the window to quit", (20, 570), 18, MUTED)
        pygame.display.flip()


# ----------------------------------------------------------------------------------------
# The live check
# ----------------------------------------------------------------------------------------

def format_roles(pad: PadMapping, roles: Roles) -> str:
    """The static part: which raw axis and button does what under this pad file."""
    out = [f"pad file {pad.name} ({pad.source})"]
    for a in sorted(roles.axes):
        stick = f" ({roles.sticks[a]})" if a in roles.sticks else ""
        out.append(f"  axis {a}{stick}: {', '.join(roles.axes[a])}")
    for b in sorted(roles.buttons, key=_button_sort_key):
        out.append(f"  {_button_name(b)}: {', '.join(roles.buttons[b])}")
    return "\n".join(out)


def _button_name(b: Button) -> str:
    return f"button {b}" if isinstance(b, int) else b


def _rest_of(axes: tuple[float, ...]) -> tuple[float, ...]:
    """Where each axis rests: a stick at 0, a trigger (reading near an end) where it is."""
    return tuple(v if abs(v) > 0.5 else 0.0 for v in axes)


def run_check(source: GamepadSource, mapper: Mapper, say: Callable[[str], None], *,
              window: PadCheckWindow | None, duration_s: float | None,
              clock: Callable[[], float], sleep: Callable[[float], None]) -> None:
    """Show the first pad's reading under the mapper's pad file until `duration_s` passes,
    the window is closed (or Esc) or Ctrl-C. Headless: a line each time the reading changes,
    at most 10 a second."""
    roles = pad_roles(mapper.pad)
    end = None if duration_s is None else clock() + duration_s
    rest: tuple[float, ...] = ()
    device = None
    shown, next_line, next_frame = "", 0.0, 0.0
    try:
        while end is None or clock() < end:
            for event in pygame.event.get():
                if source.handle_event(event) or window is None:
                    continue
                if event.type in (pygame.QUIT, pygame.WINDOWCLOSE) or \
                        (event.type == pygame.KEYDOWN and event.key == pygame.K_ESCAPE):
                    return
            now = clock()
            frame = source.read(now)
            intent = mapper.update(frame)
            if frame.present and frame.device != device:
                device, rest = frame.device, _rest_of(frame.axes)
            if window is not None:
                if now >= next_frame:
                    window.draw(frame, intent, roles, rest, source.button_count, mapper.arm)
                    next_frame = now + 1 / 30
            else:
                line = describe(frame, intent, roles, rest, mapper.arm)
                if line != shown and now >= next_line:
                    say(line)
                    shown, next_line = line, now + 0.1
            sleep(0.004)
    except KeyboardInterrupt:
        pass

