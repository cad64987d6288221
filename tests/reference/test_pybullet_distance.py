"""Cross-check of the distance core against PyBullet's getClosestPoints on the same shapes.

Conventions (measured here with pybullet 3.2.7): a capsule is GEOM_CAPSULE(radius, height =
segment length) along its local z; getClosestPoints returns contactDistance [8], positionOnA
[5], positionOnB [6] and contactNormalOnB [7] (from B toward A). Boxes and cylinders carry a
collision margin (0.001 m by default) that rounds their edges: `changeDynamics(...,
collisionMargin=0)` makes the box exact (a point 1.5, 1.5, 0 from a unit cube's centre then
measures √2 to 1e-16). Pass Python lists, not numpy arrays (REFERENCES §7).
"""

from __future__ import annotations

import numpy as np
import pybullet
import pytest

from runtime.arm.cell import load_cell
from runtime.arm.cell import Box
from runtime.arm.distance import (capsule_capsule, cell_distances, collision_model, segment_box,
                                  segment_plane)
from runtime.arm.kinematics import joint_frames
from runtime.arm.model import load_arm
from runtime.arm.transforms import make_transform, matrix_to_rpy, rotation_aligning_z

pytestmark = pytest.mark.reference

TOLERANCE_M = 1e-6  # the bar the issue sets for distances against PyBullet
SAMPLES = 60


@pytest.fixture(scope="module")
def client():
    cid = pybullet.connect(pybullet.DIRECT)
    yield cid
    pybullet.disconnect(cid)


def _body(cid: int, shape: int, position, R) -> int:
    quat = pybullet.getQuaternionFromEuler(matrix_to_rpy(R).tolist())
    body = pybullet.createMultiBody(0, shape, basePosition=list(map(float, position)),
                                    baseOrientation=quat, physicsClientId=cid)
    pybullet.changeDynamics(body, -1, collisionMargin=0.0, physicsClientId=cid)
    return body


def capsule_body(cid: int, p, q, radius: float) -> int:
    """A PyBullet capsule whose axis is the segment p–q."""
    axis = np.asarray(q, float) - np.asarray(p, float)
    length = float(np.linalg.norm(axis))
    if length < 1e-9:
        shape = pybullet.createCollisionShape(pybullet.GEOM_SPHERE, radius=radius,
                                              physicsClientId=cid)
        return _body(cid, shape, p, np.eye(3))
    shape = pybullet.createCollisionShape(pybullet.GEOM_CAPSULE, radius=radius, height=length,
                                          physicsClientId=cid)
    return _body(cid, shape, 0.5 * (np.asarray(p) + np.asarray(q)), rotation_aligning_z(axis))


def closest(cid: int, a: int, b: int) -> tuple[float, np.ndarray, np.ndarray, np.ndarray]:
    hits = pybullet.getClosestPoints(a, b, 100.0, physicsClientId=cid)
    best = min(hits, key=lambda h: h[8])
    return best[8], np.array(best[5]), np.array(best[6]), np.array(best[7])


def clear(cid: int, *bodies: int) -> None:
    for body in bodies:
        pybullet.removeBody(body, physicsClientId=cid)


def random_capsule(rng):
    p = rng.uniform(-1, 1, 3)
    return p, p + rng.uniform(-0.6, 0.6, 3), float(rng.uniform(0.01, 0.15))


def test_capsule_capsule_and_sphere(client) -> None:
    rng = np.random.default_rng(1)
    for i in range(SAMPLES):
        p1, q1, r1 = random_capsule(rng)
        p2, q2, r2 = random_capsule(rng)
        if i % 4 == 0:
            q2 = p2  # a sphere
        d, pa, pb, n = capsule_capsule(p1[None], q1[None], np.array([r1]), p2[None], q2[None],
                                       np.array([r2]))
        a, b = capsule_body(client, p1, q1, r1), capsule_body(client, p2, q2, r2)
        ref, on_a, on_b, normal = closest(client, a, b)
        clear(client, a, b)
        assert d[0] == pytest.approx(ref, abs=TOLERANCE_M)
        if ref > 0.0:
            np.testing.assert_allclose(pa[0], on_a, atol=1e-5)
            np.testing.assert_allclose(pb[0], on_b, atol=1e-5)
            np.testing.assert_allclose(n[0], normal, atol=1e-5)


def test_capsule_box(client) -> None:
    rng = np.random.default_rng(2)
    checked = 0
    for _ in range(SAMPLES):
        p, q, r = random_capsule(rng)
        half = rng.uniform(0.05, 0.5, 3)
        pose = make_transform(rng.uniform(-0.3, 0.3, 3), rng.uniform(-np.pi, np.pi, 3))
        gap, on_seg, on_box, n = segment_box(p[None], q[None], pose[None], half[None])
        if gap[0] <= 0.0:
            continue  # the axis enters the box: our depth is a direction out, not exact
        shape = pybullet.createCollisionShape(pybullet.GEOM_BOX, halfExtents=half.tolist(),
                                              physicsClientId=client)
        box = _body(client, shape, pose[:3, 3], pose[:3, :3])
        cap = capsule_body(client, p, q, r)
        ref, on_a, on_b, normal = closest(client, cap, box)
        clear(client, cap, box)
        assert gap[0] - r == pytest.approx(ref, abs=TOLERANCE_M)
        np.testing.assert_allclose(on_box[0], on_b, atol=1e-5)
        checked += 1
    assert checked > SAMPLES // 2


def test_capsule_half_space(client) -> None:
    rng = np.random.default_rng(3)
    for _ in range(SAMPLES // 2):
        p, q, r = random_capsule(rng)
        normal = rng.normal(size=3)
        normal /= np.linalg.norm(normal)
        offset = float(rng.uniform(-1.5, -0.5))
        gap, *_ = segment_plane(p[None], q[None], normal[None], np.array([offset]))
        shape = pybullet.createCollisionShape(pybullet.GEOM_PLANE, planeNormal=normal.tolist(),
                                              physicsClientId=client)
        plane = _body(client, shape, normal * offset, np.eye(3))
        cap = capsule_body(client, p, q, r)
        ref, *_ = closest(client, cap, plane)
        clear(client, cap, plane)
        assert gap[0] - r == pytest.approx(ref, abs=TOLERANCE_M)


def test_cylinder_is_conservative(client) -> None:
    """The cylinder is taken as its enclosing capsule: never farther than PyBullet's exact
    cylinder, and at most its radius nearer."""
    rng = np.random.default_rng(4)
    for _ in range(SAMPLES // 2):
        p, q, r = random_capsule(rng)
        radius, half_length = float(rng.uniform(0.02, 0.2)), float(rng.uniform(0.1, 0.6))
        pose = make_transform(rng.uniform(-0.3, 0.3, 3), rng.uniform(-np.pi, np.pi, 3))
        axis = pose[:3, 2] * half_length
        d, *_ = capsule_capsule(p[None], q[None], np.array([r]), (pose[:3, 3] - axis)[None],
                                (pose[:3, 3] + axis)[None], np.array([radius]))
        shape = pybullet.createCollisionShape(pybullet.GEOM_CYLINDER, radius=radius,
                                              height=2 * half_length, physicsClientId=client)
        cyl = _body(client, shape, pose[:3, 3], pose[:3, :3])
        cap = capsule_body(client, p, q, r)
        ref, *_ = closest(client, cap, cyl)
        clear(client, cap, cyl)
        if ref > 0.0:
            assert ref - radius - TOLERANCE_M <= d[0] <= ref + TOLERANCE_M


@pytest.mark.parametrize("arm_name", ["elbow6", "reach7"])
def test_whole_arm_in_the_demo_cell(client, arm_name: str) -> None:
    """Every pair of the collision model at random poses against PyBullet bodies built from
    the same capsules and objects (cylinders excepted: conservative, checked above)."""
    arm = load_arm(arm_name)
    cell = load_cell("bench", arm)
    rng = np.random.default_rng(5)
    model = collision_model(arm, cell)
    boxes = {b.name: b for b in cell.objects if isinstance(b, Box)}
    checked = 0
    for _ in range(4):
        q = arm.home() + rng.uniform(-0.5, 0.5, arm.n)
        result = cell_distances(arm, cell, q)
        frames, _ = joint_frames(arm, q)
        start, end = model.capsules.placed(frames)
        index = {name: i for i, name in enumerate(model.capsules.names)}
        for (a, b), d in zip(result.pairs, result.distances.tolist()):
            if a == "tcp" or b not in boxes and b not in index:
                continue
            i = index[a]
            body_a = capsule_body(client, start[i], end[i], float(model.capsules.radius[i]))
            if b in index:
                j = index[b]
                body_b = capsule_body(client, start[j], end[j], float(model.capsules.radius[j]))
            else:
                box = boxes[b]
                shape = pybullet.createCollisionShape(
                    pybullet.GEOM_BOX, halfExtents=list(box.half_extents_m),
                    physicsClientId=client)
                body_b = _body(client, shape, box.pose[:3, 3], box.pose[:3, :3])
            ref, *_ = closest(client, body_a, body_b)
            clear(client, body_a, body_b)
            if ref > 0.0:
                assert d == pytest.approx(ref, abs=TOLERANCE_M), (a, b)
                checked += 1
    assert checked > 40
