"""Workcell shapes as primitive solids: the one form that drawings take them in (pure).

The simulated arm's PyBullet bodies, the status window's outlines and the workcell digest
on the wire all need the same few numbers per shape: a kind, a pose and sizes. `solid_of`
turns each shape of `runtime.arm.cell` into that form once, so no consumer reads the shape
classes itself.

    kind       pose (4×4, base frame)                      sizes (m)
    box        centre and axes                             half extents (hx, hy, hz)
    cylinder   centre, axis along local z                  (radius, length)
    sphere     centre (no rotation)                        (radius,)
    capsule    segment midpoint, segment along local z     (radius, segment length)
    halfspace  a point on the plane, local z = the outward  ()
               normal (towards the free side); solid below
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .cell import Box, Cell, Cylinder, HalfSpace, Shape, Sphere, ToolCapsule

KINDS = ("box", "cylinder", "sphere", "capsule", "halfspace")


@dataclass(frozen=True, eq=False)
class Solid:
    """One primitive solid (see the module docstring for the meaning of pose and sizes)."""

    name: str
    kind: str
    pose: NDArray[np.float64]
    sizes: tuple[float, ...] = ()


def solid_of(shape: Shape) -> Solid:
    """A workcell object as a solid in the base frame."""
    if isinstance(shape, Box):
        return Solid(shape.name, "box", np.asarray(shape.pose, float),
                     tuple(map(float, shape.half_extents_m)))
    if isinstance(shape, Cylinder):
        return Solid(shape.name, "cylinder", np.asarray(shape.pose, float),
                     (float(shape.radius_m), 2.0 * float(shape.half_length_m)))
    if isinstance(shape, Sphere):
        return Solid(shape.name, "sphere", translation(shape.center_m), (float(shape.radius_m),))
    if isinstance(shape, HalfSpace):
        n = np.asarray(shape.normal, float)
        T = translation(n * shape.offset_m)
        T[:3, :3] = rotation_to(n)
        return Solid(shape.name, "halfspace", T)
    raise TypeError(f"not a workcell shape: {shape!r}")


def capsule(name: str, start_m: ArrayLike, end_m: ArrayLike, radius_m: float) -> Solid:
    """A capsule around the segment start–end (m, one frame), as a solid in that frame."""
    p0, p1 = np.asarray(start_m, float), np.asarray(end_m, float)
    axis = p1 - p0
    length = float(np.linalg.norm(axis))
    T = translation((p0 + p1) / 2.0)
    if length > 1e-12:
        T[:3, :3] = rotation_to(axis / length)
    return Solid(name, "capsule", T, (float(radius_m), length))


def tool_solids(tool: tuple[ToolCapsule, ...]) -> list[Solid]:
    """The tool's capsules as solids in the flange frame."""
    return [capsule(c.name, c.start_m, c.end_m, c.radius_m) for c in tool]


def cell_solids(cell: Cell) -> list[Solid]:
    """Every object of the workcell, in its file's order."""
    return [solid_of(shape) for shape in cell.objects]


def translation(p: ArrayLike) -> NDArray[np.float64]:
    T = np.eye(4)
    T[:3, 3] = p
    return T


def rotation_to(z: NDArray[np.float64]) -> NDArray[np.float64]:
    """A rotation whose third column is the unit vector z (any turn about it will do)."""
    z = np.asarray(z, float) / np.linalg.norm(z)
    helper = np.array([1.0, 0.0, 0.0]) if abs(z[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    x = np.cross(helper, z)
    x /= np.linalg.norm(x)
    return np.column_stack((x, np.cross(z, x), z))
