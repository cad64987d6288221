"""The arm's surroundings: static objects, a keep-in box for the TCP and the tool's shape.

A workcell file (configs/cells/*.toml, format in docs/CELLS.md) places named objects in the
arm's base frame — boxes, cylinders, spheres and half-spaces (a floor, a wall) — and adds
the clearance settings of the velocity damper (d_s, d_i, gain). Units inside: metres,
radians. Everything is validated here, at the boundary: a bad file raises `ConfigError`
naming the file, line and field.

Shapes are frozen values; the collision model (`runtime.arm.collision`) and the distance
core (`runtime.arm.distance`) read them, the simulated arm builds the same bodies from them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Union

import numpy as np

from ..tomlsource import TomlSource, finite_number, read_toml, reject_unknown, unit_factor
from .model import ANGLE_UNITS, LENGTH_UNITS, Arm, resolve_shipped
from .transforms import Mat4, make_transform

Vec3 = tuple[float, float, float]


@dataclass(frozen=True, eq=False)
class Box:
    """A box; `pose` places its centre and axes in the arm's base frame (4×4, m)."""

    name: str
    pose: Mat4 = field(repr=False)
    half_extents_m: Vec3


@dataclass(frozen=True, eq=False)
class Cylinder:
    """A solid cylinder along the local z axis of `pose` (centre at its origin)."""

    name: str
    pose: Mat4 = field(repr=False)
    radius_m: float
    half_length_m: float


@dataclass(frozen=True)
class Sphere:
    name: str
    center_m: Vec3
    radius_m: float


@dataclass(frozen=True)
class HalfSpace:
    """Everything on the far side of a plane: the free side is n·x ≥ offset (n unit)."""

    name: str
    normal: Vec3
    offset_m: float


Shape = Union[Box, Cylinder, Sphere, HalfSpace]


@dataclass(frozen=True)
class ToolCapsule:
    """A capsule (segment + radius) fixed to the flange; end points in the flange frame, m."""

    name: str
    start_m: Vec3
    end_m: Vec3
    radius_m: float


@dataclass(frozen=True)
class ClearanceSettings:
    """The velocity damper (Faverjon & Tournassoud 1987): closer than the influence distance
    d_i, each pair may approach at most at gain·(d − d_s) m/s, so it never comes closer
    than the safety distance d_s. gain·(d_i − d_s) is the approach speed allowed as a pair
    enters the influence zone (ξ in the paper)."""

    safety_distance_m: float = 0.02
    influence_distance_m: float = 0.12
    gain_per_s: float = 5.0

    @property
    def approach_speed_m_s(self) -> float:
        """ξ: the largest approach speed at d = d_i."""
        return self.gain_per_s * (self.influence_distance_m - self.safety_distance_m)


@dataclass(frozen=True)
class Cell:
    """A workcell: static objects around one arm, in the arm's base frame.

    keep_in         a box the TCP must stay inside (at least d_s from its faces), or None
    tool            capsules attached to the flange (empty: the collision model puts one
                    from the flange to the TCP)
    mount           the object the arm stands on (its base and first link are never
                    checked against it), or None
    excluded_pairs  further pairs of names (arm links, tool capsules, objects) never checked
    """

    name: str
    objects: tuple[Shape, ...]
    keep_in: Box | None = None
    tool: tuple[ToolCapsule, ...] = ()
    clearance: ClearanceSettings = ClearanceSettings()
    mount: str | None = None
    excluded_pairs: frozenset[frozenset[str]] = frozenset()
    summary: str = ""
    source: str = ""

    def object_named(self, name: str) -> Shape:
        for obj in self.objects:
            if obj.name == name:
                return obj
        raise KeyError(name)

    def excludes(self, a: str, b: str) -> bool:
        return frozenset((a, b)) in self.excluded_pairs


SHAPES = ("box", "cylinder", "sphere", "halfspace")
_TOP_KEYS = {"name", "summary", "length_unit", "angle_unit", "clearance", "objects", "keep_in",
             "tool", "mount", "excluded_pairs"}
_OBJECT_KEYS = {"box": {"name", "shape", "xyz", "rpy", "size"},
                "cylinder": {"name", "shape", "xyz", "rpy", "radius", "length"},
                "sphere": {"name", "shape", "xyz", "radius"},
                "halfspace": {"name", "shape", "normal", "offset"}}
_CLEARANCE_KEYS = {"safety_distance", "influence_distance", "gain"}
_TOOL_KEYS = {"name", "from", "to", "radius"}


# ----------------------------------------------------------------------------------------
# Loading
# ----------------------------------------------------------------------------------------

def resolve_cell_path(name_or_path: str | Path) -> Path:
    """A shipped cell name (`bench`) or a path to a .toml file."""
    return resolve_shipped("cell", name_or_path)


def load_cell(name_or_path: str | Path, arm: Arm) -> Cell:
    """Load a workcell for `arm` from a shipped name or a TOML file, and check it against
    the arm: names in excluded_pairs exist, and the arm at its home pose is clear."""
    data, src = read_toml(resolve_cell_path(name_or_path), "cell")
    cell = cell_from_toml(data, src)
    check_against_arm(cell, arm, src)
    return cell


def check_against_arm(cell: Cell, arm: Arm, src: TomlSource) -> None:
    """Refuse unknown names in excluded_pairs, an object that the arm (or its tool) already
    overlaps at its home pose, and a keep-in box the TCP starts outside of."""
    # The collision model and the distance core are built on this module's shapes.
    from .collision import BASE, ArmCapsules
    from .distance import cell_distances

    known = set(ArmCapsules.of(arm, cell).names) | {o.name for o in cell.objects} | {BASE}
    for pair in sorted(cell.excluded_pairs, key=sorted):
        for name in sorted(pair - known):
            raise src.error(f"no link, tool capsule or object named {name!r}; the links of "
                            f"{arm.name}: {', '.join(ArmCapsules.of(arm, cell).names)}",
                            "excluded_pairs", None, None, "excluded_pairs")
    result = cell_distances(arm, cell, arm.home())
    objects = [o.name for o in cell.objects]
    for (a, b), d in zip(result.pairs, result.distances.tolist()):
        if d > 0.0:
            continue
        if b == "keep_in":
            raise src.error(f"the TCP of {arm.name} at its home pose is outside the keep-in "
                            f"box", "keep_in", "keep_in", None, None)
        if b in objects:
            i = objects.index(b)
            raise src.error(f"{b!r} overlaps {a!r} of {arm.name} at its home pose (distance "
                            f"{d * 1000:.1f} mm); move it, or list the pair in excluded_pairs",
                            f"objects[{i}]", "objects", i, None)


def cell_from_toml(data: dict[str, Any], src: TomlSource) -> Cell:
    """Validate a parsed cell document and build the `Cell` (arm-independent checks only)."""
    reject_unknown(src, data, _TOP_KEYS)
    reader = _Reader(src, unit_factor(src, data, "length_unit", LENGTH_UNITS, "m"),
                     unit_factor(src, data, "angle_unit", ANGLE_UNITS, "deg"))
    name = data.get("name")
    if not isinstance(name, str) or not name.strip():
        raise src.error("must be a non-empty string", "name", None, None, "name")
    specs = _tables(src, data.get("objects", []), "objects")
    objects = tuple(reader.shape(spec, i) for i, spec in enumerate(specs))
    tool_specs = _tables(src, data.get("tool", []), "tool")
    tool = tuple(reader.tool_capsule(spec, i) for i, spec in enumerate(tool_specs))
    _unique_names(src, [o.name for o in objects], "objects")
    _unique_names(src, [t.name for t in tool], "tool",
                  taken={o.name: "an object" for o in objects})
    mount = data.get("mount")
    if mount is not None and mount not in {o.name for o in objects}:
        raise src.error(f"no object named {mount!r} to stand on", "mount", None, None, "mount")
    keep_in = None
    if "keep_in" in data:
        spec = data["keep_in"]
        if not isinstance(spec, dict):
            raise src.error("must be a table with xyz, rpy and size", "keep_in", None, None,
                            "keep_in")
        reject_unknown(src, spec, {"xyz", "rpy", "size"}, "keep_in.", "keep_in")
        keep_in = Box("keep_in", reader.pose(spec, "keep_in", None, "keep_in."),
                      reader.half_extents(spec, "keep_in", None, "keep_in."))
    return Cell(name=name, summary=str(data.get("summary", "")), objects=objects,
                keep_in=keep_in, tool=tool, mount=mount,
                clearance=reader.clearance(data.get("clearance", {})),
                excluded_pairs=_excluded_pairs(src, data.get("excluded_pairs", [])),
                source=str(src.path))


class _Reader:
    """Field readers that convert to SI and point errors at the right line."""

    def __init__(self, src: TomlSource, length: float, angle: float) -> None:
        self.src, self.length, self.angle = src, length, angle

    def number(self, spec: dict, key: str, table: str | None, index: int | None, prefix: str,
               *, positive: bool = False, nonnegative: bool = False) -> float:
        fname = f"{prefix}{key}"
        if key not in spec:
            raise self.src.error(f"missing {key!r}", fname, table, index, None)
        v = finite_number(self.src, spec[key], fname, table, index, key)
        if positive and v <= 0.0:
            raise self.src.error(f"must be positive, got {spec[key]!r}", fname, table, index, key)
        if nonnegative and v < 0.0:
            raise self.src.error(f"must not be negative, got {spec[key]!r}", fname, table, index,
                                 key)
        return v

    def vector(self, spec: dict, key: str, table: str | None, index: int | None, prefix: str,
               default: list[float] | None = None) -> np.ndarray:
        fname = f"{prefix}{key}"
        value = spec.get(key, default)
        if value is None:
            raise self.src.error(f"missing {key!r}", fname, table, index, None)
        if not isinstance(value, list) or len(value) != 3:
            raise self.src.error(f"must be a list of 3 numbers, got {value!r}", fname, table,
                                 index, key)
        return np.array([finite_number(self.src, v, fname, table, index, key) for v in value])

    def pose(self, spec: dict, table: str, index: int | None, prefix: str) -> Mat4:
        xyz = self.vector(spec, "xyz", table, index, prefix) * self.length
        rpy = self.vector(spec, "rpy", table, index, prefix, [0.0, 0.0, 0.0]) * self.angle
        return make_transform(xyz, rpy)

    def half_extents(self, spec: dict, table: str, index: int | None, prefix: str) -> Vec3:
        size = self.vector(spec, "size", table, index, prefix)
        if (size <= 0.0).any():
            raise self.src.error(f"every edge must be positive, got {spec['size']!r}",
                                 f"{prefix}size", table, index, "size")
        return _vec3(0.5 * size * self.length)

    def shape(self, spec: dict, i: int) -> Shape:
        prefix = f"objects[{i}]."
        for key in ("name", "shape"):
            if not isinstance(spec.get(key), str) or not spec[key].strip():
                raise self.src.error(f"needs a {key!r} (a non-empty string)", f"{prefix}{key}",
                                     "objects", i, key if key in spec else None)
        kind = spec["shape"]
        if kind not in SHAPES:
            raise self.src.error(f"unknown shape {kind!r}; use one of {', '.join(SHAPES)}",
                                 f"{prefix}shape", "objects", i, "shape")
        reject_unknown(self.src, spec, _OBJECT_KEYS[kind], prefix, "objects", i)
        name, L = spec["name"], self.length
        if kind == "box":
            return Box(name, self.pose(spec, "objects", i, prefix),
                       self.half_extents(spec, "objects", i, prefix))
        if kind == "cylinder":
            return Cylinder(name, self.pose(spec, "objects", i, prefix),
                            self.number(spec, "radius", "objects", i, prefix, positive=True) * L,
                            0.5 * L * self.number(spec, "length", "objects", i, prefix,
                                                  positive=True))
        if kind == "sphere":
            return Sphere(name, _vec3(self.vector(spec, "xyz", "objects", i, prefix) * L),
                          self.number(spec, "radius", "objects", i, prefix, positive=True) * L)
        normal = self.vector(spec, "normal", "objects", i, prefix)
        norm = float(np.linalg.norm(normal))
        if norm < 1e-9:
            raise self.src.error("must not be the zero vector", f"{prefix}normal", "objects", i,
                                 "normal")
        offset = self.number(spec, "offset", "objects", i, prefix) * L
        return HalfSpace(name, _vec3(normal / norm), offset / norm)

    def tool_capsule(self, spec: dict, i: int) -> ToolCapsule:
        prefix = f"tool[{i}]."
        reject_unknown(self.src, spec, _TOOL_KEYS, prefix, "tool", i)
        name = spec.get("name")
        if not isinstance(name, str) or not name.strip():
            raise self.src.error("needs a 'name' (a non-empty string)", f"{prefix}name", "tool",
                                 i, "name" if "name" in spec else None)
        L = self.length
        return ToolCapsule(name, _vec3(self.vector(spec, "from", "tool", i, prefix) * L),
                           _vec3(self.vector(spec, "to", "tool", i, prefix) * L),
                           self.number(spec, "radius", "tool", i, prefix, positive=True) * L)

    def clearance(self, spec: Any) -> ClearanceSettings:
        src = self.src
        if not isinstance(spec, dict):
            raise src.error("must be a table", "clearance", None, None, "clearance")
        reject_unknown(src, spec, _CLEARANCE_KEYS, "clearance.", "clearance")
        default = ClearanceSettings()
        d_s = default.safety_distance_m if "safety_distance" not in spec else \
            self.number(spec, "safety_distance", "clearance", None, "clearance.",
                        nonnegative=True) * self.length
        d_i = default.influence_distance_m if "influence_distance" not in spec else \
            self.number(spec, "influence_distance", "clearance", None, "clearance.",
                        positive=True) * self.length
        gain = default.gain_per_s if "gain" not in spec else \
            self.number(spec, "gain", "clearance", None, "clearance.", positive=True)
        if d_i <= d_s:
            key = "influence_distance" if "influence_distance" in spec else "safety_distance"
            raise src.error(f"the influence distance ({d_i:g} m) must exceed the safety "
                            f"distance ({d_s:g} m)", f"clearance.{key}", "clearance", None, key)
        return ClearanceSettings(d_s, d_i, gain)


def _tables(src: TomlSource, value: Any, table: str) -> list[dict]:
    if not isinstance(value, list):
        raise src.error(f"must be a list of [[{table}]] tables", table, None, None, table)
    for i, spec in enumerate(value):
        if not isinstance(spec, dict):
            raise src.error(f"must be a table, got {spec!r}", f"{table}[{i}]", None, None, table)
    return value


def _unique_names(src: TomlSource, names: list[str], table: str,
                  taken: dict[str, str] | None = None) -> None:
    seen = dict(taken or {})
    for i, name in enumerate(names):
        if name in seen or name == "keep_in":
            what = seen.get(name, "the keep-in box")
            raise src.error(f"the name {name!r} is already used by {what}",
                            f"{table}[{i}].name", table, i, "name")
        seen[name] = f"{table}[{i}]"


def _excluded_pairs(src: TomlSource, value: Any) -> frozenset[frozenset[str]]:
    pairs = []
    if not isinstance(value, list):
        raise src.error("must be a list of [name, name] pairs", "excluded_pairs", None, None,
                        "excluded_pairs")
    for pair in value:
        if (not isinstance(pair, list) or len(pair) != 2
                or not all(isinstance(n, str) and n for n in pair) or pair[0] == pair[1]):
            raise src.error(f"each entry must be two different names, got {pair!r}",
                            "excluded_pairs", None, None, "excluded_pairs")
        pairs.append(frozenset(pair))
    return frozenset(pairs)


def _vec3(values: Any) -> Vec3:
    x, y, z = (float(v) for v in values)
    return (x, y, z)


__all__ = ["Box", "Cell", "ClearanceSettings", "Cylinder", "HalfSpace", "SHAPES", "Shape",
           "Sphere", "ToolCapsule", "cell_from_toml", "check_against_arm", "load_cell", "resolve_cell_path"]
