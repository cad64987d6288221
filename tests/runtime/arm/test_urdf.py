"""URDF → Arm: chain selection, fixed joints, tilted axes, continuous joints, errors with lines.

The kinematic oracle here is the URDF specification itself (REFERENCES §9.1): each joint is
T_parent→child = T_origin · Motion_axis(q), rotations by Rodrigues' formula about the axis,
written out independently of the loader's "align every axis with z" trick.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from runtime.arm.kinematics import geometric_jacobian, tcp_pose
from runtime.arm.load import load_arm
from runtime.arm.transforms import make_transform
from runtime.arm.urdf import DEFAULT_RAMP_S, load_urdf_arm
from runtime.errors import ConfigError

# A 4-joint arm with tilted and negative axes, fixed joints before, between and after the moving
# ones, a continuous joint, a prismatic joint, and a two-finger gripper (one finger mimics the
# other) beyond the wrist.
TILTED = """\
<?xml version="1.0"?>
<robot name="tilted">
  <link name="world"/>
  <link name="pedestal"/>
  <link name="l1"/>
  <link name="l1b"/>
  <link name="l2"/>
  <link name="l3"/>
  <link name="l4"/>
  <link name="wrist"/>
  <link name="finger_a"/>
  <link name="finger_b"/>
  <joint name="mount" type="fixed">
    <parent link="world"/><child link="pedestal"/>
    <origin xyz="0.1 -0.2 0.5" rpy="0 0 0.3"/>
  </joint>
  <joint name="turn" type="revolute">
    <parent link="pedestal"/><child link="l1"/>
    <origin xyz="0 0 0.2" rpy="0.1 0 0"/>
    <axis xyz="0 0 1"/>
    <limit lower="-3" upper="3" effort="80" velocity="1.2"/>
  </joint>
  <joint name="spacer" type="fixed">
    <parent link="l1"/><child link="l1b"/>
    <origin xyz="0 0.05 0.1" rpy="0 0.2 0"/>
  </joint>
  <joint name="lift" type="revolute">
    <parent link="l1b"/><child link="l2"/>
    <origin xyz="0 0 0.05" rpy="0 0 0"/>
    <axis xyz="0 1 0"/>
    <limit lower="-2" upper="2" effort="80" velocity="1.0"/>
  </joint>
  <joint name="slide" type="prismatic">
    <parent link="l2"/><child link="l3"/>
    <origin xyz="0.3 0 0" rpy="0 0 0"/>
    <axis xyz="1 1 0"/>
    <limit lower="0" upper="0.2" effort="200" velocity="0.3"/>
  </joint>
  <joint name="spin" type="continuous">
    <parent link="l3"/><child link="l4"/>
    <origin xyz="0.1 0 0" rpy="0.3 -0.2 0.1"/>
    <axis xyz="0 0 -1"/>
    <limit effort="0" velocity="4.0"/>
  </joint>
  <joint name="flange" type="fixed">
    <parent link="l4"/><child link="wrist"/>
    <origin xyz="0 0 0.08" rpy="0 0 1.0"/>
  </joint>
  <joint name="grip_a" type="prismatic">
    <parent link="wrist"/><child link="finger_a"/>
    <origin xyz="0 0.02 0.03"/>
    <axis xyz="0 1 0"/>
    <limit lower="0" upper="0.04" effort="20" velocity="0.1"/>
  </joint>
  <joint name="grip_b" type="prismatic">
    <parent link="wrist"/><child link="finger_b"/>
    <origin xyz="0 -0.02 0.03"/>
    <axis xyz="0 -1 0"/>
    <limit lower="0" upper="0.04" effort="20" velocity="0.1"/>
    <mimic joint="grip_a" multiplier="1" offset="0"/>
  </joint>
</robot>
"""


def write(tmp_path: Path, text: str, name: str = "arm.urdf") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def line_of(text: str, needle: str) -> int:
    return next(no for no, line in enumerate(text.splitlines(), start=1) if needle in line)


def rodrigues(axis: np.ndarray, angle: float) -> np.ndarray:
    """Rotation about a unit axis (Rodrigues' formula)."""
    k = axis / np.linalg.norm(axis)
    K = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
    return np.eye(3) + math.sin(angle) * K + (1 - math.cos(angle)) * K @ K


def urdf_spec_pose(q: np.ndarray) -> np.ndarray:
    """The TILTED chain world → wrist by the URDF rule T = Π T_origin·Motion_axis(q)."""
    def motion(kind: str, axis, value: float) -> np.ndarray:
        M = np.eye(4)
        a = np.asarray(axis, dtype=float)
        if kind == "prismatic":
            M[:3, 3] = a / np.linalg.norm(a) * value
        else:
            M[:3, :3] = rodrigues(a, value)
        return M

    T = make_transform((0.1, -0.2, 0.5), (0, 0, 0.3))
    T = T @ make_transform((0, 0, 0.2), (0.1, 0, 0)) @ motion("revolute", (0, 0, 1), q[0])
    T = T @ make_transform((0, 0.05, 0.1), (0, 0.2, 0))
    T = T @ make_transform((0, 0, 0.05), (0, 0, 0)) @ motion("revolute", (0, 1, 0), q[1])
    T = T @ make_transform((0.3, 0, 0), (0, 0, 0)) @ motion("prismatic", (1, 1, 0), q[2])
    T = T @ make_transform((0.1, 0, 0), (0.3, -0.2, 0.1)) @ motion("revolute", (0, 0, -1), q[3])
    return T @ make_transform((0, 0, 0.08), (0, 0, 1.0))


def test_tilted_chain_matches_the_urdf_rule(tmp_path: Path) -> None:
    arm = load_urdf_arm(write(tmp_path, TILTED), tip_link="wrist")
    assert arm.joint_names == ("turn", "lift", "slide", "spin")
    assert [j.kind for j in arm.joints] == ["revolute", "revolute", "prismatic", "revolute"]
    np.testing.assert_allclose(arm.base, make_transform((0.1, -0.2, 0.5), (0, 0, 0.3)),
                               atol=1e-15)
    rng = np.random.default_rng(11)
    for _ in range(20):
        q = np.array([*rng.uniform(-2, 2, 2), rng.uniform(0, 0.2), rng.uniform(-6, 6)])
        np.testing.assert_allclose(tcp_pose(arm, q), urdf_spec_pose(q), atol=1e-14)
        # Jacobian by central differences of the URDF-rule pose (linear part and dR·Rᵀ).
        J = geometric_jacobian(arm, q)
        h = 1e-6
        R = urdf_spec_pose(q)[:3, :3]
        for i in range(4):
            dq = np.zeros(4)
            dq[i] = h
            Tp, Tm = urdf_spec_pose(q + dq), urdf_spec_pose(q - dq)
            np.testing.assert_allclose(J[:3, i], (Tp[:3, 3] - Tm[:3, 3]) / (2 * h), atol=1e-8)
            S = (Tp[:3, :3] - Tm[:3, :3]) / (2 * h) @ R.T
            np.testing.assert_allclose(J[3:, i], [S[2, 1], S[0, 2], S[1, 0]], atol=1e-8)


def test_limits_speeds_and_the_documented_acceleration_default(tmp_path: Path) -> None:
    arm = load_urdf_arm(write(tmp_path, TILTED), tip_link="wrist")
    spin = arm.joints[3]
    assert spin.lower == -math.inf and spin.upper == math.inf   # continuous
    assert spin.effort is None                                  # effort="0": unknown
    assert arm.joints[0].effort == 80.0
    assert arm.max_speed.tolist() == [1.2, 1.0, 0.3, 4.0]
    np.testing.assert_allclose(arm.max_accel, arm.max_speed / DEFAULT_RAMP_S)
    np.testing.assert_array_equal(arm.rated_speed, arm.max_speed)
    np.testing.assert_array_equal(arm.rated_accel, arm.max_accel)
    assert arm.home()[3] == 0.0  # mid-range of an unlimited joint is 0


def test_default_ends_and_branches(tmp_path: Path) -> None:
    path = write(tmp_path, TILTED)
    # The tree branches at the wrist: without --tip the error lists the candidate leaves.
    with pytest.raises(ConfigError) as info:
        load_urdf_arm(path)
    assert info.value.field == "tip_link"
    assert "finger_a" in str(info.value) and "finger_b" in str(info.value)
    # A tip inside a branch is fine when that branch has no coupled joint...
    arm = load_urdf_arm(path, tip_link="finger_a")
    assert arm.joint_names[-1] == "grip_a" and arm.name == "tilted"
    # ... and refused when the chain would include a mimic joint.
    with pytest.raises(ConfigError) as info:
        load_urdf_arm(path, tip_link="finger_b")
    assert info.value.field == "joint[grip_b].mimic"
    assert info.value.line == line_of(TILTED, "<mimic")
    # A base in the middle of the tree: the fixed joints before it are not part of the arm.
    arm = load_urdf_arm(path, base_link="l1b", tip_link="wrist")
    assert arm.joint_names == ("lift", "slide", "spin")


def test_load_arm_accepts_a_urdf_path(tmp_path: Path) -> None:
    arm = load_arm(write(tmp_path, TILTED), tip_link="wrist")
    assert arm.n == 4 and arm.source.endswith("arm.urdf")


@pytest.mark.parametrize("old, new, field, needle", [
    ('velocity="1.0"', 'velocity="-1"', "joint[lift].limit.velocity", 'velocity="-1"'),
    ('velocity="1.0"', 'velocity="0"', "joint[lift].limit.velocity", 'velocity="0"'),
    (' velocity="1.0"', "", "joint[lift].limit.velocity", 'effort="80"/>'),
    ('lower="-2"', 'lower="2.5"', "joint[lift].limit.lower", 'lower="2.5"'),
    ('lower="-2"', 'lower="nan"', "joint[lift].limit.lower", 'lower="nan"'),
    ('lower="-2"', 'lower="minus two"', "joint[lift].limit.lower", 'lower="minus two"'),
    ('xyz="0 0 0.05"', 'xyz="0 0 inf"', "joint[lift].origin.xyz", 'xyz="0 0 inf"'),
    ('xyz="0 0 0.05"', 'xyz="0 0"', "joint[lift].origin.xyz", 'xyz="0 0"'),
    ('<axis xyz="0 1 0"/>', '<axis xyz="0 0 0"/>', "joint[lift].axis.xyz", '<axis xyz="0 0 0"/>'),
    ('type="prismatic">\n    <parent link="l2"/>', 'type="sliding">\n    <parent link="l2"/>',
     "joint[slide].type", 'type="sliding"'),
    ('type="prismatic">\n    <parent link="l2"/>', 'type="planar">\n    <parent link="l2"/>',
     "joint[slide].type", 'type="planar"'),
    ('<parent link="l2"/><child link="l3"/>', '<parent link="l9"/><child link="l3"/>',
     "joint[slide].parent.link", 'link="l9"'),
])
def test_bad_urdf_names_file_line_and_field(tmp_path: Path, old: str, new: str, field: str,
                                           needle: str) -> None:
    assert old in TILTED
    text = TILTED.replace(old, new, 1)
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_urdf_arm(path, tip_link="wrist")
    err = info.value
    assert err.field == field and field in str(err)
    assert err.path == str(path) and f"{path}:{err.line}" in str(err)
    assert err.line == line_of(text, needle)


def test_missing_limit_element(tmp_path: Path) -> None:
    text = TILTED.replace('<limit lower="-3" upper="3" effort="80" velocity="1.2"/>', "")
    with pytest.raises(ConfigError) as info:
        load_urdf_arm(write(tmp_path, text), tip_link="wrist")
    assert info.value.field == "joint[turn].limit"
    assert info.value.line == line_of(text, '<joint name="turn"')


def test_unknown_links_and_a_chain_without_motion(tmp_path: Path) -> None:
    path = write(tmp_path, TILTED)
    with pytest.raises(ConfigError, match="unknown link 'hand'") as info:
        load_urdf_arm(path, tip_link="hand")
    assert info.value.field == "tip_link"
    with pytest.raises(ConfigError, match="no moving joint") as info:
        load_urdf_arm(path, tip_link="pedestal")
    with pytest.raises(ConfigError, match="no path") as info:
        load_urdf_arm(path, base_link="l3", tip_link="l1")


@pytest.mark.parametrize("text, message", [
    ("<robot name='x'><link name='a'/>", "not well-formed"),
    ("", "not well-formed"),
    ("<model><link name='a'/></model>", "<robot>"),
    ("<robot name='x'><link name='a'/><link name='a'/></robot>", "duplicate link"),
    ("<robot name='x'><link name='a'/><link name='b'/><link name='c'/>"
     "<joint name='j' type='fixed'><parent link='a'/><child link='c'/></joint>"
     "<joint name='k' type='fixed'><parent link='b'/><child link='c'/></joint></robot>",
     "already has parent"),
])
def test_structurally_broken_files(tmp_path: Path, text: str, message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        load_urdf_arm(write(tmp_path, text))


def test_unreadable_file(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="cannot read URDF"):
        load_urdf_arm(tmp_path / "missing.urdf")
