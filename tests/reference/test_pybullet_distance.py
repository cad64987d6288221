"""Cross-checks against PyBullet's getClosestPoints on the same shapes: the distance core,
and the velocity damper's clearance along jogs (a property test).

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
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from runtime.arm.cell import load_cell
from runtime.arm.cell import Box, Cylinder, HalfSpace, Sphere
from runtime.arm.collision import ArmCapsules
from runtime.arm.distance import (capsule_capsule, cell_distances, collision_model, segment_box,
                                  segment_plane)
from runtime.arm.kinematics import joint_frames, tcp_pose
from runtime.arm.model import load_arm
from runtime.arm.transforms import make_transform, matrix_to_rpy, rotation_aligning_z
from runtime.arm.urdf import load_urdf_arm
from runtime.control.clearance import ClearanceLimit
from runtime.control.solver import solve
from tests.runtime.arm.test_collision import TWO_LINKS

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
        gap, _, on_box, _ = segment_box(p[None], q[None], pose[None], half[None])
        if gap[0] <= 0.0:
            continue  # the axis enters the box: our depth is a direction out, not exact
        shape = pybullet.createCollisionShape(pybullet.GEOM_BOX, halfExtents=half.tolist(),
                                              physicsClientId=client)
        box = _body(client, shape, pose[:3, 3], pose[:3, :3])
        cap = capsule_body(client, p, q, r)
        ref, _, on_b, _ = closest(client, cap, box)
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


# ----------------------------------------------------------------------------------------
# Property: the velocity damper keeps the arm clear, measured in PyBullet
# ----------------------------------------------------------------------------------------

CLEARANCE_TOLERANCE_M = 1e-3
"""How far below d_s a pair may be measured. The damper's rows are first-order in time: a
pair that slides along a curved path dips below d_s between cycles by the second-order term,
until the push-out term gain·(d_s − d) balances it, at a depth of about v²·Δt/(2·R·gain)
(v the point's speed, R the radius of its path, Δt the period): 1 m/s, R ≥ 0.2 m,
gain 5 /s and Δt 2 ms give 1 mm. PyBullet itself agrees with our shapes to 1e-6 m (above)."""


class CellWorld:
    """PyBullet bodies for an arm's capsules and a cell's objects, to measure every pair of
    the collision model at a pose (cylinders and half-spaces as PyBullet's own shapes)."""

    def __init__(self, cid: int, arm_name: str) -> None:
        self.cid = cid
        self.arm = load_arm(arm_name)
        self.cell = load_cell("bench", self.arm)
        self.model = collision_model(self.arm, self.cell)
        self.objects = {}
        for obj in self.cell.objects:
            if isinstance(obj, Box):
                shape = pybullet.createCollisionShape(
                    pybullet.GEOM_BOX, halfExtents=list(obj.half_extents_m), physicsClientId=cid)
                self.objects[obj.name] = _body(cid, shape, obj.pose[:3, 3], obj.pose[:3, :3])
            elif isinstance(obj, Cylinder):
                shape = pybullet.createCollisionShape(
                    pybullet.GEOM_CYLINDER, radius=obj.radius_m, height=2 * obj.half_length_m,
                    physicsClientId=cid)
                self.objects[obj.name] = _body(cid, shape, obj.pose[:3, 3], obj.pose[:3, :3])
            elif isinstance(obj, HalfSpace):
                shape = pybullet.createCollisionShape(
                    pybullet.GEOM_PLANE, planeNormal=list(obj.normal), physicsClientId=cid)
                self.objects[obj.name] = _body(cid, shape, np.array(obj.normal) * obj.offset_m,
                                               np.eye(3))
            else:
                raise TypeError(f"no PyBullet body for {obj!r}")
        self.capsules = {}

    def min_distance(self, q) -> tuple[float, tuple[str, str]]:
        """The smallest distance over the model's pairs at q, as PyBullet measures it."""
        frames, T = joint_frames(self.arm, np.asarray(q, float))
        start, end = self.model.capsules.placed(frames)
        bodies = {}
        for i, name in enumerate(self.model.capsules.names):
            bodies[name] = capsule_body(self.cid, start[i], end[i],
                                        float(self.model.capsules.radius[i]))
        best = (np.inf, ("", ""))
        for a, b in self.model.pair_names:
            if b == "keep_in":  # the TCP point against the box's faces: plain geometry
                box = self.cell.keep_in
                local = box.pose[:3, :3].T @ (T[:3, 3] - box.pose[:3, 3])
                d = float(np.min(np.array(box.half_extents_m) - np.abs(local)))
            else:
                other = bodies.get(b, self.objects.get(b))
                d = closest(self.cid, bodies[a], other)[0]
            best = min(best, (d, (a, b)))
        clear(self.cid, *bodies.values())
        return best


def aim(world: CellWorld, target: str, q) -> np.ndarray:
    """A unit direction from the TCP at q toward the object `target` (its centre; for a
    half-space, straight at the plane)."""
    tcp = tcp_pose(world.arm, q)[:3, 3]
    obj = world.cell.object_named(target)
    if isinstance(obj, HalfSpace):
        return -np.array(obj.normal)
    centre = np.array(obj.center_m) if isinstance(obj, Sphere) else obj.pose[:3, 3].copy()
    if obj.name == world.cell.mount:
        centre[:2] = tcp[:2]  # straight down onto the bench top
    direction = centre - tcp
    return direction / np.linalg.norm(direction)


_VECTOR = st.tuples(*[st.floats(-1, 1)] * 3)


@settings(max_examples=8, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(arm_name=st.sampled_from(["elbow6", "reach7"]),
       target=st.sampled_from(["bench", "fixture", "camera_post", "back_wall"]),
       wobble=_VECTOR, speed=st.floats(0.3, 1.0), angular=_VECTOR, slide=_VECTOR,
       cycles=st.integers(400, 700))
def test_damper_keeps_clear_in_pybullet_and_never_blocks_moving_away(
        client, arm_name, target, wobble, speed, angular, slide, cycles) -> None:
    """Jogs at up to the TCP cap toward an object of the demo cell (its direction wobbled,
    with some turning), then a slide in any direction: every pair PyBullet measures at every
    integrated pose near d_s (and every 10th within d_i) stays ≥ d_s −
    CLEARANCE_TOLERANCE_M. Then a command back the way it came, where it approaches nothing
    near, is left exactly as without a cell."""
    world = CellWorld(client, arm_name)
    arm, limit = world.arm, ClearanceLimit.of(world.arm, world.cell)
    d_s, d_i = world.cell.clearance.safety_distance_m, world.cell.clearance.influence_distance_m
    q, prev = arm.home(), np.zeros(arm.n)
    toward = aim(world, target, q) + 0.3 * np.array(wobble)
    toward *= speed / np.linalg.norm(toward)
    for linear, steps in ((toward, cycles), (0.3 * np.array(slide), 300)):
        twist = np.concatenate((linear, 0.4 * np.array(angular)))
        for k in range(steps):
            sol = solve(arm, q, twist, prev_rates=prev, dt_s=0.002, clearance=limit)
            q, prev = q + sol.rates * 0.002, sol.rates
            d = sol.clearance.min_distance_m
            if d < d_s + 0.01 or (d < d_i and k % 10 == 0):
                measured, pair = world.min_distance(q)
                assert measured >= d_s - CLEARANCE_TOLERANCE_M, (pair, measured)
    back = -twist
    plain = solve(arm, q, back)
    guarded = solve(arm, q, back, clearance=limit)
    found = guarded.clearance.distances
    near = found.distances < d_i
    if (found.rate_rows[near] @ plain.rates >= 0.0).all():  # away from everything near
        assert np.array_equal(plain.rates, guarded.rates)


def test_urdf_collision_cylinder_matches_pybullet_on_its_side(client, tmp_path) -> None:
    """The capsule jogwire builds from a URDF link's <collision> cylinder, against PyBullet
    loading the same URDF: equal beside the cylinder's side (there the enclosing capsule is
    exact), at random joint positions."""
    path = tmp_path / "collide2.urdf"
    path.write_text(TWO_LINKS.replace("MESH", ""), encoding="utf-8")
    arm = load_urdf_arm(path)
    caps = ArmCapsules.of(arm)
    i = caps.names.index("j1")
    # URDF_USE_IMPLICIT_CYLINDER: without it PyBullet loads a URDF cylinder as a convex hull
    robot = pybullet.loadURDF(str(path), useFixedBase=True,
                              flags=pybullet.URDF_USE_IMPLICIT_CYLINDER, physicsClientId=client)
    pybullet.changeDynamics(robot, 0, collisionMargin=0.0, physicsClientId=client)
    rng = np.random.default_rng(6)
    for _ in range(10):
        q = rng.uniform(-1.5, 1.5, 2)
        for joint, value in enumerate(q):
            pybullet.resetJointState(robot, joint, float(value), physicsClientId=client)
        start, end = caps.placed(joint_frames(arm, q)[0])
        # a ball beside the middle of the cylinder, off its axis
        axis = end[i] - start[i]
        side = np.cross(axis, rng.normal(size=3))
        centre = start[i] + 0.5 * axis + side / np.linalg.norm(side) * rng.uniform(0.1, 0.3)
        ball = capsule_body(client, centre, centre, 0.02)
        ref = min(h[8] for h in pybullet.getClosestPoints(robot, ball, 10.0, linkIndexA=0,
                                                          physicsClientId=client))
        clear(client, ball)
        d, *_ = capsule_capsule(start[i][None], end[i][None], caps.radius[i:i + 1],
                                centre[None], centre[None], np.array([0.02]))
        assert d[0] == pytest.approx(ref, abs=TOLERANCE_M)
    clear(client, robot)
