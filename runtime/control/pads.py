"""Pad mappings (configs/pads/*.toml): which axis drives what, which button does what,
the speed presets, the response shaping and the start state; every error names the file,
line and field.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

from ..arm.load import resolve_shipped
from ..arm.model import FRAMES, TASK_AXES, configs_dir
from ..tomlsource import TomlSource, finite_number, read_toml, reject_unknown
from .intent import Button
from .shaping import CURVES, Shaping

__all__ = ["ACTIONS", "DEVICES", "DRIVES", "LAYERS", "MODES", "REQUIRED_ACTIONS", "AxisBinding",
           "ButtonMap", "PadMapping", "load_pad", "pad_from_toml", "pad_names",
           "resolve_pad_path"]

DRIVES = TASK_AXES + ("joint",)
MODES = ("cartesian", "joint")
LAYERS = ("main", "shift", "any")
DEVICES = ("gamepad", "keyboard")

_HAT = re.compile(r"hat(\d+):(up|down|left|right)")


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
    """A shipped pad mapping's name (configs/pads/) or a .toml path."""
    return resolve_shipped("pad", name_or_path)


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
    return str(value)


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
