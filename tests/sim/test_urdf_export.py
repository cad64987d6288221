"""Model → URDF text → model: the same TCP pose and Jacobian, and a file other tools accept."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from dataclasses import replace
from pathlib import Path
from xml.sax.saxutils import quoteattr

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from runtime import palette
from runtime.arm.kinematics import geometric_jacobian, tcp_pose
from runtime.arm.load import load_arm
from runtime.arm.transforms import make_transform, rpy_to_matrix
from runtime.arm.urdf import load_urdf_arm
from sim.urdf import _attribute, arm_to_urdf, matrix_to_rpy_exact, write_urdf

DEMO_ARMS = ["elbow6", "reach7", "scara4", "planar3"]


def random_q(arm, rng):
    return rng.uniform(np.maximum(arm.lower, -np.pi), np.minimum(arm.upper, np.pi))


@pytest.mark.parametrize("name", DEMO_ARMS)
def test_round_trip_gives_the_same_pose_and_jacobian(tmp_path: Path, name: str) -> None:
    arm = load_arm(name)
    back = load_urdf_arm(write_urdf(arm, tmp_path / f"{name}.urdf"))
    assert back.joint_names == arm.joint_names
    assert [j.kind for j in back.joints] == [j.kind for j in arm.joints]
    np.testing.assert_array_equal(back.lower, arm.lower)
    np.testing.assert_array_equal(back.upper, arm.upper)
    np.testing.assert_array_equal(back.max_speed, arm.max_speed)
    rng = np.random.default_rng(12)
    for _ in range(25):
        q = random_q(arm, rng)
        np.testing.assert_allclose(tcp_pose(back, q), tcp_pose(arm, q), rtol=0, atol=1e-12)
        np.testing.assert_allclose(geometric_jacobian(back, q), geometric_jacobian(arm, q),
                                   rtol=0, atol=1e-12)


def test_layout_names_and_fixed_joints() -> None:
    arm = load_arm("scara4")  # has a base offset, a tool offset and a prismatic joint
    root = ET.fromstring(arm_to_urdf(arm))
    assert root.get("name") == "scara4"
    links = [link.get("name") for link in root.findall("link")]
    assert links == ["world", "base_link", "link_1", "link_2", "link_3", "link_4", "flange",
                     "tcp"]
    joints = {j.get("name"): j for j in root.findall("joint")}
    assert [j.get("type") for j in joints.values()] == \
        ["fixed", "revolute", "revolute", "prismatic", "revolute", "fixed", "fixed"]
    assert joints["tcp_joint"].find("child").get("link") == "tcp"
    assert joints["flange_joint"].find("parent").get("link") == "link_4"
    # The base transform is the world joint; no world link when the base is identity.
    xyz = [float(v) for v in joints["world_joint"].find("origin").get("xyz").split()]
    assert xyz == [0.0, 0.0, 0.45]
    assert "world" not in arm_to_urdf(load_arm("elbow6"))
    assert ET.fromstring(arm_to_urdf(arm, name="other")).get("name") == "other"


@pytest.mark.parametrize("name", ["reach7", "scara4"])  # scara4 also has a world pedestal
def test_every_link_has_a_plausible_inertial(name: str) -> None:
    for link in ET.fromstring(arm_to_urdf(load_arm(name))).findall("link"):
        inertial = link.find("inertial")
        mass = float(inertial.find("mass").get("value"))
        I = inertial.find("inertia")  # noqa: E741 (the inertia tensor)
        ixx, iyy, izz = (float(I.get(k)) for k in ("ixx", "iyy", "izz"))
        # Principal moments of a rigid body obey the triangle inequality (any dynamics text).
        assert ixx > 0 and iyy > 0 and izz > 0
        assert ixx + iyy >= izz and iyy + izz >= ixx and izz + ixx >= iyy
        if link.get("name") in ("flange", "tcp"):
            assert 0 < mass < 0.01  # present, so PyBullet does not assume 1 kg (REFERENCES §7)
        else:
            assert 0.3 < mass < 5.0


def test_unlimited_revolute_joints_are_written_as_continuous(tmp_path: Path) -> None:
    arm = load_arm("planar3")
    joints = list(arm.joints)
    joints[1] = replace(joints[1], lower=-math.inf, upper=math.inf)
    arm = replace(arm, joints=tuple(joints))
    text = arm_to_urdf(arm)
    j2 = next(j for j in ET.fromstring(text).findall("joint") if j.get("name") == "j2")
    assert j2.get("type") == "continuous" and j2.find("limit").get("lower") is None
    back = load_urdf_arm(write_urdf(arm, tmp_path / "p.urdf"))
    assert back.joints[1].lower == -math.inf and back.joints[1].upper == math.inf


def test_floats_are_written_with_all_digits() -> None:
    # repr() gives the shortest text that reads back to the same double (Python docs, float
    # repr); rounded rpy text limits round trips to ~1e-14 (REFERENCES §10).
    text = arm_to_urdf(load_arm("elbow6"))
    assert "1.5707963267948966" in text  # π/2, all 17 significant digits


@pytest.mark.parametrize("rpy", [(0.3, -1.2, 2.9), (0.0, math.pi / 2, 0.4), (1.0, -math.pi / 2, -2),
                                 (math.pi, 0.0, 0.0), (0.1, math.pi / 2 - 1e-9, 0.2)])
def test_rpy_extraction_is_exact_even_at_gimbal_lock(rpy) -> None:
    # R = Rz(y)·Ry(p)·Rx(r), the URDF convention (REFERENCES §9.1).
    R = rpy_to_matrix(rpy)
    np.testing.assert_allclose(rpy_to_matrix(matrix_to_rpy_exact(R)), R, rtol=0, atol=1e-15)


def test_write_urdf_writes_the_text(tmp_path: Path) -> None:
    arm = load_arm("planar3")
    path = write_urdf(arm, tmp_path / "planar3.urdf")
    assert path.read_text(encoding="utf-8") == arm_to_urdf(arm)


def test_reserved_names_do_not_clash_with_joint_names(tmp_path: Path) -> None:
    arm = load_arm("planar3")
    joints = tuple(replace(j, name=nm) for j, nm in zip(arm.joints,
                                                         ["flange_joint", "tcp_joint", "j3"]))
    arm = replace(arm, joints=joints, base=make_transform((0, 0, 0.1)))
    names = [j.get("name") for j in ET.fromstring(arm_to_urdf(arm)).findall("joint")]
    assert len(names) == len(set(names))
    back = load_urdf_arm(write_urdf(arm, tmp_path / "p.urdf"))
    assert back.joint_names == ("flange_joint", "tcp_joint", "j3")


@pytest.mark.parametrize("name", DEMO_ARMS)
def test_materials_are_the_palette_colours(name: str) -> None:
    root = ET.fromstring(arm_to_urdf(load_arm(name)))
    colours = {m.get("name"): [float(v) for v in m.find("color").get("rgba").split()]
               for m in root.findall("material")}
    expected = {"tube": palette.ARM_LINK, "housing": palette.ARM_HOUSING, "tool": palette.TOOL}
    assert colours.keys() == expected.keys()
    for material, rgb in expected.items():
        # four decimals in the file: within 1e-4 of the 8-bit palette value, a fifth of a level
        np.testing.assert_allclose(colours[material], palette.unit(rgb), rtol=0, atol=1e-4)
    used = {m.get("name") for m in root.iter("material") if m.find("color") is None}
    assert used == set(expected)          # every visual names one of them, none is unused
    tool = [v for link in root.findall("link") if link.get("name") in ("flange", "tcp")
            for v in link.findall("visual")]
    assert tool and all(v.find("material").get("name") == "tool" for v in tool)


@given(st.text())
def test_attribute_values_are_quoted_as_the_standard_library_quotes_them(text: str) -> None:
    # Reference: xml.sax.saxutils.quoteattr (Python standard library); ours avoids its import
    # of urllib.request, which slowed the simulated arm's start.
    assert _attribute(text) == quoteattr(text)
