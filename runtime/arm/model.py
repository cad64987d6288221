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

from .chain_terms import ChainTerms, build_chain_terms
from .transforms import Mat4, rot4, rotx, rotz, trans

TASK_AXES = ("vx", "vy", "vz", "wx", "wy", "wz")
FRAMES = ("base", "tool")         # the frames a twist is given in: the arm's base, its tool
JOINT_KINDS = ("revolute", "prismatic")
ANGLE_UNITS = {"deg": math.pi / 180.0, "rad": 1.0}
LENGTH_UNITS = {"m": 1.0, "mm": 1e-3}
DEFAULT_LINK_RADIUS_M = 0.04
"""Radius of a link's capsule (runtime.arm.collision) when the arm file gives none."""


def configs_dir() -> Path:
    """The shipped configs folder (override with JOGWIRE_CONFIGS)."""
    env = os.environ.get("JOGWIRE_CONFIGS")
    return Path(env) if env else Path(__file__).resolve().parents[2] / "configs"


@dataclass(frozen=True, eq=False)
class Joint:
    """One actuated joint. Units: rad (revolute) or m (prismatic), per second, per second².

    `max_speed`/`max_accel` are what jogwire commands (software limits); `rated_speed`/
    `rated_accel` are the hardware's ratings that preflight proves against. `link_radius_m`
    is the radius of the capsule around the link this joint moves (runtime.arm.collision);
    `collision` replaces that capsule when the arm file describes the link's shape (URDF
    `<collision>`): capsules (start xyz, end xyz, radius) in this joint's frame, m.
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
    link_radius_m: float = DEFAULT_LINK_RADIUS_M
    collision: tuple[tuple[float, ...], ...] = ()

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
    def chain_terms(self) -> ChainTerms:
        """The constant part of the forward kinematics (runtime/arm/chain_terms.py)."""
        return build_chain_terms(self.origins, [j.is_revolute for j in self.joints],
                                 self.base, self.tip)

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
