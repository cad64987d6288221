"""Velocity mapping: one TCP twist in, one limited joint-rate vector out, with its reasons.

Pure: no I/O, no clock (the cycle time is an argument). `solve` is the one entry point the
control loop, preflight and `jogwire probe` call. One cycle:

 1. Command. The twist (vx vy vz in m/s, wx wy wz in rad/s, reference point the TCP) comes
    in base or tool axes. Locked axes (operator choice, e.g. wx wy wz = hold orientation)
    are set to zero: they stay in the task with a zero demand, so the arm actively holds
    them. Compare the arm's task axes (config): a direction outside them is not controlled
    at all — dropped from the task, the arm neither tracks nor holds it (a SCARA cannot
    tilt its tool, so its wx, wy rows are structurally zero and are left out). A lock on
    such a direction changes nothing.
 2. Task rows. If the arm controls all six directions, the task is written in the command's
    own axes (the damped solution is the same in any axes, J → R·J, v → R·v); otherwise the
    command is rotated into base axes (`kinematics.twist_to_base`) and the arm's task rows
    are taken there, since uncontrollable directions are directions in the base.
    (With a partial task and tool axes, a lock holds the tool axis only as far as that
    axis lies inside the controlled directions.)
 3. Damped least squares, q̇ = Jᵀ(JJᵀ + λ²I)⁻¹v (Wampler 1986; Nakamura & Hanafusa 1986),
    with λ set by the smallest singular value (Chiaverini, Siciliano & Egeland 1994;
    Chiaverini 1997; REFERENCES §3.3): λ² = (1 − (σ_min/ε)²)·λ_max² below ε, else 0.
 4. Redundancy. With more joints than task rows, a joint-centring motion is added in the
    null space of the task: (I − J⁺J)·k∇w (Liégeois 1977; w from Siciliano et al. 2009,
    ch. 3), with the exact projector so it never changes J·q̇. Only while a motion is
    commanded: with a zero twist the arm does not move by itself.
 5. Position limits. Braking toward a limit slows the whole motion (`runtime.control.limits`); a
    joint that has arrived (within a·dt² of its limit minus margin) and that the solution
    pushes further is taken out and the task re-solved with the others (saturation in the
    null space, Flacco, De Luca & Khatib 2012/2015), so the arm slides along the limit.
    The re-solve is kept only if the arm then does no motion that was not asked for;
    otherwise the arm stops at the limit.
 6. Limits by uniform scaling (`runtime.control.limits`). With a workcell, the velocity
    damper (`runtime.control.clearance`) first restricts the rates to those that approach
    nothing faster than its bound, and re-checks them after the acceleration ramp.

σ_min cheaply: the eigenvalues of the small Gram matrix JJᵀ (6×6) are the σ², for fewer
flops than an SVD of J; benchmarks/bench_solver.py times the options. One eigvalsh and one
linear solve give σ_min, the manipulability, the damped step and the null-space term.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache, partial
from typing import Any, Callable, Iterable, NamedTuple

import numpy as np
from numpy.typing import NDArray

from ..arm.kinematics import pose_and_jacobian, tool_frame_jacobian, twist_to_base
from ..arm.model import FRAMES, TASK_AXES, Arm
from ..errors import ConfigError
from .clearance import ClearanceGuard, ClearanceLimit, ClearanceReport
from .limits import (
    SCALE_NAMES,
    JointBounds,
    apply_limits,
    binding_limit,
    clear_of_limits,
    pushing_into_limits,
    start_pose,
)

Vector = NDArray[np.float64]


RESOLVE_TOLERANCE = 0.02
"""How far (relative to ‖v‖ over the task rows) a re-solved motion may stray outside the
command, beyond the error the unconstrained (damped) solve has anyway."""

MAX_TWIST = 1e3
"""Larger commands (norm, mixed m/s and rad/s) are scaled down to it first, keeping their
direction: far beyond any TCP cap, it only keeps the arithmetic finite for any input."""

_CUTOFF = 1e-14
"""Gram eigenvalues below this fraction of the largest count as zero (σ ratio 1e-7): the
eigenvalues of JJᵀ are only known to about ε_mach·λ_max."""

_REFINE_BELOW = 1e-6
"""Gram eigenvalue ratio (σ ratio 1e-3) below which G counts as nearly singular: the solve
goes through its eigenvectors, and the null-space projection is refined."""

_IS_LINEAR = (True, True, True, False, False, False)

# Products as array methods: on these small arrays about 0.2 µs cheaper a call than np.dot
# (which dispatches first) and 0.5 µs cheaper than the @ operator; Jᵀx is written x.dot(J).


def _linalg_kernels() -> tuple[Callable[..., Vector], Callable[..., Vector],
                               Callable[..., tuple[Vector, NDArray[np.float64]]]]:
    """eigvalsh, solve and eigh for small float64 matrices, as numpy's own gufuncs.

    numpy's public wrappers spend about 5 µs per call on checks and error-state handling,
    more than the LAPACK work on a 6×6, twice per cycle. The gufuncs underneath
    (numpy.linalg._umath_linalg, unchanged since numpy 1.8) are called directly; the solver
    only hands them finite, symmetric matrices, and `solve` only well-conditioned ones. They
    are checked against the public functions at import; if numpy moves them, the public
    functions stand in.
    """
    public = (np.linalg.eigvalsh, np.linalg.solve, np.linalg.eigh)
    try:
        from numpy.linalg import _umath_linalg as kernels
        fast = (partial(kernels.eigvalsh_lo, signature="d->d"),
                partial(kernels.solve1, signature="dd->d"),
                partial(kernels.eigh_lo, signature="d->dd"))
        sample = np.array([[4.0, 1.0, 0.5], [1.0, 3.0, 0.2], [0.5, 0.2, 2.0]])
        ok = (np.allclose(fast[0](sample), public[0](sample))
              and np.allclose(fast[1](sample, np.ones(3)), public[1](sample, np.ones(3)))
              and np.allclose(fast[2](sample)[0], public[2](sample)[0]))
    except (ImportError, AttributeError, TypeError, ValueError):
        ok = False
    return fast if ok else public


_eigvalsh, _solve, _eigh = _linalg_kernels()


# ----------------------------------------------------------------------------------------
# The result
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Solution:
    """One solve. Twists are 6-vectors (vx vy vz m/s, wx wy wz rad/s) in base axes, TCP
    reference point.

    rates             joint rates to send, (n,), rad/s or m/s
    damping           λ used by the final damped least-squares solve
    sigma_min         smallest singular value of the arm's task Jacobian at q
    manipulability    Yoshikawa w = Π σ_i of the task Jacobian (over min(rows, joints) values)
    commanded_twist   the command after locks, in base axes
    achieved_twist    J·rates
    tracking_error    ‖achieved − commanded‖ over the task rows (limits' slowing included);
                      _linear (m/s) and _angular (rad/s) split it by kind of row
    scales            every limit factor in [0, 1] by name (limits.SCALE_NAMES)
    binding_limit     the name of the smallest factor below 1, or None; the name of the
                      conflict instead when two bounds could not both hold (limits.CONFLICTS)
    saturated_joints  joints taken out of the solve because they sit at a position limit
    conflicts         bounds that had to give way to another this cycle (limits.CONFLICTS)
    clearance         distances to the cell and the damper's effect (None without a cell)
    """

    rates: Vector
    damping: float
    sigma_min: float
    manipulability: float
    commanded_twist: Vector
    achieved_twist: Vector
    tracking_error: float
    tracking_error_linear: float
    tracking_error_angular: float
    scales: dict[str, float] = field(default_factory=dict)
    binding_limit: str | None = None
    saturated_joints: tuple[str, ...] = ()
    conflicts: tuple[str, ...] = ()
    clearance: ClearanceReport | None = None

    @property
    def scale(self) -> float:
        """Product of all factors: the overall slowing (acceleration: fraction of the step)."""
        return math.prod(self.scales.values())

    def as_dict(self) -> dict[str, Any]:
        """Plain JSON/msgpack-ready values (lists and floats)."""
        out = {
            "rates": self.rates.tolist(),
            "damping": self.damping,
            "sigma_min": self.sigma_min,
            "manipulability": self.manipulability,
            "commanded_twist": self.commanded_twist.tolist(),
            "achieved_twist": self.achieved_twist.tolist(),
            "tracking_error": self.tracking_error,
            "tracking_error_linear": self.tracking_error_linear,
            "tracking_error_angular": self.tracking_error_angular,
            "scale": self.scale,
            "scales": dict(self.scales),
            "binding_limit": self.binding_limit,
            "saturated_joints": list(self.saturated_joints),
        }
        if self.clearance is not None:
            out["clearance"] = self.clearance.as_dict()
        return out


# ----------------------------------------------------------------------------------------
# Building blocks (each usable and testable alone)
# ----------------------------------------------------------------------------------------

def damping_squared(sigma_min: float, threshold: float, damping_max: float) -> float:
    """λ² = (1 − (σ_min/ε)²)·λ_max² for σ_min < ε, else 0: zero away from singularities,
    rising smoothly (continuous at σ_min = ε) to λ_max² at σ_min = 0.

    Chiaverini, Siciliano & Egeland 1994; Chiaverini 1997 (REFERENCES §3.3):
    σ_min = 0.02, ε = 0.04, λ_max = 0.1 → 0.0075.
    """
    if sigma_min >= threshold:
        return 0.0
    ratio = sigma_min / threshold
    return (1.0 - ratio * ratio) * damping_max * damping_max


def damped_least_squares(J: NDArray[np.float64], v: Vector, damping: float) -> Vector:
    """q̇ = Jᵀ(JJᵀ + λ²I)⁻¹v for a fixed λ: the textbook form (`DampedSolve` is the one in use).

    Minimises ‖Jq̇ − v‖² + λ²‖q̇‖²; with λ > 0, ‖q̇‖ ≤ ‖v‖/(2λ) for any J (REFERENCES §3.2).
    """
    m = J.shape[0]
    return J.T @ np.linalg.solve(J @ J.T + damping * damping * np.eye(m), v)


def joint_centring_gradient(q: Vector, lower: Vector, upper: Vector) -> Vector:
    """∇w of w(q) = −(1/2n) Σ ((q_i − q̄_i)/(q_iM − q_im))², q̄ the mid-range (Siciliano et al.
    2009, ch. 3): ∂w/∂q_i = −(1/n)(q_i − q̄_i)/(q_iM − q_im)². Ascending it (z = k∇w, k > 0)
    moves joints toward mid-range. Unlimited joints contribute 0; beyond a limit the
    gradient is held at its value at the limit.
    """
    mid, neg_inv = _centring_constants(np.asarray(lower, float), np.asarray(upper, float))
    return (np.minimum(np.maximum(q, lower), upper) - mid) * neg_inv


def _centring_constants(lower: Vector, upper: Vector) -> tuple[Vector, Vector]:
    """Mid-range q̄ and −1/(n·range²) per joint (0 for unlimited joints)."""
    finite = np.isfinite(lower) & np.isfinite(upper)
    lo, hi = np.where(finite, lower, 0.0), np.where(finite, upper, 1.0)
    return 0.5 * (lo + hi) * finite, np.where(finite, -1.0 / (len(lo) * (hi - lo) ** 2), 0.0)


class DampedSolve:
    """Damped least squares on a task Jacobian J (m×k), with its damping and dexterity, and
    an optional null-space motion z (used when k > m).

    The Gram matrix G = JJᵀ (m×m; JᵀJ when k < m, the same solution, REFERENCES §3.1) has
    the σ² as eigenvalues: σ_min sets the damping λ, Π σ the manipulability. Then
        q̇ = Jᵀ (G + λ²I)⁻¹ v  +  z − Jᵀ G⁺ J z
    by linear solves: G + λ²I is well conditioned whenever λ > 0 or σ_min ≥ ε
    (κ ≤ (σ_max² + λ_max²)/min(ε², λ_max²)). The null-space term uses the undamped G⁺, the
    exact projector, so J(I − J⁺J)z = 0: the damped (I − J⁺_DLS J) would leak into the task
    (REFERENCES §3.4). Only when G is (nearly) singular, σ_min < 1e-3·σ_max, do the
    eigenvectors of G come in, with a cut-off and iterative refinement (`_eigen_*`).
    """

    __slots__ = ("rates", "damping", "sigma_min", "manipulability")

    def __init__(self, J: NDArray[np.float64], v: Vector, z: Vector | None,
                 threshold: float, damping_max: float) -> None:
        m, k = J.shape
        wide = m <= k
        G = J.dot(J.T) if wide else J.T.dot(J)
        values = _eigvalsh(G).tolist()  # ascending; σ_i²
        smallest, largest = max(values[0], 0.0), max(values[-1], 0.0)
        self.sigma_min = math.sqrt(smallest)
        self.manipulability = math.sqrt(max(math.prod(values), 0.0))
        lam2 = damping_squared(self.sigma_min, threshold, damping_max)
        self.damping = math.sqrt(lam2)
        regular = smallest > _REFINE_BELOW * largest  # G itself safely invertible
        if not wide:
            self.rates = _damped_tall(J, v, G, lam2, smallest, largest)
        elif z is None or m == k:
            self.rates = _damped_wide(J, v, G, lam2, smallest, largest)
        elif lam2 == 0.0 and regular:  # the usual case: task and null space in one solve
            self.rates = _solve(G, v - J.dot(z)).dot(J) + z
        else:
            Jz = J.dot(z)
            null = z - (_solve(G, Jz) if regular else _eigen_pinv_gram(J, Jz, G)).dot(J)
            self.rates = _damped_wide(J, v, G, lam2, smallest, largest) + null


def _damped_wide(J: NDArray[np.float64], v: Vector, G: NDArray[np.float64], lam2: float,
                 smallest: float, largest: float) -> Vector:
    """Jᵀ(JJᵀ + λ²I)⁻¹v."""
    if smallest + lam2 > _REFINE_BELOW * (largest + lam2):
        y: Vector = _solve(G + lam2 * _identity(len(G)), v)
    else:
        y = _eigen_inverse(G, v, lam2)
    rates: Vector = y.dot(J)
    return rates


def _damped_tall(J: NDArray[np.float64], v: Vector, G: NDArray[np.float64], lam2: float,
                 smallest: float, largest: float) -> Vector:
    """(JᵀJ + λ²I)⁻¹Jᵀv, the same for fewer joints than task rows."""
    b = v.dot(J)
    if smallest + lam2 > _REFINE_BELOW * (largest + lam2):
        return _solve(G + lam2 * _identity(len(G)), b)
    return _eigen_inverse(G, b, lam2)


def _eigen_inverse(G: NDArray[np.float64], b: Vector, lam2: float) -> Vector:
    """(G + λ²I)⁺b through G's eigenvectors, eigenvalues below the cut-off dropped (G
    singular and no damping: a configuration with damping_max = 0, or J ≈ 0)."""
    lam, U = _eigh(G)
    cut = _CUTOFF * max(float(lam[-1]), 0.0)
    return U @ (_reciprocal(lam + lam2, cut, max(float(lam[0]), 0.0) + lam2) * (U.T @ b))


def _eigen_pinv_gram(J: NDArray[np.float64], Jz: Vector, G: NDArray[np.float64]) -> Vector:
    """G⁺·Jz for the projection J⁺Jz = Jᵀ G⁺ J z when G is nearly singular.

    G's eigenvectors carry errors of order ε_mach·κ(G), which Λ⁺ amplifies: the result is
    refined twice against its own residual in J⁺Jz (iterative refinement)."""
    lam, U = _eigh(G)
    cut = _CUTOFF * max(float(lam[-1]), 0.0)
    inv = _reciprocal(lam, cut, max(float(lam[0]), 0.0))
    y = U @ (inv * (U.T @ Jz))
    for _ in range(2):
        y += U @ (inv * (U.T @ (Jz - J @ (J.T @ y))))
    return y


@lru_cache(maxsize=16)
def _identity(m: int) -> NDArray[np.float64]:
    return np.eye(m)


def _reciprocal(values: Vector, cut: float, smallest: float) -> Vector:
    """1/values, with 0 where values ≤ cut (values ascending; `smallest` ≈ values[0])."""
    if smallest > cut:
        return 1.0 / values
    return np.divide(1.0, values, out=np.zeros_like(values), where=values > cut)


def within_command(achieved: Vector, commanded: Vector, slack: float) -> bool:
    """True when every achieved component lies between 0 and its commanded value, give or
    take `slack`: the motion may fall short of the command (a direction the remaining joints
    cannot serve is dropped) but adds no motion that was not asked for (a locked or zero
    axis stays still, no axis overshoots or reverses)."""
    low = np.minimum(commanded, 0.0) - slack
    high = np.maximum(commanded, 0.0) + slack
    return bool(((achieved >= low) & (achieved <= high)).all())


def parse_axes(text: str | Iterable[str], *, field_name: str = "lock") -> tuple[str, ...]:
    """Axis names from "wx,wy,wz" (or a list of names); an unknown name is a ConfigError."""
    names = [p.strip() for p in (text.split(",") if isinstance(text, str) else text)]
    names = [n for n in names if n]
    for n in names:
        if n not in TASK_AXES:
            raise ConfigError(f"unknown axis {n!r}; use {', '.join(TASK_AXES)}",
                              field=field_name)
    return tuple(dict.fromkeys(names))


@lru_cache(maxsize=64)
def _lock_index(locked: tuple[str, ...]) -> NDArray[np.intp]:
    return np.array([TASK_AXES.index(a) for a in parse_axes(locked)], dtype=np.intp)


# ----------------------------------------------------------------------------------------
# The entry point
# ----------------------------------------------------------------------------------------

def solve(arm: Arm, q: Vector, twist: Vector, *, frame: str = "base",
          locked: tuple[str, ...] = (), reduced: bool = False,
          prev_rates: Vector | None = None, dt_s: float,
          state_lag_cycles: int = 1,
          clearance: ClearanceLimit | None = None, step_s: float | None = None) -> Solution:
    """Joint rates that move the TCP as `twist` asks, within every limit of `arm`.

    q           measured joint positions (n,), rad or m
    twist       (vx, vy, vz, wx, wy, wz), m/s and rad/s, TCP reference point, in `frame` axes
    frame       "base" or "tool"
    locked      axis names held at zero (e.g. ("wx", "wy", "wz") = translate only)
    reduced     reduced-speed mode: TCP linear speed ≤ 0.25 m/s (ISO 10218-1)
    prev_rates  the rates sent last cycle (acceleration limit); None skips that limit
    dt_s        control period, s
    state_lag_cycles  how many periods q lags the arm (0 or 1): the position limits are
                judged from where the arm will be when these rates act (`start_pose`)
    clearance   the arm's collision model in a cell: the velocity damper keeps every pair
                clear (runtime.control.clearance); None: no cell
    step_s      the time since the last command, when shorter than dt_s (a cycle after a
                late one): the acceleration limit holds over it (limits.acceleration_step)

    Never raises or returns NaN for finite inputs of the right shapes (exact singularities
    and zero twists included). Wrong shapes, non-finite values, an unknown frame or axis
    name raise ValueError / ConfigError.
    """
    consts = _constants(arm)
    q, v, prev_rates = _checked(consts.n, q, twist, frame, prev_rates, dt_s)
    if locked:
        v[_lock_index(tuple(locked))] = 0.0
    size = math.hypot(*v.tolist())
    if size > MAX_TWIST:
        if size == math.inf:  # components near the float limit: shrink them first
            v /= max(map(abs, v.tolist()))
            size = math.hypot(*v.tolist())
        v *= MAX_TWIST / size
        size = MAX_TWIST

    T, J = pose_and_jacobian(arm, q)
    v_base = twist_to_base(v, T) if frame == "tool" else v
    if consts.full_task:
        Jt, vt = (tool_frame_jacobian(J, T) if frame == "tool" else J), v
    else:
        Jt, vt = J[arm.task_mask], v_base[arm.task_mask]
    moving = size > 0.0 and (consts.full_task or bool(vt.any()))

    q_start = start_pose(q, prev_rates, dt_s, state_lag_cycles)
    clear = clear_of_limits(consts.bounds, q_start, dt_s)
    z = None
    if moving and consts.nullspace and Jt.shape[0] < consts.n:  # z = k∇w (Siciliano 2009)
        inside = q if clear else np.minimum(np.maximum(q, consts.lower), consts.upper)
        z = (inside - consts.mid) * consts.k_grad
    first = DampedSolve(Jt, vt, z, consts.threshold, consts.damping_max)
    rates, damping, free = first.rates, first.damping, None
    if moving and not clear:
        rates, damping, free = _resolve_at_limits(arm, q_start, Jt, vt, z, rates, damping,
                                                  dt_s)

    guard = None
    if clearance is not None:  # the velocity damper, around the other limits
        guard = ClearanceGuard(clearance, q, Jt, damping, rates)
        rates = guard.rates
    limited = apply_limits(arm, q_start, rates, J, reduced=reduced, prev_rates=prev_rates,
                           dt_s=dt_s, clear=clear, step_s=step_s)
    if guard is not None:
        limited = guard.settle(limited)
    # Tracking error over the task rows; norms are the same in base and tool axes.
    e_lin = e_ang = 0.0
    for is_task, is_linear, a, c in zip(consts.task_axes, _IS_LINEAR, limited.twist.tolist(),
                                        v_base.tolist()):
        if is_task:
            if is_linear:
                e_lin += (a - c) * (a - c)
            else:
                e_ang += (a - c) * (a - c)
    saturated = () if free is None else \
        tuple(name for name, f in zip(arm.joint_names, free.tolist()) if not f)
    return Solution(
        rates=limited.rates, damping=damping, sigma_min=first.sigma_min,
        manipulability=first.manipulability, commanded_twist=v_base,
        achieved_twist=limited.twist, tracking_error=math.sqrt(e_lin + e_ang),
        tracking_error_linear=math.sqrt(e_lin), tracking_error_angular=math.sqrt(e_ang),
        scales=limited.scales, binding_limit=binding_limit(limited.scales, limited.conflicts),
        saturated_joints=saturated, conflicts=limited.conflicts,
        clearance=None if guard is None else guard.report)


def _checked(n: int, q: Vector, twist: Vector, frame: str, prev_rates: Vector | None,
             dt_s: float) -> tuple[Vector, Vector, Vector | None]:
    """q, a private copy of the twist and prev_rates as float arrays, or a clear error."""
    q = np.asarray(q, dtype=float)
    v = np.array(twist, dtype=float)
    if q.shape != (n,) or v.shape != (6,):
        raise ValueError(f"need q of shape ({n},) and a 6-vector twist, "
                         f"got {q.shape} and {v.shape}")
    if frame not in FRAMES:
        raise ConfigError(f"unknown frame {frame!r}; use base or tool", field="frame")
    if not (all(map(math.isfinite, q.tolist())) and all(map(math.isfinite, v.tolist()))):
        raise ValueError("q and twist must be finite")
    if not (dt_s > 0.0 and math.isfinite(dt_s)):
        raise ValueError(f"dt_s must be a positive number of seconds, got {dt_s!r}")
    if prev_rates is not None:
        prev_rates = np.asarray(prev_rates, dtype=float)
        if prev_rates.shape != (n,) or not all(map(math.isfinite, prev_rates.tolist())):
            raise ValueError(f"prev_rates must be {n} finite numbers")
    return q, v, prev_rates


class _Constants(NamedTuple):
    """What `solve` needs from an arm, computed once per arm."""

    n: int
    bounds: JointBounds
    full_task: bool      # the arm controls all six directions
    task_axes: tuple[bool, ...]
    threshold: float
    damping_max: float
    nullspace: bool
    lower: Vector
    upper: Vector
    mid: Vector
    k_grad: Vector       # nullspace_gain · (−1/(n·range²)): z = k_grad·(q − q̄)


@lru_cache(maxsize=32)
def _constants(arm: Arm) -> _Constants:
    s = arm.solver
    lower, upper = arm.lower.astype(float), arm.upper.astype(float)
    mid, neg_inv = _centring_constants(lower, upper)
    return _Constants(n=arm.n, bounds=JointBounds.of(arm), full_task=all(arm.task_axes),
                      task_axes=tuple(bool(t) for t in arm.task_axes),
                      threshold=s.damping_threshold, damping_max=s.damping_max,
                      nullspace=s.nullspace_gain > 0.0, lower=lower, upper=upper, mid=mid,
                      k_grad=s.nullspace_gain * neg_inv)


def _resolve_at_limits(arm: Arm, q: Vector, Jt: NDArray[np.float64], vt: Vector,
                       z: Vector | None, rates: Vector, damping: float, dt_s: float
                       ) -> tuple[Vector, float, NDArray[np.bool_] | None]:
    """Take out joints at a position limit that `rates` push further, re-solve with the rest.

    Repeats while the new solution pushes another joint into its limit. A re-solve is kept
    only if its achieved task motion stays `within_command`, with a slack of
    RESOLVE_TOLERANCE·‖v‖ plus the tracking error of the unconstrained solve (near a
    singularity damping costs accuracy anyway; the re-solve may not add much to it).
    Otherwise the last acceptable rates go on to the limits, where the position brake scales
    the whole vector down: the arm stops rather than wander off the commanded direction.
    Returns (rates, λ, free joints or None when nothing was taken out).
    """
    bounds = JointBounds.of(arm)
    free = None
    settings = arm.solver
    slack = None
    for _ in range(arm.n):
        pushing = pushing_into_limits(bounds, q, rates, dt_s)
        if free is not None:
            pushing &= free
        if not pushing.any():
            break
        if slack is None:
            error = Jt @ rates - vt
            slack = RESOLVE_TOLERANCE * math.sqrt(float(vt @ vt)) + \
                math.sqrt(float(error @ error))
        candidate = ~pushing if free is None else free & ~pushing
        if not candidate.any():
            break
        reduced = DampedSolve(Jt[:, candidate], vt, None if z is None else z[candidate],
                              settings.damping_threshold, settings.damping_max)
        if not within_command(Jt[:, candidate] @ reduced.rates, vt, slack):
            break
        rates = np.zeros(arm.n)
        rates[candidate] = reduced.rates
        damping, free = reduced.damping, candidate
    return rates, damping, free


__all__ = ["FRAMES", "MAX_TWIST", "RESOLVE_TOLERANCE", "SCALE_NAMES", "Solution",
           "damped_least_squares", "damping_squared", "joint_centring_gradient", "parse_axes",
           "solve", "within_command"]
