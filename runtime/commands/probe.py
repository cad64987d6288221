"""`jogwire probe ARM [--q v1,v2,…] [--twist vx,vy,vz,wx,wy,wz] [--cell C]`: kinematics at one pose.

Prints the TCP pose, the geometric Jacobian (base frame, TCP reference point), its singular
values, Yoshikawa manipulability and condition number, as a table or as one JSON object;
with --twist also the joint rates one control cycle would send (`runtime.control.solver.solve`);
with --cell the distance of every checked pair of the arm in that workcell (docs/CELLS.md),
and a twist solve then keeps clear of it.

The JSON keys are stable (other tools read them); `probe_report` builds that object, and
further options add keys to it (e.g. a twist solve adds joint rates and scale factors).
"""

from __future__ import annotations

import argparse
import json
import math
from typing import Any

import numpy as np

from ..errors import ConfigError
from ..arm.cell import Cell, load_cell
from ..arm.distance import Clearances, cell_distances
from ..arm.kinematics import KinematicsReport, analyse_pose
from ..arm.model import TASK_AXES, Arm, load_arm
from ..control.clearance import ClearanceLimit
from ..control.solver import Solution, parse_axes, solve
from ..arm.transforms import matrix_to_rpy

SINGULAR_RATIO = 1e-9  # σ_min / σ_max below this is reported as a singular pose (round-off)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("arm", metavar="ARM",
                        help="a shipped arm name (e.g. elbow6), an arm .toml or a .urdf file")
    parser.add_argument("--q", metavar="V", nargs="+",
                        help="joint values in rad and m (deg and m with --deg), separated by "
                             "commas or spaces; write --q=-0.5,1 when the first value is "
                             "negative and commas are used. Default: the arm's home pose")
    parser.add_argument("--deg", action="store_true",
                        help="revolute values in --q and in the table are in degrees")
    parser.add_argument("--json", action="store_true",
                        help="print one JSON object (SI units whatever --deg says)")
    parser.add_argument("--base", metavar="LINK", help="URDF only: the link the chain starts at")
    parser.add_argument("--tip", metavar="LINK", help="URDF only: the link the chain ends at")
    parser.add_argument("--cell", metavar="CELL",
                        help="a shipped workcell name (e.g. bench) or a cell .toml: adds the "
                             "clearance of every checked pair (docs/CELLS.md)")
    twist = parser.add_argument_group("twist solve (what jogging would send at this pose)")
    twist.add_argument("--twist", metavar="V", nargs="+",
                       help="TCP twist vx,vy,vz,wx,wy,wz in m/s and rad/s (SI whatever --deg "
                            "says); write --twist=-0.1,0,… when the first value is negative")
    twist.add_argument("--frame", choices=("base", "tool"), default="base",
                       help="axes the twist is given in (default base)")
    twist.add_argument("--reduced", action="store_true",
                       help="reduced-speed mode: TCP linear speed at most 0.25 m/s")
    twist.add_argument("--rate", type=float, default=500.0, metavar="HZ",
                       help="control rate the braking and acceleration limits are judged at "
                            "(default 500)")
    twist.add_argument("--lock", metavar="AXES", default="",
                       help="axes held still, e.g. wx,wy,wz to translate only")


def parse_q(text: str | list[str], arm: Arm, *, degrees: bool) -> np.ndarray:
    """Joint values from `v1,v2,…` in SI (rad, m); degrees converted for revolute joints."""
    if not isinstance(text, str):
        text = ",".join(text)
    parts = [p.strip() for p in text.replace(" ", ",").split(",") if p.strip()]
    if len(parts) != arm.n:
        raise ConfigError(f"{arm.name} has {arm.n} joints ({', '.join(arm.joint_names)}); "
                          f"got {len(parts)} values", field="--q")
    q = np.empty(arm.n)
    for i, (part, joint) in enumerate(zip(parts, arm.joints)):
        try:
            value = float(part)
        except ValueError:
            raise ConfigError(f"{joint.name}: {part!r} is not a number", field="--q") from None
        if not math.isfinite(value):
            raise ConfigError(f"{joint.name}: {part!r} is not a finite number", field="--q")
        q[i] = math.radians(value) if degrees and joint.is_revolute else value
    return q


def parse_twist(text: str | list[str]) -> np.ndarray:
    """Six numbers vx,vy,vz,wx,wy,wz (m/s, rad/s)."""
    if not isinstance(text, str):
        text = ",".join(text)
    parts = [p.strip() for p in text.replace(" ", ",").split(",") if p.strip()]
    if len(parts) != 6:
        raise ConfigError(f"a twist is 6 numbers vx,vy,vz,wx,wy,wz; got {len(parts)}",
                          field="--twist")
    try:
        twist = np.array([float(p) for p in parts])
    except ValueError:
        raise ConfigError(f"not a number in {text!r}", field="--twist") from None
    if not np.isfinite(twist).all():
        raise ConfigError(f"not a finite number in {text!r}", field="--twist")
    return twist


def twist_report(solution: Solution) -> dict[str, Any]:
    """The keys a twist solve adds to the JSON object (SI, base axes, TCP reference point):
    joint_rates, damping (λ), achieved_twist (J·q̇), scale (product of all factors), scales
    (each limit's factor), binding_limit (null when none), and commanded_twist,
    tracking_error, saturated_joints."""
    return {
        "joint_rates": solution.rates.tolist(),
        "damping": solution.damping,
        "commanded_twist": solution.commanded_twist.tolist(),
        "achieved_twist": solution.achieved_twist.tolist(),
        "tracking_error": solution.tracking_error,
        "scale": solution.scale,
        "scales": dict(solution.scales),
        "binding_limit": solution.binding_limit,
        "saturated_joints": list(solution.saturated_joints),
        **({} if solution.clearance is None else {"clearance": solution.clearance.as_dict()}),
    }


def clearance_report(cell: Cell, found: Clearances) -> dict[str, Any]:
    """The keys --cell adds: cell (its name) and clearances, every checked pair nearest first,
    each with pair (arm side, other side), distance_m (negative: overlap), point_arm_m and
    point_other_m (witness points, base frame) and normal (unit, from the other side toward
    the arm side)."""
    return {"cell": cell.name, "clearances": found.as_list()}


def format_clearance_report(cell: Cell, found: Clearances, shown: int = 8) -> str:
    """The nearest pairs as a table (distances in mm)."""
    d_s, d_i = cell.clearance.safety_distance_m, cell.clearance.influence_distance_m
    out = [f"Clearance in cell {cell.name} (safety {d_s * 1000:.0f} mm, influence "
           f"{d_i * 1000:.0f} mm; nearest {min(shown, len(found.pairs))} of "
           f"{len(found.pairs)} pairs)"]
    width = max([10] + [len(f"{a} / {b}") for a, b in found.pairs])
    for item in found.as_list()[:shown]:
        a, b = item["pair"]
        d = item["distance_m"]
        note = "  overlap" if d < 0 else "  inside safety" if d < d_s else \
            "  inside influence" if d < d_i else ""
        out.append(f"  {a + ' / ' + b:<{width}}  {d * 1000:9.1f} mm{note}")
    return "\n".join(out)


def format_twist_report(arm: Arm, solution: Solution, *, degrees: bool = False) -> str:
    """The twist-solve section of the human-readable output (revolute rates in deg/s with
    `degrees`)."""
    width = max(8, *(len(n) for n in arm.joint_names))
    out = ["Twist solve (base axes, m/s and rad/s; one cycle, no acceleration history)",
           "             " + " ".join(f"{ax:>8}" for ax in TASK_AXES),
           "  commanded  " + " ".join(_fmt(x, 8) for x in solution.commanded_twist),
           "  achieved   " + " ".join(_fmt(x, 8) for x in solution.achieved_twist),
           f"  damping λ {solution.damping:.4g}   scale {solution.scale:.4g}   "
           f"binding limit {solution.binding_limit or 'none'}"]
    slowed = [f"{k} {v:.4g}" for k, v in solution.scales.items() if v < 1.0]
    if slowed:
        out.append("  factors    " + ", ".join(slowed))
    if solution.saturated_joints:
        out.append("  at a limit " + ", ".join(solution.saturated_joints))
    if solution.clearance is not None and solution.clearance.binding_pair is not None:
        out.append("  clearance  binds on " + " / ".join(solution.clearance.binding_pair))
    out.append(f"  {'joint':<{width}}  {'rate':>10}  unit")
    for j, rate in zip(arm.joints, solution.rates):
        if j.is_revolute:
            rate, unit = (math.degrees(rate), "deg/s") if degrees else (rate, "rad/s")
        else:
            unit = "m/s"
        out.append(f"  {j.name:<{width}}  {_fmt(rate)}  {unit}")
    return "\n".join(out)


def _finite_or_none(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def probe_report(arm: Arm, q: np.ndarray, report: KinematicsReport | None = None
                 ) -> dict[str, Any]:
    """The JSON object of `jogwire probe --json` (SI units; null where a value is infinite).

    Keys: arm, joint_names, q, tcp_pose (4×4, base frame, m), jacobian (6×n, rows vx vy vz
    wx wy wz, base frame, reference point TCP), task_axes, singular_values (of the task rows),
    manipulability, condition_number.
    """
    r = report if report is not None else analyse_pose(arm, q)
    return {
        "arm": arm.name,
        "joint_names": list(arm.joint_names),
        "q": r.q.tolist(),
        "tcp_pose": r.tcp_pose.tolist(),
        "jacobian": r.jacobian.tolist(),
        "task_axes": [ax for ax, on in zip(TASK_AXES, arm.task_axes) if on],
        "singular_values": r.singular_values.tolist(),
        "manipulability": r.manipulability,
        "condition_number": _finite_or_none(r.condition_number),
    }


def _fmt(x: float, width: int = 10, digits: int = 4) -> str:
    if not math.isfinite(x):
        return f"{'inf' if x > 0 else '-inf':>{width}}"
    return f"{round(x, digits) + 0.0:{width}.{digits}f}"  # + 0.0: no "-0.0000"


def format_report(arm: Arm, r: KinematicsReport, *, degrees: bool) -> str:
    """The human-readable table of `jogwire probe`."""
    to_deg = 180.0 / math.pi if degrees else 1.0
    angle_unit = "deg" if degrees else "rad"
    width = max(8, *(len(n) for n in arm.joint_names))
    out = [f"arm {arm.name}: {arm.n} joints" + (f" — {arm.summary}" if arm.summary else ""),
           ""]
    out.append(f"  {'joint':<{width}}  {'value':>10}  unit   {'lower':>10}  {'upper':>10}")
    for j, qi in zip(arm.joints, r.q):
        k, unit = (to_deg, angle_unit) if j.is_revolute else (1.0, "m")
        outside = "   outside its limits" if not j.lower <= qi <= j.upper else ""
        out.append(f"  {j.name:<{width}}  {_fmt(qi * k)}  {unit:<5}  {_fmt(j.lower * k)}  "
                   f"{_fmt(j.upper * k)}{outside}")
    T = r.tcp_pose
    rpy = matrix_to_rpy(T[:3, :3]) * to_deg
    out += ["", "TCP pose in the base frame",
            f"  position  x {_fmt(T[0, 3], 9)}  y {_fmt(T[1, 3], 9)}  z {_fmt(T[2, 3], 9)}  m",
            f"  rpy    roll {_fmt(rpy[0], 9)}  pitch {_fmt(rpy[1], 9)}  yaw {_fmt(rpy[2], 9)}  "
            f"{angle_unit}", ""]
    out.append("Jacobian (base frame, reference point TCP; m/s and rad/s per unit joint rate)")
    col = max(10, *(len(n) for n in arm.joint_names))
    out.append("    " + "".join(f"  {n:>{col}}" for n in arm.joint_names) + "  task")
    for name, row, on in zip(TASK_AXES, r.jacobian, arm.task_axes):
        out.append(f"  {name}" + "".join(f"  {_fmt(v, col)}" for v in row) +
                   ("   •" if on else ""))
    task = " ".join(ax for ax, on in zip(TASK_AXES, arm.task_axes) if on)
    out += ["", f"Dexterity of the task rows ({task})",
            "  singular values   " + " ".join(f"{s:.6g}" for s in r.singular_values),
            f"  manipulability    {r.manipulability:.6g}   (Yoshikawa, product of σ)",
            f"  condition number  {r.condition_number:.6g}   (σ_max / σ_min)"]
    sv = r.singular_values
    if sv[-1] <= SINGULAR_RATIO * sv[0]:
        out.append("  singular pose: the task cannot move in every direction here")
    return "\n".join(out)


def run(args: argparse.Namespace) -> int:
    arm = load_arm(args.arm, base_link=args.base, tip_link=args.tip)
    q = arm.home() if args.q is None else parse_q(args.q, arm, degrees=args.deg)
    report = analyse_pose(arm, q)
    cell = None if args.cell is None else load_cell(args.cell, arm)
    solution = None
    if args.twist is not None:
        solution = solve(arm, q, parse_twist(args.twist), frame=args.frame,
                         locked=parse_axes(args.lock, field_name="--lock"), reduced=args.reduced,
                         dt_s=1.0 / args.rate,
                         clearance=None if cell is None else ClearanceLimit.of(arm, cell))
    found = None if cell is None else cell_distances(arm, cell, q)
    if args.json:
        data = probe_report(arm, q, report)
        if solution is not None:
            data.update(twist_report(solution))
        if cell is not None and found is not None:
            data.update(clearance_report(cell, found))
        print(json.dumps(data, allow_nan=False))
    else:
        text = format_report(arm, report, degrees=args.deg)
        if cell is not None and found is not None:
            text += "\n\n" + format_clearance_report(cell, found)
        if solution is not None:
            text += "\n\n" + format_twist_report(arm, solution, degrees=args.deg)
        print(text)
    return 0
