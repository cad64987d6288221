"""`jogwire preflight ARM PROFILE`: prove a motion against the arm's ratings before hardware moves.

PROFILE is a script (a shipped profile name or a .toml of timed twist segments) or a
recorded session (.jwlog, whose recorded inputs are played again). The control cycle runs
in lockstep with the simulated arm in a child process (`runtime.sessions.preflight_run`),
faster than real time, on the arm's measured pose every cycle. The run is evaluated by
`runtime.sessions.preflight` and written to DIR (default ./preflight):

    <arm>-<profile>-<time>.html    the report with its plots (runtime.sessions.report)
    <arm>-<profile>-<time>.json    the summary (`--json` prints it)
    <arm>-<profile>-<time>.jwlog   the run itself as a session log (replay, inspect)

Exit status: 0 pass, 1 fail, 2 bad input (a CI pipeline can gate on it).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from dataclasses import replace
from datetime import datetime
from pathlib import Path
from typing import Any

from ..arm.cell import load_cell
from ..arm.load import load_arm
from ..arm.model import Arm
from ..control.limits import REDUCED_SPEED_M_S
from ..control.settings import STATE_LAGS, RunSettings
from ..errors import ConfigError, TransportError
from ..link.arm_process import snapshot_png
from ..operator.terminal import format_table, json_safe
from ..sessions.cell_check import CellRun, format_cell
from ..sessions.lockstep import LINKS, substeps_for
from ..sessions.log_schema import SESSION_SUFFIX
from ..sessions.preflight import PreflightResult
from ..sessions.preflight_run import (
    PreflightRun,
    Profile,
    load_profile,
    preflight_settings,
    run_preflight,
)

DEFAULT_OUT = "preflight"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = ("exit status: 0 pass, 1 fail, 2 bad input. What is checked and how: "
                     "docs/PREFLIGHT.md")
    parser.add_argument("arm", metavar="ARM",
                        help="a shipped arm name (e.g. reach7), an arm .toml or a .urdf file")
    parser.add_argument("profile", metavar="PROFILE",
                        help="a motion profile: a shipped profile name, a profile .toml, or a "
                             f"recorded session ({SESSION_SUFFIX}) whose inputs are played again")
    parser.add_argument("--rate", type=float, default=RunSettings.rate_hz, metavar="HZ",
                        help=f"control rate (default {RunSettings.rate_hz:g})")
    parser.add_argument("--step-hz", type=float, default=1000.0, metavar="HZ",
                        help="physics steps per second, a whole multiple of --rate "
                             "(default 1000)")
    parser.add_argument("--state-lag", type=int, choices=STATE_LAGS, default=1,
                        metavar="CYCLES",
                        help="how many cycles the measured pose each cycle works on lags "
                             "behind the arm: 1 (default) as over a real link, 0 for a link "
                             "without delay")
    add_link_argument(parser)
    parser.add_argument("--reduced", action="store_true",
                        help="reduced speed locked on: TCP ≤ 0.25 m/s (ISO 10218-1)")
    parser.add_argument("--out", metavar="DIR", default=DEFAULT_OUT,
                        help=f"folder for the report, summary and session log "
                             f"(default ./{DEFAULT_OUT})")
    parser.add_argument("--json", action="store_true",
                        help="print the summary as one JSON object (SI units) instead of text")
    parser.add_argument("--no-report", action="store_true",
                        help="skip the HTML report and its plots (faster; JSON and log only)")
    parser.add_argument("--cell", metavar="NAME|FILE",
                        help="a workcell (shipped name or .toml): the simulated arm holds its "
                             "objects and reports contacts; any contact or a clearance below "
                             "its safety distance fails the run")
    parser.add_argument("--no-clearance", action="store_true",
                        help="with --cell: leave the velocity damper out of the solve, to see "
                             "what the motion does without it")


def add_link_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--lockstep-link", choices=LINKS, default="auto",
                        help="how messages cross to the simulated arm child: shm (shared "
                             "memory, the pipes as doorbell), pipe, or auto (default: shm on "
                             "x86-64 with two cores or more, else pipe). The motion and its "
                             "log are the same either way")


def run(args: argparse.Namespace) -> int:
    substeps_for(args.rate, args.step_hz)        # a bad rate is an error before anything starts
    settings = preflight_settings(rate_hz=args.rate, reduced=args.reduced,
                                  state_lag=args.state_lag)
    if args.no_clearance and not args.cell:
        raise ConfigError("--no-clearance needs --cell", field="no-clearance")
    arm = load_arm(args.arm)
    cell = load_cell(args.cell, arm) if args.cell else None
    profile = load_profile(args.profile, arm, args.rate)
    out_dir = Path(args.out)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError(f"cannot create {out_dir}: {exc.strerror or exc}",
                          field="out") from None
    stem = _free_stem(out_dir, f"{arm.name}-{profile.name}")
    if profile.reduced_locked:                   # a session recorded at reduced speed
        settings = replace(settings, reduced_locked=True)
    run_info = run_preflight(args.arm, arm, profile, settings, step_hz=args.step_hz,
                             log_path=out_dir / f"{stem}{SESSION_SUFFIX}",
                             cell=None if cell is None else CellRun(cell, args.cell,
                                                                    not args.no_clearance),
                             link=args.lockstep_link)
    result = run_info.result
    paths = {"session_log": str(run_info.log_path), "summary": str(out_dir / f"{stem}.json")}
    if not args.no_report:
        from ..sessions.report import ReportContext, write_report
        paths["report"] = str(write_report(out_dir / f"{stem}.html", result, ReportContext(
            arm=arm, profile=profile.name, profile_source=profile.source, rate_hz=args.rate,
            step_hz=args.step_hz, started_at=run_info.started_at, wall_s=run_info.wall_s,
            session_log=str(run_info.log_path),
            closest_picture=closest_picture(args.arm, args.cell, result))))
    summary = _summary(result, arm, profile, args, run_info, paths)
    try:
        Path(paths["summary"]).write_text(json.dumps(json_safe(summary), indent=2) + "\n",
                                          encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot write {paths['summary']}: {exc.strerror or exc}",
                          field="out") from None
    if args.json:
        print(json.dumps(json_safe(summary), indent=2))
    else:
        print(format_text(result, arm, profile.name, run_info, paths))
    return 0 if result.passed else 1


def closest_picture(arm_spec: str, cell_spec: str | None, result: PreflightResult
                    ) -> bytes | None:
    """The simulated arm in its workcell at the closest approach, or None (no workcell, or
    the picture could not be made: the report says the rest)."""
    if result.cell is None or result.cell.closest_q is None:
        return None
    try:
        return snapshot_png(arm_spec, result.cell.closest_q, cell=cell_spec)
    except TransportError as exc:
        print(f"jogwire preflight: no picture of the closest approach ({exc})",
              file=sys.stderr)
        return None


def _free_stem(folder: Path, base: str) -> str:
    stamp = datetime.now().strftime("%Y%m%d-%H%M%S")
    stem = f"{base}-{stamp}"
    n = 2
    while any((folder / f"{stem}{ext}").exists() for ext in (".html", ".json", SESSION_SUFFIX)):
        stem = f"{base}-{stamp}-{n}"
        n += 1
    return stem


# ----------------------------------------------------------------------------------------
# Output
# ----------------------------------------------------------------------------------------

def _summary(result: PreflightResult, arm: Arm, profile: Profile, args: argparse.Namespace,
             run_info: PreflightRun, paths: dict[str, str]) -> dict[str, Any]:
    out = result.as_dict()
    out.update({
        "arm": arm.name, "profile": profile.name, "profile_source": profile.source,
        "rate_hz": args.rate, "step_hz": args.step_hz, "started_at": run_info.started_at,
        "wall_s": run_info.wall_s,
        "real_time_factor": result.duration_s / run_info.wall_s if run_info.wall_s else None,
        "files": paths})
    return out


def format_text(r: PreflightResult, arm: Arm, profile: str, run_info: PreflightRun,
                paths: dict[str, str]) -> str:
    """The human-readable verdict and table."""
    speed = r.duration_s / run_info.wall_s if run_info.wall_s else math.inf
    lines = [f"preflight {arm.name} / {profile}: {r.verdict.upper()}  ({r.duration_s:.2f} s "
             f"of motion, {r.cycles} cycles at {r.rate_hz:g} Hz, {speed:.1f}x real time)",
             ""]
    rows = []
    for j, rep in zip(arm.joints, r.joints):
        k = math.degrees(1.0) if j.is_revolute else 1.0
        unit = "deg" if j.is_revolute else "m"
        rows.append([j.name, unit,
                     f"{rep.peak_speed * k:.2f} / {rep.peak_speed_measured * k:.2f}",
                     f"{rep.rated_speed * k:.2f}", _pct(rep.peak_speed, rep.rated_speed),
                     f"{rep.peak_accel * k:.1f} / {rep.peak_accel_measured * k:.1f}",
                     f"{rep.rated_accel * k:.1f}", _pct(rep.peak_accel, rep.rated_accel),
                     f"{rep.min_limit_distance * k:.2f}", f"{rep.limit_margin * k:.2f}"])
    lines += format_table(["joint", "unit", "peak speed cmd/meas", "rated", "of rated",
                           "peak accel cmd/meas", "rated", "of rated", "closest to limit",
                           "margin"], rows)
    cap_kind = " (reduced speed)" if r.reduced else ""
    lines += ["", f"TCP       peak {r.tcp_peak_speed:.3f} m/s commanded, "
                  f"{r.tcp_peak_speed_measured:.3f} m/s measured; cap {r.tcp_cap:.3f} m/s"
                  f"{cap_kind}"]
    if r.tcp_peak_speed_reduced is not None and not r.reduced:
        lines.append(f"          in reduced-speed segments peak {r.tcp_peak_speed_reduced:.3f} "
                     f"m/s commanded (cap {min(REDUCED_SPEED_M_S, r.tcp_cap_normal):.3f} m/s)")
    if r.cell is not None:
        lines.append(format_cell(r.cell))
    if r.findings:
        lines += ["", "reasons"] + [f"  - {f.message}" for f in r.findings]
    if r.notes:
        lines += ["", "notes"] + [f"  - {n}" for n in r.notes]
    lines += [""] + [f"{name:<12}{path}" for name, path in
                     (("report", paths.get("report")), ("summary", paths["summary"]),
                      ("session log", paths["session_log"])) if path]
    return "\n".join(lines)


def _pct(value: float, of: float) -> str:
    return f"{100.0 * value / of:.0f} %" if of > 0 else "—"


__all__ = ["add_arguments", "format_text", "run"]
