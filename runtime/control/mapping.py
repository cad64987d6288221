"""Device axes and buttons → operator intent (pure: no I/O, no clock).

One cycle of a `Mapper`:

    raw axes ─► clamp to [−1, 1] ─► dead zone with rescale (radial on a stick's axis pair,
    axial on a lone axis) ─► response curve ─► sign · scale per binding ─► sum per drive,
    clip to [−1, 1] ─► × speed (preset fraction of the arm's caps, reduced-speed cap)
    ─► twist (m/s, rad/s) in the chosen frame, or one joint's rate (rad/s or m/s)

    buttons ─► held levels (enable, stop, reset, shift) and edge-triggered toggles
    (frame, mode, reduced, faster/slower, next/previous joint)

Dead zone: stick drift at rest is common practice to mask with a dead zone of about 10 %
of full travel (published advice puts it between 0.1 and 0.2, Sutphin 2013, REFERENCES §6).
A radial dead zone on a stick keeps diagonals undistorted: out = dir·(|in| − dz)/(1 − dz).
The response curve then acts on the rescaled magnitude, so fine motion near the centre
is possible while full deflection still reaches full speed (out(±1) = ±1).

Sources (gamepad, keyboard, script, network) all deliver an `InputFrame`; the script and
network sources carry a `DirectCommand` (a twist already in SI units) instead of axes.
Enable, stop and reset are passed on as held levels: their semantics (held at start,
latching, re-arming) belong to `runtime.control.safety`. Toggles are edge-triggered here: a held
toggle button flips once, and buttons already held when a device appears flip nothing.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..errors import ConfigError
from .limits import REDUCED_SPEED_M_S
from ..arm.model import TASK_AXES, Arm, configs_dir
from ..tomlsource import TomlSource, finite_number, read_toml, reject_unknown

Button = int | str
"""A pad button index, a key name as pygame spells it ("space", "left shift"), or a hat
direction "hat<N>:<up|down|left|right>"."""

DRIVES = TASK_AXES + ("joint",)
FRAMES = ("base", "tool")
MODES = ("cartesian", "joint")
CURVES = ("linear", "expo", "power")
LAYERS = ("main", "shift", "any")
DEVICES = ("gamepad", "keyboard")

# Reduced speed (limits.REDUCED_SPEED_M_S, 250 mm/s after ISO 10218-1): the mapper scales
# stick travel to this cap so the whole stick range stays usable; the limits stage enforces
# the cap on the joint rates that result.

_HAT = re.compile(r"hat(\d+):(up|down|left|right)")


# ----------------------------------------------------------------------------------------
# Response shaping: one function per formula
# ----------------------------------------------------------------------------------------

def clamp_unit(x: float) -> float:
    """Clamp to [−1, 1]: pygame's events can carry −32768/32767 = −1.0000305 (REFERENCES §6)."""
    return -1.0 if x < -1.0 else 1.0 if x > 1.0 else x


def deadzone_axial(x: float, dz: float) -> float:
    """One axis: 0 inside |x| ≤ dz, else sign(x)·(|x| − dz)/(1 − dz), continuous at dz."""
    m = min(abs(x), 1.0)
    if m <= dz:
        return 0.0
    return math.copysign((m - dz) / (1.0 - dz), x)


def deadzone_radial(x: float, y: float, dz: float) -> tuple[float, float]:
    """A stick's pair: (x, y)/m · (min(m, 1) − dz)/(1 − dz) with m = √(x² + y²), 0 inside dz.

    Sutphin 2013 / REFERENCES §6; with dz = 0.1: (0.55, 0) → (0.5, 0), (0.6, 0.8) → (0.6, 0.8).
    """
    m = math.hypot(x, y)
    if m <= dz:
        return 0.0, 0.0
    k = (min(m, 1.0) - dz) / (1.0 - dz) / m
    return x * k, y * k


def expo_curve(x: float, e: float) -> float:
    """Cubic expo: (1 − e)·x + e·x³, e ∈ [0, 1]; odd, out(±1) = ±1. e = 0.5: 0.5 → 0.3125."""
    return (1.0 - e) * x + e * x * x * x


def power_curve(x: float, gamma: float) -> float:
    """Sign-preserving power: sign(x)·|x|^γ (γ ≥ 1 softens the centre)."""
    return math.copysign(abs(x) ** gamma, x)


@dataclass(frozen=True)
class Shaping:
    """Dead zone (fraction of full travel) and response curve applied after it."""

    deadzone: float = 0.10
    curve: str = "expo"
    expo: float = 0.5
    power: float = 2.0

    def curve_of(self, x: float) -> float:
        if self.curve == "expo":
            return expo_curve(x, self.expo)
        if self.curve == "power":
            return power_curve(x, self.power)
        return x

    def axis(self, x: float) -> float:
        """A lone axis: clamp, axial dead zone with rescale, curve."""
        return self.curve_of(deadzone_axial(clamp_unit(x), self.deadzone))

    def stick(self, x: float, y: float) -> tuple[float, float]:
        """A stick: clamp, radial dead zone, rescale; the curve acts on the magnitude only."""
        sx, sy = deadzone_radial(clamp_unit(x), clamp_unit(y), self.deadzone)
        r = math.hypot(sx, sy)
        if r == 0.0:
            return 0.0, 0.0
        k = self.curve_of(r) / r
        return sx * k, sy * k


# ----------------------------------------------------------------------------------------
# What a source delivers and what the mapper returns
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class DirectCommand:
    """A command that is already an intent (script or network source). SI units.

    twist: (vx, vy, vz, wx, wy, wz) in m/s and rad/s, in `frame` axes, reference point TCP.
    joint / joint_rate: single-joint jog instead of a twist (index; rad/s or m/s).
    enable / stop / reset: held levels, the same meaning as the pad's buttons.
    """

    twist: tuple[float, ...] = (0.0,) * 6
    frame: str = "base"
    enable: bool = True
    reduced: bool = False
    joint: int | None = None
    joint_rate: float = 0.0
    stop: bool = False
    reset: bool = False


@dataclass(frozen=True)
class InputFrame:
    """One read of an input source: raw device state, or a direct command.

    device: a short human-readable name ("keyboard", "pad 'X' #3", "script square.toml").
    present: False when the device is gone (unplugged, window lost focus, peer silent).
    axes: raw axis values (about −1…1), index as the device reports them.
    pressed: buttons held now (see `Button`).
    """

    device: str
    present: bool
    axes: tuple[float, ...] = ()
    pressed: frozenset[Button] = frozenset()
    command: DirectCommand | None = None

    def button_flags(self, count: int) -> tuple[bool, ...]:
        """Pad buttons 0…count−1 as held flags (for logs that store buttons by index)."""
        return tuple(i in self.pressed for i in range(count))

    def pressed_names(self) -> list[str]:
        """Everything held, as sorted text ("4", "hat0:up", "space"), for logs."""
        return sorted(str(b) for b in self.pressed)


@dataclass(frozen=True, eq=False)
class Intent:
    """What the operator asks for this cycle, before the safety gate and the solver.

    twist: (6,) m/s, rad/s in `frame` axes (zero in joint mode and outside the arm's task).
    joint_rate: rate of joint `joint` (rad/s or m/s) in joint mode, else 0.
    enable / stop / reset / present: held levels for `runtime.control.safety`.
    speed_fraction: the preset's fraction of the arm's caps (1.0 for direct commands).
    """

    twist: NDArray[np.float64]
    frame: str
    mode: str
    joint: int
    joint_rate: float
    reduced: bool
    preset: int
    speed_fraction: float
    enable: bool
    stop: bool
    reset: bool
    present: bool
    shift: bool = False
    direct: bool = False


# ----------------------------------------------------------------------------------------
# The pad mapping (configs/pads/*.toml)
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class AxisBinding:
    """One contribution to a drive: a device axis, or a plus/minus pair of buttons.

    value = sign · scale · shaped axis   (or sign · scale · (plus held − minus held))
    layer: "main" while shift is released, "shift" while it is held, "any" always.
    """

    drive: str
    axis: int | None = None
    plus: tuple[Button, ...] = ()
    minus: tuple[Button, ...] = ()
    sign: float = 1.0
    scale: float = 1.0
    layer: str = "main"


@dataclass(frozen=True)
class ButtonMap:
    """Buttons of each action; any one of an action's buttons counts. Held: enable, stop,
    reset, shift. Edge-triggered toggles: the rest."""

    enable: tuple[Button, ...]
    stop: tuple[Button, ...]
    reset: tuple[Button, ...]
    shift: tuple[Button, ...] = ()
    frame: tuple[Button, ...] = ()
    mode: tuple[Button, ...] = ()
    reduced: tuple[Button, ...] = ()
    faster: tuple[Button, ...] = ()
    slower: tuple[Button, ...] = ()
    joint_next: tuple[Button, ...] = ()
    joint_prev: tuple[Button, ...] = ()


ACTIONS = tuple(f.name for f in fields(ButtonMap))
REQUIRED_ACTIONS = ("enable", "stop", "reset")


@dataclass(frozen=True)
class PadMapping:
    """A validated pad (or keyboard) layout. Load with `load_pad`."""

    name: str
    device: str
    buttons: ButtonMap
    axes: tuple[AxisBinding, ...]
    sticks: tuple[tuple[int, int], ...] = ()
    shaping: Shaping = Shaping()
    presets: tuple[float, ...] = (0.05, 0.15, 0.4, 1.0)
    start_preset: int = 1
    start_frame: str = "base"
    start_mode: str = "cartesian"
    start_reduced: bool = False
    summary: str = ""
    source: str = ""


def pad_names() -> list[str]:
    """Names of the shipped pad mappings (configs/pads/*.toml)."""
    return sorted(p.stem for p in (configs_dir() / "pads").glob("*.toml"))


def resolve_pad_path(name_or_path: str | Path) -> Path:
    p = Path(name_or_path)
    if p.suffix == ".toml" or p.exists():
        return p
    shipped = configs_dir() / "pads" / f"{name_or_path}.toml"
    if shipped.exists():
        return shipped
    raise ConfigError(f"no pad mapping named {str(name_or_path)!r}; shipped: "
                      f"{', '.join(pad_names())}", field="pad")


def load_pad(name_or_path: str | Path) -> PadMapping:
    """Load a shipped pad mapping by name (`twinstick`) or a TOML file, fully validated."""
    path = resolve_pad_path(name_or_path)
    data, src = read_toml(path, "pad mapping")
    return pad_from_toml(data, src)


def pad_from_toml(data: dict[str, Any], src: TomlSource) -> PadMapping:
    """Validate a parsed pad document; errors name the file, line and field."""
    reject_unknown(src, data, {"name", "summary", "device", "sticks", "shaping", "speed",
                               "start", "buttons", "axis"})
    name = data.get("name")
    if not isinstance(name, str) or not name.strip():
        raise src.error("must be a non-empty string", "name", None, None, "name")
    device = data.get("device", "gamepad")
    if device not in DEVICES:
        raise src.error(f"unknown device {device!r}; use {' or '.join(DEVICES)}", "device",
                        None, None, "device")
    buttons = _buttons(src, _table(src, data, "buttons"), device)
    presets, start_preset = _speed(src, _table(src, data, "speed"))
    start = _table(src, data, "start")
    reject_unknown(src, start, {"frame", "mode", "reduced"}, "start.", "start")
    start_frame = _choice(src, start.get("frame", "base"), FRAMES, "start.frame", "start",
                          None, "frame")
    start_mode = _choice(src, start.get("mode", "cartesian"), MODES, "start.mode", "start",
                         None, "mode")
    start_reduced = start.get("reduced", False)
    if not isinstance(start_reduced, bool):
        raise src.error("must be true or false", "start.reduced", "start", None, "reduced")
    sticks = _sticks(src, data.get("sticks", []), device)
    axes = _axis_bindings(src, data.get("axis"), device, buttons)
    return PadMapping(name=name, device=device, buttons=buttons, axes=axes, sticks=sticks,
                      shaping=_shaping(src, _table(src, data, "shaping")), presets=presets,
                      start_preset=start_preset, start_frame=start_frame, start_mode=start_mode,
                      start_reduced=start_reduced, summary=str(data.get("summary", "")),
                      source=str(src.path))


def _table(src: TomlSource, data: dict[str, Any], key: str) -> dict[str, Any]:
    value = data.get(key, {})
    if not isinstance(value, dict):
        raise src.error("must be a table", key, None, None, key)
    return value


def _choice(src: TomlSource, value: Any, options: tuple[str, ...], field_name: str,
            table: str | None, index: int | None, key: str) -> str:
    if value not in options:
        raise src.error(f"got {value!r}; use one of {', '.join(options)}", field_name, table,
                        index, key)
    return value


def _button(src: TomlSource, value: Any, device: str, field_name: str, table: str,
            index: int | None, key: str) -> Button:
    if device == "gamepad":
        if isinstance(value, int) and not isinstance(value, bool) and value >= 0:
            return value
        if isinstance(value, str) and _HAT.fullmatch(value):
            return value
        raise src.error(f"a pad button is an index ≥ 0 or 'hat<N>:up|down|left|right', got "
                        f"{value!r}", field_name, table, index, key)
    if isinstance(value, str) and value.strip():
        return value
    raise src.error(f"a key is its pygame name (e.g. 'space', 'w'), got {value!r}", field_name,
                    table, index, key)


def _button_list(src: TomlSource, value: Any, device: str, field_name: str, table: str,
                 index: int | None, key: str) -> tuple[Button, ...]:
    items = value if isinstance(value, list) else [value]
    if not items:
        raise src.error("needs at least one button", field_name, table, index, key)
    return tuple(_button(src, v, device, field_name, table, index, key) for v in items)


def _buttons(src: TomlSource, spec: dict[str, Any], device: str) -> ButtonMap:
    reject_unknown(src, spec, set(ACTIONS), "buttons.", "buttons")
    for action in REQUIRED_ACTIONS:
        if action not in spec:
            raise src.error(f"a mapping needs a {action!r} button", f"buttons.{action}",
                            "buttons")
    owner: dict[Button, str] = {}
    kwargs = {}
    for action, value in spec.items():
        bs = _button_list(src, value, device, f"buttons.{action}", "buttons", None, action)
        for b in bs:
            if b in owner:
                raise src.error(f"button {b!r} is already used by {owner[b]!r}",
                                f"buttons.{action}", "buttons", None, action)
            owner[b] = action
        kwargs[action] = bs
    return ButtonMap(**kwargs)


def _speed(src: TomlSource, spec: dict[str, Any]) -> tuple[tuple[float, ...], int]:
    reject_unknown(src, spec, {"presets", "start"}, "speed.", "speed")
    raw = spec.get("presets", list(PadMapping.presets))
    if not isinstance(raw, list) or not raw:
        raise src.error("must be a non-empty list of fractions", "speed.presets", "speed",
                        None, "presets")
    presets = tuple(finite_number(src, v, "speed.presets", "speed", None, "presets")
                    for v in raw)
    if any(not 0.0 < p <= 1.0 for p in presets) or \
            any(b <= a for a, b in zip(presets, presets[1:])):
        raise src.error(f"must rise strictly within (0, 1], got {raw}", "speed.presets",
                        "speed", None, "presets")
    start = spec.get("start", min(1, len(presets) - 1))
    if isinstance(start, bool) or not isinstance(start, int) or not 0 <= start < len(presets):
        raise src.error(f"must be a preset index 0…{len(presets) - 1}, got {start!r}",
                        "speed.start", "speed", None, "start")
    return presets, start


def _shaping(src: TomlSource, spec: dict[str, Any]) -> Shaping:
    reject_unknown(src, spec, {"deadzone", "curve", "expo", "power"}, "shaping.", "shaping")
    d = Shaping()
    dz = finite_number(src, spec.get("deadzone", d.deadzone), "shaping.deadzone", "shaping",
                       None, "deadzone")
    if not 0.0 <= dz < 0.5:
        raise src.error(f"must be in [0, 0.5), got {dz}", "shaping.deadzone", "shaping", None,
                        "deadzone")
    curve = _choice(src, spec.get("curve", d.curve), CURVES, "shaping.curve", "shaping", None,
                    "curve")
    e = finite_number(src, spec.get("expo", d.expo), "shaping.expo", "shaping", None, "expo")
    if not 0.0 <= e <= 1.0:
        raise src.error(f"must be in [0, 1], got {e}", "shaping.expo", "shaping", None, "expo")
    g = finite_number(src, spec.get("power", d.power), "shaping.power", "shaping", None,
                      "power")
    if not 1.0 <= g <= 5.0:
        raise src.error(f"must be in [1, 5], got {g}", "shaping.power", "shaping", None,
                        "power")
    return Shaping(deadzone=dz, curve=curve, expo=e, power=g)


def _axis_index(src: TomlSource, value: Any, field_name: str, table: str | None,
                index: int | None, key: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise src.error(f"must be an axis index ≥ 0, got {value!r}", field_name, table, index,
                        key)
    return value


def _sticks(src: TomlSource, raw: Any, device: str) -> tuple[tuple[int, int], ...]:
    if not isinstance(raw, list):
        raise src.error("must be a list of [x_axis, y_axis] pairs", "sticks", None, None,
                        "sticks")
    if raw and device == "keyboard":
        raise src.error("a keyboard has no sticks", "sticks", None, None, "sticks")
    seen: set[int] = set()
    sticks = []
    for pair in raw:
        if not isinstance(pair, list) or len(pair) != 2:
            raise src.error(f"each stick is [x_axis, y_axis], got {pair!r}", "sticks", None,
                            None, "sticks")
        a, b = (_axis_index(src, v, "sticks", None, None, "sticks") for v in pair)
        if a == b or a in seen or b in seen:
            raise src.error(f"axis used twice in sticks: {pair!r}", "sticks", None, None,
                            "sticks")
        seen.update((a, b))
        sticks.append((a, b))
    return tuple(sticks)


def _axis_bindings(src: TomlSource, raw: Any, device: str, buttons: ButtonMap
                   ) -> tuple[AxisBinding, ...]:
    if not isinstance(raw, list) or not raw:
        raise src.error("a mapping needs at least one [[axis]] binding", "axis")
    action_buttons = {b for action in ACTIONS for b in getattr(buttons, action)}
    bindings = []
    for i, spec in enumerate(raw):
        where = ("axis", i)
        f = f"axis[{i}]."
        if not isinstance(spec, dict):
            raise src.error("each binding is an [[axis]] table", f"axis[{i}]", "axis")
        reject_unknown(src, spec, {"drive", "index", "plus", "minus", "sign", "scale", "layer"},
                       f, *where)
        if "drive" not in spec:
            raise src.error("missing 'drive'", f + "drive", *where)
        drive = _choice(src, spec["drive"], DRIVES, f + "drive", *where, "drive")
        has_index = "index" in spec
        has_keys = "plus" in spec or "minus" in spec
        if has_index == has_keys:
            raise src.error("give either 'index' (an axis) or 'plus'/'minus' (buttons)",
                            f + "index", *where)
        axis = None
        plus: tuple[Button, ...] = ()
        minus: tuple[Button, ...] = ()
        if has_index:
            if device == "keyboard":
                raise src.error("a keyboard has no axes; use plus/minus keys", f + "index",
                                *where, "index")
            axis = _axis_index(src, spec["index"], f + "index", *where, "index")
        else:
            for key in ("plus", "minus"):
                if key in spec:
                    bs = _button_list(src, spec[key], device, f + key, *where, key)
                    clash = set(bs) & action_buttons
                    if clash:
                        raise src.error(f"button {sorted(map(str, clash))[0]!r} is also an "
                                        f"action button", f + key, *where, key)
                    if key == "plus":
                        plus = bs
                    else:
                        minus = bs
        sign = finite_number(src, spec.get("sign", 1), f + "sign", *where, "sign")
        if sign not in (1.0, -1.0):
            raise src.error(f"must be 1 or -1, got {spec['sign']!r}", f + "sign", *where,
                            "sign")
        scale = finite_number(src, spec.get("scale", 1.0), f + "scale", *where, "scale")
        if not 0.0 < scale <= 1.0:
            raise src.error(f"must be in (0, 1], got {scale}", f + "scale", *where, "scale")
        layer = _choice(src, spec.get("layer", "main"), LAYERS, f + "layer", *where, "layer")
        if layer == "shift" and not buttons.shift:
            raise src.error("layer 'shift' needs a shift button in [buttons]", f + "layer",
                            *where, "layer")
        bindings.append(AxisBinding(drive=drive, axis=axis, plus=plus, minus=minus, sign=sign,
                                    scale=scale, layer=layer))
    return tuple(bindings)


# ----------------------------------------------------------------------------------------
# The mapper: a small state machine for the toggles, pure otherwise
# ----------------------------------------------------------------------------------------

@dataclass
class _Toggles:
    frame: str
    mode: str
    reduced: bool
    preset: int
    joint: int = 0


class Mapper:
    """Turns `InputFrame`s into `Intent`s for one arm; holds only the toggle state.

    reduced_locked: reduced speed forced on (the toggle cannot turn it off).
    reduced_speed_m_s: the TCP cap that reduced speed scales the sticks to.
    """

    def __init__(self, pad: PadMapping, arm: Arm, *, reduced_locked: bool = False,
                 reduced_speed_m_s: float = REDUCED_SPEED_M_S) -> None:
        self.pad = pad
        self.arm = arm
        self.reduced_locked = reduced_locked
        self.reduced_speed_m_s = reduced_speed_m_s
        self._state = _Toggles(frame=pad.start_frame, mode=pad.start_mode,
                               reduced=pad.start_reduced or reduced_locked,
                               preset=pad.start_preset)
        self._baseline: frozenset[Button] | None = None
        self._stick_of: dict[int, tuple[int, int]] = {}
        for x, y in pad.sticks:
            self._stick_of[x] = self._stick_of[y] = (x, y)
        # the bindings in force for each (joint mode?, shift held?), chosen once
        self._active = {
            (joint, shift): tuple(b for b in pad.axes if (b.drive == "joint") == joint and
                                  (b.layer == "any" or (b.layer == "shift") == shift))
            for joint in (False, True) for shift in (False, True)}
        self._task_index = [(i, d) for i, d in enumerate(TASK_AXES) if arm.task_axes[i]]

    @property
    def state(self) -> _Toggles:
        return self._state

    def update(self, frame: InputFrame) -> Intent:
        if not frame.present:
            self._baseline = None  # buttons held when the device returns must not toggle
            return self._intent(np.zeros(6), 0.0, enable=False, stop=False, reset=False,
                                present=False)
        if frame.command is not None:
            return self._direct(frame.command)
        pressed = frame.pressed
        edges = pressed - (pressed if self._baseline is None else self._baseline)
        self._baseline = pressed
        b = self.pad.buttons
        self._apply_toggles(edges)
        shift = _any(b.shift, pressed)
        drives = self._drive_values(frame.axes, pressed, shift)
        s = self._state
        if s.mode == "joint":
            rate = drives.get("joint", 0.0) * self.speed_fraction * \
                float(self.arm.max_speed[s.joint])
            twist = np.zeros(6)
        else:
            lin, ang = self.speeds()
            twist = np.zeros(6)  # directions outside the arm's task stay zero
            for i, d in self._task_index:
                if d in drives:
                    twist[i] = drives[d] * (lin if i < 3 else ang)
            rate = 0.0
        return self._intent(twist, rate, enable=_any(b.enable, pressed),
                            stop=_any(b.stop, pressed), reset=_any(b.reset, pressed),
                            present=True, shift=shift)

    @property
    def speed_fraction(self) -> float:
        return self.pad.presets[self._state.preset]

    def speeds(self) -> tuple[float, float]:
        """Full-stick TCP speeds now: (linear m/s, angular rad/s) after preset and reduced."""
        lin = self.speed_fraction * self.arm.tcp_max_linear_m_s
        ang = self.speed_fraction * self.arm.tcp_max_angular_rad_s
        if self._state.reduced and lin > self.reduced_speed_m_s:
            k = self.reduced_speed_m_s / lin  # scale both, so the stick feel stays uniform
            lin, ang = lin * k, ang * k
        return lin, ang

    def _apply_toggles(self, edges: frozenset[Button]) -> None:
        if not edges:
            return
        b, s = self.pad.buttons, self._state
        if _any(b.frame, edges):
            s.frame = "tool" if s.frame == "base" else "base"
        if _any(b.mode, edges):
            s.mode = "joint" if s.mode == "cartesian" else "cartesian"
        if _any(b.reduced, edges) and not self.reduced_locked:
            s.reduced = not s.reduced
        if _any(b.faster, edges):
            s.preset = min(s.preset + 1, len(self.pad.presets) - 1)
        if _any(b.slower, edges):
            s.preset = max(s.preset - 1, 0)
        if _any(b.joint_next, edges):
            s.joint = (s.joint + 1) % self.arm.n
        if _any(b.joint_prev, edges):
            s.joint = (s.joint - 1) % self.arm.n

    def _drive_values(self, axes: tuple[float, ...], pressed: frozenset[Button], shift: bool
                      ) -> dict[str, float]:
        """Per drive: Σ sign·scale·shaped input over the active bindings, clipped to [−1, 1]."""
        shaping = self.pad.shaping
        shaped: dict[int, float] = {}
        out: dict[str, float] = {}
        for bnd in self._active[(self._state.mode == "joint", shift)]:
            if bnd.axis is not None:
                if bnd.axis not in shaped:
                    shaped.update(self._shape(bnd.axis, axes, shaping))
                v = shaped[bnd.axis]
            else:
                v = float(_any(bnd.plus, pressed)) - float(_any(bnd.minus, pressed))
            out[bnd.drive] = out.get(bnd.drive, 0.0) + bnd.sign * bnd.scale * v
        return {d: clamp_unit(v) for d, v in out.items()}

    def _shape(self, axis: int, axes: tuple[float, ...], shaping: Shaping) -> dict[int, float]:
        def raw(i: int) -> float:
            return float(axes[i]) if i < len(axes) else 0.0
        pair = self._stick_of.get(axis)
        if pair is None:
            return {axis: shaping.axis(raw(axis))}
        x, y = shaping.stick(raw(pair[0]), raw(pair[1]))
        return {pair[0]: x, pair[1]: y}

    def _direct(self, c: DirectCommand) -> Intent:
        s = self._state
        self._baseline = None
        mode = "joint" if c.joint is not None else "cartesian"
        joint = s.joint if c.joint is None else c.joint
        twist = np.array(c.twist, dtype=float) if mode == "cartesian" else np.zeros(6)
        rate = c.joint_rate if mode == "joint" else 0.0
        return Intent(twist=twist, frame=c.frame, mode=mode, joint=joint, joint_rate=rate,
                      reduced=c.reduced or self.reduced_locked, preset=s.preset,
                      speed_fraction=1.0, enable=c.enable, stop=c.stop, reset=c.reset,
                      present=True, direct=True)

    def _intent(self, twist: NDArray[np.float64], rate: float, *, enable: bool, stop: bool,
                reset: bool, present: bool, shift: bool = False) -> Intent:
        s = self._state
        return Intent(twist=twist, frame=s.frame, mode=s.mode, joint=s.joint, joint_rate=rate,
                      reduced=s.reduced, preset=s.preset, speed_fraction=self.speed_fraction,
                      enable=enable, stop=stop, reset=reset, present=present, shift=shift)


def _any(buttons: tuple[Button, ...], pressed: frozenset[Button]) -> bool:
    for b in buttons:
        if b in pressed:
            return True
    return False
