"""The arm's capsules from URDF <collision> shapes (our own invented two-link arm).

Check values are elementary geometry: each shape's enclosing capsule, placed by the joint
frames. PyBullet's distances to the same URDF's cylinder are in
tests/reference/test_pybullet_distance.py.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from runtime.arm.collision import ArmCapsules
from runtime.arm.kinematics import joint_frames
from runtime.arm.urdf import load_urdf_arm
from runtime.errors import ConfigError

_INERTIAL = ('<inertial><origin xyz="0 0 0"/><mass value="0.5"/>'
             '<inertia ixx="0.001" ixy="0" ixz="0" iyy="0.001" iyz="0" izz="0.001"/></inertial>')

TWO_LINKS = f"""\
<?xml version="1.0"?>
<robot name="collide2">
  <link name="base">{_INERTIAL}</link>
  <joint name="j1" type="revolute">
    <parent link="base"/><child link="l1"/>
    <origin xyz="0 0 0.1"/><axis xyz="0 0 1"/>
    <limit lower="-3" upper="3" effort="10" velocity="1"/>
  </joint>
  <link name="l1">{_INERTIAL}
    <collision><origin xyz="0.2 0 0" rpy="0 {math.pi / 2!r} 0"/>
      <geometry><cylinder radius="0.05" length="0.4"/></geometry></collision>
  </link>
  <joint name="j2" type="revolute">
    <parent link="l1"/><child link="l2"/>
    <origin xyz="0.4 0 0"/><axis xyz="0 1 0"/>
    <limit lower="-2" upper="2" effort="10" velocity="1"/>
  </joint>
  <link name="l2">{_INERTIAL}
    <collision><origin xyz="0.15 0 0"/>
      <geometry><box size="0.3 0.06 0.04"/></geometry></collision>
    MESH
  </link>
  <joint name="tip" type="fixed">
    <parent link="l2"/><child link="tcp"/><origin xyz="0.3 0 0"/>
  </joint>
  <link name="tcp">{_INERTIAL}
    <collision><geometry><sphere radius="0.03"/></geometry></collision>
  </link>
</robot>
"""
MESH = '<collision><geometry><mesh filename="hand.stl"/></geometry></collision>'


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "collide2.urdf"
    path.write_text(text, encoding="utf-8")
    return path


def placed(arm, q):
    caps = ArmCapsules.of(arm)
    start, end = caps.placed(joint_frames(arm, np.asarray(q, float))[0])
    return caps, start, end


def test_collision_shapes_become_enclosing_capsules(tmp_path: Path) -> None:
    arm = load_urdf_arm(write(tmp_path, TWO_LINKS.replace("MESH", MESH)))
    caps, start, end = placed(arm, [0.0, 0.0])
    # j1: the cylinder along x from 0 to 0.4 at z = 0.1; j2: the box's long axis, radius the
    # half-diagonal of its 0.06 × 0.04 section; the sphere on the fixed tcp link; the mesh
    # is skipped. Before them the static base column up to j1's origin.
    assert caps.names[:4] == ("base", "j1", "j2.1", "j2.2")
    np.testing.assert_allclose(start[1:4], [[0, 0, 0.1], [0.4, 0, 0.1], [0.7, 0, 0.1]],
                               atol=1e-12)
    np.testing.assert_allclose(end[1:4], [[0.4, 0, 0.1], [0.7, 0, 0.1], [0.7, 0, 0.1]],
                               atol=1e-12)
    np.testing.assert_allclose(caps.radius[1:4], [0.05, 0.5 * math.hypot(0.06, 0.04), 0.03])
    # j2 turns about y: at +90° the box points down from (0.4, 0, 0.1)
    _, start, end = placed(arm, [0.0, math.pi / 2])
    np.testing.assert_allclose(end[2], [0.4, 0, 0.1 - 0.3], atol=1e-12)


def test_a_link_without_shapes_keeps_the_default_capsule(tmp_path: Path) -> None:
    arm = load_urdf_arm(write(tmp_path, TWO_LINKS.replace("MESH", "").replace(
        '<collision><origin xyz="0.2 0 0"', '<visual><origin xyz="0.2 0 0"').replace(
        '<cylinder radius="0.05" length="0.4"/></geometry></collision>',
        '<cylinder radius="0.05" length="0.4"/></geometry></visual>')))
    caps, start, end = placed(arm, [0.0, 0.0])
    assert caps.names[1] == "j1"
    np.testing.assert_allclose([start[1], end[1]], [[0, 0, 0.1], [0.4, 0, 0.1]], atol=1e-12)


def test_bad_collision_shape_names_line_and_field(tmp_path: Path) -> None:
    text = TWO_LINKS.replace("MESH", "").replace('radius="0.03"', 'radius="-0.03"')
    with pytest.raises(ConfigError, match="must be positive") as info:
        load_urdf_arm(write(tmp_path, text))
    assert info.value.field == "link[tcp].collision[0].sphere.radius"
    assert info.value.line == next(no for no, line in enumerate(text.splitlines(), 1)
                                   if 'radius="-0.03"' in line)
