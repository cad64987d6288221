"""The arm model as plain data (maps, lists, numbers), for the session log's header.

`arm_to_dict` writes every field; `arm_from_dict` restores the very same `Arm`, checking
each value by its field's annotation and naming the field it cannot read.
"""

from __future__ import annotations

from dataclasses import MISSING, fields, is_dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from ..errors import LogError
from .model import JOINT_KINDS, Arm, Joint, SolverSettings


def arm_to_dict(arm: Arm) -> dict[str, Any]:
    """Every field of the arm (joints with origins, base, flange, tool, task axes, TCP caps,
    solver settings, home) as msgpack/JSON-ready values; 4×4 matrices as nested lists."""
    return plain_data(arm, "arm")


def arm_from_dict(data: Mapping[str, Any]) -> Arm:
    """The Arm that `arm_to_dict` wrote, field for field. Raises LogError naming a missing
    or malformed field; keys this version does not know are ignored."""
    if not isinstance(data, Mapping):
        raise LogError("arm: not a map")
    raw_joints = data.get("joints")
    if not isinstance(raw_joints, list) or not raw_joints:
        raise LogError("arm.joints: missing or empty")
    joints = []
    for i, raw in enumerate(raw_joints):
        values = _restore_fields(Joint, raw, f"arm.joints[{i}]")
        if values["kind"] not in JOINT_KINDS:
            raise LogError(f"arm.joints[{i}].kind: unknown joint kind {values['kind']!r}")
        joints.append(Joint(**values))
    solver = SolverSettings(**_restore_fields(SolverSettings, data.get("solver", {}),
                                              "arm.solver"))
    values = _restore_fields(Arm, data, "arm", skip=("joints", "solver"))
    return Arm(joints=tuple(joints), solver=solver, **values)


def plain_data(value: Any, where: str) -> Any:
    """`value` as msgpack-ready data: dataclasses → maps, arrays and tuples → lists."""
    if value is None or isinstance(value, (bool, int, float, str, bytes)):
        return value
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    if is_dataclass(value) and not isinstance(value, type):
        return {f.name: plain_data(getattr(value, f.name), f"{where}.{f.name}")
                for f in fields(value)}
    if isinstance(value, Mapping):
        return {str(k): plain_data(v, f"{where}.{k}") for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain_data(v, f"{where}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"{where}: cannot record a value of type {type(value).__name__}")


def _restore_fields(cls: type, data: Any, where: str, skip: Sequence[str] = ()
                    ) -> dict[str, Any]:
    """Constructor arguments of dataclass `cls` from a map, typed by the field annotations."""
    if not isinstance(data, Mapping):
        raise LogError(f"{where}: not a map")
    out: dict[str, Any] = {}
    for f in fields(cls):
        if f.name in skip:
            continue
        if f.name not in data:
            if f.default is MISSING and f.default_factory is MISSING:
                raise LogError(f"{where}.{f.name}: missing")
            continue
        out[f.name] = _coerce(str(f.type), data[f.name], f"{where}.{f.name}")
    return out


def _coerce(annotation: str, value: Any, where: str) -> Any:
    """Check and convert one value by its (string) annotation: float, str, bool, Mat4,
    tuple[X, ...], each optionally `| None`."""
    kind = annotation.strip()
    if kind.endswith("| None"):
        if value is None:
            return None
        kind = kind[: -len("| None")].strip()
    try:
        if kind == "float":
            return as_float(value)
        if kind == "str":
            return as_str(value)
        if kind == "bool":
            return as_bool(value)
        if kind == "Mat4":
            m = np.array(value, dtype=float)
            if m.shape != (4, 4):
                raise ValueError(f"shape {m.shape}, expected (4, 4)")
            return m
        if kind.startswith("tuple["):
            if not isinstance(value, list):
                raise TypeError(f"{value!r} is not a list")
            inner = kind[len("tuple["):].split(",")[0].strip()
            return tuple(_coerce(inner, v, f"{where}[{i}]") for i, v in enumerate(value))
    except (TypeError, ValueError) as exc:
        raise LogError(f"{where}: {exc}") from None
    return value


def as_float(value: Any) -> float:
    if type(value) is float:
        return value
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise TypeError(f"{value!r} is not a number")
    return float(value)


def as_bool(value: Any) -> bool:
    if not isinstance(value, bool):
        raise TypeError(f"{value!r} is not true/false")
    return value


def as_str(value: Any) -> str:
    if not isinstance(value, str):
        raise TypeError(f"{value!r} is not a string")
    return value

