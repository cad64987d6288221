"""The arm's collision model: capsules (segment + radius) on its links, and the pairs to check.

Capsules come from the uniform chain of `runtime.arm.model`, so DH and URDF arms alike:

- link i (moved by joint i) is the segment from joint i's origin to joint i+1's origin (the
  last one to the flange), with the joint's `link_radius_m`. Origins that coincide (a
  spherical wrist) give a sphere. Where the arm file gives the link's shapes (URDF
  `<collision>`, `Joint.collision`), their capsules stand in instead, named after the joint
  (`name.1`, `name.2` … for several). All end points are fixed in joint frame i, so one
  pass of forward kinematics places every capsule.
- a `base` capsule from the base frame's origin to joint 0's origin, when they differ (a
  column under the first joint), static.
- the tool: the cell's capsules in the flange frame; without any, one from the flange to the
  TCP with the last link's radius.

Pairs (`CollisionModel.build`): every link and tool capsule against every object of the
cell, and against every other link that is not a neighbour. Neighbours are next to each other
in the chain, also across links of zero length (the three joints of a spherical wrist share a
point, so the forearm and the hand touch there by construction); the tool is part of the
last link's body. So across a spherical wrist the tool is not checked against the forearm:
the wrist's joint limits keep those apart. The `mount` object is not
checked against the base and the first link; the cell's `excluded_pairs` drop more. The TCP
point is checked against the faces of the keep-in box. Pure numpy, no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .cell import Box, Cell, Cylinder, HalfSpace, Sphere
from .model import Arm

BASE = "base"
TCP = "tcp"
_ZERO_LENGTH_M = 1e-9


@dataclass(frozen=True, eq=False)
class ArmCapsules:
    """The arm's capsules, each fixed in one joint frame (-1: the base frame, static).

    names      one per capsule (link = its joint's name, `base`, tool capsule names)
    frame      (k,) joint frame index each capsule moves with
    start      (k, 3) and end (k, 3): end points in that frame, m
    radius     (k,) m
    chain      (k,) position along the chain: -1 base, i for link i; the tool is on the
               last link's body, n − 1
    """

    names: tuple[str, ...]
    frame: NDArray[np.intp]
    start: NDArray[np.float64]
    end: NDArray[np.float64]
    radius: NDArray[np.float64]
    chain: NDArray[np.intp]

    @staticmethod
    def of(arm: Arm, cell: Cell | None = None) -> "ArmCapsules":
        n = arm.n
        rows: list[tuple[str, int, np.ndarray, np.ndarray, float, int]] = []
        zero = np.zeros(3)
        first_origin = (arm.base @ arm.joints[0].origin)[:3, 3]
        if np.linalg.norm(first_origin) > _ZERO_LENGTH_M:
            rows.append((BASE, -1, zero, first_origin, arm.joints[0].link_radius_m, -1))
        for i, joint in enumerate(arm.joints):
            if joint.collision:  # the arm file's own shapes (URDF <collision>)
                for k, c in enumerate(joint.collision):
                    name = joint.name if len(joint.collision) == 1 else f"{joint.name}.{k + 1}"
                    rows.append((name, i, np.array(c[:3]), np.array(c[3:6]), c[6], i))
                continue
            nxt = arm.joints[i + 1].origin if i + 1 < n else arm.flange
            rows.append((joint.name, i, zero, nxt[:3, 3].copy(), joint.link_radius_m, i))
        tool = cell.tool if cell is not None else ()
        if tool:
            F = arm.flange
            for cap in tool:
                rows.append((cap.name, n - 1, F[:3, :3] @ cap.start_m + F[:3, 3],
                             F[:3, :3] @ cap.end_m + F[:3, 3], cap.radius_m, n - 1))
        else:
            rows.append(("tool", n - 1, arm.flange[:3, 3].copy(), arm.tip[:3, 3].copy(),
                         arm.joints[-1].link_radius_m, n - 1))
        names, frame, start, end, radius, chain = zip(*rows)
        return ArmCapsules(names=tuple(names), frame=np.array(frame, dtype=np.intp),
                           start=np.array(start), end=np.array(end), radius=np.array(radius),
                           chain=np.array(chain, dtype=np.intp))

    @property
    def lengths(self) -> NDArray[np.float64]:
        return np.linalg.norm(self.end - self.start, axis=1)

    def neighbours(self, a: int, b: int) -> bool:
        """True for capsules on one body (the last link and the tool), on bodies next to each
        other in the chain, or with only links of zero length between them."""
        lo, hi = sorted((int(self.chain[a]), int(self.chain[b])))
        if hi - lo <= 1:
            return True
        between = (self.chain > lo) & (self.chain < hi)
        return bool((self.lengths[between] <= _ZERO_LENGTH_M).all())

    def placed(self, frames: NDArray[np.float64]) -> tuple[NDArray[np.float64],
                                                          NDArray[np.float64]]:
        """End points (k, 3) and (k, 3) in the base frame, from `kinematics.joint_frames`."""
        F = np.concatenate((np.eye(4)[None], frames))[self.frame + 1]
        R, t = F[:, :3, :3], F[:, :3, 3]
        return (np.einsum("kij,kj->ki", R, self.start) + t,
                np.einsum("kij,kj->ki", R, self.end) + t)


@dataclass(frozen=True, eq=False)
class CollisionModel:
    """Everything the distance core needs for one arm in one cell, built once.

    Pairs come in three kernels, each as index arrays into the capsule table (arm capsules
    first, then the capsule-like objects: spheres as zero-length segments, cylinders as
    their enclosing capsule) and the object tables:
        capsule_pairs   (p, 2) capsule table indices, first always an arm capsule
        box_pairs       (p, 2) arm capsule, box index
        plane_pairs     (p, 2) arm capsule (or the TCP, the table's last row), plane index
    `pair_names` lists all of them in that order, (arm side, other side).
    """

    arm: Arm
    cell: Cell | None
    capsules: ArmCapsules
    static_start: NDArray[np.float64]   # (s, 3) capsule-like objects, base frame
    static_end: NDArray[np.float64]
    static_radius: NDArray[np.float64]
    box_pose: NDArray[np.float64]       # (b, 4, 4)
    box_half: NDArray[np.float64]       # (b, 3)
    plane_normal: NDArray[np.float64]   # (h, 3), unit, pointing to the free side
    plane_offset: NDArray[np.float64]   # (h,)
    capsule_pairs: NDArray[np.intp]
    box_pairs: NDArray[np.intp]
    plane_pairs: NDArray[np.intp]
    pair_names: tuple[tuple[str, str], ...]

    @staticmethod
    def build(arm: Arm, cell: Cell | None = None) -> "CollisionModel":
        caps = ArmCapsules.of(arm, cell)
        k = len(caps.names)
        objects = cell.objects if cell is not None else ()
        static: list[tuple[str, np.ndarray, np.ndarray, float]] = []
        boxes: list[Box] = []
        planes: list[tuple[str, np.ndarray, float]] = []
        for obj in objects:
            if isinstance(obj, Sphere):
                c = np.array(obj.center_m)
                static.append((obj.name, c, c, obj.radius_m))
            elif isinstance(obj, Cylinder):
                axis = obj.pose[:3, 2] * obj.half_length_m
                c = obj.pose[:3, 3]
                static.append((obj.name, c - axis, c + axis, obj.radius_m))
            elif isinstance(obj, Box):
                boxes.append(obj)
            elif isinstance(obj, HalfSpace):
                planes.append((obj.name, np.array(obj.normal), obj.offset_m))
        keep_in_planes = _keep_in_faces(cell.keep_in) if cell and cell.keep_in else []

        def checked(a: int, other: str) -> bool:
            name = caps.names[a]
            if cell is not None and cell.excludes(name, other):
                return False
            return not (cell is not None and other == cell.mount and caps.chain[a] <= 0)

        cap_pairs = [(a, b) for a in range(k) for b in range(a + 1, k)
                     if not caps.neighbours(a, b) and checked(a, caps.names[b])]
        cap_pairs += [(a, k + s) for s, (name, *_) in enumerate(static) for a in range(k)
                      if checked(a, name)]
        box_pairs = [(a, b) for b, box in enumerate(boxes) for a in range(k)
                     if checked(a, box.name)]
        plane_pairs = [(a, h) for h, (name, *_) in enumerate(planes) for a in range(k)
                       if checked(a, name)]
        tcp = k + len(static)  # the TCP point follows the capsule-like objects in the table
        plane_pairs += [(tcp, len(planes) + f) for f in range(len(keep_in_planes))]
        all_planes = planes + keep_in_planes
        static_names = [s[0] for s in static]
        names = [(caps.names[a], (caps.names + tuple(static_names))[b]) for a, b in cap_pairs]
        names += [(caps.names[a], boxes[b].name) for a, b in box_pairs]
        names += [(TCP if a == tcp else caps.names[a], all_planes[h][0]) for a, h in plane_pairs]
        return CollisionModel(
            arm=arm, cell=cell, capsules=caps,
            static_start=_rows([s[1] for s in static]), static_end=_rows([s[2] for s in static]),
            static_radius=np.array([s[3] for s in static], dtype=float),
            box_pose=np.array([b.pose for b in boxes]).reshape(-1, 4, 4),
            box_half=_rows([b.half_extents_m for b in boxes]),
            plane_normal=_rows([p[1] for p in all_planes]),
            plane_offset=np.array([p[2] for p in all_planes], dtype=float),
            capsule_pairs=_pairs(cap_pairs), box_pairs=_pairs(box_pairs),
            plane_pairs=_pairs(plane_pairs), pair_names=tuple(names))


def _keep_in_faces(box: Box) -> list[tuple[str, np.ndarray, float]]:
    """The six faces of the keep-in box as half-spaces whose free side is the inside."""
    R, c = box.pose[:3, :3], box.pose[:3, 3]
    faces = []
    for axis in range(3):
        for sign in (1.0, -1.0):
            n = -sign * R[:, axis]  # the face at +h along the axis: inside is −axis
            faces.append((box.name, n, float(n @ c) - box.half_extents_m[axis]))
    return faces


def _rows(values: list) -> NDArray[np.float64]:
    return np.array(values, dtype=float).reshape(-1, 3)


def _pairs(pairs: list[tuple[int, int]]) -> NDArray[np.intp]:
    return np.array(pairs, dtype=np.intp).reshape(-1, 2)


__all__ = ["ArmCapsules", "BASE", "CollisionModel", "TCP"]
