"""The workcell in PyBullet: static bodies for its objects, and the contacts PyBullet finds.

The runtime keeps clearance with its own distance code (runtime/arm/distance.py); the
simulated arm holds the same objects as PyBullet static bodies (mass 0, a collision shape
and a visual of the same shape), so contact is measured by something other than that
code: PyBullet's own narrow phase, read back with `getContactPoints` after each step
(pybullet quickstart guide, "getContactPoints": contactDistance < 0 is penetration).
The contact points of a step are those of its collision pass, which runs before the
step's integration: a report lags the pose by at most one physics step.

Every shape is first turned into a `Solid` (name, kind, pose in the arm's base frame,
sizes), in `solids_of_cell` and `solids_of_parts`: the only place that knows the
workcell's dataclasses. The world frame of the simulation is the arm's base frame moved by
the arm's base transform, so a solid sits at base · pose.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pybullet as pb

from .urdf import matrix_to_rpy_exact

KINDS = ("box", "cylinder", "sphere", "capsule", "halfspace")
# A half-space is infinite for collision; it is drawn as a square plate this wide (m).
HALFSPACE_DRAWN_M = 3.0
OBJECT_RGBA = (0.55, 0.62, 0.70, 1.0)     # workcell objects in snapshots (see palette note)
TOOL_RGBA = (0.20, 0.45, 0.75, 1.0)


@dataclass(frozen=True, eq=False)
class Solid:
    """One collision shape, as PyBullet takes it.

    pose: 4×4 in the arm's base frame (box, cylinder, capsule: centred at the origin, axis
    along z; half-space: the plane through the origin, its z axis the outward normal, the
    solid side below). sizes (m): box (hx, hy, hz) half extents; cylinder (radius,
    length); sphere (radius,); capsule (radius, length of the segment between the two
    sphere centres); half-space ().
    """

    name: str
    kind: str
    pose: np.ndarray
    sizes: tuple[float, ...] = ()
    rgba: tuple[float, float, float, float] = field(default=OBJECT_RGBA)


def capsule_solid(name: str, p0: np.ndarray, p1: np.ndarray, radius: float,
                  rgba: tuple[float, float, float, float] = TOOL_RGBA) -> Solid:
    """A capsule around the segment p0–p1 (m, one frame) as a `Solid` in that frame."""
    p0, p1 = np.asarray(p0, dtype=float), np.asarray(p1, dtype=float)
    axis = p1 - p0
    length = float(np.linalg.norm(axis))
    T = np.eye(4)
    T[:3, 3] = (p0 + p1) / 2.0
    if length > 1e-12:
        T[:3, :3] = _rotation_to(axis / length)
    return Solid(name, "capsule", T, (float(radius), length), rgba)


def _rotation_to(z: np.ndarray) -> np.ndarray:
    """A rotation whose third column is the unit vector z."""
    helper = np.array([1.0, 0.0, 0.0]) if abs(z[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    x = np.cross(helper, z)
    x /= np.linalg.norm(x)
    return np.column_stack((x, np.cross(z, x), z))


def pose_of(T: np.ndarray) -> tuple[list[float], list[float]]:
    """A 4×4 transform as PyBullet's (position, quaternion x y z w)."""
    return (np.asarray(T[:3, 3], dtype=float).tolist(),
            list(pb.getQuaternionFromEuler(matrix_to_rpy_exact(T[:3, :3]))))


def collision_shape(solid: Solid, client: int, frame: np.ndarray | None = None) -> int:
    """A PyBullet collision shape for `solid`; `frame` (4×4) places it in a link's frame
    (for a shape that is part of a multibody), else it sits at the body's origin."""
    kw = _geometry(solid)
    if frame is not None:
        kw["collisionFramePosition"], kw["collisionFrameOrientation"] = pose_of(frame)
    return pb.createCollisionShape(physicsClientId=client, **kw)


def visual_shape(solid: Solid, client: int) -> int:
    kw = _geometry(solid)
    if solid.kind == "halfspace":   # drawn as a thin plate just under the plane
        kw = {"shapeType": pb.GEOM_BOX,
              "halfExtents": [HALFSPACE_DRAWN_M / 2, HALFSPACE_DRAWN_M / 2, 0.002],
              "visualFramePosition": [0.0, 0.0, -0.002]}
    if kw["shapeType"] in (pb.GEOM_CYLINDER, pb.GEOM_CAPSULE):
        kw["length"] = kw.pop("height")     # visual shapes call it length
    return pb.createVisualShape(rgbaColor=list(solid.rgba), physicsClientId=client, **kw)


def _geometry(solid: Solid) -> dict:
    s = solid.sizes
    if solid.kind == "box":
        return {"shapeType": pb.GEOM_BOX, "halfExtents": list(s)}
    if solid.kind == "cylinder":
        return {"shapeType": pb.GEOM_CYLINDER, "radius": s[0], "height": s[1]}
    if solid.kind == "capsule":
        return {"shapeType": pb.GEOM_CAPSULE, "radius": s[0], "height": s[1]}
    if solid.kind == "sphere":
        return {"shapeType": pb.GEOM_SPHERE, "radius": s[0]}
    if solid.kind == "halfspace":
        return {"shapeType": pb.GEOM_PLANE, "planeNormal": [0.0, 0.0, 1.0]}
    raise ValueError(f"unknown solid kind {solid.kind!r}")


@dataclass
class CellBodies:
    """The static bodies of one workcell in one PyBullet client: body id → object name."""

    client: int
    names: dict[int, str]

    @classmethod
    def add(cls, client: int, solids: list[Solid], base: np.ndarray) -> "CellBodies":
        """A static body (mass 0) per solid, placed at base · pose."""
        names = {}
        for solid in solids:
            position, orientation = pose_of(np.asarray(base) @ solid.pose)
            body = pb.createMultiBody(
                baseMass=0.0, baseCollisionShapeIndex=collision_shape(solid, client),
                baseVisualShapeIndex=visual_shape(solid, client), basePosition=position,
                baseOrientation=orientation, physicsClientId=client)
            names[body] = solid.name
        return cls(client, names)


def read_contacts(client: int, arm_body: int, parts: dict[int, str],
                  objects: dict[int, str]) -> tuple[tuple[str, str, float], ...]:
    """The pairs touching after the last step: (part of the arm, what it touches, depth m),
    deepest first, one entry per pair. parts: the arm's link index → part name (links
    without a name are not reported); objects: static body id → object name.

    Self-contacts come once per pair (PyBullet lists both orders). Touching counts
    (contactDistance ≤ 0): PyBullet also lists pairs a little apart, within its contact
    threshold, which are not contacts.
    """
    deepest: dict[tuple[str, str], float] = {}
    for c in pb.getContactPoints(bodyA=arm_body, physicsClientId=client):
        body_b, link_a, link_b, distance = c[2], c[3], c[4], c[8]
        if distance > 0.0:
            continue
        a = parts.get(link_a)
        b = parts.get(link_b) if body_b == arm_body else objects.get(body_b)
        if a is None or b is None:
            continue
        if body_b == arm_body and a > b:
            a, b = b, a
        key = (a, b)
        deepest[key] = max(deepest.get(key, 0.0), -distance)
    return tuple(sorted(((a, b, d) for (a, b), d in deepest.items()), key=lambda x: -x[2]))


@dataclass(frozen=True, eq=False)
class SimCell:
    """A workcell as the simulated arm holds it.

    objects: the static objects (base frame); links: URDF link name → (the part's name in
    contact reports, its collision shapes in the link's frame), the arm's collision model
    and the tool (on "flange"); ignored: pairs of part names never reported (adjacent
    links and the pairs the workcell lists); hello: what the arm side answers to `cell`.
    """

    name: str
    objects: list[Solid]
    links: dict[str, tuple[str, list[Solid]]]
    ignored: frozenset[frozenset[str]] = frozenset()
    digest: str = ""

    def collisions(self) -> dict[str, list[Solid]]:
        return {link: shapes for link, (_, shapes) in self.links.items()}
