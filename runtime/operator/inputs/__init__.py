"""Input sources: gamepad, keyboard, scripted file, network twist.

Every source has the same tiny interface, so the control loop and the recorder treat them
alike and can log the raw input of every cycle:

    name: str
    read(now_s) -> InputFrame     latest state; never blocks
    close() -> None

Some sources have more, declared below as small protocols that a runner checks with
`isinstance`: the pygame sources take events (`EventInput`: whoever owns pygame's event
queue, the status window on the main thread, hands each event to them), the gamepad pumps
its own events without a window (`PumpedInput`), and a script ends (`FiniteInput`).
Importing this package imports neither pygame nor zmq; the modules that need them are
imported when used.
"""

from __future__ import annotations

from typing import Any, Protocol, runtime_checkable

from ...arm.model import Arm
from ...control.intent import InputFrame
from ...errors import ConfigError

__all__ = ["INPUT_KINDS", "EventInput", "FiniteInput", "InputSource", "PumpedInput",
           "open_source", "parse_input_spec"]

INPUT_KINDS = ("gamepad", "keyboard", "script", "network")


class InputSource(Protocol):
    name: str

    def read(self, now_s: float) -> InputFrame: ...

    def close(self) -> None: ...


@runtime_checkable
class EventInput(Protocol):
    """A source fed with pygame events by whoever owns the event queue."""

    def handle_event(self, event: Any) -> bool: ...


@runtime_checkable
class PumpedInput(Protocol):
    """A source that can pump pygame's event queue itself (no window to do it)."""

    def pump(self) -> list[Any]: ...


@runtime_checkable
class FiniteInput(Protocol):
    """A source that ends: `finished(now_s)` once its last segment is over; `progress`
    says how far it is, for the status (name, elapsed s, total s)."""

    def finished(self, now_s: float) -> bool: ...

    def progress(self, now_s: float) -> tuple[str, float, float]: ...


def parse_input_spec(spec: str) -> tuple[str, str]:
    """`gamepad`, `keyboard`, `script:FILE` or `network:ENDPOINT` → (kind, argument)."""
    kind, _, arg = spec.partition(":")
    if kind not in INPUT_KINDS:
        raise ConfigError(f"unknown input {spec!r}; use gamepad, keyboard, script:FILE or "
                          f"network:ENDPOINT", field="input")
    if kind in ("script", "network") and not arg:
        raise ConfigError(f"input {kind!r} needs an argument: {kind}:"
                          f"{'FILE' if kind == 'script' else 'ENDPOINT'}", field="input")
    if kind in ("gamepad", "keyboard") and arg:
        raise ConfigError(f"input {kind!r} takes no argument, got {arg!r}", field="input")
    return kind, arg


def open_source(spec: str, *, arm: Arm, stale_after_s: float) -> InputSource:
    """Open the source an `--input` spec names. The pygame sources need their events fed
    (`handle_event`, or `GamepadSource.pump()` without a window)."""
    kind, arg = parse_input_spec(spec)
    if kind == "script":
        from .script import ScriptSource, load_script
        return ScriptSource(load_script(arg, arm))
    if kind == "network":
        from .network import NetworkSource
        return NetworkSource(arg, stale_after_s=stale_after_s)
    if kind == "gamepad":
        from .gamepad import GamepadSource
        return GamepadSource()
    from .keyboard import KeyboardSource
    return KeyboardSource()

