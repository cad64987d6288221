"""`jogwire replay LOG`: send a recorded session to a target, or re-run it through today's
control cycle and show what would differ.

Three ways:

    jogwire replay LOG [--speed X] [--target E]    send the recorded rates, paced by the
                                                   recorded times (the simulated arm by
                                                   default, started at the recorded pose)
    jogwire replay LOG --rerun [--arm A]           open loop: every recorded cycle stepped
                                                   again on its recorded pose; per joint
                                                   the largest rate difference
    jogwire replay LOG --rerun --closed-loop       closed loop: the recorded inputs drive
                                                   today's cycle in lockstep with the
                                                   simulated arm (its measured pose)

Open loop is the exact check: the recorded poses are facts, so with the same software and
settings every rate is bit for bit the recorded one (differences ≤ 1e-12 count as equal,
`--tolerance`). A difference answers "what would this change have done in that very
situation", cycle by cycle. Closed loop answers "where would the arm have gone": from the
first difference on the poses part ways, so its differences grow and are not a test of
equality (except for a log that was itself recorded on the lockstep simulated arm, such as
a preflight run, which it reproduces).

Sending moves an arm: the target must be at the recorded start pose (within 1° or 1 mm),
unless --from-here. `--speed X` scales time and rates together, so the path stays the
recorded one; X > 1 is refused where the faster rates would break the arm's limits.
Exit status: 0 done (re-run: no difference beyond the tolerance), 1 re-run differences,
2 bad input (unreadable log, arm mismatch, …).
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..arm.cell import load_cell
from ..arm.load import load_arm
from ..arm.model import Arm
from ..control.settings import RunSettings
from ..errors import ConfigError, LogError
from ..link.arm_process import ArmProcess
from ..link.protocol import hello_for
from ..link.transport import ArmClient, load_client_keys
from ..operator.terminal import format_table
from ..sessions.lockstep import LINKS, arm_file_for
from ..sessions.log_reader import Session, read_session
from ..sessions.log_schema import CycleRecord
from ..sessions.replay import ReplayLink, check_speed, check_start, paced_send, rerun_closed_loop
from ..sessions.rerun import continuous_records, cycle_settings, inputs_of, rerun_open_loop

DEFAULT_TOLERANCE = 1e-12
ZERO_REPEATS = 5            # zero-rate messages sent at the end (one could be lost)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = ("exit status: 0 done (a re-run: no difference beyond --tolerance), 1 a "
                     "re-run differs, 2 bad input. Modes: docs/SESSION_FORMAT.md")
    parser.add_argument("log", metavar="LOG", help="a session log (.jwlog)")
    parser.add_argument("--rerun", action="store_true",
                        help="feed the recorded inputs through today's control cycle instead "
                             "of sending; report per joint the largest rate difference")
    parser.add_argument("--cell", metavar="NAME|FILE",
                        help="with --rerun: the workcell to re-run in (default: the one the "
                             "session recorded, if any; `none` for none)")
    parser.add_argument("--closed-loop", action="store_true",
                        help="with --rerun: in lockstep with the simulated arm (its measured "
                             "pose) instead of on the recorded poses")
    parser.add_argument("--arm", metavar="ARM",
                        help="use this arm model instead of the recorded one (same joint "
                             "count): what would another config have done")
    parser.add_argument("--tolerance", type=float, default=DEFAULT_TOLERANCE, metavar="R",
                        help=f"re-run: differences up to R count as none (default "
                             f"{DEFAULT_TOLERANCE:g})")
    parser.add_argument("--target", metavar="ENDPOINT",
                        help="send to this arm side (tcp://HOST:PORT) instead of starting "
                             "the simulated arm")
    parser.add_argument("--keys", metavar="DIR", help="CURVE keys for a --target off this host")
    parser.add_argument("--speed", type=float, default=1.0, metavar="X",
                        help="playback speed: time and rates scaled together (default 1)")
    parser.add_argument("--from-here", action="store_true",
                        help="send even if the target is not at the recorded start pose")
    parser.add_argument("--step-hz", type=float, default=1000.0, metavar="HZ",
                        help="physics step rate of the simulated arm (default 1000)")
    parser.add_argument("--lockstep-link", choices=LINKS, default="auto",
                        help="with --closed-loop: how messages cross to the simulated arm "
                             "child: shm, pipe or auto (default; as `jogwire preflight`)")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")


def run(args: argparse.Namespace) -> int:
    _check_options(args)
    session = read_session(args.log)
    records, damage = continuous_records(session)
    for p in session.problems:
        _warn(f"{args.log}: {p}")
    if damage:
        _warn(damage)
    if not records:
        raise LogError(f"{args.log}: no cycle records to replay")
    arm = _arm(session, args.arm)
    if args.rerun:
        return _rerun(args, session, records, arm)
    return _send(args, session, records, arm)


def _check_options(args: argparse.Namespace) -> None:
    if args.closed_loop and not args.rerun:
        raise ConfigError("--closed-loop goes with --rerun", field="closed-loop")
    if args.cell is not None and not args.rerun:
        raise ConfigError("--cell goes with --rerun (sending replays recorded rates)",
                          field="cell")
    if args.rerun and (args.target or args.speed != 1.0 or args.from_here):
        raise ConfigError("--target, --speed and --from-here are for sending; a re-run "
                          "moves no arm", field="rerun")
    if not (math.isfinite(args.speed) and 0.01 <= args.speed <= 100.0):
        raise ConfigError(f"--speed must be within 0.01…100, got {args.speed:g}",
                          field="speed")
    if not (math.isfinite(args.step_hz) and 1.0 <= args.step_hz <= 20000.0):
        raise ConfigError(f"--step-hz must be within 1…20000, got {args.step_hz:g}",
                          field="step-hz")
    if not (math.isfinite(args.tolerance) and args.tolerance >= 0.0):
        raise ConfigError("--tolerance must be a number ≥ 0", field="tolerance")


def _arm(session: Session, override: str | None) -> Arm:
    recorded = session.header.arm
    if override is None:
        return recorded
    arm = load_arm(override)
    if arm.n != recorded.n:
        raise ConfigError(f"{override} has {arm.n} joints; the session was recorded with "
                          f"{recorded.n} ({recorded.name})", field="arm")
    return arm


def _warn(text: str) -> None:
    print(f"jogwire replay: warning: {text}", file=sys.stderr)


# ----------------------------------------------------------------------------------------
# Re-run
# ----------------------------------------------------------------------------------------

def rerun_cell(option: str | None, recorded: Any) -> str | None:
    """The workcell a re-run uses: --cell, else the one the session recorded; "none": none."""
    spec = option if option is not None else recorded.get("cell")
    return None if spec in (None, "", "none") else str(spec)


def _rerun(args: argparse.Namespace, session: Session, records: Sequence[CycleRecord],
           arm: Arm) -> int:
    where = str(args.log)
    settings = cycle_settings(session.header.settings, where=where)
    frames = inputs_of(records, where)
    cell_spec = rerun_cell(args.cell, session.header.settings)
    cell = None if cell_spec is None else load_cell(cell_spec, arm)
    if args.closed_loop:
        result = rerun_closed_loop(settings, records, frames, arm,
                                   arm_spec=args.arm or arm_file_for(arm),
                                   step_hz=args.step_hz, label=Path(args.log).name,
                                   cell=cell, cell_spec=cell_spec, link=args.lockstep_link)
    else:
        cycle = settings.control_cycle(arm, cell)
        diff = rerun_open_loop(cycle, records, frames)
        result = {"mode": "open loop", **diff.as_dict()}
    result.update({"log": where, "arm": arm.name, "recorded_arm": session.header.arm.name,
                   "cell": cell_spec, "tolerance": args.tolerance})
    same = result["largest_difference"] <= args.tolerance
    result["identical"] = same
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        print(_format_rerun(result, arm))
    return 0 if same else 1


def _format_rerun(r: dict[str, Any], arm: Arm) -> str:
    verdict = ("identical" if r["largest_difference"] == 0.0 else
               f"identical within {r['tolerance']:g}") if r["identical"] else "DIFFERENT"
    lines = [f"re-run ({r['mode']}) of {r['log']} with arm {r['arm']}: {r['cycles']} cycles, "
             f"rates {verdict}"]
    if r["differing_cycles"]:
        lines.append(f"  {r['differing_cycles']} cycles differ, the first at "
                     f"t = {r['first_difference_t_s']:.3f} s")
    if r.get("safety_state_mismatches"):
        lines.append(f"  the safety gate decided differently in "
                     f"{r['safety_state_mismatches']} cycles")
    rows = []
    for j, item in zip(arm.joints, r["joints"]):
        unit = "rad/s" if j.is_revolute else "m/s"
        row = [j.name, f"{item['max_abs_difference']:.3e} {unit}",
               "—" if item["at_t_s"] is None else f"{item['at_t_s']:.3f}"]
        if "max_pose_deviation" in item:
            row.append(f"{item['max_pose_deviation']:.3e} {'rad' if j.is_revolute else 'm'}")
        rows.append(row)
    head = ["joint", "largest |Δ rate|", "at t (s)"]
    if rows and len(rows[0]) == 4:
        head.append("largest |Δ pose|")
    lines += [""] + format_table(head, rows)
    return "\n".join(lines)


# ----------------------------------------------------------------------------------------
# Send
# ----------------------------------------------------------------------------------------

def _send(args: argparse.Namespace, session: Session, records: Sequence[CycleRecord],
          arm: Arm) -> int:
    check_speed(arm, records, args.speed)
    start_q = np.array(records[0].q) if records[0].q else None
    child = None
    if args.target:
        endpoint, target = args.target, f"arm side at {args.target}"
    else:
        options = ["--endpoint", "tcp://127.0.0.1:*", "--step-hz", repr(float(args.step_hz))]
        if start_q is not None:
            options.append("--q=" + ",".join(repr(float(v)) for v in start_q))
        child = ArmProcess("sim", args.arm or arm_file_for(arm), options,
                           stderr=subprocess.PIPE, new_session=True)
        endpoint, target = child.endpoint, "the simulated arm"
    link = None
    try:
        keys = load_client_keys(args.keys) if args.keys else None
        hello = hello_for(arm, "runtime", stale_after_s=RunSettings.stale_after_s)
        link = ReplayLink(ArmClient(endpoint, hello=hello, keys=keys))
        _, first = link.client.handshake(timeout_s=5.0)
        check_start(arm, np.array(first.q), start_q, args.from_here)
        result = paced_send(link, records, speed=args.speed, target=target,
                            label=str(args.log))
    finally:
        if link is not None:
            for _ in range(ZERO_REPEATS):     # stop the arm, whatever ended the replay
                link.send(np.zeros(arm.n))
            link.client.close()
        if child is not None:
            child.stop()
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        print(_format_send(result, arm))
    return 0


def _format_send(r: dict[str, Any], arm: Arm) -> str:
    lines = [f"replayed {r['cycles']} cycles ({r['recorded_s']:.2f} s recorded) to "
             f"{r['target']} at speed {r['speed']:g} in {r['wall_s']:.2f} s"]
    if r["skipped_late"]:
        lines.append(f"  {r['skipped_late']} records skipped: this machine fell behind the "
                     f"recorded timing and the next one was already due")
    if r["dropped_sends"]:
        lines.append(f"  {r['dropped_sends']} rates messages could not be sent")
    lines.append("  largest deviation of the target's pose from the recorded pose "
                 "(measured while sending; includes one cycle of latency):")
    for j, item in zip(arm.joints, r["joints"]):
        v = item["max_pose_deviation"]
        lines.append(f"    {j.name:<14} " + (f"{math.degrees(v):.3f} deg" if j.is_revolute
                                             else f"{v * 1e3:.3f} mm"))
    return "\n".join(lines)
