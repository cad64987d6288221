"""runtime/operator/cell_outlines.py: outlines of workcell objects in the window's views,
checked against hand-computed projections and a brute-force convex-hull test."""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from runtime.arm.solids import Solid as Shape
from runtime.operator.cell_outlines import CellOutlines, edge_on, hull


def at(p, R=np.eye(3)) -> np.ndarray:
    T = np.eye(4)
    T[:3, :3], T[:3, 3] = R, p
    return T


def rot_z(a: float) -> np.ndarray:
    c, s = math.cos(a), math.sin(a)
    return np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]])


def test_a_turned_box_from_above_is_its_turned_rectangle() -> None:
    box = Shape("fixture", "box", at([0.5, 0.1, 0.2], rot_z(math.pi / 2)), (0.2, 0.1, 0.05))
    out = CellOutlines.of("c", [box])
    (_, top), = out.polygons[(0, 1)]
    # Turned 90° about z: 0.2 m half extent along y, 0.1 m along x.
    assert np.allclose(sorted(map(tuple, top)), sorted([(0.4, -0.1), (0.6, -0.1),
                                                        (0.6, 0.3), (0.4, 0.3)]))
    (_, side), = out.polygons[(0, 2)]
    assert np.allclose(side.min(axis=0), [0.4, 0.15]) and np.allclose(side.max(axis=0),
                                                                      [0.6, 0.25])


def test_a_floor_shows_edge_on_from_the_side_only() -> None:
    floor = Shape("bench", "halfspace", at([0.0, 0.0, -0.02]))
    out = CellOutlines.of("c", [floor])
    assert out.halfplanes[(0, 1)] == ()                  # seen from above it is everywhere
    (name, point, normal), = out.halfplanes[(0, 2)]
    assert name == "bench" and np.allclose(point, [0.0, -0.02]) and np.allclose(normal, [0, 1])
    wall = at([-0.3, 0, 0], np.array([[0, 0, 1], [0, 1, 0], [-1, 0, 0]]))  # normal +x
    assert np.allclose(edge_on(wall, (0, 1))[1], [1.0, 0.0])


def test_sphere_and_cylinder_outlines_have_their_radii() -> None:
    ball = Shape("ball", "sphere", at([0.2, 0.3, 0.4]), (0.05,))
    post = Shape("post", "cylinder", at([0.0, -0.4, 0.5]), (0.03, 1.0))
    out = CellOutlines.of("c", [ball, post])
    (_, b), (_, p) = out.polygons[(0, 1)]
    assert np.allclose(np.linalg.norm(b - [0.2, 0.3], axis=1), 0.05)
    assert np.allclose(np.linalg.norm(p - [0.0, -0.4], axis=1), 0.03)
    (_, b), (_, p) = out.polygons[(0, 2)]
    assert np.allclose(p.min(axis=0), [-0.03, 0.0]) and np.allclose(p.max(axis=0), [0.03, 1.0])


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(-1, 1), st.floats(-1, 1)), min_size=3, max_size=40))
def test_hull_contains_every_point_and_turns_left(points) -> None:
    pts = np.array(points)
    h = hull(pts)
    if len(h) < 3:
        return
    edges = np.roll(h, -1, axis=0) - h
    # Counter-clockwise: every point lies left of (or on) every edge (brute force).
    cross = edges[:, None, 0] * (pts[None, :, 1] - h[:, None, 1]) - \
        edges[:, None, 1] * (pts[None, :, 0] - h[:, None, 0])
    assert (cross >= -1e-9).all()
