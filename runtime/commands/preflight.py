"""`jogwire preflight ARM PROFILE`: prove a motion against the arm's ratings before hardware moves.

PROFILE is a script (a shipped profile name or a .toml of timed twist segments) or a
recorded session (.jwlog, whose recorded inputs are played again). The control cycle runs
in lockstep with the simulated arm in a child process (`runtime.sessions.lockstep`), faster than
real time, on the arm's measured pose every cycle. The run is evaluated by
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
import time
from dataclasses import dataclass, replace
from datetime import datetime
from pathlib import Path
from typing import Any, Callable

import numpy as np

from ..errors import ConfigError, LogError
from ..operator.inputs.script import ScriptSource, load_script
from ..control.limits import REDUCED_SPEED_M_S
from ..sessions.lockstep import STATE_LAGS, LockstepSim, run_closed_loop, substeps_for
from ..control.mapping import InputFrame, load_pad
from ..arm.model import Arm, load_arm
from ..control.cycle import ControlCycle
from ..arm.cell import load_cell
from ..errors import TransportError
from ..link.arm_process import snapshot_png
from ..link.protocol import cell_hello_for
from ..sessions.cell_check import CellRun, format_cell, judge_cell, with_cell
from ..sessions.preflight import Finding, PreflightResult, TraceBuilder, evaluate
from ..operator.progress import Progress
from ..sessions.log_schema import SESSION_SUFFIX, cycle_record
from ..sessions.log_writer import SessionRecorder
from ..sessions.log_reader import read_session
from ..sessions.rerun import RecordedInputs, continuous_records, cycle_settings, inputs_of
from ..control.safety import SafetySettings

DEFAULT_OUT = "preflight"
TAIL_S = 0.1          # cycles run after the profile ends: the arm is seen to come to rest
RECORDER_QUEUE = 1 << 16


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = ("exit status: 0 pass, 1 fail, 2 bad input. What is checked and how: "
                     "docs/PREFLIGHT.md")
    parser.add_argument("arm", metavar="ARM",
                        help="a shipped arm name (e.g. reach7), an arm .toml or a .urdf file")
    parser.add_argument("profile", metavar="PROFILE",
                        help="a motion profile: a shipped profile name, a profile .toml, or a "
                             f"recorded session ({SESSION_SUFFIX}) whose inputs are played again")
    parser.add_argument("--rate", type=float, default=500.0, metavar="HZ",
                        help="control rate (default 500)")
    parser.add_argument("--step-hz", type=float, default=1000.0, metavar="HZ",
                        help="physics steps per second, a whole multiple of --rate "
                             "(default 1000)")
    parser.add_argument("--state-lag", type=int, choices=STATE_LAGS, default=1,
                        metavar="CYCLES",
                        help="how many cycles the measured pose each cycle works on lags "
                             "behind the arm: 1 (default) as over a real link, 0 for a link "
                             "without delay")
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


@dataclass(frozen=True)
class Profile:
    """A motion to prove: its input frame at each cycle, its length and start pose."""

    name: str
    source: str
    kind: str                      # "script" or "session"
    duration_s: float
    frame_at: Callable[[int, float], InputFrame]
    start_q: np.ndarray | None     # None: the arm's home pose
    pad_name: str
    pad_source: str
    reduced_locked: bool
    damage: str | None = None      # a recorded profile cut short by damage in the log


def load_profile(spec: str, arm: Arm, rate_hz: float) -> Profile:
    """A shipped profile name, a profile .toml or a session log (.jwlog)."""
    if spec.endswith(SESSION_SUFFIX):
        return _session_profile(Path(spec), arm, rate_hz)
    script = load_script(spec, arm)
    source = ScriptSource(script)
    pad = load_pad("keyboard")   # a script's frames carry their commands; the pad is idle
    return Profile(name=script.name, source=script.source, kind="script",
                   duration_s=script.duration_s,
                   frame_at=lambda _k, t: source.read(t), start_q=None, pad_name=pad.name,
                   pad_source=pad.source, reduced_locked=False)


def _session_profile(path: Path, arm: Arm, rate_hz: float) -> Profile:
    session = read_session(path)
    records, damage = continuous_records(session)
    if not records:
        raise LogError(f"{path}: no cycle records to play"
                       + (f" ({session.problems[0]})" if session.problems else ""))
    if session.header.arm.n != arm.n:
        raise ConfigError(f"{path} was recorded with {session.header.arm.n} joints "
                          f"({session.header.arm.name}); {arm.name} has {arm.n}", field="arm")
    settings = cycle_settings(session.header.settings, where=str(path))
    inputs = RecordedInputs(records, inputs_of(records, str(path)), 1.0 / rate_hz)
    return Profile(name=path.stem, source=str(path), kind="session",
                   duration_s=inputs.duration_s, frame_at=inputs.frame_at,
                   start_q=np.array(records[0].q) if records[0].q else None,
                   pad_name=settings.pad.name, pad_source=settings.pad.source,
                   reduced_locked=settings.reduced_locked, damage=damage)


def run(args: argparse.Namespace) -> int:
    substeps_for(args.rate, args.step_hz)        # a bad rate is an error before anything starts
    arm = load_arm(args.arm)
    if args.no_clearance and not args.cell:
        raise ConfigError("--no-clearance needs --cell", field="no-clearance")
    cell = load_cell(args.cell, arm) if args.cell else None
    profile = load_profile(args.profile, arm, args.rate)
    out_dir = Path(args.out)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError(f"cannot create {out_dir}: {exc.strerror or exc}",
                          field="--out") from None
    stem = _free_stem(out_dir, f"{arm.name}-{profile.name}")
    reduced = bool(args.reduced or profile.reduced_locked)
    run_info = run_preflight(args.arm, arm, profile, rate_hz=args.rate, step_hz=args.step_hz,
                             reduced=reduced, log_path=out_dir / f"{stem}{SESSION_SUFFIX}",
                             state_lag=args.state_lag,
                             cell=None if cell is None else CellRun(cell, args.cell,
                                                                    not args.no_clearance))
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
        Path(paths["summary"]).write_text(json.dumps(_json_safe(summary), indent=2) + "\n",
                                          encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot write {paths['summary']}: {exc.strerror or exc}",
                          field="--out") from None
    if args.json:
        print(json.dumps(_json_safe(summary), indent=2))
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


@dataclass(frozen=True)
class PreflightRun:
    result: PreflightResult
    log_path: Path
    started_at: str
    wall_s: float
    cycles: int
    compute_median_s: float


def run_preflight(arm_spec: str, arm: Arm, profile: Profile, *, rate_hz: float,
                  step_hz: float, reduced: bool, log_path: Path, state_lag: int = 1,
                  progress: Progress | None = None, cell: CellRun | None = None
                  ) -> PreflightRun:
    """Run `profile` on the simulated arm in lockstep, record it, evaluate it.

    state_lag: cycles the measured pose lags behind the arm (`lockstep.run_closed_loop`).
    cell: the workcell the arm works in: the simulated arm holds it and reports contacts,
    and the verdict adds contacts and clearance (`runtime.sessions.cell_check`)."""
    safety = SafetySettings()
    pad = load_pad(profile.pad_source) if Path(profile.pad_source).exists() \
        else load_pad(profile.pad_name)
    cycle_settings_ = {"command": "preflight", "input": f"{profile.kind}:{profile.source}",
                       "profile": profile.name, "pad": pad.name, "pad_source": pad.source,
                       "rate_hz": rate_hz, "step_hz": step_hz, "reduced_locked": reduced,
                       "stale_after_s": safety.stale_after_s,
                       "overrun_limit": safety.overrun_limit, "target": "sim child, lockstep",
                       "target_kind": "sim child", "clock": "simulated (t = cycle / rate)",
                       "state_lag_cycles": state_lag,
                       "cell": None if cell is None else cell.spec,
                       "clearance": cell is not None and cell.clearance}
    cycle = ControlCycle(arm, pad, rate_hz=rate_hz, safety=safety, reduced_locked=reduced,
                         state_lag_cycles=state_lag,
                         cell=cell.cell if cell is not None and cell.clearance else None)
    dt = cycle.dt_s
    n_cycles = int(math.ceil((profile.duration_s + TAIL_S) * rate_hz - 1e-9))
    started_at = datetime.now().astimezone()
    bar = progress if progress is not None else \
        Progress(f"preflight {arm.name} {profile.name}", n_cycles * dt)
    computes = np.zeros(n_cycles)
    wall0 = time.perf_counter()
    contacts: list[tuple[float, str, str, float]] = []
    with LockstepSim(arm_spec, arm, rate_hz=rate_hz, step_hz=step_hz,
                     start_q=profile.start_q, cell_spec=None if cell is None else cell.spec,
                     cell=None if cell is None else cell_hello_for(cell.cell)) as sim, \
            SessionRecorder.start(log_path, arm, cycle_settings_, started_at=started_at,
                                  queue_size=RECORDER_QUEUE, encode_in_caller=True) as recorder:
        trace = TraceBuilder(arm, sim.first.q, sim.first.qd, capacity=n_cycles)

        def prepare(k: int, t: float, frame: InputFrame, out: Any, q: np.ndarray,
                    compute_s: float, state_age_s: float) -> None:
            """Record the cycle while the simulated arm steps."""
            rec = cycle_record(k, t, frame, out, q, state_age_s=state_age_s, overrun_streak=0,
                               period_s=dt, compute_s=compute_s, overrun=False)
            recorder.record(rec)
            sol = out.solution
            trace.add_cycle(rec, joint_mode=out.intent.mode == "joint",
                            commanded_twist=np.zeros(6) if sol is None else sol.commanded_twist)
            computes[k] = compute_s

        for c in run_closed_loop(cycle, sim, profile.frame_at, n_cycles,
                                 state_lag=state_lag, prepare=prepare):
            trace.add_state(c.after.q, c.after.qd, c.after.limited, cycle=c.k)
            contacts += [(c.t_s, a, b, depth) for a, b, depth in c.after.contacts]
            bar.update((c.k + 1) * dt)
        bar.close()
        arm_cell = sim.arm_cell
    wall = time.perf_counter() - wall0
    built = trace.build()
    result = evaluate(arm, built, rate_hz=rate_hz, reduced=reduced)
    if cell is not None:
        result = with_cell(result, *judge_cell(arm, cell.cell, built, contacts, arm_cell))
    logged = recorder.stats()
    if logged.failed or logged.dropped or logged.lost:
        result = replace(result, notes=result.notes + (
            f"the session log is incomplete: {logged.written} of {n_cycles} cycles written"
            + (f" ({logged.failed})" if logged.failed else ""),))
    if profile.damage is not None:
        result = _add_finding(result, Finding(
            "damaged_profile", None, None, None, None, "",
            f"the profile log is damaged: {profile.damage}; the rest was not proven"))
    return PreflightRun(result, log_path, started_at.isoformat(timespec="seconds"), wall,
                        n_cycles, float(np.median(computes)) if n_cycles else 0.0)


def _add_finding(result: PreflightResult, finding: Finding) -> PreflightResult:
    return replace(result, verdict="fail", findings=result.findings + (finding,))


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


def _json_safe(value: Any) -> Any:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    return value


def format_text(r: PreflightResult, arm: Arm, profile: str, run_info: PreflightRun,
                paths: dict[str, str]) -> str:
    """The human-readable verdict and table."""
    from ..operator.terminal import format_table
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


__all__ = ["Profile", "PreflightRun", "add_arguments", "format_text", "load_profile", "run",
           "run_preflight"]
