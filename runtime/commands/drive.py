"""`jogwire drive`: move an arm's tool by hand — the main job (runtime.sessions.drive).

With no arguments it starts the built-in simulated demo arm as a child on a free loopback
port, opens the status window and takes the first gamepad, or the keyboard when there is
none. Where no window can open and no pad is plugged in (a server, CI, a container) it plays
the shipped demo script headless, prints a live status line and a summary, and says so.
This module parses the command line into `RunSettings` and the session's parts, runs
`run_drive` and prints the summary.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

from ..arm.cell import Cell, load_cell
from ..arm.load import load_arm
from ..arm.model import Arm
from ..control.pads import load_pad
from ..control.settings import RunSettings
from ..errors import ConfigError
from ..link.transport import check_endpoint, load_client_keys
from ..operator.inputs import parse_input_spec
from ..operator.terminal import format_drive_summary, json_safe, say
from ..sessions.archive import BYTES_PER_MB, SECONDS_PER_DAY, ArchiveCap
from ..sessions.drive import REALTIME_PRIORITY, DriveInput, DriveTarget, run_drive
from ..sessions.drive_ui import DEMO_SCRIPT, DriveUI, plan_input, probe_display_and_pads

DEMO_ARM, DEMO_CELL = "elbow6", "bench"   # the demo arm works in the demo workcell
DEFAULT_PADS = {"gamepad": "twinstick", "keyboard": "keyboard"}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.description = (
        "Drive an arm's tool by hand. With no arguments: start the simulated demo arm, open "
        "the status window and take the first gamepad (or the keyboard). Without a display "
        "and a pad: play the demo script headless and print a summary.")
    parser.add_argument("--arm", default=DEMO_ARM,
                        help=f"shipped arm name, arm .toml or .urdf (default {DEMO_ARM})")
    parser.add_argument("--cell", metavar="NAME|FILE",
                        help="the workcell around the arm (shipped name or .toml); clearance "
                             "keeps the arm out of it, the simulated arm holds it and reports "
                             "contacts. Default: the demo workcell `bench` for the built-in "
                             f"demo arm ({DEMO_ARM}), none otherwise; `none` for none")
    parser.add_argument("--pad", metavar="PAD",
                        help="pad mapping: shipped name (twinstick, twinstick_sdl, keyboard) "
                             "or a .toml (default for a pad: the shipped file SDL's layout "
                             "of it fits, else twinstick; see `jogwire pads`; keyboard for "
                             "keys)")
    parser.add_argument("--input", metavar="SPEC",
                        help="gamepad | keyboard | script:FILE | network:ENDPOINT (default: "
                             "a gamepad if one is plugged in, else the keyboard when a window "
                             f"can open, else the demo script {DEMO_SCRIPT!r} headless)")
    parser.add_argument("--target", metavar="tcp://HOST:PORT",
                        help="drive the arm side listening there (jogwire bridge or sim) "
                             "instead of starting the simulated arm; off this host needs --keys")
    parser.add_argument("--keys", metavar="DIR", help="CURVE keys from `jogwire keys DIR`")
    parser.add_argument("--rate", type=float, default=RunSettings.rate_hz, metavar="HZ",
                        help=f"control loop rate (default {RunSettings.rate_hz:g})")
    parser.add_argument("--reduced", action="store_true",
                        help="reduced speed locked on (TCP ≤ 0.25 m/s) for the whole session")
    parser.add_argument("--headless", action="store_true",
                        help="no status window: a status line in the terminal")
    parser.add_argument("--duration", type=float, metavar="S", help="end after S seconds")
    parser.add_argument("--no-record", action="store_true", help="do not write a session log")
    parser.add_argument("--sessions", default="sessions", metavar="DIR",
                        help="where session logs go (default ./sessions)")
    parser.add_argument("--sessions-max-mb", type=float, metavar="MB",
                        help="at the start, remove the oldest session logs in --sessions until "
                             "they take at most MB megabytes (never this session's; each "
                             "removal is listed)")
    parser.add_argument("--sessions-max-days", type=float, metavar="DAYS",
                        help="at the start, remove session logs in --sessions older than DAYS "
                             "days (never this session's; each removal is listed)")
    parser.add_argument("--gui", action="store_true",
                        help="open PyBullet's own window for the simulated arm")
    parser.add_argument("--lockstep", action="store_true",
                        help="step the simulated arm once per control cycle (1/rate of "
                             "simulated time each) instead of in real time: its time then "
                             "follows the loop exactly, even on a loaded machine (no arm-side "
                             "watchdog in this mode)")
    parser.add_argument("--realtime", action="store_true",
                        help="run the control loop and this process's other threads at "
                             f"real-time priority (SCHED_FIFO {REALTIME_PRIORITY}, Linux; needs "
                             "CAP_SYS_NICE or `ulimit -r`): other programs then cannot delay "
                             "the loop; refused → normal priority, with a note")
    parser.add_argument("--stale-after", type=float, default=RunSettings.stale_after_s,
                        metavar="S",
                        help="arm state older than S stops motion here, and the simulated arm "
                             "ramps to zero when our rates are older than S (default "
                             f"{RunSettings.stale_after_s:g})")
    parser.add_argument("--max-round-trip", type=float, metavar="S",
                        help="refuse motion while the link's round trip (rates sent → state "
                             "showing them applied, median of the last 0.5 s) is above S "
                             "(default: --stale-after; above it a release can take longer "
                             "than stale_after to reach the arm)")
    parser.add_argument("--screenshot", metavar="FILE.png",
                        help="save the status window to a PNG once, after --screenshot-after")
    parser.add_argument("--screenshot-after", type=float, metavar="S",
                        help="when to take --screenshot (default: half of --duration, else 3 s)")
    parser.add_argument("--json-file", metavar="FILE",
                        help="also write the end-of-session summary as JSON (SI units)")
    parser.add_argument("--summary-json", dest="json_file", help=argparse.SUPPRESS)  # old name


def settings_from(args: argparse.Namespace) -> RunSettings:
    return RunSettings(rate_hz=args.rate, stale_after_s=args.stale_after,
                       max_round_trip_s=args.max_round_trip, reduced_locked=args.reduced)


def _check_options(args: argparse.Namespace) -> None:
    if args.duration is not None and not args.duration > 0:
        raise ConfigError("--duration must be positive", field="duration")
    for flag in ("gui", "lockstep"):
        if args.target is not None and getattr(args, flag):
            raise ConfigError(f"--{flag} is for the simulated arm; with --target there is none",
                              field=flag)
    if args.keys is not None and args.target is None:
        raise ConfigError("--keys is for a --target off this host", field="keys")
    for flag in ("sessions_max_mb", "sessions_max_days"):
        value = getattr(args, flag)
        if value is not None and not (math.isfinite(value) and value > 0):
            raise ConfigError(f"--{flag.replace('_', '-')} must be positive, got {value:g}",
                              field=flag.replace("_", "-"))


def cell_for(args: argparse.Namespace, arm: Arm) -> tuple[Cell | None, str | None]:
    """The workcell of the session and what the simulated arm loads: --cell, or the demo
    workcell for the demo arm on the built-in simulated arm."""
    spec = args.cell
    if spec is None and args.arm == DEMO_ARM and args.target is None:
        spec = DEMO_CELL
    if spec is None or spec == "none":
        return None, None
    return load_cell(spec, arm), spec


def run(args: argparse.Namespace) -> int:
    settings = settings_from(args)
    _check_options(args)
    arm = load_arm(args.arm)
    cell, cell_spec = cell_for(args, arm)
    keys = load_client_keys(args.keys) if args.keys else None
    if args.target is not None:
        check_endpoint(args.target, keys, action="connect to")   # refused before anything runs
    if args.gui:
        from ..operator.inputs.pygame_init import display_available
        if not display_available():
            raise ConfigError("--gui needs a display for PyBullet's window", field="gui")
    need_pads = args.input is None or args.input == "gamepad"
    if args.input is not None:
        parse_input_spec(args.input)
    display, pads = probe_display_and_pads(args.headless, need_pads)
    plan = plan_input(args.input, headless=args.headless, display=display, pads=pads)
    kind, _ = parse_input_spec(plan.spec)
    pad_name, pad_note = args.pad or DEFAULT_PADS.get(kind, "keyboard"), ""
    if args.pad is None and kind == "gamepad":    # the shipped file SDL says the pad fits
        from ..operator.pad_check import pad_file_for_first_pad
        pad_name, pad_note = pad_file_for_first_pad(pad_name)
    pad = load_pad(pad_name)
    screenshot = None
    if args.screenshot:
        after = args.screenshot_after if args.screenshot_after is not None else \
            (args.duration / 2 if args.duration else 3.0)
        screenshot = (Path(args.screenshot), after)
    if not args.no_record:             # a folder that cannot be made fails before the arm starts
        Path(args.sessions).mkdir(parents=True, exist_ok=True)
    out = sys.stdout
    for note in (plan.note, pad_note):
        if note:
            say(out, f"jogwire drive: {note}")
    cap = ArchiveCap(
        max_bytes=None if args.sessions_max_mb is None
        else int(args.sessions_max_mb * BYTES_PER_MB),
        max_age_s=None if args.sessions_max_days is None
        else args.sessions_max_days * SECONDS_PER_DAY)
    result = run_drive(settings, arm, DriveInput(plan.spec, pad),
                       DriveTarget(args.arm, args.target, keys, gui=args.gui,
                                   lockstep=args.lockstep,
                                   cell_spec=cell_spec if args.target is None else None),
                       DriveUI(plan.window, out, screenshot), duration_s=args.duration,
                       sessions_dir=None if args.no_record else args.sessions,
                       sessions_cap=cap, realtime=args.realtime, cell=cell)
    summary = result.summary
    say(out, format_drive_summary(summary))
    if "screenshot" in summary:
        say(out, f"  screenshot {summary['screenshot']}")
    if args.json_file:
        Path(args.json_file).write_text(json.dumps(json_safe(summary), indent=2) + "\n",
                                        encoding="utf-8")
    if result.child_exit is not None:
        print(f"jogwire drive: the simulated arm exited early (status {result.child_exit})",
              file=sys.stderr)
        return 1
    return 0
