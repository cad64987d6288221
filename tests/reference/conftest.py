"""Fixtures of the reference cross-checks: a hand-written URDF (our own invented geometry).

Tilted and negative joint axes, fixed joints before, between and after the moving joints, a
prismatic joint along a diagonal, and two gripper fingers beyond the wrist (a branch). Every
link carries a small inertial so the physics libraries need not invent one.
"""

from __future__ import annotations

from pathlib import Path

import pytest

_INERTIAL = ('<inertial><origin xyz="0 0 0"/><mass value="0.5"/>'
             '<inertia ixx="0.001" ixy="0" ixz="0" iyy="0.001" iyz="0" izz="0.001"/></inertial>')

_LINKS = ["world", "pedestal", "l1", "l1b", "l2", "l3", "l4", "wrist", "finger_a", "finger_b"]

TILTED_NO_MIMIC = f"""\
<?xml version="1.0"?>
<robot name="tilted">
{chr(10).join(f'  <link name="{name}">{_INERTIAL}</link>' for name in _LINKS)}
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
    <axis xyz="0.6 0.8 0"/>
    <limit lower="0" upper="0.2" effort="200" velocity="0.3"/>
  </joint>
  <joint name="bend" type="revolute">
    <parent link="l3"/><child link="l4"/>
    <origin xyz="0.1 0 0" rpy="0.3 -0.2 0.1"/>
    <axis xyz="0 0 -1"/>
    <limit lower="-2.5" upper="2.5" effort="20" velocity="4.0"/>
  </joint>
  <joint name="roll" type="continuous">
    <parent link="l4"/><child link="wrist"/>
    <origin xyz="0.02 0 0.08" rpy="0 0 1.0"/>
    <axis xyz="0.36 0.48 0.8"/>
    <limit effort="5" velocity="6.0"/>
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
  </joint>
</robot>
"""


@pytest.fixture
def tilted_urdf(tmp_path: Path) -> Path:
    """TILTED_NO_MIMIC written to a file; its arm is the chain from `world` to `wrist`."""
    path = tmp_path / "tilted.urdf"
    path.write_text(TILTED_NO_MIMIC, encoding="utf-8")
    return path
