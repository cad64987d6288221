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

from ..errors import ConfigError
from ..tomlsource import TomlSource as _Source, read_toml, unit_factor as _unit
from .chain_terms import ChainTerms, build_chain_terms
from .transforms import Mat4, make_transform, rot4, rotx, rotz, trans

TASK_AXES = ("vx", "vy", "vz", "wx", "wy", "wz")
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


# ----------------------------------------------------------------------------------------
# TOML loading
# ----------------------------------------------------------------------------------------

def resolve_shipped(kind: str, name_or_path: str | Path, suffixes: tuple[str, ...] = (".toml",)
                    ) -> Path:
    """A shipped config name (`elbow6` under configs/arms/, for kind "arm") or a file path.

    A name with one of `suffixes`, or any existing path, is taken as a path; otherwise the
    name is looked up as configs/<kind>s/<name>.toml and an unknown name lists the shipped
    ones.
    """
    p = Path(name_or_path)
    if p.suffix in suffixes or p.exists():
        return p
    folder = configs_dir() / f"{kind}s"
    shipped = folder / f"{name_or_path}.toml"
    if shipped.exists():
        return shipped
    names = sorted(f.stem for f in folder.glob("*.toml"))
    raise ConfigError(f"no {kind} named {str(name_or_path)!r}; shipped {kind}s: "
                      f"{', '.join(names)}", field=kind)


def resolve_arm_path(name_or_path: str | Path) -> Path:
    """A shipped arm name (`elbow6`) or a path to a .toml / .urdf file."""
    return resolve_shipped("arm", name_or_path, (".toml", ".urdf"))


def load_arm(name_or_path: str | Path, *, base_link: str | None = None,
             tip_link: str | None = None) -> Arm:
    """Load an arm from a shipped name, a TOML file or a URDF file."""
    path = resolve_arm_path(name_or_path)
    if path.suffix == ".urdf":
        from .urdf import load_urdf_arm
        return load_urdf_arm(path, base_link=base_link, tip_link=tip_link)
    data, src = read_toml(path, "arm")
    return arm_from_toml(data, src)


def _number(src: _Source, value: Any, field_name: str, table: str | None, index: int | None,
            key: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise src.error(f"must be a number, got {value!r}", field_name, table, index, key)
    if not math.isfinite(value):
        raise src.error(f"must be a finite number, got {value!r}", field_name, table, index, key)
    return float(value)


def _vector3(src: _Source, value: Any, field_name: str, table: str, key: str) -> list[float]:
    if not isinstance(value, list) or len(value) != 3:
        raise src.error(f"must be a list of 3 numbers, got {value!r}", field_name, table, None, key)
    return [_number(src, v, field_name, table, None, key) for v in value]


def _frame(src: _Source, data: dict, table: str, length: float, angle: float) -> Mat4:
    spec = data.get(table, {})
    if not isinstance(spec, dict):
        raise src.error("must be a table with xyz and rpy", table, None, None, table)
    unknown = set(spec) - {"xyz", "rpy"}
    if unknown:
        raise src.error(f"unknown key {sorted(unknown)[0]!r}", f"{table}.{sorted(unknown)[0]}",
                        table, None, sorted(unknown)[0])
    xyz = _vector3(src, spec.get("xyz", [0, 0, 0]), f"{table}.xyz", table, "xyz")
    rpy = _vector3(src, spec.get("rpy", [0, 0, 0]), f"{table}.rpy", table, "rpy")
    return make_transform(np.array(xyz) * length, np.array(rpy) * angle)


_JOINT_KEYS = {"name", "type", "d", "a", "alpha", "theta", "lower", "upper", "max_speed",
               "max_accel", "rated_speed", "rated_accel", "effort", "link_radius"}


def _joint_limits(src: _Source, spec: dict, i: int, scale: float, name: str) -> dict[str, Any]:
    """Position, speed and acceleration limits of joint i, converted to SI."""
    def get(key: str, required: bool = True, default: float | None = None) -> float | None:
        fname = f"joints[{i}].{key}"
        if key not in spec:
            if required:
                raise src.error(f"joint {name!r} has no {key!r}", fname, "joints", i, None)
            return default
        return _number(src, spec[key], fname, "joints", i, key)

    lower, upper = get("lower") * scale, get("upper") * scale
    if lower >= upper:
        raise src.error(f"lower ({spec['lower']}) must be below upper ({spec['upper']})",
                        f"joints[{i}].lower", "joints", i, "lower")
    out: dict[str, Any] = {"lower": lower, "upper": upper}
    for key in ("max_speed", "max_accel"):
        v = get(key)
        if v <= 0:
            raise src.error(f"must be positive, got {spec[key]}", f"joints[{i}].{key}",
                            "joints", i, key)
        out[key] = v * scale
    for key, fallback in (("rated_speed", "max_speed"), ("rated_accel", "max_accel")):
        v = get(key, required=False)
        if v is not None and v <= 0:
            raise src.error(f"must be positive, got {spec[key]}", f"joints[{i}].{key}",
                            "joints", i, key)
        out[key] = out[fallback] if v is None else v * scale
    effort = get("effort", required=False)
    if effort is not None and effort <= 0:
        raise src.error(f"must be positive, got {spec['effort']}", f"joints[{i}].effort",
                        "joints", i, "effort")
    out["effort"] = effort
    return out


def _link_radius(src: _Source, spec: dict, i: int, length: float) -> float:
    """The optional `link_radius` of joint i (length unit), positive; m."""
    if "link_radius" not in spec:
        return DEFAULT_LINK_RADIUS_M
    r = _number(src, spec["link_radius"], f"joints[{i}].link_radius", "joints", i, "link_radius")
    if r <= 0:
        raise src.error(f"must be positive, got {spec['link_radius']}",
                        f"joints[{i}].link_radius", "joints", i, "link_radius")
    return r * length


def arm_from_toml(data: dict, src: _Source) -> Arm:
    """Validate a parsed arm TOML document and build the `Arm`."""
    top_keys = {"name", "summary", "convention", "angle_unit", "length_unit", "task", "base",
                "tool", "tcp_limits", "solver", "joints", "urdf", "base_link", "tip_link", "home"}
    for key in data:
        if key not in top_keys:
            raise src.error(f"unknown key {key!r}", key, None, None, key)
    for key in ("name", "convention"):
        if key not in data:
            raise src.error(f"missing required field {key!r}", key)
    angle = _unit(src, data, "angle_unit", ANGLE_UNITS, "deg")
    length = _unit(src, data, "length_unit", LENGTH_UNITS, "m")
    convention = data["convention"]
    if convention not in ("dh", "mdh", "urdf"):
        raise src.error(f"unknown convention {convention!r}; use dh, mdh or urdf",
                        "convention", None, None, "convention")

    common = _common_fields(data, src, angle)
    if convention == "urdf":
        return _arm_from_urdf_toml(data, src, common)

    specs = data.get("joints")
    if not isinstance(specs, list) or not specs:
        raise src.error("an arm needs at least one [[joints]] table", "joints")
    rows, kinds, limits, names = [], [], [], []
    for i, spec in enumerate(specs):
        _require_table(src, spec, f"joints[{i}]", "joints", i)
        for key in spec:
            if key not in _JOINT_KEYS:
                raise src.error(f"unknown key {key!r}", f"joints[{i}].{key}", "joints", i, key)
        if "name" not in spec:
            raise src.error("joint has no 'name'", f"joints[{i}].name", "joints", i, None)
        name = str(spec["name"])
        if name in names:
            raise src.error(f"duplicate joint name {name!r}", f"joints[{i}].name", "joints", i,
                            "name")
        kind = spec.get("type")
        if kind not in JOINT_KINDS:
            raise src.error(f"unknown joint type {kind!r}; use revolute or prismatic",
                            f"joints[{i}].type", "joints", i, "type")
        dh = {}
        for key in ("d", "a", "alpha", "theta"):
            dh[key] = _number(src, spec.get(key, 0.0), f"joints[{i}].{key}", "joints", i, key)
        rows.append(DHRow(d=dh["d"] * length, a=dh["a"] * length, alpha=dh["alpha"] * angle,
                          theta=dh["theta"] * angle))
        kinds.append(kind)
        names.append(name)
        limits.append(_joint_limits(src, spec, i, angle if kind == "revolute" else length, name)
                      | {"link_radius_m": _link_radius(src, spec, i, length)})
    origins, flange = chain_from_dh(rows, kinds, modified=(convention == "mdh"))
    joints = tuple(Joint(name=nm, kind=k, origin=o, **lim)
                   for nm, k, o, lim in zip(names, kinds, origins, limits))
    return Arm(joints=joints, flange=flange, home_q=_home(data, src, joints, angle, length),
               **common)


def _require_table(src: _Source, value: Any, field_name: str, table: str, index: int | None
                   ) -> None:
    if not isinstance(value, dict):
        message = f"must be a table, got {value!r}"
        err = src.error(message, field_name, table, index, None)
        raise err if err.line is not None else src.error(message, field_name, None, None, table)


def _home(data: dict, src: _Source, joints: tuple[Joint, ...], angle: float, length: float
          ) -> tuple[float, ...] | None:
    """The optional start pose `home = [...]` (angle/length units), inside the limits."""
    if "home" not in data:
        return None
    raw = data["home"]
    if not isinstance(raw, list) or len(raw) != len(joints):
        raise src.error(f"must list {len(joints)} joint values", "home", None, None, "home")
    home = []
    for j, v in zip(joints, raw):
        x = _number(src, v, "home", None, None, "home") * (angle if j.is_revolute else length)
        if not j.lower <= x <= j.upper:
            raise src.error(f"{j.name} = {v} is outside its limits", "home", None, None, "home")
        home.append(x)
    return tuple(home)


def _common_fields(data: dict, src: _Source, angle: float) -> dict[str, Any]:
    length = LENGTH_UNITS[data.get("length_unit", "m")]
    task = data.get("task", list(TASK_AXES))
    if not isinstance(task, list) or not task or any(t not in TASK_AXES for t in task):
        raise src.error(f"task must list some of {', '.join(TASK_AXES)}; got {task!r}", "task",
                        None, None, "task")
    tcp = data.get("tcp_limits", {})
    solver_spec = data.get("solver", {})
    _require_table(src, tcp, "tcp_limits", "tcp_limits", None)
    _require_table(src, solver_spec, "solver", "solver", None)
    solver_kwargs = {}
    solver_units = {"damping_threshold": 1.0, "damping_max": 1.0, "nullspace_gain": 1.0,
                    "limit_margin_rad": 1.0, "limit_margin_m": 1.0}
    for key, value in solver_spec.items():
        if key == "limit_margin_angle":
            solver_kwargs["limit_margin_rad"] = _number(src, value, f"solver.{key}", "solver",
                                                        None, key) * angle
            continue
        if key == "limit_margin_length":
            solver_kwargs["limit_margin_m"] = _number(src, value, f"solver.{key}", "solver",
                                                      None, key) * length
            continue
        if key not in solver_units or key.startswith("limit_margin"):
            raise src.error(f"unknown key {key!r}", f"solver.{key}", "solver", None, key)
        v = _number(src, value, f"solver.{key}", "solver", None, key)
        if v < 0:
            raise src.error("must not be negative", f"solver.{key}", "solver", None, key)
        solver_kwargs[key] = v
    for key in tcp:
        if key not in ("linear", "angular"):
            raise src.error(f"unknown key {key!r}", f"tcp_limits.{key}", "tcp_limits", None, key)
    lin = _number(src, tcp.get("linear", 1.0), "tcp_limits.linear", "tcp_limits", None, "linear")
    ang = _number(src, tcp.get("angular", 180.0 if angle != 1.0 else math.pi),
                  "tcp_limits.angular", "tcp_limits", None, "angular")
    for key, v in (("linear", lin), ("angular", ang)):
        if v <= 0:
            raise src.error("must be positive", f"tcp_limits.{key}", "tcp_limits", None, key)
    name = data["name"]
    if not isinstance(name, str) or not name.strip():
        raise src.error("must be a non-empty string", "name", None, None, "name")
    return dict(
        name=name,
        summary=str(data.get("summary", "")),
        base=_frame(src, data, "base", length, angle),
        tool=_frame(src, data, "tool", length, angle),
        task_axes=tuple(ax in task for ax in TASK_AXES),
        tcp_max_linear_m_s=lin * length,
        tcp_max_angular_rad_s=ang * angle,
        solver=SolverSettings(**solver_kwargs),
        source=str(src.path),
    )


_URDF_OVERRIDE_KEYS = {"name", "max_speed", "max_accel", "rated_speed", "rated_accel",
                       "link_radius"}


def _arm_from_urdf_toml(data: dict, src: _Source, common: dict[str, Any]) -> Arm:
    """An arm TOML that points at a URDF file and adds what URDF lacks (accelerations, task).

    `[[joints]]` tables here only override speeds, accelerations and the collision model's
    link radius of URDF joints by name.
    """
    from dataclasses import replace

    from .urdf import load_urdf_arm
    if "urdf" not in data:
        raise src.error("convention 'urdf' needs a 'urdf' path", "urdf")
    for key in ("urdf", "base_link", "tip_link"):
        if key in data and not isinstance(data[key], str):
            raise src.error(f"must be a string, got {data[key]!r}", key, None, None, key)
    urdf_path = (src.path.parent / data["urdf"]).resolve()
    arm = load_urdf_arm(urdf_path, base_link=data.get("base_link"), tip_link=data.get("tip_link"))
    specs = data.get("joints", [])
    if not isinstance(specs, list):
        raise src.error("must be a list of [[joints]] tables", "joints", None, None, "joints")
    overrides: dict[str, tuple[int, dict]] = {}
    for i, spec in enumerate(specs):
        _require_table(src, spec, f"joints[{i}]", "joints", i)
        for key in spec:
            if key not in _URDF_OVERRIDE_KEYS:
                raise src.error(f"unknown key {key!r}; a URDF arm's [[joints]] may set "
                                f"{', '.join(sorted(_URDF_OVERRIDE_KEYS))}",
                                f"joints[{i}].{key}", "joints", i, key)
        if "name" not in spec:
            raise src.error("joint has no 'name'", f"joints[{i}].name", "joints", i, None)
        overrides[str(spec["name"])] = (i, spec)
    angle, length = ANGLE_UNITS[data.get("angle_unit", "deg")], \
        LENGTH_UNITS[data.get("length_unit", "m")]
    joints = []
    for j in arm.joints:
        if j.name in overrides:
            i, spec = overrides.pop(j.name)
            scale = angle if j.is_revolute else length
            changes = {}
            for key in ("max_speed", "max_accel", "rated_speed", "rated_accel"):
                if key in spec:
                    v = _number(src, spec[key], f"joints[{i}].{key}", "joints", i, key)
                    if v <= 0:
                        raise src.error(f"must be positive, got {spec[key]}",
                                        f"joints[{i}].{key}", "joints", i, key)
                    changes[key] = v * scale
            if "link_radius" in spec:
                changes["link_radius_m"] = _link_radius(src, spec, i, length)
            j = replace(j, **changes)
        joints.append(j)
    if overrides:
        name, (i, _) = next(iter(overrides.items()))
        raise src.error(f"no joint named {name!r} in {urdf_path.name}; its moving joints: "
                        f"{', '.join(arm.joint_names)}", f"joints[{i}].name", "joints", i, "name")
    joints_t = tuple(joints)
    common = dict(common, base=common["base"] @ arm.base, tool=arm.tool @ common["tool"])
    return Arm(joints=joints_t, flange=arm.flange,
               home_q=_home(data, src, joints_t, angle, length), **common)
