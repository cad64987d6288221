"""What an input source delivers (`InputFrame`, `DirectCommand`) and what the mapper makes
of it (`Intent`): plain frozen values shared by the operator's devices, the control cycle
and the session log.

Sources (gamepad, keyboard, script, network) all deliver an `InputFrame`; the script and
network sources carry a `DirectCommand` (a twist already in SI units) instead of axes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

__all__ = ["Button", "DirectCommand", "InputFrame", "Intent"]

Button = int | str
"""A pad button index, a key name as pygame spells it ("space", "left shift"), or a hat
direction "hat<N>:<up|down|left|right>"."""


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
