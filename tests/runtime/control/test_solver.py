"""Velocity mapping core: damped least squares, adaptive damping, null space, task selection,
frames, the joint-limit re-solve and the Solution record.

Every check names its outside source: a textbook closed form, a published check value from
REFERENCES.md, or numpy as a reference library. Values marked "derived" follow from the
cited formula by algebra and are recomputed here rather than copied.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from runtime.arm.kinematics import geometric_jacobian, tcp_pose, twist_to_base
from runtime.arm.load import load_arm
from runtime.arm.model import SolverSettings
from runtime.control.limits import SCALE_NAMES, JointBounds
from runtime.control.solver import (
    DampedSolve,
    damped_least_squares,
    damping_squared,
    joint_centring_gradient,
    parse_axes,
    solve,
    within_command,
)
from runtime.errors import ConfigError

ARMS = {name: load_arm(name) for name in ("elbow6", "reach7", "scara4", "planar3")}
DEG = math.pi / 180.0
DT_S = 0.002  # one cycle at 500 Hz, the drive's rate


def planar_2r_position_jacobian(a1: float, a2: float, t1: float, t2: float) -> np.ndarray:
    """Closed form Jv(xy) of a planar 2R (Spong et al. 2006, ch. 4; REFERENCES §1.4)."""
    s1, c1, s12, c12 = math.sin(t1), math.cos(t1), math.sin(t1 + t2), math.cos(t1 + t2)
    return np.array([[-a1 * s1 - a2 * s12, -a2 * s12], [a1 * c1 + a2 * c12, a2 * c12]])


def fixed_damping(J: np.ndarray, v: np.ndarray, lam: float, z: np.ndarray | None = None):
    """DampedSolve with λ pinned: threshold huge → σ_min/ε ≈ 0 → λ = λ_max (REFERENCES §3.3)."""
    return DampedSolve(J, v, z, threshold=1e300, damping_max=lam)


def undamped(J: np.ndarray, v: np.ndarray, z: np.ndarray | None = None):
    return DampedSolve(J, v, z, threshold=0.0, damping_max=0.0)


# ----------------------------------------------------------------------------------------
# Damped least squares and its damping schedule
# ----------------------------------------------------------------------------------------

def test_damping_schedule_check_values() -> None:
    # Chiaverini et al. 1994 / Chiaverini 1997 rule, check values of REFERENCES §3.3.
    assert damping_squared(0.02, 0.04, 0.1) == pytest.approx(0.0075, rel=1e-12)
    assert damping_squared(0.0, 0.04, 0.1) == pytest.approx(0.01, rel=1e-12)
    assert damping_squared(0.04, 0.04, 0.1) == 0.0
    assert damping_squared(0.5, 0.04, 0.1) == 0.0
    # Continuous at σ_min = ε (REFERENCES §3.3) and monotone below it.
    assert damping_squared(0.04 * (1 - 1e-9), 0.04, 0.1) < 1e-10  # ≈ 2e-9·λ_max²
    values = [damping_squared(s, 0.04, 0.1) for s in np.linspace(0, 0.04, 50)]
    assert all(a >= b for a, b in zip(values, values[1:]))


def test_2r_dls_check_value() -> None:
    # REFERENCES §3.2: 2R a = (0.4, 0.3) at (30°, 60°), v = (0.1, 0), λ = 0.05
    # → q̇ = (−0.010455, −0.307371) rad/s; the exact inverse is (0, −0.333333) (§1.4).
    J = planar_2r_position_jacobian(0.4, 0.3, 30 * DEG, 60 * DEG)
    v = np.array([0.1, 0.0])
    expected = [-0.010455, -0.307371]
    np.testing.assert_allclose(damped_least_squares(J, v, 0.05), expected, atol=5e-7)
    np.testing.assert_allclose(fixed_damping(J, v, 0.05).rates, expected, atol=5e-7)
    np.testing.assert_allclose(undamped(J, v).rates, [0.0, -1 / 3], atol=1e-12)


def test_2r_dexterity_check_values() -> None:
    # REFERENCES §1.4 / §2: σ = (0.659684, 0.157535), w = 0.103923 = a1·a2·sin θ2.
    J = planar_2r_position_jacobian(0.4, 0.3, 30 * DEG, 60 * DEG)
    s = undamped(J, np.zeros(2))
    assert s.sigma_min == pytest.approx(0.157535, abs=5e-7)
    assert s.manipulability == pytest.approx(0.12 * math.sin(60 * DEG), rel=1e-12)


@settings(max_examples=100, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(2, 6), extra=st.integers(0, 2))
def test_undamped_full_rank_equals_numpy_pinv(seed: int, rows: int, extra: int) -> None:
    # λ = 0 and J full rank: q̇ = J⁺v, with numpy.linalg.pinv as the reference library.
    rng = np.random.default_rng(seed)
    J = rng.normal(size=(rows, rows + extra))
    v = rng.normal(size=rows)
    if np.linalg.svd(J, compute_uv=False)[-1] < 1e-3:
        return  # nearly singular draws test round-off, not the formula
    np.testing.assert_allclose(undamped(J, v).rates, np.linalg.pinv(J) @ v, rtol=1e-8,
                               atol=1e-9)


@settings(max_examples=100, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(1, 6), cols=st.integers(1, 8),
       lam=st.floats(1e-3, 1.0), rank_drop=st.booleans())
def test_dls_equals_its_svd_form_and_obeys_the_bound(seed: int, rows: int, cols: int,
                                                      lam: float, rank_drop: bool) -> None:
    # Wampler 1986; Buss 2004 (REFERENCES §3.1, §3.2): q̇ = Σ σ_i/(σ_i² + λ²)(u_iᵀv) v_i and
    # ‖q̇‖ ≤ ‖v‖/(2λ) for any J, singular ones included.
    rng = np.random.default_rng(seed)
    J = rng.normal(size=(rows, cols))
    if rank_drop and min(rows, cols) > 1:
        J[:, 0] = J[:, 1]  # exactly rank deficient
    v = rng.normal(size=rows)
    U, sigma, Vt = np.linalg.svd(J, full_matrices=False)
    svd_form = Vt.T @ (sigma / (sigma**2 + lam**2) * (U.T @ v))
    # Both forms go through JJᵀ + λ²I (or JᵀJ + λ²I), whose condition number bounds the
    # round-off: ε_mach·κ relative to ‖q̇‖ (standard perturbation bound for linear solves).
    kappa = (sigma[0] ** 2 + lam**2) / lam**2
    atol = 1e-14 * kappa * (1.0 + np.linalg.norm(svd_form))
    ours = fixed_damping(J, v, lam).rates
    np.testing.assert_allclose(ours, svd_form, rtol=1e-9, atol=atol)
    np.testing.assert_allclose(damped_least_squares(J, v, lam), svd_form, rtol=1e-9, atol=atol)
    assert np.linalg.norm(ours) <= np.linalg.norm(v) / (2 * lam) * (1 + 1e-9)


def test_exact_singularity_and_zero_input_stay_finite() -> None:
    # Degenerate inputs: all-zero J, rank-one J, zero v, with and without damping.
    for J in (np.zeros((6, 7)), np.outer(np.ones(6), np.arange(7.0)), np.zeros((3, 2))):
        for v in (np.zeros(len(J)), np.ones(len(J))):
            for threshold, lam in ((0.04, 0.08), (0.0, 0.0)):
                s = DampedSolve(J, v, np.ones(J.shape[1]), threshold, lam)
                assert np.isfinite(s.rates).all()
                assert math.isfinite(s.damping) and math.isfinite(s.sigma_min)


# ----------------------------------------------------------------------------------------
# Null space (Liégeois 1977; Siciliano et al. 2009, ch. 3)
# ----------------------------------------------------------------------------------------

def test_joint_centring_gradient_check_value() -> None:
    # REFERENCES §3.4: q = (20°, 40°, −30°), limits ±(170°, 120°, 150°)
    # → ∇w = (−0.003304, −0.013263, +0.006366).
    upper = np.array([170, 120, 150]) * DEG
    grad = joint_centring_gradient(np.array([20, 40, -30]) * DEG, -upper, upper)
    np.testing.assert_allclose(grad, [-0.003304, -0.013263, 0.006366], atol=5e-7)


def test_joint_centring_gradient_unlimited_and_outside() -> None:
    lower, upper = np.array([-1.0, -np.inf]), np.array([1.0, np.inf])
    grad = joint_centring_gradient(np.array([5.0, 3.0]), lower, upper)
    # held at its value at the limit (−(1/n)(1 − 0)/2² = −0.125); 0 for an unlimited joint
    np.testing.assert_allclose(grad, [-0.125, 0.0])


def test_projector_properties_on_the_3r_check_pose() -> None:
    # REFERENCES §3.4 / §1.5: planar 3R (0.4, 0.3, 0.2) at (20°, 40°, −30°), 2-D position
    # task. N = I − J⁺J is symmetric, idempotent, trace N = n − rank J = 1, and J N z = 0.
    J = np.array([[-0.496616, -0.359808, -0.100000], [0.699082, 0.323205, 0.173205]])
    N = np.column_stack([undamped(J, np.zeros(2), e).rates for e in np.eye(3)])
    reference = np.eye(3) - np.linalg.pinv(J) @ J  # numpy as reference library
    np.testing.assert_allclose(N, reference, atol=1e-12)
    np.testing.assert_allclose(N, N.T, atol=1e-12)
    np.testing.assert_allclose(N @ N, N, atol=1e-12)
    assert np.trace(N) == pytest.approx(1.0, abs=1e-12)
    z = np.array([0.3, -0.2, 0.5])
    assert np.linalg.norm(J @ undamped(J, np.zeros(2), z).rates) < 1e-15


@settings(max_examples=100, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(1, 6), extra=st.integers(1, 3),
       near_singular=st.booleans())
def test_null_space_term_leaves_the_task_motion_unchanged(seed: int, rows: int, extra: int,
                                                          near_singular: bool) -> None:
    # J(q̇_task + N z) = J q̇_task, also when the task part is damped (REFERENCES §3.4).
    rng = np.random.default_rng(seed)
    J = rng.normal(size=(rows, rows + extra))
    if near_singular and rows > 1:
        J[0] = J[1] + 1e-5 * rng.normal(size=J.shape[1])  # σ_min ≪ ε: damping is on
    v, z = rng.normal(size=rows), rng.normal(size=rows + extra)
    with_z = DampedSolve(J, v, z, 0.04, 0.08)
    without = DampedSolve(J, v, None, 0.04, 0.08)
    assert with_z.damping == without.damping
    scale = 1 + np.linalg.norm(z) + np.linalg.norm(without.rates)
    assert np.linalg.norm(J @ (with_z.rates - without.rates)) <= 1e-9 * scale


def test_damped_projector_would_leak() -> None:
    # REFERENCES §3.4, last bullet: I − J⁺_DLS J is not a projector, so using it would move
    # the TCP; the exact projector does not. (Why solver.py builds N from the undamped J⁺.)
    rng = np.random.default_rng(5)
    J = rng.normal(size=(2, 3))
    J[0] = J[1] + 1e-3 * rng.normal(size=3)
    z = rng.normal(size=3)
    lam = 0.08
    J_dls = J.T @ np.linalg.inv(J @ J.T + lam**2 * np.eye(2))
    leaky = z - J_dls @ (J @ z)
    exact = undamped(J, np.zeros(2), z).rates
    assert np.linalg.norm(J @ leaky) > 1e-3
    assert np.linalg.norm(J @ exact) < 1e-12


def test_reach7_centring_moves_joints_toward_mid_range_only_while_jogging() -> None:
    # The 7R arm has one redundant direction; with a gain the self-motion follows +∇w.
    arm = ARMS["reach7"].with_changes(solver=SolverSettings(nullspace_gain=200.0))
    q = np.radians([20, 60, 40, -80, 30, 70, 50])
    twist = np.array([0.05, 0, 0, 0, 0, 0])
    s = solve(arm, q, twist, dt_s=DT_S)
    plain = solve(ARMS["reach7"].with_changes(solver=SolverSettings(nullspace_gain=0.0)), q,
                  twist, dt_s=DT_S)
    grad = joint_centring_gradient(q, arm.lower, arm.upper)
    assert (s.rates - plain.rates) @ grad > 0  # the added motion ascends w
    np.testing.assert_allclose(s.achieved_twist, plain.achieved_twist, atol=1e-12)
    # No command, no motion: the arm never moves on its own.
    assert not solve(arm, q, np.zeros(6), dt_s=DT_S).rates.any()


# ----------------------------------------------------------------------------------------
# Task selection and frames
# ----------------------------------------------------------------------------------------

def test_scara_drops_the_directions_it_cannot_move() -> None:
    # RRPR SCARA (REFERENCES §1.6): wx, wy rows are structurally zero; a demand there is
    # dropped and the four task directions are tracked exactly.
    arm = ARMS["scara4"]
    q = arm.home()
    twist = np.array([0.05, -0.02, 0.03, 0.4, -0.3, 0.2])
    s = solve(arm, q, twist, dt_s=DT_S)
    np.testing.assert_allclose(s.achieved_twist[[0, 1, 2, 5]], twist[[0, 1, 2, 5]], atol=1e-12)
    np.testing.assert_allclose(s.achieved_twist[3:5], 0.0, atol=1e-12)
    assert s.tracking_error < 1e-12


def test_locked_axes_are_held_not_freed() -> None:
    # Hold orientation while translating: the locked rows stay in the task with zero demand.
    arm = ARMS["elbow6"]
    q = arm.home()
    twist = np.array([0.05, 0.02, -0.03, 0.3, 0.2, -0.1])
    s = solve(arm, q, twist, locked=("wx", "wy", "wz"), dt_s=DT_S)
    np.testing.assert_allclose(s.achieved_twist, [0.05, 0.02, -0.03, 0, 0, 0], atol=1e-12)
    np.testing.assert_allclose(s.commanded_twist, [0.05, 0.02, -0.03, 0, 0, 0])
    # A lock on a direction outside the arm's task changes nothing (SCARA cannot tilt).
    scara = ARMS["scara4"]
    a = solve(scara, scara.home(), twist, locked=("wx",), dt_s=DT_S)
    b = solve(scara, scara.home(), twist, dt_s=DT_S)
    np.testing.assert_allclose(a.rates, b.rates, atol=1e-15)


def test_locks_in_tool_axes_hold_tool_axes() -> None:
    arm = ARMS["elbow6"]
    q = arm.home()
    s = solve(arm, q, [0.02, 0.03, 0.04, 0.3, 0.2, 0.1], frame="tool", locked=("vz", "wz"),
              dt_s=DT_S)
    R = tcp_pose(arm, q)[:3, :3]
    in_tool = np.concatenate((R.T @ s.achieved_twist[:3], R.T @ s.achieved_twist[3:]))
    np.testing.assert_allclose(in_tool, [0.02, 0.03, 0, 0.3, 0.2, 0], atol=1e-12)


@pytest.mark.parametrize("name", sorted(ARMS))
def test_tool_frame_twist_equals_the_rotated_base_twist(name: str) -> None:
    # A tool-axes twist is the base twist R·v (same TCP reference point).
    arm = ARMS[name]
    q = arm.home()
    twist = np.array([0.03, -0.02, 0.01, 0.1, 0.05, -0.2])
    in_tool = solve(arm, q, twist, frame="tool", dt_s=DT_S)
    in_base = solve(arm, q, twist_to_base(twist, tcp_pose(arm, q)), dt_s=DT_S)
    np.testing.assert_allclose(in_tool.rates, in_base.rates, atol=1e-12)
    np.testing.assert_allclose(in_tool.commanded_twist, in_base.commanded_twist, atol=1e-15)


def test_bad_names_are_clear_errors() -> None:
    arm = ARMS["elbow6"]
    with pytest.raises(ConfigError, match="unknown axis 'wq'"):
        solve(arm, arm.home(), np.zeros(6), locked=("wq",), dt_s=DT_S)
    with pytest.raises(ConfigError, match="unknown frame"):
        solve(arm, arm.home(), np.zeros(6), frame="world", dt_s=DT_S)
    with pytest.raises(ValueError, match="finite"):
        solve(arm, arm.home(), [math.nan, 0, 0, 0, 0, 0], dt_s=DT_S)
    with pytest.raises(ValueError, match="shape"):
        solve(arm, np.zeros(3), np.zeros(6), dt_s=DT_S)
    assert parse_axes("wx, wy,wz,wx") == ("wx", "wy", "wz")
    assert parse_axes("") == ()


# ----------------------------------------------------------------------------------------
# Whole solves on the demo arms
# ----------------------------------------------------------------------------------------

def test_far_from_singularity_the_solve_is_the_exact_inverse() -> None:
    # λ = 0 (σ_min ≥ ε) and nothing binding: q̇ = J⁻¹v, numpy.linalg.solve as reference.
    arm = ARMS["elbow6"]
    q = arm.home()
    twist = np.array([0.05, 0.02, -0.03, 0.1, 0.2, -0.1])
    s = solve(arm, q, twist, dt_s=DT_S)
    assert s.damping == 0.0 and s.binding_limit is None and s.scale == 1.0
    np.testing.assert_allclose(s.rates, np.linalg.solve(geometric_jacobian(arm, q), twist),
                               atol=1e-12)
    assert s.tracking_error < 1e-12


def test_wrist_singularity_gives_bounded_rates_and_damping() -> None:
    # elbow6 at q5 ≈ 0 (REFERENCES §1.8: z3 and z5 collinear). A twist along the weakest
    # direction needs ‖v‖/σ_min without damping; DLS keeps ‖q̇‖ ≤ ‖v‖/(2λ) (REFERENCES §3.2).
    arm = ARMS["elbow6"]
    q = arm.home()
    q[4] = 1e-7
    J = geometric_jacobian(arm, q)
    U, sigma, _ = np.linalg.svd(J)
    v = 0.1 * U[:, -1]
    undamped_rates = np.linalg.pinv(J, rcond=1e-12) @ v
    assert np.linalg.norm(undamped_rates) > 1e4  # "needs unbounded speed"
    s = solve(arm, q, v, dt_s=DT_S)
    assert s.damping > 0.0
    assert s.damping == pytest.approx(arm.solver.damping_max, rel=1e-6)
    assert s.sigma_min < 1e-6
    assert np.isfinite(s.rates).all()
    raw = fixed_damping(J, v, s.damping).rates
    assert np.linalg.norm(raw) <= 0.1 / (2 * s.damping) * (1 + 1e-9)
    assert (np.abs(s.rates) <= arm.max_speed * (1 + 1e-12)).all()
    # Exactly singular too: no NaN, no exception.
    q[4] = 0.0
    assert np.isfinite(solve(arm, q, v, dt_s=DT_S).rates).all()


def test_zero_twist_gives_zero_rates_and_no_binding_limit() -> None:
    for arm in ARMS.values():
        s = solve(arm, arm.home(), np.zeros(6), dt_s=DT_S)
        assert not s.rates.any()
        assert s.binding_limit is None and s.saturated_joints == ()


def test_extreme_finite_inputs_stay_finite() -> None:
    arm = ARMS["reach7"]
    for q in (np.full(7, 1e300), np.full(7, -1e12), arm.upper + 5.0):
        for twist in (np.full(6, 1e300), np.full(6, -1e-300), np.zeros(6)):
            s = solve(arm, q, twist, prev_rates=np.full(7, 1e300), dt_s=1e-6)
            assert np.isfinite(s.rates).all() and np.isfinite(s.achieved_twist).all()
            assert all(0.0 <= f <= 1.0 for f in s.scales.values())


def test_solution_record_is_json_ready() -> None:
    arm = ARMS["reach7"]
    s = solve(arm, arm.home(), [0.3, 0, 0, 0, 0, 0], reduced=True, prev_rates=np.zeros(7),
              dt_s=DT_S)
    d = json.loads(json.dumps(s.as_dict(), allow_nan=False))
    assert set(d["scales"]) == set(SCALE_NAMES)
    assert d["binding_limit"] == s.binding_limit == min(s.scales, key=s.scales.get)
    assert d["scale"] == pytest.approx(math.prod(s.scales.values()))
    assert len(d["rates"]) == 7 and len(d["achieved_twist"]) == 6
    np.testing.assert_allclose(d["achieved_twist"], geometric_jacobian(arm, arm.home()) @ s.rates,
                               atol=1e-12)


# ----------------------------------------------------------------------------------------
# A joint driven into its limit: saturation in the null space (Flacco et al. 2012/2015)
# ----------------------------------------------------------------------------------------

def jog(arm, q0, twist, cycles: int, dt: float = 0.002, **kw):
    """Simulated control loop: solve, integrate q += q̇·dt, feed the rates back."""
    q, prev = np.array(q0, dtype=float), np.zeros(arm.n)
    out = []
    for _ in range(cycles):
        s = solve(arm, q, twist, prev_rates=prev, dt_s=dt, **kw)
        q = q + s.rates * dt
        prev = s.rates
        out.append((q, s))
    return out


def test_scara_quill_at_its_stroke_end_slides_on_in_x() -> None:
    # Moving diagonally down in x and z (z is the quill alone, REFERENCES §1.6): the quill
    # stops at its limit (minus margin) and x, y, yaw keep being tracked.
    arm = ARMS["scara4"]
    b = JointBounds.of(arm)
    q0 = arm.home()
    q0[2] = 0.19  # 8 mm above its braking stop at 0.198 m
    twist = np.array([0.1, 0.0, -0.05, 0.0, 0.0, 0.0])  # +q3 moves the quill down
    run = jog(arm, q0, twist, 400)
    assert max(q[2] for q, _ in run) <= b.high[2] + 1e-12  # never passes the limit
    sliding = [s for _, s in run[150:]]
    assert all(s.saturated_joints == ("quill",) for s in sliding)
    for s in sliding:
        others = s.achieved_twist[[0, 1, 5]] - twist[[0, 1, 5]]
        assert np.linalg.norm(others) < 1e-9  # x, y, yaw tracked
        assert abs(s.achieved_twist[2]) < 1e-9  # z, the direction lost, is not overshot
        assert s.tracking_error == pytest.approx(0.05, abs=1e-9)


@pytest.mark.parametrize("joint, limit_deg", [(1, 112.0), (5, 117.0)])
def test_reach7_keeps_tracking_the_full_twist_with_a_joint_at_its_limit(joint: int,
                                                                          limit_deg: float) -> None:
    # With one joint out, six remain for the six task rows: the twist is still tracked.
    arm = ARMS["reach7"]
    b = JointBounds.of(arm)
    q0 = np.radians([10.0, 40.0, 30.0, -70.0, -30.0, 50.0, 0.0])
    q0[joint] = limit_deg * DEG
    J = geometric_jacobian(arm, q0)
    twist = J[:, joint] / np.linalg.norm(J[:, joint]) * 0.15  # needs mostly that joint
    run = jog(arm, q0, twist, 500)
    qs = np.array([q for q, _ in run])
    assert (qs[:, joint] <= b.high[joint] + 1e-12).all()
    saturated = [s for _, s in run if s.saturated_joints]
    assert len(saturated) > 200
    assert all(s.saturated_joints == (arm.joint_names[joint],) for s in saturated)
    settled = [s.tracking_error for s in saturated[-150:]]  # after the ramp back to speed
    assert max(settled) < 1e-6  # measured: the whole twist is tracked while sliding


def test_a_joint_that_cannot_be_spared_stops_the_arm_at_its_limit() -> None:
    # reach7's elbow is the only joint that changes the shoulder–wrist distance: without it
    # the task cannot be served without unrequested motion, so the arm stops at the limit.
    arm = ARMS["reach7"]
    b = JointBounds.of(arm)
    q0 = np.radians([0.0, 30.0, 0.0, -115.0, 0.0, 60.0, 0.0])
    run = jog(arm, q0, np.array([0.1, 0, 0, 0, 0, 0]), 600)
    assert min(q[3] for q, _ in run) >= b.low[3] - 1e-12
    last = run[-1][1]
    assert last.saturated_joints == () and last.binding_limit == "position_brake"
    assert np.abs(last.rates).max() < 1e-9


def test_within_command() -> None:
    assert within_command(np.array([0.1, 0.0, 0.0]), np.array([0.1, 0.0, -0.05]), 1e-9)
    assert within_command(np.array([0.05, 0.0, 0.0]), np.array([0.1, 0.0, 0.0]), 0.0)
    assert not within_command(np.array([0.1, 0.01, 0.0]), np.array([0.1, 0.0, 0.0]), 1e-3)
    assert not within_command(np.array([-0.01, 0.0]), np.array([0.1, 0.0]), 1e-3)
    assert not within_command(np.array([0.12, 0.0]), np.array([0.1, 0.0]), 1e-3)


# ----------------------------------------------------------------------------------------
# Properties over random demo arms, poses and twists (hypothesis)
# ----------------------------------------------------------------------------------------

@st.composite
def jog_cases(draw):
    arm = ARMS[draw(st.sampled_from(sorted(ARMS)))]
    fractions = draw(st.lists(st.floats(0.0, 1.0), min_size=arm.n, max_size=arm.n))
    q = arm.lower + np.array(fractions) * (arm.upper - arm.lower)
    twist = np.array(draw(st.lists(st.floats(-1.0, 1.0), min_size=6, max_size=6)))
    twist[3:] *= 2.0
    frame = draw(st.sampled_from(["base", "tool"]))
    return arm, q, twist, frame


@settings(max_examples=100, deadline=None)
@given(case=jog_cases())
def test_achieved_twist_is_parallel_to_the_command_away_from_singularity(case) -> None:
    # With λ = 0 (σ_min ≥ ε), no joint saturated and only uniform scaling applied, J q̇ is the
    # command times one factor: cosine ≥ 0.999 over the task rows.
    arm, q, twist, frame = case
    s = solve(arm, q, twist, frame=frame, dt_s=DT_S)
    mask = arm.task_mask
    commanded = s.commanded_twist[mask]
    if s.damping > 0.0 or s.saturated_joints or np.linalg.norm(commanded) < 1e-9:
        return
    achieved = s.achieved_twist[mask]
    if np.linalg.norm(achieved) < 1e-12:
        return  # stopped by a limit: nothing to compare
    cosine = achieved @ commanded / (np.linalg.norm(achieved) * np.linalg.norm(commanded))
    assert cosine >= 0.999
    # and J q̇ is the achieved twist it reports
    np.testing.assert_allclose(s.achieved_twist, geometric_jacobian(arm, q) @ s.rates,
                               atol=1e-12)


# ----------------------------------------------------------------------------------------
# jogwire probe --twist
# ----------------------------------------------------------------------------------------

def test_probe_adds_the_twist_solve_to_its_json(capsys) -> None:
    from runtime.cli import main
    assert main(["probe", "reach7", "--twist=-0.3,0.2,0.1,0,0,1", "--reduced", "--lock", "wx",
                 "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    arm = ARMS["reach7"]
    s = solve(arm, arm.home(), [-0.3, 0.2, 0.1, 0, 0, 1], reduced=True, locked=("wx",), dt_s=DT_S)
    np.testing.assert_allclose(data["joint_rates"], s.rates, atol=1e-15)
    np.testing.assert_allclose(data["achieved_twist"], s.achieved_twist, atol=1e-15)
    assert data["damping"] == s.damping
    assert data["scales"] == s.scales and data["scale"] == pytest.approx(s.scale)
    assert data["binding_limit"] == "reduced_speed"
    assert np.linalg.norm(data["achieved_twist"][:3]) <= 0.25 + 1e-12  # ISO 10218-1
    assert main(["probe", "elbow6", "--twist", "0,0,0,0,0,0", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["binding_limit"] is None


def test_probe_rejects_a_bad_twist(capsys) -> None:
    from runtime.cli import main
    assert main(["probe", "elbow6", "--twist", "1,2"]) == 2
    assert "6 numbers" in capsys.readouterr().err
    assert main(["probe", "elbow6", "--twist", "0,0,0,0,0,0", "--lock", "wq"]) == 2
    assert "unknown axis 'wq'" in capsys.readouterr().err
