"""Response shaping of a device axis: dead zones, curves (pure functions of floats).

Dead zone: stick drift at rest is common practice to mask with a dead zone of about 10 %
of full travel (published advice puts it between 0.1 and 0.2, Sutphin 2013, REFERENCES §6).
A radial dead zone on a stick keeps diagonals undistorted: out = dir·(|in| − dz)/(1 − dz).
The response curve then acts on the rescaled magnitude, so fine motion near the centre
is possible while full deflection still reaches full speed (out(±1) = ±1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["CURVES", "Shaping", "clamp_unit", "deadzone_axial", "deadzone_radial",
           "expo_curve", "power_curve"]

CURVES = ("linear", "expo", "power")


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
