"""An arm model as URDF text, for PyBullet, other tools and the user (pure but `write_urdf`).

Layout of the written tree (each arrow a joint, parent → child):

    [world →(fixed "world_joint": the arm's base transform; only when not identity)]
    base_link → link_1 → … → link_n →(fixed "flange_joint") flange →(fixed "tcp_joint") tcp

Joint i keeps the model's joint name, its origin is the model's `origin_i` and its axis is
z, so loading the file back (`runtime.arm.urdf.load_urdf_arm`) gives the same chain.
Floats are written with `repr` (17 significant digits) so that round trip is exact to the
last bit of the text. Unlimited revolute joints are written as `continuous`. Fixed joints
and links have different names, so a library that keeps joints and links in one namespace
of frames (pin does) finds the `tcp` frame by its name alone.

The geometry is only a sketch for the viewer and for collisions: a cylinder from each
link's frame to the next joint's origin and a short housing around each joint axis; the
tool (a plate on the flange, a rod to the TCP and a ball at the TCP) is drawn but has no
collision shape. Colours are jogwire's palette (`runtime.palette`): light links, darker
housings, the accent for the tool. Masses follow link length (a hollow aluminium tube of
~2.5 kg/m plus a 0.4 kg joint housing, our round numbers), with solid-cylinder inertias
about the centre of mass. The `flange` and `tcp` links have a tiny inertial so PyBullet
does not give them its 1 kg default.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from runtime import palette
from runtime.arm.model import Arm
from runtime.arm.transforms import Mat4, rotation_aligning_z

if TYPE_CHECKING:
    from runtime.arm.solids import Solid

LINK_RADIUS_M = 0.035
LINK_MASS_PER_M_KG = 2.5
HOUSING_MASS_KG = 0.4
HOUSING_LENGTH_M = 0.08
TINY_MASS_KG = 1e-3  # flange and tcp: present, but negligible for dynamics
TOOL_RADIUS_M = 0.012
TOOL_PLATE_M = 0.012     # thickness of the tool plate on the flange
TCP_BALL_RADIUS_M = 0.018
MATERIALS = {"tube": palette.ARM_LINK, "housing": palette.ARM_HOUSING, "tool": palette.TOOL}


def matrix_to_rpy_exact(R: np.ndarray) -> tuple[float, float, float]:
    """Roll, pitch, yaw with R = Rz(y)·Ry(p)·Rx(r), well conditioned for every R.

    Yaw first, from the first column; then roll and pitch from Rz(−y)·R = Ry(p)·Rx(r),
    whose entries are O(1) even near pitch = ±90° (where arcsin(−R[2,0]) loses digits).
    """
    yaw = math.atan2(R[1, 0], R[0, 0])  # any yaw will do at pitch = ±90°: roll absorbs it
    c, s = math.cos(yaw), math.sin(yaw)
    n00 = c * R[0, 0] + s * R[1, 0]          # = cos p
    n11 = -s * R[0, 1] + c * R[1, 1]         # = cos r
    n12 = -s * R[0, 2] + c * R[1, 2]         # = −sin r
    return math.atan2(-n12, n11), math.atan2(-R[2, 0], n00), yaw


def _num(x: float) -> str:
    return repr(float(x) + 0.0)  # + 0.0 turns −0.0 into 0.0


def _origin_tag(T: Mat4) -> str:
    r, p, y = matrix_to_rpy_exact(T[:3, :3])
    xyz = " ".join(_num(v) for v in T[:3, 3])
    return f'<origin xyz="{xyz}" rpy="{_num(r)} {_num(p)} {_num(y)}"/>'


def _pose_tag(xyz: np.ndarray, R: np.ndarray) -> str:
    T = np.eye(4)
    T[:3, :3] = R
    T[:3, 3] = xyz
    return _origin_tag(T)


def _cylinder_inertia(mass: float, radius: float, length: float) -> tuple[float, float, float]:
    """Solid cylinder along z about its centre (kg·m²): Ixx = Iyy = m(3r² + L²)/12, Izz = mr²/2."""
    ixx = mass * (3.0 * radius**2 + length**2) / 12.0
    return ixx, ixx, 0.5 * mass * radius**2


def _shape(kind: str, pose: str, geometry: str, material: str) -> list[str]:
    extra = [f'    <material name="{material}"/>'] if kind == "visual" else []
    return [f"   <{kind}>", f"    {pose}", f"    <geometry>{geometry}</geometry>", *extra,
            f"   </{kind}>"]


def _inertial(mass: float, com: np.ndarray, R: np.ndarray, ixx: float, iyy: float,
              izz: float) -> list[str]:
    return ["   <inertial>", f"    {_pose_tag(com, R)}", f'    <mass value="{_num(mass)}"/>',
            f'    <inertia ixx="{_num(ixx)}" ixy="0" ixz="0" iyy="{_num(iyy)}" iyz="0" '
            f'izz="{_num(izz)}"/>',
            "   </inertial>"]


def _solid_geometry(solid: "Solid") -> str:
    s = [_num(v) for v in solid.sizes]
    if solid.kind == "box":
        return f'<box size="{" ".join(_num(2.0 * v) for v in solid.sizes)}"/>'
    if solid.kind in ("cylinder", "capsule"):
        return f'<{solid.kind} radius="{s[0]}" length="{s[1]}"/>'
    if solid.kind == "sphere":
        return f'<sphere radius="{s[0]}"/>'
    raise ValueError(f"a {solid.kind} cannot be part of a link")


def _part_link(name: str, solid: "Solid", drawn: bool) -> list[str]:
    """A link holding one collision shape of the arm's collision model (drawn: the tool's)."""
    geometry = _solid_geometry(solid)
    body = _shape("collision", _origin_tag(solid.pose), geometry, "")
    if drawn:
        body += _shape("visual", _origin_tag(solid.pose), geometry, "tool")
    return _tool_link(name, body)


def _material(name: str, rgb: palette.RGB) -> str:
    rgba = " ".join(f"{v:.4f}" for v in palette.unit(rgb))
    return f'  <material name="{name}"><color rgba="{rgba}"/></material>'


def _tool_link(name: str, visual: list[str]) -> list[str]:
    """Flange or tcp: drawn, no collision shape, and a tiny but present inertial (so
    PyBullet does not give it its 1 kg default)."""
    i = TINY_MASS_KG * 1e-4
    return [f'  <link name="{name}">', *visual,
            *_inertial(TINY_MASS_KG, np.zeros(3), np.eye(3), i, i, i), "  </link>"]


def _tool(offset: np.ndarray) -> list[str]:
    """The tool: a plate on the flange and a rod to the TCP at `offset` (m, flange frame)."""
    plate = (f'<cylinder radius="{_num(LINK_RADIUS_M * 1.2)}" '
             f'length="{_num(TOOL_PLATE_M)}"/>')
    shapes = _shape("visual", _pose_tag(np.array([0.0, 0.0, TOOL_PLATE_M / 2.0]), np.eye(3)),
                    plate, "tool")
    length = float(np.linalg.norm(offset))
    if length > 1e-6:
        rod = f'<cylinder radius="{_num(TOOL_RADIUS_M)}" length="{_num(length)}"/>'
        shapes += _shape("visual", _pose_tag(offset / 2.0, rotation_aligning_z(offset / length)),
                         rod, "tool")
    return shapes


def _link(name: str, offset: np.ndarray) -> list[str]:
    """A link whose next joint sits at `offset` (m, link frame)."""
    body: list[str] = []
    housing = (f'<cylinder radius="{_num(LINK_RADIUS_M * 1.2)}" '
               f'length="{_num(HOUSING_LENGTH_M)}"/>')
    for kind in ("visual", "collision"):
        body += _shape(kind, _origin_tag(np.eye(4)), housing, "housing")
    length = float(np.linalg.norm(offset))
    mass, com, R = HOUSING_MASS_KG, np.zeros(3), np.eye(3)
    if length > 1e-6:
        R = rotation_aligning_z(offset / length)
        tube = f'<cylinder radius="{_num(LINK_RADIUS_M)}" length="{_num(length)}"/>'
        for kind in ("visual", "collision"):
            body += _shape(kind, _pose_tag(offset / 2.0, R), tube, "tube")
        tube_mass = LINK_MASS_PER_M_KG * length
        # The housing sits at the link origin, the tube's centre halfway to the next joint.
        com = offset / 2.0 * tube_mass / (tube_mass + HOUSING_MASS_KG)
        mass += tube_mass
    body += _inertial(mass, com, R,
                      *_cylinder_inertia(mass, LINK_RADIUS_M, max(length, HOUSING_LENGTH_M)))
    return [f'  <link name="{name}">', *body, "  </link>"]


def _unique(wanted: str, taken: set[str]) -> str:
    name = wanted
    while name in taken:
        name += "_fixed"
    taken.add(name)
    return name


def _attribute(text: str) -> str:
    """`text` as a quoted XML attribute value, as `xml.sax.saxutils.quoteattr` writes it
    (whose module imports urllib.request: 15 ms of the simulated arm's start)."""
    for raw, entity in _ENTITIES:
        text = text.replace(raw, entity)
    if '"' not in text:
        return f'"{text}"'
    if "'" not in text:
        return f"'{text}'"
    return '"' + text.replace('"', "&quot;") + '"'


_ENTITIES = (("&", "&amp;"), (">", "&gt;"), ("<", "&lt;"), ("\n", "&#10;"), ("\r", "&#13;"),
             ("\t", "&#9;"))


def _joint(name: str, kind: str, parent: str, child: str, T: Mat4,
           extra: tuple[str, ...] = ()) -> list[str]:
    return [f"  <joint name={_attribute(name)} type=\"{kind}\">", f"   {_origin_tag(T)}",
            f'   <parent link="{parent}"/>', f'   <child link="{child}"/>',
            *(f"   {e}" for e in extra), "  </joint>"]


def arm_to_urdf(arm: Arm, *, name: str | None = None,
                parts: "list[tuple[str, str, Solid, bool]] | None" = None) -> str:
    """The URDF text of `arm` (see the module docstring for the layout).

    parts: the arm's collision model besides the sketch, as (parent link, part link name,
    its shape in the parent's frame, drawn?): each part is a link of its own on a fixed
    joint, so a contact names the very part it touched (the simulator decides which
    shapes may collide)."""
    out = ['<?xml version="1.0"?>',
           "<!-- written by jogwire from an arm model; geometry and inertias are a sketch -->",
           f"<robot name={_attribute(name or arm.name)}>",
           *(_material(m, rgb) for m, rgb in MATERIALS.items())]
    taken = set(arm.joint_names)
    if not np.array_equal(arm.base, np.eye(4)):
        out += [*_link("world", arm.base[:3, 3]),  # a pedestal up to the arm's base
                *_joint(_unique("world_joint", taken), "fixed", "world", "base_link",
                        arm.base)]
    links = ["base_link"] + [f"link_{i + 1}" for i in range(arm.n)]
    # Each link's next joint sits at the next origin (after the last joint: the flange).
    offsets = [j.origin[:3, 3] for j in arm.joints] + [arm.flange[:3, 3]]
    for link, offset in zip(links, offsets):
        out += _link(link, offset)
    for i, joint in enumerate(arm.joints):
        unlimited = not (math.isfinite(joint.lower) and math.isfinite(joint.upper))
        kind = "continuous" if joint.is_revolute and unlimited else joint.kind
        limit = "" if kind == "continuous" else \
            f'lower="{_num(joint.lower)}" upper="{_num(joint.upper)}" '
        effort = _num(joint.effort) if joint.effort is not None else "0"
        out += _joint(joint.name, kind, links[i], links[i + 1], joint.origin,
                      ('<axis xyz="0 0 1"/>',
                       f'<limit {limit}effort="{effort}" velocity="{_num(joint.max_speed)}"/>'))
    # Without a tool offset the ball sits on the last tube's end: make it stand out of it.
    radius = TCP_BALL_RADIUS_M if np.any(arm.tool[:3, 3]) else 1.3 * LINK_RADIUS_M
    ball = f'<sphere radius="{_num(radius)}"/>'
    out += _tool_link("flange", _tool(arm.tool[:3, 3]))
    out += _tool_link("tcp", _shape("visual", _origin_tag(np.eye(4)), ball, "tool"))
    out += _joint(_unique("flange_joint", taken), "fixed", links[-1], "flange", arm.flange)
    out += _joint(_unique("tcp_joint", taken), "fixed", "flange", "tcp", arm.tool)
    for parent, link, solid, drawn in parts or ():
        out += _part_link(link, solid, drawn)
        out += _joint(_unique(f"{link}_joint", taken), "fixed", parent, link, np.eye(4))
    out.append("</robot>")
    return "\n".join(out) + "\n"


def write_urdf(arm: Arm, path: str | Path, *, name: str | None = None) -> Path:
    """Write `arm_to_urdf(arm)` to `path` (UTF-8) and return the path."""
    path = Path(path)
    path.write_text(arm_to_urdf(arm, name=name), encoding="utf-8")
    return path
