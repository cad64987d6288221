"""The workcell in PyBullet: static bodies for its objects, and the contacts PyBullet finds.

The runtime keeps clearance with its own distance code (runtime/arm/distance.py); the
simulated arm holds the same objects as PyBullet static bodies (mass 0, collision shape
and a visual of the same shape), so contact is measured by something other than that code:
PyBullet's own narrow phase, read back with `getContactPoints` after each step (pybullet
quickstart guide, "getContactPoints": contactDistance is negative for penetration).

Frames: the objects are placed in the arm's base frame (runtime/arm/cell.py); the
simulated arm's base sits at the world origin transformed by the arm's base transform,
so each object's pose is base · pose.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pybullet as pb

from runtime.arm.cell import Box, Cell, Cylinder, HalfSpace, Sphere

# PyBullet reports a pair within its contact threshold even when the two are a little
# apart (contactDistance > 0); touching or penetrating is contactDistance ≤ 0.
TOUCHING_M = 0.0


@dataclass(frozen=True)
class CellBodies:
    """The static bodies of one workcell in one PyBullet client: body id → object name."""

    names: dict[int, str]

    def remove(self, client: int) -> None:
        for body in self.names:
            pb.removeBody(body, physicsClientId=client)


def _pose(T: np.ndarray) -> tuple[list[float], list[float]]:
    """A 4×4 transform as PyBullet's (position, quaternion x y z w)."""
    R = T[:3, :3]
    # Shepperd's method via the largest diagonal term (numerically safe for any rotation).
    w = np.sqrt(max(0.0, 1.0 + R[0, 0] + R[1, 1] + R[2, 2])) / 2.0
    x = np.sqrt(max(0.0, 1.0 + R[0, 0] - R[1, 1] - R[2, 2])) / 2.0
    y = np.sqrt(max(0.0, 1.0 - R[0, 0] + R[1, 1] - R[2, 2])) / 2.0
    z = np.sqrt(max(0.0, 1.0 - R[0, 0] - R[1, 1] + R[2, 2])) / 2.0
    x = np.copysign(x, R[2, 1] - R[1, 2])
    y = np.copysign(y, R[0, 2] - R[2, 0])
    z = np.copysign(z, R[1, 0] - R[0, 1])
    return T[:3, 3].tolist(), [float(x), float(y), float(z), float(w)]
