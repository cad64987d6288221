"""Forward kinematics and the geometric Jacobian against textbook closed forms, published check
values and finite differences. Values marked "REFERENCES §x" are from the project's reference
sheet of published check values (each there with its source and how it was verified)."""

from __future__ import annotations

import math
import pickle
import threading

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from runtime.arm.kinematics import (
    analyse_pose,
    condition_number,
    geometric_jacobian,
    jacobian_from_frames,
    joint_frames,
    link_transforms,
    pose_and_jacobian,
    tcp_pose,
    tool_frame_jacobian,
    twist_to_base,
    yoshikawa_manipulability,
)
from runtime.arm.load import load_arm
from runtime.arm.model import Arm, DHRow, Joint, chain_from_dh
from runtime.arm.transforms import make_transform, trans

DEMO_ARMS = ["elbow6", "reach7", "scara4", "planar3"]
TASK_XY_WZ = (True, True, False, False, False, True)


def dh_arm(rows: list[tuple[float, float, float, float]], kinds: str | None = None, *,
           modified: bool = False, tool=None, base=None, task=(True,) * 6) -> Arm:
    """An arm from DH rows (d, a, alpha, theta) in m and rad; kinds like "RRPR"."""
    kinds_l = ["prismatic" if k == "P" else "revolute" for k in (kinds or "R" * len(rows))]
    origins, flange = chain_from_dh([DHRow(*r) for r in rows], kinds_l, modified=modified)
    joints = tuple(Joint(name=f"j{i + 1}", kind=k, lower=-10.0, upper=10.0, max_speed=1.0,
                         max_accel=1.0, rated_speed=1.0, rated_accel=1.0, effort=None, origin=o)
                   for i, (k, o) in enumerate(zip(kinds_l, origins)))
    return Arm(name="test", joints=joints, base=np.eye(4) if base is None else base,
               flange=flange, tool=np.eye(4) if tool is None else tool, task_axes=task)


def random_q(arm: Arm, rng: np.random.Generator) -> np.ndarray:
    return rng.uniform(np.maximum(arm.lower, -np.pi), np.minimum(arm.upper, np.pi))


def fd_jacobian(arm: Arm, q: np.ndarray, h: float = 1e-6) -> np.ndarray:
    """Central differences of the FK: linear part from the TCP position, angular part from
    the skew-symmetric part of dR·Rᵀ (standard numerical differentiation; Siciliano et al.
    2009 §3.1: Ṙ = S(ω)·R)."""
    J = np.zeros((6, arm.n))
    R = tcp_pose(arm, q)[:3, :3]
    for i in range(arm.n):
        dq = np.zeros(arm.n)
        dq[i] = h
        Tp, Tm = tcp_pose(arm, q + dq), tcp_pose(arm, q - dq)
        J[:3, i] = (Tp[:3, 3] - Tm[:3, 3]) / (2 * h)
        S = (Tp[:3, :3] - Tm[:3, :3]) / (2 * h) @ R.T
        S = 0.5 * (S - S.T)
        J[3:, i] = (S[2, 1], S[0, 2], S[1, 0])
    return J


# ------------------------------------------------------------------------------------------
# Planar 2R and 3R (REFERENCES §1.4, §1.5, §2)
# ------------------------------------------------------------------------------------------

A1, A2, A3 = 0.4, 0.3, 0.2


def planar_2r() -> Arm:
    return dh_arm([(0, A1, 0, 0), (0, A2, 0, 0)], task=TASK_XY_WZ)


def test_planar_2r_matches_the_textbook_closed_form() -> None:
    # Closed form: Spong, Hutchinson & Vidyasagar 2006, Ch. 4 two-link example (REFERENCES §1.4).
    arm = planar_2r()
    rng = np.random.default_rng(1)
    for _ in range(20):
        t1, t2 = rng.uniform(-np.pi, np.pi, 2)
        s1, c1, s12, c12 = math.sin(t1), math.cos(t1), math.sin(t1 + t2), math.cos(t1 + t2)
        J = geometric_jacobian(arm, np.array([t1, t2]))
        expected_v = [[-A1 * s1 - A2 * s12, -A2 * s12], [A1 * c1 + A2 * c12, A2 * c12]]
        np.testing.assert_allclose(J[:2], expected_v, atol=1e-15)
        np.testing.assert_allclose(J[2:5], 0.0, atol=1e-15)  # no vz, wx, wy in the plane
        np.testing.assert_allclose(J[5], [1.0, 1.0], atol=1e-15)
        # Forward kinematics: x = a1 c1 + a2 c12, y = a1 s1 + a2 s12 (same source).
        T = tcp_pose(arm, np.array([t1, t2]))
        np.testing.assert_allclose(T[:2, 3], [A1 * c1 + A2 * c12, A1 * s1 + A2 * s12],
                                   atol=1e-15)


def test_planar_2r_check_values_at_30_60_degrees() -> None:
    # REFERENCES §1.4 (sympy / roboticstoolbox verified): a1 = 0.4, a2 = 0.3, θ = (30°, 60°).
    arm = planar_2r()
    q = np.radians([30.0, 60.0])
    J = geometric_jacobian(arm, q)
    np.testing.assert_allclose(J[:2], [[-0.5, -0.3], [0.346410, 0.0]], atol=1e-6)
    assert np.linalg.det(J[:2]) == pytest.approx(0.103923, abs=1e-6)
    # σ = (0.659684, 0.157535), κ = 4.187549 (REFERENCES §1.4); with the planar task rows
    # (vx, vy) only: the Yoshikawa measure uses the task rows (REFERENCES §2, "Pitfall").
    sv = np.linalg.svd(J[:2], compute_uv=False)
    np.testing.assert_allclose(sv, [0.659684, 0.157535], atol=1e-6)
    assert condition_number(sv) == pytest.approx(4.187549, abs=1e-6)
    assert yoshikawa_manipulability(sv) == pytest.approx(0.103923, abs=1e-6)


@settings(max_examples=60, deadline=None)
@given(st.floats(-math.pi, math.pi), st.floats(-math.pi, math.pi))
def test_planar_2r_determinant_is_a1_a2_sin_theta2(t1: float, t2: float) -> None:
    # det Jv = a1·a2·sin θ2 (Spong 2006 Ch. 4; REFERENCES §1.4, sympy-verified).
    J = geometric_jacobian(planar_2r(), np.array([t1, t2]))
    assert np.linalg.det(J[:2]) == pytest.approx(A1 * A2 * math.sin(t2), abs=1e-15)


def test_planar_2r_manipulability_is_largest_at_plus_minus_90_degrees() -> None:
    # Yoshikawa 1985 (IJRR 4(2)): w = a1·a2·|sin θ2|, maximal at θ2 = ±90° with w = a1·a2
    # (REFERENCES §2, grid search verified there too).
    arm = dh_arm([(0, A1, 0, 0), (0, A2, 0, 0)], task=(True, True, False, False, False, False))
    grid = np.radians(np.arange(-180.0, 180.5, 0.5))
    w = np.array([analyse_pose(arm, np.array([0.3, t2])).manipulability for t2 in grid])
    np.testing.assert_allclose(w, A1 * A2 * np.abs(np.sin(grid)), atol=1e-15)
    best = set(np.degrees(grid[np.isclose(w, w.max(), rtol=0, atol=1e-15)]).round(6))
    assert best == {-90.0, 90.0}
    assert w.max() == pytest.approx(A1 * A2, abs=1e-15)


def test_planar_3r_check_values() -> None:
    # REFERENCES §1.5: θ = (20°, 40°, −30°); det of the (vx, vy, wz) Jacobian is still
    # a1·a2·sin θ2 = 0.077135, and the 2×3 position Jacobian is given to 6 digits.
    arm = dh_arm([(0, A1, 0, 0), (0, A2, 0, 0), (0, A3, 0, 0)], task=TASK_XY_WZ)
    report = analyse_pose(arm, np.radians([20.0, 40.0, -30.0]))
    np.testing.assert_allclose(report.jacobian[:2], [[-0.496616, -0.359808, -0.100000],
                                                     [0.699082, 0.323205, 0.173205]], atol=1e-6)
    assert np.linalg.det(report.task_jacobian) == pytest.approx(0.077135, abs=1e-6)
    assert report.manipulability == pytest.approx(abs(np.linalg.det(report.task_jacobian)))


# ------------------------------------------------------------------------------------------
# SCARA and the elbow arm (REFERENCES §1.6, §1.7)
# ------------------------------------------------------------------------------------------

def test_scara_jacobian_matches_the_closed_form() -> None:
    # Spong 2006 Ch. 4 SCARA example, sympy-verified (REFERENCES §1.6): DH rows (θ1,0,a1,0),
    # (θ2,0,a2,π), (0,d3,0,0), (θ4,d4,0,0); the prismatic column is [0,0,−1; 0,0,0] and
    # joint 4 turns about −z.
    a1, a2, d4 = 0.35, 0.25, 0.1
    arm = dh_arm([(0, a1, 0, 0), (0, a2, math.pi, 0), (0, 0, 0, 0), (d4, 0, 0, 0)], "RRPR",
                 task=(True, True, True, False, False, True))
    rng = np.random.default_rng(2)
    for _ in range(10):
        t1, t2, d3, t4 = rng.uniform(-2, 2, 4)
        s1, c1, s12, c12 = math.sin(t1), math.cos(t1), math.sin(t1 + t2), math.cos(t1 + t2)
        expected = [[-a1 * s1 - a2 * s12, -a2 * s12, 0, 0], [a1 * c1 + a2 * c12, a2 * c12, 0, 0],
                    [0, 0, -1, 0], [0, 0, 0, 0], [0, 0, 0, 0], [1, 1, 0, -1]]
        np.testing.assert_allclose(geometric_jacobian(arm, np.array([t1, t2, d3, t4])),
                                   expected, atol=1e-15)
    # Check value: a1 = 0.35, a2 = 0.25, θ = (0°, 90°) → det of (vx, vy, vz, wz) = 0.0875.
    report = analyse_pose(arm, np.array([0.0, math.pi / 2, 0.05, 0.3]))
    assert abs(np.linalg.det(report.task_jacobian)) == pytest.approx(0.0875, abs=1e-12)


def test_demo_scara_prismatic_column_is_z_and_zero() -> None:
    # Prismatic column [z_{i-1}; 0] (Spong 2006 Ch. 4; Siciliano et al. 2009 eq. 3.30).
    arm = load_arm("scara4")
    q = arm.home()
    frames, T = joint_frames(arm, q)
    J = jacobian_from_frames(arm, frames, T)
    np.testing.assert_allclose(J[:, 2], [0, 0, -1, 0, 0, 0], atol=1e-15)  # quill moves down
    np.testing.assert_allclose(J[:3, 2], frames[2, :3, 2], atol=0)


D1, EA2, EA3 = 0.30, 0.35, 0.30


def elbow_rrr() -> Arm:
    return dh_arm([(D1, 0, math.pi / 2, 0), (0, EA2, 0, 0), (0, EA3, 0, 0)],
                  task=(True, True, True, False, False, False))


def test_elbow_rrr_check_values_and_determinant() -> None:
    # REFERENCES §1.7 (sympy / finite differences; Siciliano 2009 §3.3 gives the same det):
    # d1 = 0.30, a2 = 0.35, a3 = 0.30, θ = (10°, 30°, 45°).
    arm = elbow_rrr()
    J = geometric_jacobian(arm, np.radians([10.0, 30.0, 45.0]))
    np.testing.assert_allclose(J[:3], [[-0.066117, -0.457717, -0.285375],
                                       [0.374970, -0.080708, -0.050319],
                                       [0.0, 0.380755, 0.077646]], atol=1e-6)
    assert np.linalg.det(J[:3]) == pytest.approx(-0.0282696, abs=1e-7)
    rng = np.random.default_rng(3)
    for t1, t2, t3 in rng.uniform(-np.pi, np.pi, (20, 3)):
        # det Jv = −a2·a3·sin θ3·(a2 cos θ2 + a3 cos(θ2+θ3)) (REFERENCES §1.7).
        expected = -EA2 * EA3 * math.sin(t3) * (EA2 * math.cos(t2) + EA3 * math.cos(t2 + t3))
        J = geometric_jacobian(arm, np.array([t1, t2, t3]))
        assert np.linalg.det(J[:3]) == pytest.approx(expected, abs=1e-15)


def test_elbow_rrr_shoulder_singularity() -> None:
    # REFERENCES §1.7: θ2 = 60°, θ3 = 65.6853° puts the wrist centre on the base axis
    # (x_c = y_c = 0) and det Jv = 0 (to the 4 decimals the angle is given with).
    arm = elbow_rrr()
    q = np.radians([25.0, 60.0, 65.6853])
    T = tcp_pose(arm, q)
    assert np.hypot(T[0, 3], T[1, 3]) < 1e-6
    assert abs(np.linalg.det(geometric_jacobian(arm, q)[:3])) < 1e-7


def test_modified_dh_2r_equals_standard_dh() -> None:
    # Craig 2005 eq. 3.6 (REFERENCES §1.3): modified-DH rows (α0=0, a0=0, θ1), (α1=0, a1, θ2)
    # plus a tool Trans_x(a2) give exactly the standard-DH 2R Jacobian.
    mdh = dh_arm([(0, 0, 0, 0), (0, A1, 0, 0)], modified=True, tool=trans(x=A2))
    std = planar_2r()
    rng = np.random.default_rng(4)
    for q in rng.uniform(-np.pi, np.pi, (20, 2)):
        np.testing.assert_allclose(geometric_jacobian(mdh, q), geometric_jacobian(std, q),
                                   atol=1e-15)
        np.testing.assert_allclose(tcp_pose(mdh, q), tcp_pose(std, q), atol=1e-15)


def test_spherical_wrist_axes_determinant_is_minus_sin_theta5() -> None:
    # REFERENCES §1.8 (sympy): wrist rows (θ4,0,0,−90°), (θ5,0,0,+90°), (θ6,d6,0,0); the angular
    # columns z3, z4, z5 in frame 3 have det = −sin θ5.
    arm = dh_arm([(0, 0, -math.pi / 2, 0), (0, 0, math.pi / 2, 0), (0.08, 0, 0, 0)])
    rng = np.random.default_rng(5)
    for q in rng.uniform(-np.pi, np.pi, (10, 3)):
        J = geometric_jacobian(arm, q)
        assert np.linalg.det(J[3:]) == pytest.approx(-math.sin(q[1]), abs=1e-15)


# ------------------------------------------------------------------------------------------
# Every demo arm
# ------------------------------------------------------------------------------------------

@pytest.mark.parametrize("name", DEMO_ARMS)
def test_jacobian_matches_finite_differences(name: str) -> None:
    # Central differences of the FK (step 1e-6: truncation ~1e-12, round-off ~1e-10).
    arm = load_arm(name)
    rng = np.random.default_rng(6)
    for _ in range(10):
        q = random_q(arm, rng)
        np.testing.assert_allclose(geometric_jacobian(arm, q), fd_jacobian(arm, q), atol=1e-8)


@pytest.mark.parametrize("name", DEMO_ARMS)
def test_frames_match_the_chain_of_link_transforms(name: str) -> None:
    # The uniform chain convention of runtime.arm.model: T_tcp = base · Π L_i · flange · tool,
    # multiplied out one link at a time.
    arm = load_arm(name)
    q = random_q(arm, np.random.default_rng(7))
    T = arm.base
    frames = []
    for L in link_transforms(arm, q):
        T = T @ L
        frames.append(T)
    got_frames, got_T = joint_frames(arm, q)
    np.testing.assert_allclose(got_frames, frames, atol=1e-15)
    np.testing.assert_allclose(got_T, T @ arm.flange @ arm.tool, atol=1e-15)


@pytest.mark.parametrize("kinds", ["R", "P", "RR", "RP", "PR", "RRR", "PPR", "RPRRPR", "RRRRRRRR",
                                   "RRPRRRPRR"])
def test_paired_chain_equals_the_plain_product_on_random_chains(kinds: str) -> None:
    """Joints taken in pairs with fitted trigonometric terms (runtime/arm/chain_terms.py)
    give the plain product of link transforms and the cross-product Jacobian
    (Siciliano et al. 2009, eq. 3.30) on random chains, any mix and count of joint kinds."""
    rng = np.random.default_rng(len(kinds))
    for _ in range(5):
        rows = [tuple(rng.uniform(-0.5, 0.5, 2)) + tuple(rng.uniform(-np.pi, np.pi, 2))
                for _ in kinds]
        arm = dh_arm(rows, kinds, modified=bool(rng.integers(2)),
                     tool=make_transform(rng.uniform(-0.2, 0.2, 3), rng.uniform(-3, 3, 3)),
                     base=make_transform(rng.uniform(-1, 1, 3), rng.uniform(-3, 3, 3)))
        q = rng.uniform(-6.0, 6.0, arm.n)
        T = arm.base
        frames = []
        for L in link_transforms(arm, q):
            T = T @ L
            frames.append(T)
        T = T @ arm.tip
        got_frames, got_T = joint_frames(arm, q)
        np.testing.assert_allclose(got_frames, frames, rtol=0, atol=1e-13)
        np.testing.assert_allclose(got_T, T, rtol=0, atol=1e-13)
        T_again, J = pose_and_jacobian(arm, q)
        np.testing.assert_array_equal(T_again, got_T)
        np.testing.assert_allclose(J, jacobian_from_frames(arm, np.array(frames), T), rtol=0,
                                   atol=1e-13)


def test_pose_and_jacobian_keeps_its_results_apart_from_the_next_call_and_other_threads(
) -> None:
    """The solver's pass writes into arrays kept with the arm (a set per concurrent
    caller): what it returns must not change with the next call, on this thread or
    another, nor after a pickle round trip (a preflight's child gets the arm by value).
    Checked against the allocating `joint_frames` and the cross-product Jacobian
    (Siciliano et al. 2009, eq. 3.30); `joint_frames` shares the working arrays, so its
    frames are checked to stay apart too."""
    rng = np.random.default_rng(17)
    for name in DEMO_ARMS:
        arm = load_arm(name)
        qs = [random_q(arm, rng) for _ in range(40)]
        expected, expected_frames = [], []
        for q in qs:                                           # each copied at once
            frames, T = joint_frames(arm, q)
            expected.append((T.copy(), jacobian_from_frames(arm, frames, T)))
            expected_frames.append(frames.copy())
        first = [pose_and_jacobian(arm, q) for q in qs]       # all kept, then compared
        kept_frames = [joint_frames(arm, q) for q in qs]
        for (frames, T), frames_ref, (T_ref, _) in zip(kept_frames, expected_frames, expected):
            np.testing.assert_array_equal(T, T_ref)
            np.testing.assert_array_equal(frames, frames_ref)
        for (T, J), (T_ref, J_ref) in zip(first, expected):
            np.testing.assert_array_equal(T, T_ref)
            np.testing.assert_allclose(J, J_ref, rtol=0, atol=1e-13)

        results: dict[int, list[tuple[np.ndarray, np.ndarray]]] = {}

        def run(k: int, arm: Arm = arm) -> None:
            results[k] = [pose_and_jacobian(arm, q) for q in qs[k::4] for _ in range(25)]

        workers = [threading.Thread(target=run, args=(k,)) for k in range(4)]
        for w in workers:
            w.start()
        for w in workers:
            w.join()
        assert sorted(results) == [0, 1, 2, 3]                # every thread finished
        for k, got in results.items():
            assert len(got) == 25 * len(first[k::4])
            for i, (T, J) in enumerate(got):
                T_ref, J_ref = first[k::4][i // 25]
                np.testing.assert_array_equal(T, T_ref)
                np.testing.assert_array_equal(J, J_ref)
        copied = pickle.loads(pickle.dumps(arm))
        T, J = pose_and_jacobian(copied, qs[0])
        np.testing.assert_array_equal(T, first[0][0])
        np.testing.assert_array_equal(J, first[0][1])


def test_reach7_manipulability_is_sqrt_det_j_jt() -> None:
    # Yoshikawa 1985: w = √det(J Jᵀ) = Π σ_i; condition number as numpy.linalg.cond (2-norm).
    arm = load_arm("reach7")
    report = analyse_pose(arm, random_q(arm, np.random.default_rng(8)))
    J = report.task_jacobian
    assert report.manipulability == pytest.approx(math.sqrt(np.linalg.det(J @ J.T)), rel=1e-9)
    assert report.condition_number == pytest.approx(np.linalg.cond(J), rel=1e-9)


def test_elbow6_smallest_singular_value_vanishes_at_wrist_and_elbow_singularities() -> None:
    # Wrist singularity at θ5 = 0 (z3 ∥ z5) and the elbow stretched (sin θ3 = 0 in the
    # elbow's own DH angle; q3 = 0 in this arm) — Spong 2006 Ch. 4 "Singularities";
    # REFERENCES §1.7, §1.8.
    arm = load_arm("elbow6")
    home = arm.home()
    sigma_home = analyse_pose(arm, home).singular_values[-1]
    assert sigma_home > 0.05
    rng = np.random.default_rng(9)
    for _ in range(5):
        q = random_q(arm, rng) * 0.8
        for joint in (4, 2):  # q5 = 0, then q3 = 0
            qs = q.copy()
            qs[joint] = 0.0
            report = analyse_pose(arm, qs)
            assert report.singular_values[-1] < 1e-12 * report.singular_values[0]
            # ... and it rises again a little way off the singular pose.
            qs[joint] = 0.3
            assert analyse_pose(arm, qs).singular_values[-1] > 1e-3


def test_tool_frame_jacobian_matches_body_velocity_by_finite_differences() -> None:
    # In tool axes: v_tool = Rᵀ·ṗ and [ω_tool]× = Rᵀ·Ṙ (Siciliano et al. 2009 §3.1), here by
    # central differences, independent of the base-frame Jacobian.
    arm = load_arm("reach7")
    rng = np.random.default_rng(10)
    h = 1e-6
    for _ in range(5):
        q = random_q(arm, rng)
        T = tcp_pose(arm, q)
        R = T[:3, :3]
        J_tool = tool_frame_jacobian(geometric_jacobian(arm, q), T)
        for i in range(arm.n):
            dq = np.zeros(arm.n)
            dq[i] = h
            Tp, Tm = tcp_pose(arm, q + dq), tcp_pose(arm, q - dq)
            v = R.T @ (Tp[:3, 3] - Tm[:3, 3]) / (2 * h)
            S = R.T @ (Tp[:3, :3] - Tm[:3, :3]) / (2 * h)
            np.testing.assert_allclose(J_tool[:3, i], v, atol=1e-8)
            np.testing.assert_allclose(J_tool[3:, i], [S[2, 1], S[0, 2], S[1, 0]], atol=1e-8)
        # A tool-axes twist rotated into the base axes is the same motion.
        qd = rng.normal(size=arm.n)
        np.testing.assert_allclose(twist_to_base(J_tool @ qd, T),
                                   geometric_jacobian(arm, q) @ qd, atol=1e-14)


def test_base_and_tool_transforms_enter_the_pose() -> None:
    # A base offset moves the whole arm; a tool offset moves the TCP along the flange axes.
    base = make_transform((0.1, -0.2, 0.3), (0.2, -0.1, 0.4))
    tool = make_transform((0.0, 0.0, 0.12), (0.0, 0.3, 0.0))
    plain = planar_2r()
    moved = dh_arm([(0, A1, 0, 0), (0, A2, 0, 0)], base=base, tool=tool)
    q = np.array([0.4, -1.1])
    np.testing.assert_allclose(tcp_pose(moved, q), base @ tcp_pose(plain, q) @ tool, atol=1e-15)
    np.testing.assert_allclose(geometric_jacobian(moved, q), fd_jacobian(moved, q), atol=1e-8)


def test_task_with_more_rows_than_joints_reports_zero_singular_values() -> None:
    # A 2-joint arm asked for (vx, vy, wz) cannot follow all three: the missing singular value is
    # 0, so w = 0 and κ = inf (REFERENCES §2, "Pitfall": rank-deficient J Jᵀ gives w = 0).
    report = analyse_pose(planar_2r(), np.array([0.3, 0.9]))
    assert report.singular_values.shape == (3,)
    assert report.singular_values[-1] == 0.0
    assert report.manipulability == 0.0
    assert report.condition_number == math.inf
