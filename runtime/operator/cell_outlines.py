"""The workcell's objects as outlines in the status window's orthographic views (pure numpy).

A view looks along one base axis and shows two others (top: x right, y up; side: x right,
z up). A solid's outline there is the convex hull of its projected points: a box's eight
corners, a cylinder's two end circles, a sphere's silhouette circle. A half-space (a floor,
a wall) shows as a line with its solid side when its plane is seen edge-on (normal within
60° of the view plane); otherwise it covers the whole view and is left out.

Outlines are computed once per workcell (`CellOutlines.of`) and drawn into the window's
static background; they are in metres in the base frame.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable

import numpy as np
from numpy.typing import NDArray

from ..arm.cell import Cell
from ..arm.solids import Solid, cell_solids, solid_of

Axes = tuple[int, int]
VIEWS: tuple[Axes, ...] = ((0, 1), (0, 2))
CIRCLE_POINTS = 32
EDGE_ON = 0.5            # |normal · view direction| below this: the plane is seen edge-on


@dataclass(frozen=True, eq=False)
class CellOutlines:
    """Per view (axes): the solids' polygons (name, (k, 2) points in m) and the
    half-spaces seen edge-on (name, a point on the line, the outward normal, both 2-D).
    Hashed by identity: built once per workcell, it keys the window's background cache."""

    name: str
    polygons: dict[Axes, tuple[tuple[str, NDArray[np.float64]], ...]]
    halfplanes: dict[Axes, tuple[tuple[str, NDArray[np.float64], NDArray[np.float64]], ...]]
    keep_in: dict[Axes, NDArray[np.float64]] | None = None
    safety_m: float = 0.0        # d_s: the nearest pair is drawn red at or below it
    influence_m: float = 0.0     # d_i: amber inside it (the velocity damper acts)

    @classmethod
    def of_cell(cls, cell: Cell) -> "CellOutlines":
        c = cell.clearance
        return cls.of(cell.name, cell_solids(cell),
                      None if cell.keep_in is None else solid_of(cell.keep_in),
                      safety_m=c.safety_distance_m, influence_m=c.influence_distance_m)

    @classmethod
    def of(cls, name: str, shapes: Iterable[Solid], keep_in: Solid | None = None, *,
           safety_m: float = 0.0, influence_m: float = 0.0) -> "CellOutlines":
        shapes = list(shapes)
        polygons, halfplanes = {}, {}
        for axes in VIEWS:
            polygons[axes] = tuple((s.name, hull(project(solid_points(s), axes)))
                                   for s in shapes if s.kind != "halfspace")
            halfplanes[axes] = tuple((s.name, *line)
                                     for s in shapes if s.kind == "halfspace"
                                     and (line := edge_on(s.pose, axes)) is not None)
        box = None if keep_in is None else \
            {axes: hull(project(solid_points(keep_in), axes)) for axes in VIEWS}
        return cls(name, polygons, halfplanes, box, safety_m, influence_m)


def solid_points(s: Solid) -> NDArray[np.float64]:
    """Points whose convex hull is the solid (its silhouette from any direction, for a
    sphere and a capsule: circles in the three coordinate planes), base frame (k, 3)."""
    T = np.asarray(s.pose, dtype=float)
    if s.kind == "box":
        signs = np.array([[x, y, z] for x in (-1, 1) for y in (-1, 1) for z in (-1, 1)])
        local = signs * np.asarray(s.sizes)
    elif s.kind == "cylinder":
        r, length = s.sizes
        local = np.vstack([_circle(r, 2) + [0.0, 0.0, z] for z in (-length / 2, length / 2)])
    elif s.kind in ("sphere", "capsule"):
        r = s.sizes[0]
        half = s.sizes[1] / 2 if s.kind == "capsule" else 0.0
        ball = np.vstack([_circle(r, axis) for axis in range(3)])
        local = np.vstack([ball + [0.0, 0.0, z] for z in (-half, half)])
    else:
        raise ValueError(f"no outline for a {s.kind}")
    return local @ T[:3, :3].T + T[:3, 3]


def _circle(radius: float, normal_axis: int) -> NDArray[np.float64]:
    a = np.linspace(0.0, 2.0 * np.pi, CIRCLE_POINTS, endpoint=False)
    pts = np.zeros((CIRCLE_POINTS, 3))
    u, v = [i for i in range(3) if i != normal_axis]
    pts[:, u], pts[:, v] = radius * np.cos(a), radius * np.sin(a)
    return pts


def project(points: NDArray[np.float64], axes: Axes) -> NDArray[np.float64]:
    return points[:, list(axes)]


def edge_on(pose: NDArray[np.float64], axes: Axes
            ) -> tuple[NDArray[np.float64], NDArray[np.float64]] | None:
    """A half-space's boundary in a view: (a point on it, its outward normal), 2-D; None
    when the plane faces the viewer (it would cover the whole view)."""
    depth = ({0, 1, 2} - set(axes)).pop()
    n = np.asarray(pose, dtype=float)[:3, 2]
    if abs(n[depth]) > EDGE_ON:
        return None
    n2 = n[list(axes)]
    return np.asarray(pose)[:3, 3][list(axes)], n2 / np.linalg.norm(n2)


def hull(points: NDArray[np.float64]) -> NDArray[np.float64]:
    """The convex hull of 2-D points, counter-clockwise (Andrew's monotone chain, 1979)."""
    pts = sorted(set(map(tuple, np.round(points, 12))))
    if len(pts) <= 2:
        return np.array(pts)

    def cross(o, a, b) -> float:
        return (a[0] - o[0]) * (b[1] - o[1]) - (a[1] - o[1]) * (b[0] - o[0])

    lower: list = []
    upper: list = []
    for p in pts:
        while len(lower) >= 2 and cross(lower[-2], lower[-1], p) <= 0:
            lower.pop()
        lower.append(p)
    for p in reversed(pts):
        while len(upper) >= 2 and cross(upper[-2], upper[-1], p) <= 0:
            upper.pop()
        upper.append(p)
    return np.array(lower[:-1] + upper[:-1])
