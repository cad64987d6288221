"""Loading workcell files: the shipped cell, and one clear error per kind of bad file.

Each bad-file test asserts the error names the file, the field and the line: the project's
rule for config errors (DEVELOPERS.md, Conventions).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from runtime.arm.cell import Box, Cylinder, HalfSpace, Sphere, load_cell
from runtime.arm.model import load_arm
from runtime.errors import ConfigError

GOOD = """\
name = "test_cell"
length_unit = "mm"
mount = "table"

[clearance]
safety_distance = 20
influence_distance = 100
gain = 4

[[objects]]
name = "table"
shape = "box"
xyz = [300, 0, -25]
size = [1000, 1000, 50]

[[objects]]
name = "post"
shape = "cylinder"
xyz = [0, 600, 500]
rpy = [90, 0, 0]
radius = 40
length = 1000

[[objects]]
name = "ball"
shape = "sphere"
xyz = [-500, -500, 300]
radius = 50

[[objects]]
name = "wall"
shape = "halfspace"
normal = [2, 0, 0]
offset = -1200
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "cell.toml"
    path.write_text(text, encoding="utf-8")
    return path


def line_of(text: str, needle: str) -> int:
    """1-based line of the last line containing `needle`."""
    return [no for no, line in enumerate(text.splitlines(), 1) if needle in line][-1]


@pytest.fixture(scope="module")
def elbow6():
    return load_arm("elbow6")


def test_shipped_bench_cell_loads_for_the_demo_arms() -> None:
    for arm_name in ("elbow6", "reach7"):
        cell = load_cell("bench", load_arm(arm_name))
        assert [o.name for o in cell.objects] == ["bench", "fixture", "camera_post", "back_wall"]
        assert cell.keep_in is not None and cell.tool and cell.mount == "bench"


def test_units_are_converted_and_shapes_built(tmp_path: Path, elbow6) -> None:
    cell = load_cell(write(tmp_path, GOOD), elbow6)
    table, post, ball, wall = cell.objects
    assert isinstance(table, Box) and table.half_extents_m == pytest.approx((0.5, 0.5, 0.025))
    np.testing.assert_allclose(table.pose[:3, 3], (0.3, 0.0, -0.025))
    assert isinstance(post, Cylinder) and post.radius_m == pytest.approx(0.04)
    assert post.half_length_m == pytest.approx(0.5)
    # roll 90°: the cylinder's local z axis lies along −y of the base (URDF rpy convention)
    np.testing.assert_allclose(post.pose[:3, 2], (0.0, -1.0, 0.0), atol=1e-12)
    assert isinstance(ball, Sphere) and ball.center_m == pytest.approx((-0.5, -0.5, 0.3))
    # a half-space normal is made unit and its offset scaled with it: 2x ≥ −1.2 → x ≥ −0.6
    assert isinstance(wall, HalfSpace) and wall.normal == (1.0, 0.0, 0.0)
    assert wall.offset_m == pytest.approx(-0.6)
    c = cell.clearance
    assert (c.safety_distance_m, c.influence_distance_m, c.gain_per_s) == \
        pytest.approx((0.02, 0.1, 4.0))


@pytest.mark.parametrize(("needle", "replacement", "field", "message"), [
    ('shape = "sphere"', 'shape = "cone"', "objects[2].shape", "unknown shape"),
    ("size = [1000, 1000, 50]", "size = [1000, -1000, 50]", "objects[0].size", "positive"),
    ("radius = 40", "radius = nan", "objects[1].radius", "finite"),
    ("radius = 50", "radius = 0", "objects[2].radius", "positive"),
    ("normal = [2, 0, 0]", "normal = [0, 0, 0]", "objects[3].normal", "zero vector"),
    ("offset = -1200", "offest = -1200", "objects[3].offest", "unknown key"),
    ("influence_distance = 100", "influence_distance = 10", "clearance.influence_distance",
     "must exceed"),
    ("safety_distance = 20", "safety_distance = -1", "clearance.safety_distance", "negative"),
    ('name = "ball"', 'name = "post"', "objects[2].name", "already used"),
    ('xyz = [-500, -500, 300]', 'xyz = [-500, 300]', "objects[2].xyz", "3 numbers"),
])
def test_bad_files_name_file_line_and_field(tmp_path: Path, elbow6, needle: str,
                                            replacement: str, field: str, message: str) -> None:
    text = GOOD.replace(needle, replacement)
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_cell(path, elbow6)
    err = info.value
    assert err.path == str(path) and err.field == field and message in str(err)
    assert err.line == line_of(text, replacement)


def test_unknown_mount_and_unknown_name(tmp_path: Path, elbow6) -> None:
    with pytest.raises(ConfigError, match="to stand on"):
        load_cell(write(tmp_path, GOOD.replace('mount = "table"', 'mount = "desk"')), elbow6)
    with pytest.raises(ConfigError, match="no cell named 'nope'; shipped cells: bench"):
        load_cell("nope", elbow6)
