"""The distance core on closed-form cases, its rate rows against finite differences, and the
collision model's pairs.

Check values are elementary geometry (REFERENCES §11 names the segment–segment algorithm:
Lumelsky 1985; Ericson 2005 §5.1.9). PyBullet's getClosestPoints on random poses is in
tests/reference/test_pybullet_distance.py.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from runtime.arm.cell import load_cell
from runtime.arm.collision import CollisionModel
from runtime.arm.distance import (
    capsule_capsule,
    cell_distances,
    segment_box,
    segment_parameters,
    segment_plane,
)
from runtime.arm.load import load_arm
from runtime.arm.transforms import make_transform
from runtime.errors import ConfigError


def one(*rows):
    return tuple(np.array([r], dtype=float) for r in rows)


def segment_distance(p1, q1, p2, q2) -> float:
    d, *_ = capsule_capsule(*one(p1, q1), np.zeros(1), *one(p2, q2), np.zeros(1))
    return float(d[0])


@pytest.mark.parametrize(("p1", "q1", "p2", "q2", "expected", "s", "t"), [
    # REFERENCES §11 [V, elementary geometry]: distance 1.0 at s = 0.5, t = 0
    ((0, 0, 0), (1, 0, 0), (0.5, 1, 0), (0.5, 1, 1), 1.0, 0.5, 0.0),
    # skew, closest points inside both: the common perpendicular, length 1 (elementary)
    ((0, 0, 0), (1, 0, 0), (0.5, -1, 1), (0.5, 1, 1), 1.0, 0.5, 0.5),
    # crossing: distance 0 at both middles (elementary)
    ((-1, 0, 0), (1, 0, 0), (0, -1, 0), (0, 1, 0), 0.0, 0.5, 0.5),
    # a point (zero-length segment) against a segment: its distance to the line, 0.3
    ((0.2, 0.3, 0), (0.2, 0.3, 0), (0, 0, 0), (1, 0, 0), 0.3, 0.0, 0.2),
    # two points: their distance, 5 (3-4-5 triangle)
    ((0, 0, 0), (0, 0, 0), (3, 4, 0), (3, 4, 0), 5.0, 0.0, 0.0),
])
def test_segment_closed_forms(p1, q1, p2, q2, expected, s, t) -> None:
    assert segment_distance(p1, q1, p2, q2) == pytest.approx(expected, abs=1e-12)
    P1, Q1, P2, Q2 = one(p1, q1, p2, q2)
    s_got, t_got = segment_parameters(P1, Q1 - P1, P2, Q2 - P2)
    assert (s_got[0], t_got[0]) == pytest.approx((s, t), abs=1e-12)


def test_parallel_segments_distance_is_unique() -> None:
    # REFERENCES §11 [V]: parallel, end point to end point: √2
    assert segment_distance((0, 0, 0), (1, 0, 0), (2, 1, 0), (3, 1, 0)) == \
        pytest.approx(math.sqrt(2.0), abs=1e-12)
    # overlapping parallel segments 0.5 apart: any closest pair, distance 0.5 (elementary)
    assert segment_distance((0, 0, 0), (2, 0, 0), (1, 0.5, 0), (3, 0.5, 0)) == \
        pytest.approx(0.5, abs=1e-12)


def test_capsules_subtract_radii_and_normal_points_to_the_first() -> None:
    d, pa, pb, n = capsule_capsule(*one((0, 0, 1), (1, 0, 1)), np.array([0.1]),
                                   *one((0, -1, 0), (0, 1, 0)), np.array([0.2]))
    assert d[0] == pytest.approx(0.7)
    np.testing.assert_allclose(n[0], (0, 0, 1), atol=1e-12)
    np.testing.assert_allclose(pa[0], (0, 0, 0.9), atol=1e-12)
    np.testing.assert_allclose(pb[0], (0, 0, 0.2), atol=1e-12)


UNIT_CUBE = (make_transform()[None], np.array([[0.5, 0.5, 0.5]]))


@pytest.mark.parametrize(("p", "q", "expected"), [
    # points (zero-length segments) against a unit cube at the origin (elementary geometry;
    # PyBullet getClosestPoints with margin 0 gives the same): face, edge, corner
    ((1.5, 0, 0), (1.5, 0, 0), 1.0),
    ((1.5, 1.5, 0), (1.5, 1.5, 0), math.sqrt(2.0)),
    ((1.5, 1.5, 1.5), (1.5, 1.5, 1.5), math.sqrt(3.0)),
    # a segment parallel to an edge, beside it: √0.5
    ((1, 1, -0.2), (1, 1, 0.2), math.sqrt(0.5)),
    # a segment pointing away from a corner: √0.75 from its near end
    ((1, 1, 1), (2, 2, 2), math.sqrt(0.75)),
    # a segment passing over an edge, closest in its middle: 0.2 above the top edge
    ((1.0, 0, 0.7), (0, 1.0, 0.7), 0.2),
])
def test_segment_box_closed_forms(p, q, expected) -> None:
    gap, on_segment, on_box, n = segment_box(*one(p, q), *UNIT_CUBE)
    assert gap[0] == pytest.approx(expected, abs=1e-12)
    np.testing.assert_allclose(on_segment[0] - on_box[0], gap[0] * n[0], atol=1e-12)
    assert (np.abs(on_box[0]) <= 0.5 + 1e-12).all()


def test_segment_through_a_box_reports_depth_and_a_way_out() -> None:
    gap, _, _, n = segment_box(*one((-1, 0.3, 0.1), (1, 0.3, 0.1)), *UNIT_CUBE)
    assert gap[0] == pytest.approx(-0.2)  # 0.2 below the +y face, the nearest one
    np.testing.assert_allclose(n[0], (0, 1, 0), atol=1e-12)


def test_rotated_box() -> None:
    # a box turned 45° about z: its corner points along +x, at √2·0.5 from the centre
    pose = make_transform((0, 0, 0), (0, 0, math.pi / 4))[None]
    gap, *_ = segment_box(*one((1, 0, 0), (1, 0, 0)), pose, np.array([[0.5, 0.5, 0.5]]))
    assert gap[0] == pytest.approx(1.0 - math.sqrt(0.5), abs=1e-12)


def test_half_space_uses_the_nearer_end() -> None:
    gap, _, on_plane = segment_plane(*one((0, 0, 0.5), (0, 0.3, 0.2)),
                                       np.array([[0.0, 0.0, 1.0]]), np.array([0.1]))
    assert gap[0] == pytest.approx(0.1)
    np.testing.assert_allclose(on_plane[0], (0, 0.3, 0.1))


# ----------------------------------------------------------------------------------------
# The whole model
# ----------------------------------------------------------------------------------------

@pytest.fixture(scope="module", params=["elbow6", "reach7"])
def arm_in_bench(request):
    arm = load_arm(request.param)
    return arm, load_cell("bench", arm)


def test_rate_rows_match_central_differences(arm_in_bench) -> None:
    """ḋ = row·q̇ against (d(q + hq̇) − d(q − hq̇))/2h (REFERENCES §11), random poses near
    home, skipping pairs whose witness points jump between the two sides (ties)."""
    arm, cell = arm_in_bench
    rng = np.random.default_rng(7)
    h = 1e-6
    checked = 0
    for _ in range(20):
        q = arm.home() + rng.uniform(-0.6, 0.6, arm.n)
        qd = rng.normal(size=arm.n)
        at = cell_distances(arm, cell, q)
        plus = cell_distances(arm, cell, q + h * qd)
        minus = cell_distances(arm, cell, q - h * qd)
        fd = (plus.distances - minus.distances) / (2 * h)
        smooth = (np.linalg.norm(plus.points_arm - minus.points_arm, axis=1) < 1e-3)
        np.testing.assert_allclose((at.rate_rows @ qd)[smooth], fd[smooth], atol=1e-6)
        checked += int(smooth.sum())
    assert checked > 500


def test_neighbours_and_mount_are_not_pairs() -> None:
    arm = load_arm("elbow6")
    pairs = {frozenset(p) for p in CollisionModel.build(arm, load_cell("bench", arm)).pair_names}
    # across the zero-length elbow and wrist links: touching by construction
    assert frozenset(("shoulder", "forearm_roll")) not in pairs
    assert frozenset(("forearm_roll", "flange_roll")) not in pairs
    assert frozenset(("gripper", "flange_roll")) not in pairs  # one body
    # the first link stands on the mount; the second does not
    assert frozenset(("base_yaw", "bench")) not in pairs
    assert frozenset(("shoulder", "bench")) in pairs
    assert frozenset(("base_yaw", "forearm_roll")) in pairs
    assert frozenset(("tcp", "keep_in")) in pairs


def test_scara_column_is_a_static_base_capsule() -> None:
    arm = load_arm("scara4")
    model = CollisionModel.build(arm, load_cell("bench", arm))
    i = model.capsules.names.index("base")
    assert model.capsules.frame[i] == -1
    np.testing.assert_allclose(model.capsules.end[i], (0, 0, 0.45))


def write_cell(tmp_path: Path, body: str) -> Path:
    path = tmp_path / "cell.toml"
    path.write_text('name = "c"\n' + body, encoding="utf-8")
    return path


def test_object_overlapping_the_arm_at_home_is_refused(tmp_path: Path) -> None:
    arm = load_arm("elbow6")  # its elbow is at (0.144, 0, 0.725) at home
    path = write_cell(tmp_path, '[[objects]]\nname = "a"\nshape = "sphere"\nxyz = [2, 0, 0]\n'
                      'radius = 0.1\n\n[[objects]]\nname = "lamp"\nshape = "sphere"\n'
                      'xyz = [0.15, 0, 0.75]\nradius = 0.05\n')
    with pytest.raises(ConfigError, match="'lamp' overlaps 'shoulder' of elbow6") as info:
        load_cell(path, arm)
    assert info.value.field == "objects[1]" and info.value.line == 8


def test_tcp_outside_keep_in_and_unknown_excluded_name(tmp_path: Path) -> None:
    arm = load_arm("elbow6")
    path = write_cell(tmp_path, '[keep_in]\nxyz = [0, 0, 0]\nsize = [0.2, 0.2, 0.2]\n')
    with pytest.raises(ConfigError, match="outside the keep-in box"):
        load_cell(path, arm)
    path = write_cell(tmp_path, 'excluded_pairs = [["shoulder", "tabel"]]\n')
    with pytest.raises(ConfigError, match="no link, tool capsule or object named 'tabel'"):
        load_cell(path, arm)


def test_cull_keeps_every_pair_within_reach_and_bounds_the_rest(arm_in_bench) -> None:
    """The control cycle's cull (runtime.arm.distance.clearances with within_m) measures
    the same as the full pass for every pair it keeps, keeps every pair closer than
    within_m, and reports a lower bound for the rest."""
    from runtime.arm.distance import clearances, collision_model
    from runtime.arm.kinematics import joint_frames
    arm, cell = arm_in_bench
    model = collision_model(arm, cell)
    rng = np.random.default_rng(9)
    for _ in range(40):
        q = arm.home() + rng.uniform(-1.0, 1.0, arm.n)
        frames, T = joint_frames(arm, q)
        full = clearances(model, frames, T)
        part = clearances(model, frames, T, within_m=0.15)
        # the same arithmetic on fewer rows: equal to round-off
        np.testing.assert_allclose(full.distances[part.index], part.distances, atol=1e-15)
        np.testing.assert_allclose(full.rate_rows[part.index], part.rate_rows, atol=1e-15)
        left_out = np.setdiff1d(np.arange(len(full.pairs)), part.index)
        assert (full.distances[left_out] >= 0.15).all()
        if len(left_out):
            assert part.beyond_m <= full.distances[left_out].min() + 1e-12


def test_known_bounds_leave_out_pairs_and_keep_the_rows_bit_for_bit(arm_in_bench) -> None:
    """With bounds known from elsewhere (`known_m`), a kind of pair the cull keeps but the
    bounds place beyond within_m is not measured; the rows of the pairs measured are the
    same numbers, bit for bit, as without (the rate-row product keeps its shape), and
    every pair left out is reported as beyond."""
    from runtime.arm.distance import clearances, collision_model
    from runtime.arm.kinematics import joint_frames
    arm, cell = arm_in_bench
    model = collision_model(arm, cell)
    rng = np.random.default_rng(4)
    left_out = 0
    for _ in range(60):
        q = arm.home() + rng.uniform(-1.0, 1.0, arm.n)
        frames, T = joint_frames(arm, q)
        plain = clearances(model, frames, T, within_m=0.15)
        exact = clearances(model, frames, T).distances
        # true lower bounds that place every pair beyond 0.15 m beyond it
        known = np.where(exact >= 0.15 + 1e-6, exact, -np.inf)
        part = clearances(model, frames, T, within_m=0.15, known_m=known)
        assert set(part.index.tolist()) <= set(plain.index.tolist())
        assert (exact[np.setdiff1d(plain.index, part.index)] >= 0.15).all()
        left_out += len(plain.index) - len(part.index)
        where = np.searchsorted(plain.index, part.index)
        assert plain.rate_rows[where].tobytes() == part.rate_rows.tobytes()
        assert plain.distances[where].tobytes() == part.distances.tobytes()
        assert part.beyond_m <= exact[np.setdiff1d(np.arange(len(exact)), part.index)].min()
        assert part.lower_m is not None and (part.lower_m <= exact + 1e-12).all()
    assert left_out > 0


def test_distance_table_is_the_distances_of_each_pose_bit_for_bit(arm_in_bench) -> None:
    """The preflight's table of every pair at every pose, taken many poses per pass, is
    `clearances_at` pose by pose, to the bit (blocks of 7 poses: a last block shorter)."""
    from runtime.arm.distance import clearances_at, collision_model, distance_table
    arm, cell = arm_in_bench
    model = collision_model(arm, cell)
    qs = arm.home() + np.random.default_rng(5).uniform(-1.5, 1.5, (40, arm.n))
    table = distance_table(model, qs, block=7)
    assert table.shape == (40, len(model.pair_names))
    assert table.tobytes() == np.array([clearances_at(model, q).distances for q in qs]).tobytes()
