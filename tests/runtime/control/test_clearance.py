"""Clearance in the solve: the velocity damper (Faverjon & Tournassoud 1987, REFERENCES §11).

Pure checks on the solver (ideal integration q += q̇·dt). The property test measuring the
integrated poses in PyBullet is in tests/reference/test_pybullet_distance.py.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from runtime.arm.cell import load_cell
from runtime.arm.distance import clearances_at
from runtime.arm.kinematics import tcp_pose
from runtime.arm.load import load_arm
from runtime.control.clearance import ClearanceLimit
from runtime.control.solver import solve

DT = 0.002


@pytest.fixture(scope="module")
def elbow6_bench():
    arm = load_arm("elbow6")
    cell = load_cell("bench", arm)
    return arm, cell, ClearanceLimit.of(arm, cell)


def drive(arm, limit, twist, cycles, q=None, frame="base"):
    """Integrate the solver's rates; returns the last pose and every solution."""
    q = arm.home() if q is None else q.copy()
    prev = np.zeros(arm.n)
    out = []
    for _ in range(cycles):
        sol = solve(arm, q, np.asarray(twist, float), frame=frame, prev_rates=prev, dt_s=DT,
                    clearance=limit)
        q = q + sol.rates * DT
        prev = sol.rates
        out.append(sol)
    return q, out


def test_a_cell_out_of_reach_changes_nothing(tmp_path: Path) -> None:
    arm = load_arm("reach7")
    path = tmp_path / "far.toml"
    path.write_text('name = "far"\n[[objects]]\nname = "moon"\nshape = "sphere"\n'
                    'xyz = [9, 9, 9]\nradius = 1\n', encoding="utf-8")
    limit = ClearanceLimit.of(arm, load_cell(path, arm))
    rng = np.random.default_rng(11)
    for _ in range(20):
        q = arm.home() + rng.uniform(-0.4, 0.4, arm.n)
        twist, prev = rng.normal(size=6), rng.normal(size=arm.n) * 0.1
        plain = solve(arm, q, twist, prev_rates=prev, dt_s=DT)
        guarded = solve(arm, q, twist, prev_rates=prev, clearance=limit, dt_s=DT)
        assert np.array_equal(plain.rates, guarded.rates)
        assert guarded.scales["clearance"] == 1.0 and "clearance" not in plain.scales
        assert guarded.binding_limit == plain.binding_limit
        assert "clearance" not in plain.as_dict() and guarded.clearance.binding_pair is None


def test_straight_down_stops_at_the_safety_distance(elbow6_bench) -> None:
    arm, cell, limit = elbow6_bench
    _, sols = drive(arm, limit, [0, 0, -0.3, 0, 0, 0], 1500)
    d_s = cell.clearance.safety_distance_m
    assert min(s.clearance.min_distance_m for s in sols) >= d_s - 1e-4
    last = sols[-1]
    assert last.binding_limit == "clearance"
    assert last.clearance.binding_pair == ("gripper", "bench")
    assert last.clearance.min_distance_m == pytest.approx(d_s, abs=1e-3)
    assert np.abs(last.rates).max() < 1e-2  # it has come to rest above the bench


def test_a_diagonal_jog_into_the_bench_slides_along_it(elbow6_bench) -> None:
    arm, cell, limit = elbow6_bench
    q, sols = drive(arm, limit, [0, -0.2, -0.25, 0, 0, 0], 1400)
    touching = [i for i, s in enumerate(sols) if s.clearance.binding_pair == ("gripper", "bench")]
    assert touching, "the jog never reached the bench"
    later = sols[touching[0] + 250]
    # still moving along −y at the commanded 0.2 m/s, hardly down any more
    assert later.achieved_twist[1] == pytest.approx(-0.2, abs=0.01)
    assert abs(later.achieved_twist[2]) < 0.03
    assert later.binding_limit == "clearance" and 0.0 < later.scales["clearance"] < 1.0
    y_at_touch = tcp_pose(arm, arm.home())[1, 3] - 0.2 * DT * touching[0]
    assert tcp_pose(arm, q)[1, 3] < y_at_touch - 0.05
    assert min(s.clearance.min_distance_m for s in sols) >= \
        cell.clearance.safety_distance_m - 1e-4


def test_moving_away_is_never_limited(elbow6_bench) -> None:
    arm, _, limit = elbow6_bench
    q, _ = drive(arm, limit, [0, 0, -0.3, 0, 0, 0], 1200)
    for twist in ([0, 0, 0.3, 0, 0, 0], [0.1, 0.2, 0.3, 0, 0, 0]):
        plain = solve(arm, q, np.array(twist, float), dt_s=DT)
        guarded = solve(arm, q, np.array(twist, float), clearance=limit, dt_s=DT)
        assert np.array_equal(plain.rates, guarded.rates)
        assert guarded.scales["clearance"] == 1.0


def test_a_start_inside_the_safety_distance_only_moves_out(tmp_path: Path) -> None:
    arm = load_arm("elbow6")
    tcp = tcp_pose(arm, arm.home())[:3, 3]
    # a ball 1 cm below the tool's capsule end (tool: 0.08 m along the flange z, r 0.035)
    path = tmp_path / "tight.toml"
    flange_z = tcp_pose(arm, arm.home())[:3, 2]
    tool_end = tcp - flange_z * (arm.tool[2, 3] - 0.08)
    centre = tool_end + flange_z * (0.035 + 0.01 + 0.05)
    path.write_text('name = "tight"\n[clearance]\nsafety_distance = 0.03\n'
                    'influence_distance = 0.15\n[[tool]]\nname = "gripper"\n'
                    'from = [0, 0, 0]\nto = [0, 0, 0.08]\nradius = 0.035\n[[objects]]\n'
                    f'name = "ball"\nshape = "sphere"\nxyz = {centre.tolist()}\nradius = 0.05\n',
                    encoding="utf-8")
    limit = ClearanceLimit.of(arm, load_cell(path, arm))
    q = arm.home()
    held = solve(arm, q, np.zeros(6), clearance=limit, dt_s=DT)
    assert held.clearance.min_distance_m == pytest.approx(0.01, abs=1e-6)
    assert not held.rates.any()  # no command: no motion, even inside d_s
    toward = solve(arm, q, np.concatenate((0.2 * flange_z, np.zeros(3))), clearance=limit,
                   dt_s=DT)
    row = toward.clearance.distances
    i = row.pairs.index(("gripper", "ball"))
    assert row.rate_rows[i] @ toward.rates > 0.0  # commanded toward it, it moves out
    assert toward.binding_limit == "clearance"


def test_keep_in_box_binds_by_name() -> None:
    arm = load_arm("reach7")
    limit = ClearanceLimit.of(arm, load_cell("bench", arm))
    _, sols = drive(arm, limit, [0, -0.5, 0, 0, 0, 0], 1500)
    assert sols[-1].clearance.binding_pair == ("tcp", "keep_in")
    assert min(s.clearance.min_distance_m for s in sols) >= 0.03 - 1e-4


def test_the_arm_keeps_clear_of_itself(elbow6_bench) -> None:
    """Pulling the tool in low toward the base column: self pairs (the hand against the
    upper arm and the column) bind, and hold d_s like the objects do."""
    arm, cell, limit = elbow6_bench
    _, sols = drive(arm, limit, [-0.3, 0, -0.15, 0, 0, 0], 2000)
    links = set(arm.joint_names) | {"gripper"}
    bound = {s.clearance.binding_pair for s in sols if s.clearance.binding_pair}
    assert any(set(pair) <= links for pair in bound), bound
    assert min(s.clearance.min_distance_m for s in sols) >= \
        cell.clearance.safety_distance_m - 1e-4


@pytest.mark.parametrize("name, twist", [("elbow6", [0.1, -0.1, -0.3, 0.2, 0.0, 0.1]),
                                         ("reach7", [0.3, 0.0, -0.3, 0.0, 0.0, 0.0])])
def test_the_bounds_carried_over_change_no_rate(name: str, twist: list[float]) -> None:
    """ClearanceLimit carries each pair's last distance (or bound) to the next poses with
    its motion bound and leaves out the pairs, or the whole pass, that cannot have come
    within d_i: along a jog into the bench the rates equal, bit for bit, those of a solve
    without the bound (weights None: the cull alone, every cycle)."""
    arm = load_arm(name)
    cell = load_cell("bench", arm)
    limit = ClearanceLimit.of(arm, cell)
    assert limit.weights is not None
    remembering = ClearanceLimit.of(arm, cell)
    q, prev = arm.home(), np.zeros(arm.n)
    skipped = near = 0
    for _ in range(900):
        fresh = solve(arm, q, np.array(twist), prev_rates=prev, dt_s=DT, clearance=ClearanceLimit(
            limit.model, limit.settings, None))
        kept = solve(arm, q, np.array(twist), prev_rates=prev, dt_s=DT, clearance=remembering)
        assert fresh.rates.tobytes() == kept.rates.tobytes()
        assert fresh.scales == kept.scales and fresh.binding_limit == kept.binding_limit
        assert fresh.clearance.binding_pair == kept.clearance.binding_pair
        exact = float(clearances_at(limit.model, q).distances.min())
        assert kept.clearance.min_distance_m <= exact + 1e-12   # never overstated
        if exact < cell.clearance.influence_distance_m:         # exact inside d_i
            near += 1
            assert kept.clearance.min_distance_m == fresh.clearance.min_distance_m == exact
            assert kept.clearance.nearest_pair == fresh.clearance.nearest_pair
        # fewer pairs measured than the cull alone keeps: the bound left them out
        skipped += len(kept.clearance.distances.pairs) < len(fresh.clearance.distances.pairs)
        q, prev = q + kept.rates * DT, kept.rates
    assert skipped > 100 and near > 100
