"""The workcell in PyBullet: static bodies for its objects, and the contacts PyBullet finds.

The runtime keeps clearance with its own distance code (runtime/arm/distance.py); the
simulated arm holds the same objects as PyBullet static bodies (mass 0, a collision shape
and a visual of the same shape), so contact is measured by something other than that
code: PyBullet's own narrow phase, read back with `getContactPoints` after each step
(pybullet quickstart guide, "getContactPoints": contactDistance < 0 is penetration).
The contact points of a step are those of its collision pass, which runs before the
step's integration: a report lags the pose by at most one physics step.

Every shape comes as a `runtime.arm.solids.Solid` (name, kind, pose, sizes), posed in the
frame the kinematics works in (runtime/arm/kinematics.py, the arm's base transform
included), which is the simulation's world frame. Cylinders are true cylinders here; the
runtime's distance code takes their enclosing capsules (conservative), so a contact here
always means a negative distance there.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pybullet as pb

from runtime import palette
from runtime.arm.cell import Cell
from runtime.arm.model import Arm
from runtime.arm.solids import Solid, capsule, cell_solids
from runtime.link.protocol import cell_digest

from .urdf import matrix_to_rpy_exact

# A half-space is infinite for collision; it is drawn as a square plate this wide (m).
HALFSPACE_DRAWN_M = 3.0
# Workcell objects in jogwire's palette: objects, and floors and walls (half-spaces).
OBJECT_RGBA = palette.unit(palette.CELL_OBJECT)
HALFSPACE_RGBA = palette.unit(palette.CELL_FLOOR)


def pose_of(T: np.ndarray) -> tuple[list[float], list[float]]:
    """A 4×4 transform as PyBullet's (position, quaternion x y z w)."""
    return (np.asarray(T[:3, 3], dtype=float).tolist(),
            list(pb.getQuaternionFromEuler(matrix_to_rpy_exact(T[:3, :3]))))


def visual_shape(solid: Solid, client: int) -> int:
    kw, rgba = _geometry(solid), OBJECT_RGBA
    if solid.kind == "halfspace":   # drawn as a thin plate just under the plane
        rgba = HALFSPACE_RGBA
        kw = {"shapeType": pb.GEOM_BOX,
              "halfExtents": [HALFSPACE_DRAWN_M / 2, HALFSPACE_DRAWN_M / 2, 0.002],
              "visualFramePosition": [0.0, 0.0, -0.002]}
    if kw["shapeType"] in (pb.GEOM_CYLINDER, pb.GEOM_CAPSULE):
        kw["length"] = kw.pop("height")     # visual shapes call it length
    return pb.createVisualShape(rgbaColor=list(rgba), physicsClientId=client, **kw)


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


def add_static_bodies(client: int, solids: list[Solid]) -> dict[int, str]:
    """A static body (mass 0) per solid, at its pose; returns body id → object name."""
    names = {}
    for solid in solids:
        position, orientation = pose_of(solid.pose)
        body = pb.createMultiBody(
            baseMass=0.0,
            baseCollisionShapeIndex=pb.createCollisionShape(physicsClientId=client,
                                                            **_geometry(solid)),
            baseVisualShapeIndex=visual_shape(solid, client), basePosition=position,
            baseOrientation=orientation, physicsClientId=client)
        names[body] = solid.name
    return names


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
    """A workcell as the simulated arm holds it (`sim_cell`).

    objects   the static objects (base frame)
    parts     the arm's collision model: (parent URDF link, part link, shape in the
              parent's frame, drawn?) — one link per capsule, named after it, so a contact
              names the very capsule the runtime's distance code names
    checked   the pairs of names the runtime checks (arm part with object, or arm part
              with arm part); PyBullet's collision detection is switched off for the rest
              (neighbouring links, the arm's mount, the workcell's excluded pairs)
    """

    name: str
    objects: list[Solid]
    parts: list[tuple[str, str, Solid, bool]]
    checked: frozenset[frozenset[str]]
    digest: str = ""

    @property
    def part_names(self) -> dict[str, str]:
        """Part link name → the part's name in contact reports."""
        return {link: solid.name for _, link, solid, _ in self.parts}


PART_PREFIX = "part_"


def sim_cell(arm: Arm, cell: Cell) -> SimCell:
    """The workcell and the arm's collision model (runtime/arm/collision.py) for PyBullet."""
    # Imported here: the distance code is some 10 ms to import, which a simulated arm
    # without a workcell (a preflight's lockstep child) need not pay at its start.
    from runtime.arm.distance import collision_model
    model = collision_model(arm, cell)
    caps = model.capsules
    root = "base_link" if np.array_equal(arm.base, np.eye(4)) else "world"
    tool = {c.name for c in cell.tool} or {"tool"}
    parts = []
    for k, name in enumerate(caps.names):
        frame = int(caps.frame[k])
        parent = root if frame < 0 else f"link_{frame + 1}"
        parts.append((parent, PART_PREFIX + name,
                      capsule(name, caps.start[k], caps.end[k], float(caps.radius[k])),
                      name in tool))
    checked = frozenset(frozenset(pair) for pair in model.pair_names)
    return SimCell(cell.name, cell_solids(cell), parts, checked, cell_digest(cell))
