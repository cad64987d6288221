"""Device axes and buttons → operator intent (pure: no I/O, no clock).

One cycle of a `Mapper`:

    raw axes ─► clamp to [−1, 1] ─► dead zone with rescale (radial on a stick's axis pair,
    axial on a lone axis) ─► response curve ─► sign · scale per binding ─► sum per drive,
    clip to [−1, 1] ─► × speed (preset fraction of the arm's caps, reduced-speed cap)
    ─► twist (m/s, rad/s) in the chosen frame, or one joint's rate (rad/s or m/s)

    buttons ─► held levels (enable, stop, reset, shift) and edge-triggered toggles
    (frame, mode, reduced, faster/slower, next/previous joint)

The dead zones and curves are in `shaping`, the pad files in `pads`, the values a source
delivers and the intent that comes out in `intent`.

Reduced speed (limits.REDUCED_SPEED_M_S, 250 mm/s after ISO 10218-1): the mapper scales
stick travel to this cap so the whole stick range stays usable; the limits stage enforces
the cap on the joint rates that result.
Enable, stop and reset are passed on as held levels: their semantics (held at start,
latching, re-arming) belong to `runtime.control.safety`. Toggles are edge-triggered here: a held
toggle button flips once, and buttons already held when a device appears flip nothing.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..arm.model import TASK_AXES, Arm
from .intent import Button, DirectCommand, InputFrame, Intent
from .limits import REDUCED_SPEED_M_S
from .pads import PadMapping
from .shaping import Shaping, clamp_unit

__all__ = ["Mapper"]


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
    """

    def __init__(self, pad: PadMapping, arm: Arm, *, reduced_locked: bool = False) -> None:
        self.pad = pad
        self.arm = arm
        self.reduced_locked = reduced_locked
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
        if self._state.reduced and lin > REDUCED_SPEED_M_S:
            k = REDUCED_SPEED_M_S / lin  # scale both, so the stick feel stays uniform
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
