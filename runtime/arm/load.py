"""Loading an arm: a shipped name, an arm .toml (DH, modified DH or a URDF with what URDF
lacks) or a .urdf file, into an `Arm` (runtime.arm.model).

Every error names the file, line and field (`ConfigError`). This module imports the model
and the URDF reader; neither imports it back.
"""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ConfigError
from ..tomlsource import TomlSource as _Source
from ..tomlsource import finite_number, read_toml
from ..tomlsource import unit_factor as _unit
from .model import (
    ANGLE_UNITS,
    DEFAULT_LINK_RADIUS_M,
    JOINT_KINDS,
    LENGTH_UNITS,
    TASK_AXES,
    Arm,
    DHRow,
    Joint,
    SolverSettings,
    chain_from_dh,
    configs_dir,
)
from .transforms import Mat4, make_transform

__all__ = ["arm_from_toml", "load_arm", "resolve_arm_path", "resolve_shipped"]



def resolve_shipped(kind: str, name_or_path: str | Path, suffixes: tuple[str, ...] = (".toml",),
                    folder_name: str | None = None) -> Path:
    """A shipped config name (`elbow6` under configs/arms/, for kind "arm") or a file path.

    A name with one of `suffixes`, or any existing path, is taken as a path; otherwise the
    name is looked up as configs/<folder_name>/<name>.toml (folder_name: "<kind>s" unless
    given) and an unknown name lists the shipped ones. The one lookup for arms, cells, pads
    and scripts.
    """
    p = Path(name_or_path)
    if p.suffix in suffixes or p.exists():
        return p
    folder = configs_dir() / (folder_name or f"{kind}s")
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
        return _urdf_arm(path, base_link=base_link, tip_link=tip_link)
    data, src = read_toml(path, "arm")
    return arm_from_toml(data, src)


def _vector3(src: _Source, value: Any, field_name: str, table: str, key: str) -> list[float]:
    if not isinstance(value, list) or len(value) != 3:
        raise src.error(f"must be a list of 3 numbers, got {value!r}", field_name, table, None, key)
    return [finite_number(src, v, field_name, table, None, key) for v in value]


def _frame(src: _Source, data: dict[str, Any], table: str, length: float, angle: float) -> Mat4:
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


def _link_radius(src: _Source, spec: dict[str, Any], i: int, length: float) -> float:
    """The optional `link_radius` of joint i (length unit), positive; m."""
    if "link_radius" not in spec:
        return DEFAULT_LINK_RADIUS_M
    r = finite_number(src, spec["link_radius"], f"joints[{i}].link_radius", "joints", i,
                      "link_radius")
    if r <= 0:
        raise src.error(f"must be positive, got {spec['link_radius']}",
                        f"joints[{i}].link_radius", "joints", i, "link_radius")
    return r * length


def _joint_limits(src: _Source, spec: dict[str, Any], i: int, scale: float,
                  name: str) -> dict[str, Any]:
    """Position, speed and acceleration limits of joint i, converted to SI."""
    def need(key: str) -> float:
        fname = f"joints[{i}].{key}"
        if key not in spec:
            raise src.error(f"joint {name!r} has no {key!r}", fname, "joints", i, None)
        return finite_number(src, spec[key], fname, "joints", i, key)

    def get(key: str) -> float | None:
        return need(key) if key in spec else None

    lower, upper = need("lower") * scale, need("upper") * scale
    if lower >= upper:
        raise src.error(f"lower ({spec['lower']}) must be below upper ({spec['upper']})",
                        f"joints[{i}].lower", "joints", i, "lower")
    out: dict[str, Any] = {"lower": lower, "upper": upper}
    for key in ("max_speed", "max_accel"):
        v = need(key)
        if v <= 0:
            raise src.error(f"must be positive, got {spec[key]}", f"joints[{i}].{key}",
                            "joints", i, key)
        out[key] = v * scale
    for key, fallback in (("rated_speed", "max_speed"), ("rated_accel", "max_accel")):
        rated = get(key)
        if rated is not None and rated <= 0:
            raise src.error(f"must be positive, got {spec[key]}", f"joints[{i}].{key}",
                            "joints", i, key)
        out[key] = out[fallback] if rated is None else rated * scale
    effort = get("effort")
    if effort is not None and effort <= 0:
        raise src.error(f"must be positive, got {spec['effort']}", f"joints[{i}].effort",
                        "joints", i, "effort")
    out["effort"] = effort
    return out


def arm_from_toml(data: dict[str, Any], src: _Source) -> Arm:
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
            dh[key] = finite_number(src, spec.get(key, 0.0), f"joints[{i}].{key}", "joints", i, key)
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


def _home(data: dict[str, Any], src: _Source, joints: tuple[Joint, ...], angle: float, length: float
          ) -> tuple[float, ...] | None:
    """The optional start pose `home = [...]` (angle/length units), inside the limits."""
    if "home" not in data:
        return None
    raw = data["home"]
    if not isinstance(raw, list) or len(raw) != len(joints):
        raise src.error(f"must list {len(joints)} joint values", "home", None, None, "home")
    home = []
    for j, v in zip(joints, raw):
        x = finite_number(src, v, "home", None, None, "home") * (angle if j.is_revolute else length)
        if not j.lower <= x <= j.upper:
            raise src.error(f"{j.name} = {v} is outside its limits", "home", None, None, "home")
        home.append(x)
    return tuple(home)


def _common_fields(data: dict[str, Any], src: _Source, angle: float) -> dict[str, Any]:
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
            solver_kwargs["limit_margin_rad"] = finite_number(src, value, f"solver.{key}", "solver",
                                                        None, key) * angle
            continue
        if key == "limit_margin_length":
            solver_kwargs["limit_margin_m"] = finite_number(src, value, f"solver.{key}", "solver",
                                                      None, key) * length
            continue
        if key not in solver_units or key.startswith("limit_margin"):
            raise src.error(f"unknown key {key!r}", f"solver.{key}", "solver", None, key)
        v = finite_number(src, value, f"solver.{key}", "solver", None, key)
        if v < 0:
            raise src.error("must not be negative", f"solver.{key}", "solver", None, key)
        solver_kwargs[key] = v
    for key in tcp:
        if key not in ("linear", "angular"):
            raise src.error(f"unknown key {key!r}", f"tcp_limits.{key}", "tcp_limits", None, key)
    lin = finite_number(src, tcp.get("linear", 1.0), "tcp_limits.linear", "tcp_limits", None,
                        "linear")
    ang = finite_number(src, tcp.get("angular", 180.0 if angle != 1.0 else math.pi),
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


def _urdf_arm(path: Path, *, base_link: str | None, tip_link: str | None) -> Arm:
    """The arm in a URDF file. Its reader (with an XML parser) is imported here, for URDF
    arms only: a process that loads a DH arm, such as the simulated arm's child whose start
    counts in a preflight's time, does not pay for it."""
    from .urdf import load_urdf_arm
    return load_urdf_arm(path, base_link=base_link, tip_link=tip_link)


def _arm_from_urdf_toml(data: dict[str, Any], src: _Source, common: dict[str, Any]) -> Arm:
    """An arm TOML that points at a URDF file and adds what URDF lacks (accelerations, task).

    `[[joints]]` tables here only override speeds, accelerations and the collision model's
    link radius of URDF joints by name.
    """
    if "urdf" not in data:
        raise src.error("convention 'urdf' needs a 'urdf' path", "urdf")
    for key in ("urdf", "base_link", "tip_link"):
        if key in data and not isinstance(data[key], str):
            raise src.error(f"must be a string, got {data[key]!r}", key, None, None, key)
    urdf_path = (src.path.parent / data["urdf"]).resolve()
    arm = _urdf_arm(urdf_path, base_link=data.get("base_link"), tip_link=data.get("tip_link"))
    specs = data.get("joints", [])
    if not isinstance(specs, list):
        raise src.error("must be a list of [[joints]] tables", "joints", None, None, "joints")
    overrides: dict[str, tuple[int, dict[str, Any]]] = {}
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
            changes: dict[str, float] = {}
            for key in ("max_speed", "max_accel", "rated_speed", "rated_accel"):
                if key in spec:
                    v = finite_number(src, spec[key], f"joints[{i}].{key}", "joints", i, key)
                    if v <= 0:
                        raise src.error(f"must be positive, got {spec[key]}",
                                        f"joints[{i}].{key}", "joints", i, key)
                    changes[key] = v * scale
            if "link_radius" in spec:
                changes["link_radius_m"] = _link_radius(src, spec, i, length)
            j = replace(j, **changes)  # type: ignore[arg-type]  # (floats, by key)
        joints.append(j)
    if overrides:
        name, (i, _) = next(iter(overrides.items()))
        raise src.error(f"no joint named {name!r} in {urdf_path.name}; its moving joints: "
                        f"{', '.join(arm.joint_names)}", f"joints[{i}].name", "joints", i, "name")
    joints_t = tuple(joints)
    common = dict(common, base=common["base"] @ arm.base, tool=arm.tool @ common["tool"])
    return Arm(joints=joints_t, flange=arm.flange,
               home_q=_home(data, src, joints_t, angle, length), **common)
