"""Load a serial arm from a URDF file (the open robot description format; XML).

The chain runs from `base_link` to `tip_link` along the URDF tree and becomes the uniform
chain of `runtime.arm.model`:

- fixed joints are folded into their neighbours: those before the first moving joint into
  `arm.base`, those after the last one into `arm.flange`, the rest into the next origin;
- a joint whose axis is not z gets a rotation R with R·ẑ = axis folded into its origin (and
  Rᵀ into whatever follows), so every joint moves about / along its local z;
- `continuous` joints become revolute joints with limits −inf … +inf;
- `mimic`, `planar` and `floating` joints on the chain are refused; links and joints beyond
  the tip (a gripper's fingers, a camera mount) are ignored.
- `<collision>` shapes of the links a joint moves (its child, and links fixed to it up to
  the next moving joint) become that joint's collision capsules (runtime.arm.collision),
  each shape by the capsule that encloses it: a cylinder by its axis and radius, a sphere by
  its centre and radius, a box by its longest axis and the half-diagonal of the other two.
  Meshes are skipped; a link without another shape keeps the default capsule. Shapes on
  links before the first moving joint (a pedestal) are static and left to the cell.

URDF knows speeds (`<limit velocity>`) but no accelerations. Our assumption, stated here and
in `DEFAULT_RAMP_S`: each joint may reach its full speed in 0.25 s, i.e. max_accel =
velocity / 0.25 s. The ratings equal the limits (rated_speed = max_speed, rated_accel =
max_accel). An arm TOML with `convention = "urdf"` overrides any of these per joint.
A `<limit effort="0">` is read as "effort unknown".

Every error is a `ConfigError` naming the file, the line and the field, e.g.
`arm.urdf:42 [joint[shoulder].limit.velocity]: must be positive, got -1`.
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass, replace
from pathlib import Path
from xml.parsers import expat

import numpy as np

from ..errors import ConfigError
from .model import Arm, Joint
from .transforms import Mat4, make_transform, rot4, rotation_aligning_z

DEFAULT_RAMP_S = 0.25  # assumed time to reach full speed: max_accel = velocity / DEFAULT_RAMP_S
URDF_JOINT_TYPES = ("revolute", "continuous", "prismatic", "fixed", "floating", "planar")


# ----------------------------------------------------------------------------------------
# Parsing with line numbers
# ----------------------------------------------------------------------------------------

class _Document:
    """A parsed URDF: its root element, and the source line of every element."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.lines: dict[ET.Element, int] = {}
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise ConfigError(f"cannot read URDF file: {exc.strerror}", path=path) from None
        builder = ET.TreeBuilder()
        parser = expat.ParserCreate()
        parser.buffer_text = True

        def start(tag: str, attrs: dict[str, str]) -> None:
            self.lines[builder.start(tag, attrs)] = parser.CurrentLineNumber

        parser.StartElementHandler = start
        parser.EndElementHandler = builder.end
        parser.CharacterDataHandler = builder.data
        try:
            parser.Parse(data, True)
        except expat.ExpatError as exc:
            raise ConfigError(f"not well-formed XML: {expat.errors.messages[exc.code]}",
                              path=path, line=exc.lineno) from None
        self.root = builder.close()

    def error(self, message: str, element: ET.Element | None, field: str) -> ConfigError:
        line = self.lines.get(element) if element is not None else None
        return ConfigError(message, path=self.path, line=line, field=field)

    def number(self, text: str | None, element: ET.Element, field: str) -> float:
        """One finite float from an attribute value."""
        if text is None:
            raise self.error("missing", element, field)
        try:
            value = float(text)
        except ValueError:
            raise self.error(f"must be a number, got {text!r}", element, field) from None
        if not math.isfinite(value):
            raise self.error(f"must be a finite number, got {text!r}", element, field)
        return value

    def vector3(self, text: str | None, element: ET.Element, field: str,
                default: tuple[float, float, float]) -> np.ndarray:
        if text is None:
            return np.array(default, dtype=float)
        parts = text.split()
        if len(parts) != 3:
            raise self.error(f"must be 3 numbers separated by spaces, got {text!r}", element,
                             field)
        return np.array([self.number(p, element, field) for p in parts])


@dataclass(frozen=True)
class _UrdfJoint:
    """A joint as the tree walk needs it; the details are read later, for chain joints only."""

    name: str
    kind: str
    parent: str
    child: str
    element: ET.Element


# ----------------------------------------------------------------------------------------
# The tree
# ----------------------------------------------------------------------------------------

def _read_tree(doc: _Document) -> tuple[list[str], dict[str, _UrdfJoint]]:
    """Link names (in file order) and, per child link, the joint that carries it."""
    root = doc.root
    if root.tag != "robot":
        raise doc.error(f"the top element must be <robot>, found <{root.tag}>", root, "robot")
    links: list[str] = []
    for el in root.findall("link"):
        name = el.get("name")
        if not name:
            raise doc.error("a <link> needs a name", el, "link.name")
        if name in links:
            raise doc.error(f"duplicate link name {name!r}", el, f"link[{name}]")
        links.append(name)
    known = set(links)
    by_child: dict[str, _UrdfJoint] = {}
    names: set[str] = set()
    for el in root.findall("joint"):
        name = el.get("name")
        if not name:
            raise doc.error("a <joint> needs a name", el, "joint.name")
        if name in names:
            raise doc.error(f"duplicate joint name {name!r}", el, f"joint[{name}]")
        names.add(name)
        kind = el.get("type")
        if kind is None:
            raise doc.error("missing joint type", el, f"joint[{name}].type")
        if kind not in URDF_JOINT_TYPES:
            raise doc.error(f"unknown joint type {kind!r}; URDF knows "
                            f"{', '.join(URDF_JOINT_TYPES)}", el, f"joint[{name}].type")
        ends = {}
        for end in ("parent", "child"):
            sub = el.find(end)
            field = f"joint[{name}].{end}.link"
            if sub is None or not sub.get("link"):
                raise doc.error(f"missing <{end} link=...>", el if sub is None else sub, field)
            if sub.get("link") not in known:
                raise doc.error(f"unknown link {sub.get('link')!r}", sub, field)
            ends[end] = sub.get("link")
        if ends["child"] in by_child:
            raise doc.error(f"link {ends['child']!r} already has parent joint "
                            f"{by_child[ends['child']].name!r}; URDF is a tree", el,
                            f"joint[{name}].child.link")
        by_child[ends["child"]] = _UrdfJoint(name, kind, ends["parent"], ends["child"], el)
    if not links:
        raise doc.error("the file has no <link>", root, "robot")
    return links, by_child


def _descendant_leaves(link: str, links: list[str], by_child: dict[str, _UrdfJoint]
                       ) -> list[str]:
    children: dict[str, list[str]] = {name: [] for name in links}
    for j in by_child.values():
        children[j.parent].append(j.child)
    leaves, stack = [], [link]
    while stack:
        here = stack.pop()
        if children[here]:
            stack.extend(reversed(children[here]))
        else:
            leaves.append(here)
    return leaves


def _root_of(link: str, by_child: dict[str, _UrdfJoint]) -> str:
    seen = {link}
    while link in by_child:
        link = by_child[link].parent
        if link in seen:  # a cycle; URDF forbids it
            break
        seen.add(link)
    return link


def _choose_ends(doc: _Document, links: list[str], by_child: dict[str, _UrdfJoint],
                 base_link: str | None, tip_link: str | None) -> tuple[str, str]:
    for arg, value in (("base_link", base_link), ("tip_link", tip_link)):
        if value is not None and value not in links:
            raise doc.error(f"unknown link {value!r}; links: {', '.join(links)}", None, arg)
    if base_link is None:
        roots = [name for name in links if name not in by_child]
        if tip_link is not None:
            base_link = _root_of(tip_link, by_child)
        elif len(roots) == 1:
            base_link = roots[0]
        else:
            raise doc.error(f"several root links ({', '.join(roots)}); name one with --base",
                            None, "base_link")
    if tip_link is None:
        leaves = _descendant_leaves(base_link, links, by_child)
        if len(leaves) != 1:
            raise doc.error(f"the tree branches below {base_link!r}; name the tip link with "
                            f"--tip, one of: {', '.join(leaves)}", None, "tip_link")
        tip_link = leaves[0]
    return base_link, tip_link


def _chain(doc: _Document, by_child: dict[str, _UrdfJoint], base_link: str, tip_link: str
           ) -> list[_UrdfJoint]:
    """The joints from base_link down to tip_link, in order."""
    chain: list[_UrdfJoint] = []
    link = tip_link
    while link != base_link:
        joint = by_child.get(link)
        if joint is None or len(chain) > len(by_child):
            raise doc.error(f"no path from link {base_link!r} down to link {tip_link!r} "
                            f"(reached the root {link!r})", None, "tip_link")
        chain.append(joint)
        link = joint.parent
    return chain[::-1]


# ----------------------------------------------------------------------------------------
# Joints
# ----------------------------------------------------------------------------------------

def _origin(doc: _Document, j: _UrdfJoint) -> Mat4:
    el = j.element.find("origin")
    if el is None:
        return np.eye(4)
    xyz = doc.vector3(el.get("xyz"), el, f"joint[{j.name}].origin.xyz", (0.0, 0.0, 0.0))
    rpy = doc.vector3(el.get("rpy"), el, f"joint[{j.name}].origin.rpy", (0.0, 0.0, 0.0))
    return make_transform(xyz, rpy)


def _axis(doc: _Document, j: _UrdfJoint) -> np.ndarray:
    el = j.element.find("axis")
    if el is None:
        return np.array([1.0, 0.0, 0.0])  # the URDF default
    axis = doc.vector3(el.get("xyz"), el, f"joint[{j.name}].axis.xyz", (1.0, 0.0, 0.0))
    norm = float(np.linalg.norm(axis))
    if norm < 1e-9:
        raise doc.error("the axis must not be zero", el, f"joint[{j.name}].axis.xyz")
    return axis / norm


def _limits(doc: _Document, j: _UrdfJoint) -> dict[str, float | None]:
    """Position, speed and acceleration limits (SI) of a moving joint."""
    el = j.element.find("limit")
    field = f"joint[{j.name}].limit"
    if el is None:
        raise doc.error("missing <limit effort=... velocity=...> (jogwire needs a speed limit "
                        "for every moving joint)", j.element, field)
    if j.kind == "continuous":
        lower, upper = -math.inf, math.inf
    else:
        lower = doc.number(el.get("lower"), el, f"{field}.lower")
        upper = doc.number(el.get("upper"), el, f"{field}.upper")
        if lower >= upper:
            raise doc.error(f"lower ({el.get('lower')}) must be below upper ({el.get('upper')}); "
                            "a joint without travel should be type fixed", el, f"{field}.lower")
    speed = doc.number(el.get("velocity"), el, f"{field}.velocity")
    if speed <= 0:
        raise doc.error(f"must be positive, got {el.get('velocity')}", el, f"{field}.velocity")
    effort: float | None = None
    if el.get("effort") is not None:
        effort = doc.number(el.get("effort"), el, f"{field}.effort")
        if effort < 0:
            raise doc.error(f"must not be negative, got {el.get('effort')}", el,
                            f"{field}.effort")
        effort = effort or None
    accel = speed / DEFAULT_RAMP_S
    return dict(lower=lower, upper=upper, max_speed=speed, max_accel=accel, rated_speed=speed,
                rated_accel=accel, effort=effort)


def _collision_capsules(doc: _Document, link: ET.Element, to_joint: Mat4
                        ) -> list[tuple[float, ...]]:
    """The link's `<collision>` shapes as enclosing capsules (start xyz, end xyz, radius) in
    the joint frame that `to_joint` maps the link frame into (see the module docstring)."""
    out = []
    name = link.get("name")
    for k, col in enumerate(link.findall("collision")):
        geometry = col.find("geometry")
        shape = None if geometry is None else next(iter(geometry), None)
        if shape is None or shape.tag == "mesh":
            continue
        field = f"link[{name}].collision[{k}].{shape.tag}"
        origin = col.find("origin")
        T = to_joint if origin is None else to_joint @ make_transform(
            doc.vector3(origin.get("xyz"), origin, f"link[{name}].collision[{k}].origin.xyz",
                        (0.0, 0.0, 0.0)),
            doc.vector3(origin.get("rpy"), origin, f"link[{name}].collision[{k}].origin.rpy",
                        (0.0, 0.0, 0.0)))
        if shape.tag == "sphere":
            half, radius = np.zeros(3), _positive(doc, shape, "radius", field)
        elif shape.tag == "cylinder":
            radius = _positive(doc, shape, "radius", field)
            half = np.array([0.0, 0.0, 0.5 * _positive(doc, shape, "length", field)])
        elif shape.tag == "box":
            size = doc.vector3(shape.get("size"), shape, f"{field}.size", (0.0, 0.0, 0.0))
            if (size <= 0).any():
                raise doc.error(f"every edge must be positive, got {shape.get('size')!r}",
                                shape, f"{field}.size")
            axis = int(np.argmax(size))
            half = np.zeros(3)
            half[axis] = 0.5 * size[axis]
            radius = 0.5 * float(np.linalg.norm(np.delete(size, axis)))
        else:
            raise doc.error(f"unknown collision shape <{shape.tag}>; use box, cylinder, sphere "
                            f"or mesh", shape, field)
        start, end = (T @ np.append(-half, 1.0))[:3], (T @ np.append(half, 1.0))[:3]
        out.append((*start.tolist(), *end.tolist(), radius))
    return out


def _positive(doc: _Document, element: ET.Element, key: str, field: str) -> float:
    value = doc.number(element.get(key), element, f"{field}.{key}")
    if value <= 0:
        raise doc.error(f"must be positive, got {element.get(key)}", element, f"{field}.{key}")
    return value


def _refuse_unsupported(doc: _Document, j: _UrdfJoint) -> None:
    if j.kind in ("planar", "floating"):
        raise doc.error(f"a {j.kind} joint cannot be part of a jogged serial arm",
                        j.element, f"joint[{j.name}].type")
    mimic = j.element.find("mimic")
    if mimic is not None:
        raise doc.error(f"joint {j.name!r} mimics {mimic.get('joint')!r}; coupled joints are "
                        "not supported on the arm's chain (choose another --tip)", mimic,
                        f"joint[{j.name}].mimic")


# ----------------------------------------------------------------------------------------
# The arm
# ----------------------------------------------------------------------------------------

def load_urdf_arm(path: str | Path, base_link: str | None = None,
                  tip_link: str | None = None) -> Arm:
    """The serial arm from `base_link` to `tip_link` of a URDF file.

    Defaults: the base is the root link; the tip is the single leaf below the base (if the
    tree branches, a ConfigError lists the candidate tips). See the module docstring for
    how fixed joints, axes and missing accelerations are handled.
    """
    path = Path(path)
    doc = _Document(path)
    links, by_child = _read_tree(doc)
    base_link, tip_link = _choose_ends(doc, links, by_child, base_link, tip_link)
    chain = _chain(doc, by_child, base_link, tip_link)
    for j in chain:
        _refuse_unsupported(doc, j)
    moving = [j for j in chain if j.kind != "fixed"]
    if not moving:
        raise doc.error(f"no moving joint between links {base_link!r} and {tip_link!r}",
                        None, "tip_link")

    base = np.eye(4)
    carry = None  # the fixed transform since the last moving joint's frame
    joints: list[Joint] = []
    capsules: list[list[tuple[float, ...]]] = []  # per moving joint, in its frame
    link_elements = {el.get("name"): el for el in doc.root.findall("link")}
    for j in chain:
        T = _origin(doc, j)
        if j.kind == "fixed":
            if carry is None:
                base = base @ T
            else:
                carry = carry @ T
                capsules[-1] += _collision_capsules(doc, link_elements[j.child], carry)
            continue
        # URDF: parent→child = T · Motion_axis(q) = (T·R) · Motion_z(q) · Rᵀ, with R·ẑ = axis.
        R = rot4(rotation_aligning_z(_axis(doc, j)))
        origin = T @ R if carry is None else carry @ T @ R
        kind = "prismatic" if j.kind == "prismatic" else "revolute"
        joints.append(Joint(name=j.name, kind=kind, origin=origin, **_limits(doc, j)))
        carry = R.T.copy()
        capsules.append(_collision_capsules(doc, link_elements[j.child], carry))
    joints = [replace(joint, collision=tuple(caps)) for joint, caps in zip(joints, capsules)]
    robot_name = doc.root.get("name") or path.stem
    return Arm(name=robot_name, joints=tuple(joints), base=base, flange=carry,
               tool=np.eye(4), summary=f"from URDF {path.name}: {base_link} → {tip_link}",
               source=str(path))
