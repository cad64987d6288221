"""Cross-check against pybullet: its own `calculateJacobian` and link poses on our URDF files.

Conventions (REFERENCES §7, verified there): pybullet's Jacobian at a link with localPosition
[0, 0, 0] is taken at the link frame origin when the inertial frame sits at the link origin,
which the exported `tcp` link does; pass Python lists (numpy arrays segfault pybullet 3.2.7
with numpy 2.x); `getLinkState(...)[4]` is the link frame (index 0 is the centre of mass) and
agrees with exact FK only to ~6e-8 m.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pybullet
import pytest

from runtime.arm.kinematics import geometric_jacobian, tcp_pose
from runtime.arm.load import load_arm
from runtime.arm.model import Arm
from runtime.arm.urdf import load_urdf_arm
from sim.urdf import write_urdf

pytestmark = pytest.mark.reference

DEMO_ARMS = ["elbow6", "reach7", "scara4", "planar3"]
POSES = 15


@pytest.fixture
def client():
    # One connection per test: pybullet keeps its inverse-dynamics model per body id, and a
    # new body that reuses a removed body's id in the same connection gets the stale model.
    cid = pybullet.connect(pybullet.DIRECT)
    yield cid
    pybullet.disconnect(cid)


def random_q(arm: Arm, rng: np.random.Generator) -> np.ndarray:
    return rng.uniform(np.maximum(arm.lower, -np.pi), np.minimum(arm.upper, np.pi))


def check_against_pybullet(client: int, arm: Arm, urdf: Path, tip: str, seed: int) -> None:
    body = pybullet.loadURDF(str(urdf), useFixedBase=True, physicsClientId=client)
    infos = [pybullet.getJointInfo(body, i, physicsClientId=client)
             for i in range(pybullet.getNumJoints(body, physicsClientId=client))]
    index = {info[1].decode(): info[0] for info in infos}
    tip_link = next(info[0] for info in infos if info[12].decode() == tip)
    movable = [info[0] for info in infos if info[2] != pybullet.JOINT_FIXED]
    ours = [index[name] for name in arm.joint_names]
    rng = np.random.default_rng(seed)
    for _ in range(POSES):
        q = random_q(arm, rng)
        for joint, value in zip(ours, q):
            pybullet.resetJointState(body, joint, float(value), physicsClientId=client)
        q_all = [pybullet.getJointState(body, j, physicsClientId=client)[0] for j in movable]
        zeros = [0.0] * len(movable)
        lin, ang = pybullet.calculateJacobian(body, tip_link, [0.0, 0.0, 0.0], q_all, zeros,
                                              zeros, physicsClientId=client)
        columns = [movable.index(j) for j in ours]
        J_bullet = np.vstack((np.array(lin), np.array(ang)))[:, columns]
        # pybullet calculateJacobian vs ours: ≤ 1e-9 (REFERENCES §1.2 found ≤ 4e-16).
        np.testing.assert_allclose(geometric_jacobian(arm, q), J_bullet, rtol=0, atol=1e-9)
        state = pybullet.getLinkState(body, tip_link, computeForwardKinematics=True,
                                      physicsClientId=client)
        T = tcp_pose(arm, q)
        # Link frame position: pybullet's link state is good to ~6e-8 m (REFERENCES §10).
        np.testing.assert_allclose(state[4], T[:3, 3], rtol=0, atol=2e-7)
        R = np.array(pybullet.getMatrixFromQuaternion(state[5])).reshape(3, 3)
        np.testing.assert_allclose(R, T[:3, :3], rtol=0, atol=1e-6)


@pytest.mark.parametrize("seed, name", list(enumerate(DEMO_ARMS)))
def test_demo_arm_jacobian_matches_pybullet(client, tmp_path: Path, seed: int, name: str) -> None:
    arm = load_arm(name)
    check_against_pybullet(client, arm, write_urdf(arm, tmp_path / f"{name}.urdf"), "tcp", seed)


def test_loader_on_tilted_axes_matches_pybullet(client, tilted_urdf: Path) -> None:
    # A hand-written URDF with tilted and negative axes, fixed joints in the chain and a
    # branch beyond the tip (conftest.py): pybullet reads the same file by its own rules.
    arm = load_urdf_arm(tilted_urdf, tip_link="wrist")
    check_against_pybullet(client, arm, tilted_urdf, "wrist", 99)
