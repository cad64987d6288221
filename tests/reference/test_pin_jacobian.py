"""Cross-check against the `pin` rigid-body library (pinocchio) loading the same URDF files.

Conventions (REFERENCES §1.9, §10, verified there): only the LOCAL_WORLD_ALIGNED frame
Jacobian is the geometric Jacobian [v; ω] at the frame origin in base axes; `q` must be a float
array; a continuous joint has two configuration entries (cos θ, sin θ) and one velocity.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest

from runtime.arm.kinematics import geometric_jacobian, tcp_pose
from runtime.arm.load import load_arm
from runtime.arm.model import Arm
from runtime.arm.urdf import load_urdf_arm
from sim.urdf import write_urdf

pytestmark = pytest.mark.reference

DEMO_ARMS = ["elbow6", "reach7", "scara4", "planar3"]
POSES = 15


def check_against_pin(arm: Arm, urdf: Path, tip: str, seed: int) -> None:
    model = pin.buildModelFromUrdf(str(urdf))
    data = model.createData()
    frame = model.getFrameId(tip)
    joints = [model.joints[model.getJointId(name)] for name in arm.joint_names]
    rng = np.random.default_rng(seed)
    for _ in range(POSES):
        q = rng.uniform(np.maximum(arm.lower, -np.pi), np.minimum(arm.upper, np.pi))
        q_pin = pin.neutral(model)
        for joint, value in zip(joints, q):
            if joint.nq == 2:  # continuous: (cos θ, sin θ)
                q_pin[joint.idx_q:joint.idx_q + 2] = (np.cos(value), np.sin(value))
            else:
                q_pin[joint.idx_q] = value
        J_pin = pin.computeFrameJacobian(model, data, q_pin, frame,
                                         pin.ReferenceFrame.LOCAL_WORLD_ALIGNED)
        J_pin = J_pin[:, [joint.idx_v for joint in joints]]
        pin.forwardKinematics(model, data, q_pin)
        pin.updateFramePlacement(model, data, frame)
        # pin frame Jacobian (LOCAL_WORLD_ALIGNED) vs ours: ≤ 1e-9 (REFERENCES §1.2: ≤ 4e-16).
        np.testing.assert_allclose(geometric_jacobian(arm, q), J_pin, rtol=0, atol=1e-9)
        np.testing.assert_allclose(tcp_pose(arm, q), data.oMf[frame].homogeneous, rtol=0,
                                   atol=1e-9)


@pytest.mark.parametrize("seed, name", list(enumerate(DEMO_ARMS)))
def test_demo_arm_jacobian_matches_pin(tmp_path: Path, seed: int, name: str) -> None:
    arm = load_arm(name)
    check_against_pin(arm, write_urdf(arm, tmp_path / f"{name}.urdf"), "tcp", seed)


def test_loader_on_tilted_axes_matches_pin(tilted_urdf: Path) -> None:
    # Tilted axes, fixed joints in the chain, a continuous joint and a branch beyond the tip
    # (conftest.py): pin reads the same file by its own rules.
    arm = load_urdf_arm(tilted_urdf, tip_link="wrist")
    check_against_pin(arm, tilted_urdf, "wrist", 98)
