"""The motion bound of runtime.arm.distance.reach_weights, on random arms, cells and poses.

A pair's distance at q is at least its distance at q₀ less Σ_j W[pair, j]·|q_j − q₀_j|
wherever that is positive: the gap between two sets changes by no more than their
relative motion (the distance is 1-Lipschitz in each set's position, elementary geometry),
and a point at distance r from a revolute axis moves r·|dq| (rigid-body kinematics;
Spong, Hutchinson & Vidyasagar, Robot Modeling and Control, 2006, §4.1). Checked against
the distances the core measures at both poses; those are themselves checked against
PyBullet in tests/reference/test_pybullet_distance.py.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from runtime.arm.cell import Box, Cell, Cylinder, HalfSpace, Sphere, ToolCapsule
from runtime.arm.collision import CollisionModel
from runtime.arm.distance import clearances, clearances_at, reach_weights
from runtime.arm.kinematics import joint_frames
from runtime.arm.model import Arm, DHRow, Joint, chain_from_dh
from runtime.arm.transforms import make_transform, rotation_aligning_z

finite = dict(allow_nan=False, allow_infinity=False)
length = st.floats(-0.4, 0.4, **finite)
angle = st.floats(-math.pi, math.pi, **finite)


@st.composite
def revolute_arms(draw) -> Arm:
    """2–8 revolute joints, a DH table or arbitrary URDF-style origins, a tool offset."""
    n = draw(st.integers(2, 8))
    if draw(st.booleans()):
        rows = [DHRow(d=draw(length), a=draw(length), alpha=draw(angle), theta=draw(angle))
                for _ in range(n)]
        origins, flange = chain_from_dh(rows, ["revolute"] * n, modified=draw(st.booleans()))
    else:
        origins = [make_transform(xyz_m=[draw(length) for _ in range(3)],
                                  rpy_rad=[draw(angle) for _ in range(3)]) for _ in range(n)]
        flange = make_transform(xyz_m=[draw(length) for _ in range(3)])
    joints = tuple(Joint(origin=o, name=f"j{i}", kind="revolute", lower=-math.pi,
                         upper=math.pi, max_speed=1.0, max_accel=5.0, rated_speed=1.0,
                         rated_accel=5.0, effort=None) for i, o in enumerate(origins))
    tool = make_transform(xyz_m=[draw(length) for _ in range(3)])
    return Arm(name="random", joints=joints, base=np.eye(4), flange=flange, tool=tool)


def point(draw) -> tuple[float, float, float]:
    return (draw(st.floats(-1.2, 1.2, **finite)), draw(st.floats(-1.2, 1.2, **finite)),
            draw(st.floats(-1.2, 1.2, **finite)))


@st.composite
def cells(draw) -> Cell:
    """One object of each shape at random places, a keep-in box, sometimes a tool shape."""
    def pose():
        return make_transform(xyz_m=point(draw), rpy_rad=[draw(angle) for _ in range(3)])
    size = st.floats(0.02, 0.5, **finite)
    objects = (Box("box", pose(), (draw(size), draw(size), draw(size))),
               Cylinder("post", pose(), draw(size), draw(size)),
               Sphere("ball", point(draw), draw(size)),
               HalfSpace("floor", tuple(np.array(point(draw)) + (0.0, 0.0, 1e-3)),
                         draw(st.floats(-1.0, 0.0, **finite))))
    normal = np.array(objects[3].normal) / np.linalg.norm(objects[3].normal)
    objects = objects[:3] + (HalfSpace("floor", tuple(normal), objects[3].offset_m),)
    keep_in = Box("keep_in", pose(), (1.5, 1.5, 1.5))
    tool = (ToolCapsule("gripper", (0.0, 0.0, 0.0), point(draw), draw(size)),) \
        if draw(st.booleans()) else ()
    return Cell(name="random", objects=objects, keep_in=keep_in, tool=tool)


@settings(max_examples=300, deadline=None)
@given(arm=revolute_arms(), cell=cells(), data=st.data())
def test_the_bound_never_exceeds_the_distance(arm: Arm, cell: Cell, data) -> None:
    model = CollisionModel.build(arm, cell)
    W = reach_weights(model)
    assert W is not None and W.shape == (len(model.pair_names), arm.n) and (W >= 0).all()
    q0 = np.array(data.draw(st.lists(angle, min_size=arm.n, max_size=arm.n)))
    step = data.draw(st.sampled_from([1e-3, 0.05, 0.5, 2.0]))
    q1 = q0 + step * np.array(data.draw(st.lists(st.floats(-1.0, 1.0, **finite),
                                                 min_size=arm.n, max_size=arm.n)))
    moved = W @ np.abs(q1 - q0)
    d1 = clearances_at(model, q1).distances
    # from the exact distances at q0, and from the cull's lower bounds there
    frames, T = joint_frames(arm, q0)
    for d0 in (clearances_at(model, q0).distances,
               clearances(model, frames, T, within_m=0.15).lower_m):
        assert d0 is not None
        bound = d0 - moved
        holds = bound > 0.0
        assert (d1[holds] >= bound[holds] - 1e-12).all(), \
            [(model.pair_names[i], d1[i], bound[i]) for i in np.flatnonzero(d1 < bound - 1e-12)]


def test_arms_with_prismatic_joints_have_no_bound() -> None:
    from runtime.arm.cell import load_cell
    from runtime.arm.load import load_arm
    arm = load_arm("scara4")
    assert reach_weights(CollisionModel.build(arm, load_cell("bench", arm))) is None


@pytest.mark.parametrize("axis", [(3e-170, 0.0, 1e-170), (0.0, -8e-284, -1.3e-160),
                                  (1e-300, 2e-300, -2e-300), (0.3, -0.2, 0.6)])
def test_the_cull_axis_of_a_segment_too_short_to_square(axis) -> None:
    """The cull aligns z with each capsule's segment (`rotation_aligning_z`); hypothesis found
    random DH tables whose segments are so short that their squared length underflows to
    zero. The result is still a rotation (RᵀR = I, det R = 1) taking ẑ to the direction.
    Reference for the direction: the standard library's `math.hypot`, which computes the
    length without underflow (Python docs, math.hypot; multi-argument since 3.8)."""
    a = np.array(axis)
    direction = a / math.hypot(*axis)
    R = rotation_aligning_z(a)
    np.testing.assert_allclose(R.T @ R, np.eye(3), atol=1e-15)
    assert abs(np.linalg.det(R) - 1.0) < 1e-15
    np.testing.assert_allclose(R[:, 2], direction, atol=1e-15)
    with pytest.raises(ValueError, match="zero vector"):
        rotation_aligning_z((0.0, 0.0, 0.0))
