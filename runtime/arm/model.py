"""Arm description: joints, limits, base and tool; loaded from TOML (DH / modified DH) or URDF.

Every arm, whatever file it came from, becomes one uniform serial chain:

    T_tcp(q) = base · Π_i [origin_i · Motion_i(q_i)] · flange · tool

where Motion_i is a rotation about (revolute) or a translation along (prismatic) the local
z axis of joint i. `origin_i` is the fixed transform from the previous joint's frame (after
its motion) to joint i's frame at q_i = 0. Units inside: metres, radians, seconds.

All validation happens here, at the boundary; kinematics, solver and limits trust an `Arm`.
A bad file raises `ConfigError` naming the file, line and field.
"""

from __future__ import annotations

import hashlib
import math
import os
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .transforms import Mat4, rot4, rotx, rotz, trans

TASK_AXES = ("vx", "vy", "vz", "wx", "wy", "wz")
FRAMES = ("base", "tool")         # the frames a twist is given in: the arm's base, its tool
JOINT_KINDS = ("revolute", "prismatic")
ANGLE_UNITS = {"deg": math.pi / 180.0, "rad": 1.0}
LENGTH_UNITS = {"m": 1.0, "mm": 1e-3}


def configs_dir() -> Path:
    """The shipped configs folder (override with JOGWIRE_CONFIGS)."""
    env = os.environ.get("JOGWIRE_CONFIGS")
    return Path(env) if env else Path(__file__).resolve().parents[2] / "configs"


@dataclass(frozen=True, eq=False)
class Joint:
    """One actuated joint. Units: rad (revolute) or m (prismatic), per second, per second².

    `max_speed`/`max_accel` are what jogwire commands (software limits); `rated_speed`/
    `rated_accel` are the hardware's ratings that preflight proves against.
    """

    name: str
    kind: str
    lower: float
    upper: float
    max_speed: float
    max_accel: float
    rated_speed: float
    rated_accel: float
    effort: float | None
    origin: Mat4 = field(repr=False)

    @property
    def is_revolute(self) -> bool:
        return self.kind == "revolute"


@dataclass(frozen=True)
class SolverSettings:
    """Per-arm tuning of the velocity solver.

    damping_threshold: σ_min below which damping starts (ε, same unit as J's singular values).
    damping_max: λ_max, the damping at σ_min = 0.
    nullspace_gain: gain k of the joint-centring motion z = k∇w (1/s); 0 turns it off.
    limit_margin: distance kept from each position limit (rad or m, per joint kind).
    """

    damping_threshold: float = 0.04
    damping_max: float = 0.08
    nullspace_gain: float = 0.5
    limit_margin_rad: float = math.radians(1.0)
    limit_margin_m: float = 0.002


@dataclass(frozen=True, eq=False)
class Arm:
    """A serial arm. See the module docstring for the chain convention."""

    name: str
    joints: tuple[Joint, ...]
    base: Mat4 = field(repr=False)
    flange: Mat4 = field(repr=False)
    tool: Mat4 = field(repr=False)
    task_axes: tuple[bool, ...] = (True,) * 6
    tcp_max_linear_m_s: float = 1.0
    tcp_max_angular_rad_s: float = math.pi
    solver: SolverSettings = SolverSettings()
    home_q: tuple[float, ...] | None = None
    summary: str = ""
    source: str = ""

    @property
    def n(self) -> int:
        return len(self.joints)

    @property
    def joint_names(self) -> tuple[str, ...]:
        return tuple(j.name for j in self.joints)

    # Arrays the hot path uses, built once.
    @cached_property
    def origins(self) -> NDArray[np.float64]:
        return np.stack([j.origin for j in self.joints])

    @cached_property
    def is_revolute(self) -> NDArray[np.bool_]:
        return np.array([j.is_revolute for j in self.joints])

    @cached_property
    def lower(self) -> NDArray[np.float64]:
        return np.array([j.lower for j in self.joints])

    @cached_property
    def upper(self) -> NDArray[np.float64]:
        return np.array([j.upper for j in self.joints])

    @cached_property
    def max_speed(self) -> NDArray[np.float64]:
        return np.array([j.max_speed for j in self.joints])

    @cached_property
    def max_accel(self) -> NDArray[np.float64]:
        return np.array([j.max_accel for j in self.joints])

    @cached_property
    def rated_speed(self) -> NDArray[np.float64]:
        return np.array([j.rated_speed for j in self.joints])

    @cached_property
    def rated_accel(self) -> NDArray[np.float64]:
        return np.array([j.rated_accel for j in self.joints])

    @cached_property
    def limit_margin(self) -> NDArray[np.float64]:
        s = self.solver
        return np.where(self.is_revolute, s.limit_margin_rad, s.limit_margin_m)

    @cached_property
    def tip(self) -> Mat4:
        """flange · tool: the fixed transform from the last joint frame to the TCP."""
        return self.flange @ self.tool

    @cached_property
    def task_mask(self) -> NDArray[np.bool_]:
        return np.array(self.task_axes)

    @cached_property
    def motion_terms(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """The link transforms as one affine map of u = [cos q; sin q; q] (length 3n):

            vec(L) = offset + matrix · u,   shapes (16n,) and (16n, 3n),

        where L_0 = base·origin_0·Motion_0(q_0), L_i = origin_i·Motion_i(q_i), each 4×4
        flattened row by row. This holds because Motion_z(q) is K0 + cos q·Kc + sin q·Ks for
        a rotation and I + q·Kd for a translation (constant K's), so the kinematics builds
        every link transform with one matrix product instead of per-joint work.
        """
        n = self.n
        K = np.zeros((4, 4, 4))   # Rot_z(q) = K[0] + cos q·K[1] + sin q·K[2]
        K[0, 2, 2] = K[0, 3, 3] = 1.0
        K[1, 0, 0] = K[1, 1, 1] = 1.0
        K[2, 1, 0], K[2, 0, 1] = 1.0, -1.0
        P = np.zeros((4, 4, 4))   # Trans_z(q) = P[0] + q·P[3]
        P[0] = np.eye(4)
        P[3, 2, 3] = 1.0
        origins = self.origins.copy()
        origins[0] = self.base @ origins[0]
        offset = np.empty((n, 16))
        matrix = np.zeros((n, 16, 3, n))
        for i, (origin, joint) in enumerate(zip(origins, self.joints)):
            basis = K if joint.is_revolute else P
            offset[i] = (origin @ basis[0]).ravel()
            for k in range(3):  # the columns multiplying cos q_i, sin q_i and q_i
                matrix[i, :, k, i] = (origin @ basis[k + 1]).ravel()
        return offset.ravel(), matrix.reshape(16 * n, 3 * n)

    @cached_property
    def prismatic_index(self) -> NDArray[np.intp]:
        """Indices of the prismatic joints (often empty)."""
        return np.flatnonzero(~self.is_revolute)

    def home(self) -> NDArray[np.float64]:
        """The configured start pose, else mid-range (0 for unlimited joints); rad or m."""
        if self.home_q is not None:
            return np.array(self.home_q)
        finite = np.isfinite(self.lower) & np.isfinite(self.upper)
        mid = np.zeros(self.n)
        mid[finite] = 0.5 * (self.lower[finite] + self.upper[finite])
        return np.clip(mid, self.lower, self.upper)  # 0, or the nearer limit if half-bounded

    def with_changes(self, **changes: Any) -> "Arm":
        from dataclasses import replace
        return replace(self, **changes)


def limits_digest(arm: Arm) -> str:
    """A short hash of what both ends of the wire must agree on: joint names, kinds, limits."""
    parts = []
    for j in arm.joints:
        parts.append(f"{j.name}|{j.kind}|{j.lower:.9g}|{j.upper:.9g}|{j.max_speed:.9g}|"
                     f"{j.max_accel:.9g}|{j.rated_speed:.9g}|{j.rated_accel:.9g}")
    return hashlib.sha256("\n".join(parts).encode()).hexdigest()[:16]


# ----------------------------------------------------------------------------------------
# Building chains from DH tables
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class DHRow:
    """One DH row (lengths m, angles rad). `theta`/`d` is the constant offset of the joint
    variable: q_dh = q + theta (revolute) or q_dh = q + d (prismatic)."""

    d: float
    a: float
    alpha: float
    theta: float = 0.0


def chain_from_dh(rows: list[DHRow], kinds: list[str], modified: bool
                  ) -> tuple[list[Mat4], Mat4]:
    """Joint origins and the flange transform of a DH table.

    Standard DH (Spong 2006, Ch. 3): A_i = Rz(θ_i)·Tz(d_i)·Tx(a_i)·Rx(α_i); the fixed part
    after joint i's motion moves into the next origin, the last one into the flange.
    Modified DH (Craig 2005, eq. 3.6): A_i = Rx(α_{i−1})·Tx(a_{i−1})·Rz(θ_i)·Tz(d_i).
    """
    origins: list[Mat4] = []
    carry = np.eye(4)  # standard DH: fixed part left over from the previous row
    for row, kind in zip(rows, kinds):
        offset = rot4(rotz(row.theta)) @ trans(z=row.d)  # Rz(θ) and Tz(d) commute
        if modified:
            origins.append(rot4(rotx(row.alpha)) @ trans(x=row.a) @ offset)
        elif kind == "revolute":
            origins.append(carry @ rot4(rotz(row.theta)))
            carry = trans(z=row.d) @ trans(x=row.a) @ rot4(rotx(row.alpha))
        else:
            origins.append(carry @ offset)
            carry = trans(x=row.a) @ rot4(rotx(row.alpha))
    flange = np.eye(4) if modified else carry
    return origins, flange
