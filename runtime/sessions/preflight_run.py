"""A preflight run: a motion profile played on the simulated arm in lockstep, recorded, and
judged against the arm's ratings (`runtime.sessions.preflight.evaluate`).

A profile is a script (a shipped profile name or a .toml of timed twist segments) or a
recorded session (.jwlog, whose recorded inputs are played again). The control cycle runs in
lockstep with the simulated arm in a child process (`runtime.sessions.lockstep`), faster than
real time, on the arm's measured pose every cycle.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, replace
from datetime import datetime
from pathlib import Path
from typing import Any, Callable

import numpy as np

from ..arm.model import Arm
from ..control.cycle import ControlCycle, CycleOutput
from ..control.intent import InputFrame
from ..control.pads import load_pad
from ..control.settings import RunSettings
from ..errors import ConfigError, LogError
from ..link.protocol import cell_hello_for
from ..operator.inputs.script import ScriptSource, load_script
from ..operator.progress import Progress
from .cell_check import CellRun, judge_cell, with_cell
from .cycle_columns import CycleColumns
from .lockstep import LockstepSim, run_closed_loop
from .log_reader import read_session
from .log_schema import SESSION_SUFFIX
from .log_writer import CALLER_BLOCK_RECORDS, SessionRecorder
from .preflight import Finding, PreflightResult, TraceBuilder, evaluate
from .rerun import RecordedInputs, continuous_records, cycle_settings, inputs_of

__all__ = ["PreflightRun", "Profile", "load_profile", "preflight_settings", "run_preflight"]

TAIL_S = 0.1          # cycles run after the profile ends: the arm is seen to come to rest
RECORDER_QUEUE = 1 << 16
BLOCK_CYCLES = CALLER_BLOCK_RECORDS   # cycles a block of the log holds, as the recorder packs
# The safety gate's stale_after in a preflight run. In lockstep each cycle works on a pose at
# most `state_lag_cycles` old, so at the usual rates it never binds; 0.05 s is what preflight
# has always recorded in its logs.
PREFLIGHT_STALE_AFTER_S = 0.05


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
                   reduced_locked=settings.run.reduced_locked, damage=damage)


@dataclass(frozen=True)
class PreflightRun:
    result: PreflightResult
    log_path: Path
    started_at: str
    wall_s: float
    cycles: int
    compute_median_s: float


def preflight_settings(*, rate_hz: float, reduced: bool, state_lag: int) -> RunSettings:
    """The settings of a preflight run: a lockstep run with its state lag."""
    return RunSettings(rate_hz=rate_hz, stale_after_s=PREFLIGHT_STALE_AFTER_S,
                       reduced_locked=reduced, state_lag_cycles=state_lag)


def run_preflight(arm_spec: str, arm: Arm, profile: Profile, settings: RunSettings, *,
                  step_hz: float, log_path: Path,
                  progress: Progress | None = None, cell: CellRun | None = None,
                  link: str = "auto") -> PreflightRun:
    """Run `profile` on the simulated arm in lockstep, record it, evaluate it.

    link: how the messages cross to the child (`lockstep.link_kind`).

    settings.state_lag_cycles: cycles the measured pose lags behind the arm
    (`lockstep.run_closed_loop`; None counts as 1).
    cell: the workcell the arm works in: the simulated arm holds it and reports contacts,
    and the verdict adds contacts and clearance (`runtime.sessions.cell_check`)."""
    settings = replace(settings, state_lag_cycles=settings.effective_state_lag)
    rate_hz, reduced = settings.rate_hz, settings.reduced_locked
    pad = load_pad(profile.pad_source) if Path(profile.pad_source).exists() \
        else load_pad(profile.pad_name)
    header = settings.to_header(
        command="preflight", input=f"{profile.kind}:{profile.source}", profile=profile.name,
        pad=pad.name, pad_source=pad.source, step_hz=step_hz, target="sim child, lockstep",
        target_kind="sim child", clock="simulated (t = cycle / rate)",
        **({} if cell is None else {"cell": cell.spec, "clearance": cell.clearance}))
    cycle = ControlCycle(arm, pad, settings,
                         cell=cell.cell if cell is not None and cell.clearance else None)
    dt = cycle.dt_s
    n_cycles = int(math.ceil((profile.duration_s + TAIL_S) * rate_hz - 1e-9))
    started_at = datetime.now().astimezone()
    bar = progress if progress is not None else \
        Progress(f"preflight {arm.name} {profile.name}", n_cycles * dt)
    computes = np.zeros(n_cycles)
    contacts: list[tuple[float, str, str, float]] = []
    wall0 = time.perf_counter()
    with LockstepSim(arm_spec, arm, rate_hz=rate_hz, step_hz=step_hz,
                     start_q=profile.start_q, cell_spec=None if cell is None else cell.spec,
                     cell=None if cell is None else cell_hello_for(cell.cell),
                     link=link) as sim, \
            SessionRecorder.start(log_path, arm, header, started_at=started_at,
                                  queue_size=RECORDER_QUEUE, encode_in_caller=True) as recorder:
        trace = TraceBuilder(arm, sim.first.q, sim.first.qd, capacity=n_cycles)
        cycles = CycleColumns()
        commanded: list[np.ndarray] = []     # each kept cycle's commanded twist, base axes

        def prepare(k: int, t: float, frame: InputFrame, out: Any, q: np.ndarray,
                    compute_s: float, state_age_s: float) -> None:
            """Keep the cycle for the log and the verdict while the simulated arm steps."""
            cycles.add(k, t, frame, out, q, state_age_s=state_age_s, overrun_streak=0,
                       period_s=dt, compute_s=compute_s, overrun=False)
            commanded.append(_commanded_twist(out))
            computes[k] = compute_s
            if len(cycles) == BLOCK_CYCLES:
                _hand_over(cycles, commanded, recorder, trace)

        for c in run_closed_loop(cycle, sim, profile.frame_at, n_cycles,
                                 state_lag=settings.effective_state_lag, prepare=prepare):
            trace.add_state(c.after.q, c.after.qd, c.after.limited, cycle=c.k)
            if c.after.contacts:
                contacts += [(c.t_s, a, b, depth) for a, b, depth in c.after.contacts]
            bar.update((c.k + 1) * dt)
        _hand_over(cycles, commanded, recorder, trace)
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


def _hand_over(cycles: CycleColumns, commanded: list[np.ndarray], recorder: SessionRecorder,
               trace: TraceBuilder) -> None:
    """The cycles kept so far, with their commanded twists, to the log and the verdict's
    trace as one block; record by record should they not gather into one (a value that
    fits no column: the log skips that record, the trace still gets it)."""
    if not cycles:
        return
    try:
        block = cycles.block()
    except (TypeError, ValueError, LogError):
        for rec, twist in zip(cycles.records(), commanded):
            recorder.record(rec)
            trace.add_cycle(rec, commanded_twist=twist)
    else:
        recorder.record_block(block)
        trace.add_cycles(block, np.array(commanded).reshape(-1, 6))
    cycles.clear()
    commanded.clear()


_NO_TWIST = np.zeros(6)
_JOINT_JOG = np.full(6, math.nan)


def _commanded_twist(out: CycleOutput) -> np.ndarray:
    """The twist the cycle was asked for, in base axes (NaN in a joint jog)."""
    if out.intent.mode == "joint":
        return _JOINT_JOG
    return _NO_TWIST if out.solution is None else out.solution.commanded_twist


def _add_finding(result: PreflightResult, finding: Finding) -> PreflightResult:
    return replace(result, verdict="fail", findings=result.findings + (finding,))
