"""Forward kinematics, geometric Jacobian and dexterity measures (pure numpy, no I/O).

Chain convention: see `runtime.arm.model`. Every joint moves about / along its local z axis,
so after the chain product the joint axes and origins are read straight off the frames.

Geometric Jacobian in the base frame, reference point the TCP (Spong, Hutchinson &
Vidyasagar 2006, Ch. 4; Siciliano et al. 2009, eq. 3.30):
    revolute i:  J_i = [ z_i × (p_tcp − o_i) ; z_i ]
    prismatic i: J_i = [ z_i ; 0 ]
Rows are (vx, vy, vz, wx, wy, wz) in m/s and rad/s per unit joint rate.

Example: planar 2R, a1 = 0.4 m, a2 = 0.3 m, q = (30°, 60°) →
    Jv(xy) = [[−0.5, −0.3], [0.34641, 0]], det = a1·a2·sin q2 = 0.103923.

The hot path (`pose_and_jacobian`, every control cycle) multiplies 7×7 matrices that carry
each frame's Plücker moment, with revolute joints in pairs (runtime/arm/chain_terms.py), so
it makes about 15 numpy calls for seven joints, into arrays kept with the arm.
`jacobian_from_frames` computes the same Jacobian from any given frames with the cross
products above.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .chain_terms import ChainTerms
from .model import Arm
from .transforms import Mat4

Jacobian = NDArray[np.float64]  # (6, n)


def link_transforms(arm: Arm, q: NDArray[np.float64]) -> NDArray[np.float64]:
    """origin_i · Motion_i(q_i) for every joint, as one (n, 4, 4) batch (base not included)."""
    O = arm.origins  # noqa: E741 (the origins, O_i in the formula)
    q = np.asarray(q, dtype=float)
    c = np.cos(q)[:, None]
    s = np.sin(q)[:, None]
    L = O.copy()
    # Right-multiplying by Rz(q) mixes columns 0 and 1; by Tz(q) shifts column 3 along column 2.
    rev = arm.is_revolute
    L[rev, :, 0] = (O[:, :, 0] * c + O[:, :, 1] * s)[rev]
    L[rev, :, 1] = (O[:, :, 1] * c - O[:, :, 0] * s)[rev]
    pri = arm.prismatic_index
    L[pri, :, 3] += O[pri, :, 2] * q[pri, None]
    return L


def _chain(c: ChainTerms, b: _Buffers, q: NDArray[np.float64]) -> NDArray[np.float64]:
    """Every frame and the TCP as 7×7 augmented matrices, transposed and stacked, into
    b.chain: rows 7i … 7i + 6 are frame i's Xᵀ, the last seven the TCP's
    (runtime/arm/chain_terms.py).

    About one microsecond per numpy call whatever the array size, so it makes few: one sine
    for every joint's terms, one matrix product for every pair's local products, then one
    product per pair along the chain, each into arrays and views made once (`_Buffers`), as
    array methods (np.dot and np.copyto dispatch first: about 0.7 µs more a call here).
    """
    c.angles.dot(q, out=b.angle)
    np.add(b.angle, c.phases, out=b.angle)
    np.sin(b.angle, out=b.angle)
    if c.with_q:
        b.q[:] = q
    c.matrix.dot(b.s, out=b.local_flat)
    b.chain_first[:] = b.local_first             # the first group's products are final
    for local, before, out in b.steps:           # the chain product is sequential by nature
        local.dot(before, out=out)
    return b.chain


def joint_frames(arm: Arm, q: NDArray[np.float64]) -> tuple[NDArray[np.float64], Mat4]:
    """All joint frames in the base frame, (n, 4, 4), after each joint's motion, and T_tcp.

    Joint i's axis is frames[i][:3, 2] and a point on it is frames[i][:3, 3]. Both are
    views into the one array of the chain product (not contiguous).
    """
    c = arm.chain_terms
    b = _take(c)
    chain = _chain(c, b, q).copy()
    c.spare_buffers.append(b)
    return chain.reshape(-1, 7, 7)[:-1, :4, :4].transpose(0, 2, 1), chain[-7:-3, :4].T


def pose_and_jacobian(arm: Arm, q: NDArray[np.float64]) -> tuple[Mat4, Jacobian]:
    """T_tcp and the geometric Jacobian at q (base frame, TCP reference point), in one pass
    for the solver: the Jacobian is read off the moments the chain carries, J = S(p)·Wᵀ.

    W stacks column 2 (revolute: z, 0, o × z) or column 6 (prismatic: 0, 0, z) of each
    joint's augmented matrix, and S(p) = [−p̂ 0 I; I 0 0] moves the reference point to the
    TCP at p: z × (p − o) = o × z − p × z.
    """
    c = arm.chain_terms
    b = _take(c)
    _chain(c, b, q)
    axes = b.axes if b.axes is not None else b.chain[c.axis_rows].T
    J = _SHIFT.dot(b.tcp).reshape(6, 7).dot(axes)
    T = b.pose.copy().T
    c.spare_buffers.append(b)
    return T, J


def _take(c: ChainTerms) -> _Buffers:
    """A set of working arrays for the arm, to be put back in c.spare_buffers after use:
    list.pop and .append are atomic, so callers at the same time never share a set (one
    that raises in between only leaves its set to the collector)."""
    return c.spare_buffers.pop() if c.spare_buffers else _Buffers(c)


class _Buffers:
    """The arrays `_chain` works in for one arm, and the views it reads and writes, made
    once."""

    def __init__(self, c: ChainTerms) -> None:
        rows = c.matrix.shape[0] // 7
        self.s = np.empty(c.matrix.shape[1])
        self.angle = self.s[:len(c.phases)]
        self.q = self.s[len(c.phases):]
        self.local = np.empty((rows, 7))
        self.local_flat = self.local.reshape(-1)
        self.chain = np.empty((rows, 7))
        first = c.steps[0][0].start if c.steps else rows
        self.local_first, self.chain_first = self.local[:first], self.chain[:first]
        self.steps = tuple((self.local[r], self.chain[before], self.chain[r])
                           for r, before in c.steps)
        self.tcp = self.chain[c.tcp_row, :4]
        self.pose = self.chain[-7:-3, :4]
        self.axes = self.chain[c.axis_rows].T if isinstance(c.axis_rows, slice) else None


def tcp_pose(arm: Arm, q: NDArray[np.float64]) -> Mat4:
    """T_base→tcp (4×4, metres)."""
    return joint_frames(arm, q)[1]


# ε_kij as a (3, 9) matrix: (z × r)_k = Σ_ij ε_kij z_i r_j, so one matrix product turns the
# batch of outer products z_i r_j into the batch of cross products (np.cross costs ~30 µs).
_LEVI_CIVITA = np.zeros((3, 9))
for _k, _i, _j in ((0, 1, 2), (1, 2, 0), (2, 0, 1)):
    _LEVI_CIVITA[_k, 3 * _i + _j] = 1.0
    _LEVI_CIVITA[_k, 3 * _j + _i] = -1.0


# S(p) of `pose_and_jacobian` as a linear map of (p, 1): S = _SHIFT·(p, 1), (42, 4).
_SHIFT: NDArray[np.float64] = np.zeros((6, 7, 4))
for _a in range(3):
    _SHIFT[3 + _a, _a, 3] = 1.0                 # ω rows: z
    _SHIFT[_a, 4 + _a, 3] = 1.0                 # v rows: + o × z
for _k, _i, _j in ((0, 1, 2), (1, 2, 0), (2, 0, 1)):
    _SHIFT[_i, _j, _k] = 1.0                    # v rows: − p̂ z, −p̂[i, j] = −ε_ikj p_k
    _SHIFT[_j, _i, _k] = -1.0
_SHIFT = _SHIFT.reshape(42, 4)


def jacobian_from_frames(arm: Arm, frames: NDArray[np.float64], T_tcp: Mat4) -> Jacobian:
    """Geometric Jacobian (6×n, base frame, TCP reference point) from `joint_frames`."""
    z = frames[:, :3, 2]
    r = T_tcp[:3, 3] - frames[:, :3, 3]
    outer = (z[:, :, None] * r[:, None, :]).reshape(-1, 9)  # z_i r_j per joint
    J = np.concatenate((np.dot(_LEVI_CIVITA, outer.T), z.T))
    pri = arm.prismatic_index
    if len(pri):
        J[:3, pri] = z[pri].T
        J[3:, pri] = 0.0
    return J


def geometric_jacobian(arm: Arm, q: NDArray[np.float64]) -> Jacobian:
    """Geometric Jacobian at q in the base frame, reference point the TCP."""
    return pose_and_jacobian(arm, q)[1]


def tool_frame_jacobian(J_base: Jacobian, T_tcp: Mat4) -> Jacobian:
    """The same Jacobian with its rows expressed in the tool (TCP) axes: diag(Rᵀ, Rᵀ)·J."""
    Rt = T_tcp[:3, :3].T
    return np.vstack((Rt @ J_base[:3], Rt @ J_base[3:]))


def twist_to_base(twist: NDArray[np.float64], T_tcp: Mat4) -> NDArray[np.float64]:
    """A TCP twist given in tool axes, rotated into base axes (same reference point)."""
    R = T_tcp[:3, :3]
    return np.concatenate((R @ twist[:3], R @ twist[3:]))


def task_rows(J: Jacobian, mask: NDArray[np.bool_]) -> Jacobian:
    """Only the rows of the task directions the arm (or operator) selects."""
    return J[mask]


def yoshikawa_manipulability(singular_values: NDArray[np.float64]) -> float:
    """w = √det(J Jᵀ) = Π σ_i (Yoshikawa 1985, IJRR 4(2)); 0 when J has fewer σ than rows."""
    return float(np.prod(singular_values))


def condition_number(singular_values: NDArray[np.float64]) -> float:
    """κ = σ_max / σ_min (Salisbury & Craig 1982); inf at a singularity."""
    smin = singular_values[-1]
    return float(singular_values[0] / smin) if smin > 0 else float("inf")


@dataclass(frozen=True, eq=False)
class KinematicsReport:
    """Everything `jogwire probe` prints about one pose."""

    q: NDArray[np.float64]
    tcp_pose: Mat4
    jacobian: Jacobian
    task_jacobian: Jacobian
    singular_values: NDArray[np.float64]
    manipulability: float
    condition_number: float


def analyse_pose(arm: Arm, q: NDArray[np.float64]) -> KinematicsReport:
    """TCP pose, Jacobian and dexterity measures of the arm's task rows at q.

    A task with more rows than joints has n singular values only; the missing ones are 0,
    so manipulability and condition number then report the rank deficiency honestly.
    """
    q = np.asarray(q, dtype=float)
    T, J = pose_and_jacobian(arm, q)
    Jt = task_rows(J, arm.task_mask)
    sv = np.asarray(np.linalg.svd(Jt, compute_uv=False), dtype=np.float64)
    m = Jt.shape[0]
    if len(sv) < m:
        sv = np.concatenate((sv, np.zeros(m - len(sv))))
    return KinematicsReport(q=q, tcp_pose=T, jacobian=J, task_jacobian=Jt, singular_values=sv,
                            manipulability=yoshikawa_manipulability(sv),
                            condition_number=condition_number(sv))
