"""Loading arm files: the shipped arms, units, and one clear error per kind of bad file.

Each bad-file test asserts the error names the file, the field and (where the file has one)
the line. These are the project's own rules for config errors (DEVELOPERS.md, Conventions).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from runtime.errors import ConfigError
from runtime.arm.kinematics import geometric_jacobian, tcp_pose
from runtime.arm.model import Arm, limits_digest, load_arm

GOOD_TOML = """\
name = "two_link"
convention = "dh"
angle_unit = "deg"
length_unit = "m"
task = ["vx", "vy", "wz"]

[tool]
xyz = [0.05, 0.0, 0.0]

[[joints]]
name = "shoulder"
type = "revolute"
a = 0.4
lower = -170
upper = 170
max_speed = 90
max_accel = 300

[[joints]]
name = "elbow"
type = "revolute"
a = 0.3
lower = -150
upper = 150
max_speed = 120
max_accel = 400
rated_speed = 150
"""


def write(tmp_path: Path, text: str, name: str = "arm.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def line_of(text: str, needle: str, occurrence: int = 0) -> int:
    """1-based line of the occurrence-th line containing `needle`."""
    hits = [no for no, line in enumerate(text.splitlines(), start=1) if needle in line]
    return hits[occurrence]


def load_error(tmp_path: Path, text: str, name: str = "arm.toml") -> ConfigError:
    path = write(tmp_path, text, name)
    with pytest.raises(ConfigError) as info:
        load_arm(path)
    err = info.value
    assert err.path == str(path) and str(path) in str(err)
    return err


# ------------------------------------------------------------------------------------------
# Good files
# ------------------------------------------------------------------------------------------

def test_good_toml_loads_in_si_units(tmp_path: Path) -> None:
    arm = load_arm(write(tmp_path, GOOD_TOML))
    assert arm.joint_names == ("shoulder", "elbow")
    assert arm.lower[0] == pytest.approx(math.radians(-170))
    assert arm.max_speed[1] == pytest.approx(math.radians(120))
    assert arm.rated_speed[0] == arm.max_speed[0]          # rating defaults to the limit
    assert arm.rated_speed[1] == pytest.approx(math.radians(150))
    assert arm.task_axes == (True, True, False, False, False, True)
    # Planar 2R + tool x offset: x = a1 + a2 + 0.05 at q = 0 (standard DH, Spong 2006 Ch. 3).
    np.testing.assert_allclose(tcp_pose(arm, np.zeros(2))[:3, 3], [0.75, 0, 0], atol=1e-15)


@pytest.mark.parametrize("name", ["elbow6", "reach7", "scara4", "planar3"])
def test_shipped_arms_load_with_home_inside_limits(name: str) -> None:
    arm = load_arm(name)
    assert isinstance(arm, Arm) and arm.name == name
    home = arm.home()
    assert np.all(arm.lower <= home) and np.all(home <= arm.upper)
    assert np.all(arm.max_speed > 0) and np.all(arm.max_accel > 0)
    assert np.all(arm.rated_speed >= arm.max_speed)
    assert len(limits_digest(arm)) == 16


def test_millimetres_and_radians_are_converted_once(tmp_path: Path) -> None:
    text = GOOD_TOML.replace('angle_unit = "deg"', 'angle_unit = "rad"') \
        .replace('length_unit = "m"', 'length_unit = "mm"') \
        .replace("a = 0.4", "a = 400").replace("a = 0.3", "a = 300") \
        .replace("xyz = [0.05, 0.0, 0.0]", "xyz = [50, 0, 0]") \
        .replace("lower = -170", "lower = -3").replace("upper = 170", "upper = 3")
    arm = load_arm(write(tmp_path, text))
    np.testing.assert_allclose(tcp_pose(arm, np.zeros(2))[:3, 3], [0.75, 0, 0], atol=1e-15)
    assert arm.lower[0] == -3.0


def test_unknown_arm_name_lists_the_shipped_arms() -> None:
    with pytest.raises(ConfigError, match="elbow6") as info:
        load_arm("no_such_arm")
    assert info.value.field == "arm"


# ------------------------------------------------------------------------------------------
# One test per kind of bad file
# ------------------------------------------------------------------------------------------

def test_missing_field_names_the_joint_and_its_table(tmp_path: Path) -> None:
    text = GOOD_TOML.replace("max_speed = 120\n", "")
    err = load_error(tmp_path, text)
    assert err.field == "joints[1].max_speed" and "joints[1].max_speed" in str(err)
    assert err.line == line_of(text, "[[joints]]", 1)  # the second [[joints]] header


def test_missing_top_level_field(tmp_path: Path) -> None:
    err = load_error(tmp_path, GOOD_TOML.replace('convention = "dh"\n', ""))
    assert err.field == "convention" and "convention" in str(err)


def test_unknown_joint_type(tmp_path: Path) -> None:
    text = GOOD_TOML.replace('type = "revolute"', 'type = "ball"', 1)
    err = load_error(tmp_path, text)
    assert err.field == "joints[0].type" and "'ball'" in str(err)
    assert err.line == line_of(text, 'type = "ball"')


def test_lower_above_upper(tmp_path: Path) -> None:
    text = GOOD_TOML.replace("lower = -150", "lower = 160")
    err = load_error(tmp_path, text)
    assert err.field == "joints[1].lower" and "below upper" in str(err)
    assert err.line == line_of(text, "lower = 160")


@pytest.mark.parametrize("value", ["0", "-90"])
def test_non_positive_speed(tmp_path: Path, value: str) -> None:
    text = GOOD_TOML.replace("max_speed = 90", f"max_speed = {value}")
    err = load_error(tmp_path, text)
    assert err.field == "joints[0].max_speed" and "positive" in str(err)
    assert err.line == line_of(text, f"max_speed = {value}")


@pytest.mark.parametrize("literal", ["nan", "inf", "-inf"])
def test_non_finite_number(tmp_path: Path, literal: str) -> None:
    text = GOOD_TOML.replace("a = 0.3", f"a = {literal}")
    err = load_error(tmp_path, text)
    assert err.field == "joints[1].a" and "finite" in str(err)
    assert err.line == line_of(text, f"a = {literal}")


def test_unknown_unit(tmp_path: Path) -> None:
    text = GOOD_TOML.replace('angle_unit = "deg"', 'angle_unit = "grad"')
    err = load_error(tmp_path, text)
    assert err.field == "angle_unit" and "'grad'" in str(err) and "deg" in str(err)
    assert err.line == line_of(text, "angle_unit")


def test_malformed_toml_reports_the_line(tmp_path: Path) -> None:
    text = GOOD_TOML.replace("a = 0.3", "a = 0.3.1")
    err = load_error(tmp_path, text)
    assert "not valid TOML" in str(err)
    assert err.line == line_of(text, "a = 0.3.1")


def test_unknown_key_is_a_typo_not_ignored(tmp_path: Path) -> None:
    text = GOOD_TOML.replace("max_accel = 300", "max_acel = 300")
    err = load_error(tmp_path, text)
    assert err.field == "joints[0].max_acel"
    assert err.line == line_of(text, "max_acel")


@pytest.mark.parametrize("bad", ['tcp_limits = 3', 'solver = "fast"', 'angle_unit = ["deg"]'])
def test_wrong_value_shapes_are_config_errors(tmp_path: Path, bad: str) -> None:
    key = bad.split()[0]
    text = GOOD_TOML.replace('angle_unit = "deg"\n', "").replace(
        'task = ["vx", "vy", "wz"]', f'task = ["vx", "vy", "wz"]\n{bad}')
    err = load_error(tmp_path, text)
    assert err.field == key


def test_joints_entry_that_is_not_a_table(tmp_path: Path) -> None:
    text = GOOD_TOML.split("[[joints]]")[0].replace('task = ["vx", "vy", "wz"]',
                                                     'task = ["vx"]\njoints = [1, 2]')
    err = load_error(tmp_path, text)
    assert err.field == "joints[0]"


def test_home_outside_the_limits(tmp_path: Path) -> None:
    text = GOOD_TOML.replace('task = ["vx", "vy", "wz"]', 'task = ["vx", "vy", "wz"]\n'
                                                          "home = [0, 175]")
    err = load_error(tmp_path, text)
    assert err.field == "home" and "elbow" in str(err)
    assert err.line == line_of(text, "home =")


def test_missing_file() -> None:
    with pytest.raises(ConfigError, match="cannot read"):
        load_arm(Path("/nonexistent/arm.toml"))


# ------------------------------------------------------------------------------------------
# URDF files and TOML files wrapping a URDF (details in test_urdf_loader.py)
# ------------------------------------------------------------------------------------------

URDF = """\
<?xml version="1.0"?>
<robot name="pair">
  <link name="base"/>
  <link name="upper"/>
  <link name="fore"/>
  <link name="spare"/>
  <joint name="j1" type="revolute">
    <parent link="base"/><child link="upper"/>
    <axis xyz="0 0 1"/>
    <limit lower="-2" upper="2" effort="10" velocity="1.5"/>
  </joint>
  <joint name="j2" type="revolute">
    <parent link="upper"/><child link="fore"/>
    <origin xyz="0.4 0 0"/>
    <axis xyz="0 0 1"/>
    <limit lower="-2" upper="2" effort="10" velocity="2.0"/>
  </joint>
  <joint name="j3" type="fixed">
    <parent link="base"/><child link="spare"/>
  </joint>
</robot>
"""


def test_urdf_with_no_path_between_the_named_links(tmp_path: Path) -> None:
    path = write(tmp_path, URDF, "pair.urdf")
    with pytest.raises(ConfigError) as info:
        load_arm(path, base_link="spare", tip_link="fore")
    err = info.value
    assert err.path == str(path) and err.field == "tip_link"
    assert "no path" in str(err) and "'spare'" in str(err) and "'fore'" in str(err)


def test_malformed_xml_reports_the_line(tmp_path: Path) -> None:
    text = URDF.replace('<child link="fore"/>', '<child link="fore">')
    path = write(tmp_path, text, "pair.urdf")
    with pytest.raises(ConfigError) as info:
        load_arm(path)
    assert "not well-formed XML" in str(info.value)
    assert info.value.line == line_of(text, "</joint>", 1)  # where the mismatch shows


def test_toml_wrapping_a_urdf_adds_accelerations_and_home(tmp_path: Path) -> None:
    write(tmp_path, URDF, "pair.urdf")
    text = """\
name = "pair_wrapped"
convention = "urdf"
urdf = "pair.urdf"
tip_link = "fore"
angle_unit = "deg"
task = ["vx", "vy", "wz"]
home = [10, -20]

[base]
xyz = [0, 0, 0.5]

[[joints]]
name = "j2"
max_accel = 600
rated_speed = 150
"""
    arm = load_arm(write(tmp_path, text))
    assert arm.name == "pair_wrapped" and arm.joint_names == ("j1", "j2")
    assert arm.max_speed.tolist() == [1.5, 2.0]                       # from the URDF
    assert arm.max_accel[1] == pytest.approx(math.radians(600))       # override, deg/s²
    assert arm.max_accel[0] == pytest.approx(1.5 / 0.25)              # URDF default ramp
    assert arm.rated_speed[1] == pytest.approx(math.radians(150))
    np.testing.assert_allclose(arm.home(), np.radians([10, -20]))
    plain = load_arm(tmp_path / "pair.urdf", tip_link="fore")
    q = np.array([0.3, -0.4])
    T = tcp_pose(plain, q)
    T[2, 3] += 0.5  # the [base] offset
    np.testing.assert_allclose(tcp_pose(arm, q), T, atol=1e-15)
    np.testing.assert_allclose(geometric_jacobian(arm, q), geometric_jacobian(plain, q),
                               atol=1e-15)


def test_toml_wrapping_a_urdf_rejects_unknown_joint_and_key(tmp_path: Path) -> None:
    write(tmp_path, URDF, "pair.urdf")
    head = 'name = "w"\nconvention = "urdf"\nurdf = "pair.urdf"\ntip_link = "fore"\n'
    err = load_error(tmp_path, head + '[[joints]]\nname = "j9"\nmax_accel = 5\n')
    assert err.field == "joints[0].name" and "j1, j2" in str(err)
    err = load_error(tmp_path, head + '[[joints]]\nname = "j1"\nlower = -1\n')
    assert err.field == "joints[0].lower" and err.line == 7
    err = load_error(tmp_path, head + '[[joints]]\nname = "j1"\nmax_accel = -1\n')
    assert err.field == "joints[0].max_accel" and err.line == 7


def test_link_radius_per_joint_with_a_default(tmp_path: Path) -> None:
    """The collision model's capsule radius (runtime.arm.collision): per joint, in the file's
    length unit, 0.04 m when absent; not positive is an error at its line."""
    from runtime.arm.model import DEFAULT_LINK_RADIUS_M
    text = GOOD_TOML.replace('a = 0.3\n', 'a = 0.3\nlink_radius = 0.025\n')
    arm = load_arm(write(tmp_path, text))
    assert [j.link_radius_m for j in arm.joints] == [DEFAULT_LINK_RADIUS_M, 0.025]
    bad = GOOD_TOML.replace('a = 0.3\n', 'a = 0.3\nlink_radius = 0\n')
    with pytest.raises(ConfigError, match="must be positive") as info:
        load_arm(write(tmp_path, bad))
    assert info.value.field == "joints[1].link_radius"
    assert info.value.line == line_of(bad, "link_radius")
