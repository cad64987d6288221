"""A drive session: move an arm's tool by hand — the main job, end to end.

    input (pad, keys, script, network) ─► ControlCycle: mapping ─► safety gate ─► solver
    and limits ─► rates over the wire ─► arm side (the simulated arm as a child process,
    or a bridge with --target) ─► measured state ─► back into the next cycle
                                                     every cycle ─► session log

`run_drive` starts the simulated arm as a child on a free loopback port (or connects to a
target), records the session and runs the loop; `jogwire drive` (runtime.commands.drive)
parses the command line into its arguments.

Threads. The control loop runs in its own thread (`FixedRateLoop.start`); the main thread
(`runtime.sessions.drive_ui`) owns pygame and runs the status window, or, without one, pumps
the pad's events and prints the status line. The loop publishes a
`StatusSnapshot` every few cycles by replacing one reference; the main thread adds the
loop's timing statistics a few times per second (percentiles are too dear for the loop).

Stopping. Every way to stop (duration, end of the script, window closed, Ctrl-C, SIGTERM,
the arm side gone) asks the loop to *end*: it keeps cycling with motion held ("session
ending"), so zero rates go out and are recorded, until a state shows the arm side has applied
them and measures the arm at rest (or `SETTLE_TIMEOUT_S` passes). Then the recorder closes
and the simulated arm is stopped. A second Ctrl-C ends the loop at once.

Faults. Besides what the safety gate watches itself (input device, state age, overruns,
the link's round trip), the loop holds motion when the command path fails: this loop paused
longer than stale_after, the arm side reports that its watchdog took over, it has applied
none of our rates for stale_after, it refused us, or it came back as another arm. A hold
makes the gate forget the enable press, so motion never resumes by itself when the fault
clears.

Link health. State age is how old the measured q is when a cycle uses it: with the arm side
on this host and the same monotonic clock (our own child) it is now − the state's stamp,
otherwise now − when it arrived. Round trip is the time from sending rates number k to the
first state whose `applied_seq` is k, as the loop sees it (so it includes up to one period
of waiting for the next cycle). Its median over the last half second (`RoundTripMeter`) is
what the gate compares with the round-trip limit and what the status shows.
"""

from __future__ import annotations

import contextlib
import gc
import math
import os
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, TextIO

import numpy as np

from ..arm.cell import Cell
from ..arm.kinematics import analyse_pose
from ..arm.model import Arm
from ..control.cycle import ControlCycle, CycleOutput
from ..control.intent import DirectCommand, InputFrame
from ..control.loop import FixedRateLoop, Tick, TimingStats
from ..control.pads import PadMapping
from ..control.settings import RunSettings
from ..link.arm_process import ArmProcess
from ..link.protocol import (
    CellHello,
    Hello,
    Rates,
    RoundTripMeter,
    State,
    StateFreshness,
    cell_hello_for,
    encode,
    hello_differences,
    hello_for,
    rates_message,
)
from ..link.transport import ArmClient, ClientKeys
from ..operator.cell_outlines import CellOutlines
from ..operator.inputs import FiniteInput, InputSource, open_source
from ..operator.terminal import say
from .archive import BYTES_PER_MB, ArchiveCap, prune_sessions
from .drive_stats import RunStats
from .drive_ui import DriveUI, MainThread, StopSignals
from .log_schema import cycle_record
from .log_writer import SessionRecorder, new_session_path
from .stats import above

__all__ = ["DriveInput", "DriveResult", "DriveSession", "DriveTarget", "build_summary",
           "enter_realtime", "run_drive", "sim_child_options", "warm_up"]

SCRIPT_TAIL_S = 0.5               # after a script's last segment: watch the arm stop, then end
SETTLE_TIMEOUT_S = 1.0            # ending: longest wait for the arm to be measured at rest
REST_SPEED = 1e-3                 # |q̇| at or below this (rad/s or m/s) counts as at rest
REFUSAL_HOLD_S = 0.5              # motion held this long after the arm side refused us
HANDSHAKE_TIMEOUT_S = 10.0
SNAPSHOT_HZ = 60.0                # status snapshots per second published by the loop
CONTACT_SHOWN_S = 0.5             # a contact report stays on the screen at least this long
REALTIME_PRIORITY = 50            # SCHED_FIFO level for --realtime: above ordinary work and
                                  # below the kernel's own threads (common practice)


# ----------------------------------------------------------------------------------------
# The loop body
# ----------------------------------------------------------------------------------------

class DriveSession:
    """One drive session's control loop body and what it publishes.

    `body(tick)` runs on the loop thread; `request_end`, `latest` and `stats` are for the
    main thread. Times are readings of `clock` (s); the same clock drives the loop.
    """

    def __init__(self, *, arm: Arm, pad: PadMapping, settings: RunSettings,
                 source: InputSource, client: ArmClient, recorder: SessionRecorder | None,
                 clock: Callable[[], float], duration_s: float | None, same_clock: bool,
                 target: str, lockstep: bool = False, cell: Cell | None = None) -> None:
        self.arm = arm
        self.settings = settings
        self.cycle = ControlCycle(arm, pad, settings, cell=cell)
        self.cell = cell
        self.cell_hello = None if cell is None else cell_hello_for(cell)  # sent after hellos
        self.cell_name = None if cell is None else cell.name
        # the workcell in the window's views
        self.outlines = None if cell is None else CellOutlines.of_cell(cell)
        self.source = source
        # a script ends: checked once here, not every cycle (a protocol isinstance is slow)
        self._finite = source if isinstance(source, FiniteInput) else None
        self.client = client
        self.recorder = recorder
        self.clock = clock
        self.stale_after_s = settings.stale_after_s
        self.duration_s = duration_s
        self.same_clock = same_clock
        self.target = target
        self.lockstep = lockstep
        self.stats = RunStats(arm, settings.rate_hz)
        self.freshness = StateFreshness(settings.stale_after_s)
        self.round_trip = RoundTripMeter()
        self.publish_every = max(1, round(settings.rate_hz / SNAPSHOT_HZ))
        self.t0: float | None = None
        self.q: np.ndarray | None = None
        self.qd: np.ndarray | None = None
        self.state_stamp_s: float | None = None      # when q was measured/received
        self.state_received_s: float | None = None
        self.arm_status = ""
        self.arm_cell: CellHello | None = None       # the arm side's answer to our workcell
        self.recent_contacts: tuple[tuple[tuple[str, str], ...], float] = ((), -math.inf)
        self.seq = 0
        self.cycles = 0
        self.latest = None                           # StatusSnapshot, replaced whole
        self.end_reason: str | None = None
        self.stop_outcome = ""
        self._end_request: str | None = None
        self._force = False
        self._ending_since: float | None = None
        self._ending_first_seq = 0
        self._applied_seen = 0
        self._applied_seen_at_s: float | None = None  # when applied_seq last advanced
        self._last_sent_s: float | None = None      # when this loop last sent rates
        self._refused: tuple[str, float] | None = None
        self._mismatch: str | None = None
        self._prev_start: float | None = None
        self._script_done_at: float | None = None
        from ..operator.status_window import StatusSnapshot  # pygame: imported only when driving
        self._snapshot_type = StatusSnapshot

    # -- other threads -------------------------------------------------------------------

    def request_end(self, why: str) -> None:
        """Ask the loop to end (any thread). A second request ends it without settling."""
        if self._end_request is None:
            self._end_request = why
        else:
            self._force = True

    def _elapsed_s(self, now: float) -> float:
        """Session time (s): since the first cycle."""
        return 0.0 if self.t0 is None else now - self.t0

    @property
    def ending(self) -> bool:
        return self._ending_since is not None

    # -- state from the arm side ---------------------------------------------------------

    def offer_state(self, state: State, now: float) -> None:
        """Take a received state (sequence and lateness checked); update link figures."""
        if not self.freshness.offer(state, int(now * 1e9)):
            return
        self.q = np.asarray(state.q)
        self.qd = np.asarray(state.qd)
        self.state_received_s = now
        self.state_stamp_s = state.t_ns * 1e-9 if self.same_clock else now
        self.arm_status = state.status
        self.stats.add_state(state, self.qd)
        if state.applied_seq > self._applied_seen:
            self._applied_seen, self._applied_seen_at_s = state.applied_seq, now
            rtt = now - state.echo_ns * 1e-9
            if state.echo_ns and rtt >= 0.0:    # (an echo from the future is no measurement)
                self.round_trip.add(rtt, now)
                self.stats.round_trip.add(rtt)

    def _receive(self, now: float, timeout_s: float = 0.0) -> None:
        inbox = self.client.receive(timeout_s)
        if inbox.cell is not None:
            self.arm_cell = inbox.cell
        for contact in inbox.contacts:
            self.stats.add_contact(contact, now - (self.t0 or now))
            self.recent_contacts = (tuple((a, b) for a, b, _ in contact.pairs), now)
        if inbox.refuse is not None and inbox.refuse.code != "no_hello":
            self._refused = (f"the arm side refused us ({inbox.refuse.code}): "
                             f"{inbox.refuse.reason}", now)
        if inbox.hello is not None:
            self._on_hello(inbox.hello, now)
        self.freshness.refuse_overtaken(inbox.overtaken)
        if inbox.state is not None:
            self.offer_state(inbox.state, now if timeout_s == 0.0 else self.clock())

    def _on_hello(self, theirs: Hello, now: float) -> None:
        """The arm side answered a hello again (it restarted, or lost us): its state and
        applied sequences start afresh. Another arm on the same endpoint is refused."""
        diffs = hello_differences(self.client.hello, theirs)
        if diffs:
            self._mismatch = "the arm side is now another arm: " + "; ".join(diffs)
            return
        self._mismatch = None
        self.freshness.reset()
        self._applied_seen, self._applied_seen_at_s = 0, None
        if self.cell_hello is not None:        # a new exchange: ask for contacts again
            self.client.send(self.cell_hello)

    def _await_applied(self, seq: int, until: float) -> None:
        """Lockstep (docs/PROTOCOL.md §6): wait for the state of the step that applied
        rates `seq`, so the arm side steps exactly once per cycle and none is superseded."""
        while self._applied_seen < seq and (remaining := until - self.clock()) > 0:
            self._receive(self.clock(), remaining)

    # -- one cycle -----------------------------------------------------------------------

    def body(self, tick: Tick) -> bool:
        now = tick.start_s
        if self.t0 is None:
            self.t0 = now
        frame = self.source.read(now)
        self._receive(now)
        hold = self._hold(now)
        rtt = self.round_trip.level_s
        out = self.cycle.step(frame, now, self.q, self.state_stamp_s,
                              overrun_streak=tick.overrun_streak, round_trip_s=rtt, hold=hold)
        self.stats.add_round_trip(rtt, self.settings.round_trip_limit_s)
        self.seq += 1
        sent = self._last_sent_s = self.clock()
        self.client.send(rates_message(self.seq, int(sent * 1e9), out.rates,
                                       reduced=out.intent.reduced))
        if self.lockstep:
            self._await_applied(self.seq, sent + self.stale_after_s)
        if self.ending and not self._ending_first_seq:
            self._ending_first_seq = self.seq
        self.stats.read_to_send.add(sent - now)
        self.stats.add_cycle(out, tick.index, now - self.t0)
        self.stats.add_clearance(out, now - self.t0)
        # (a state that came in after `now` was read has a stamp a little after it)
        age = None if self.state_stamp_s is None else max(now - self.state_stamp_s, 0.0)
        if age is not None:
            self.stats.state_age.add(age)
        if self.recorder is not None and self.q is not None:
            period = tick.period_s if self._prev_start is None else now - self._prev_start
            end = self.clock()
            self.recorder.record(cycle_record(
                tick.index, self._elapsed_s(now), frame, out, self.q, state_age_s=age,
                overrun_streak=tick.overrun_streak, period_s=period, compute_s=end - now,
                overrun=end > tick.deadline_s + tick.period_s))
        self._prev_start = now
        self.cycles += 1
        if tick.index % self.publish_every == 0:
            self.latest = self._snapshot(now, out, age)
        return self._keep_going(now)

    def _hold(self, now: float) -> str | None:
        if self._ending_since is None:
            why = self._end_request or self._due_end(now)
            if why is not None:
                self.end_reason = why
                self._ending_since = now
        if self._ending_since is not None:
            return "session ending: holding zero until the arm is at rest"
        if self._mismatch is not None:
            return self._mismatch
        if self._refused is not None and now - self._refused[1] < REFUSAL_HOLD_S:
            return self._refused[0]
        return self._rates_not_followed(now)

    def _rates_not_followed(self, now: float) -> str | None:
        """A fault of the command path: this loop paused, the arm side says it is not
        following our rates, or it has applied none of ours for stale_after. Holding makes
        the gate forget the press, so motion does not resume when the rates get through
        again. (A steady delay is not caught here: the rates keep being applied, late.)"""
        if self._last_sent_s is not None and \
                (paused := now - self._last_sent_s) > self.stale_after_s:
            return (f"this control loop paused for {paused * 1e3:.0f} ms (the arm side's "
                    "watchdog stops the arm)")
        if self.arm_status == "stale":
            return "the arm side is not getting our rates (its watchdog is stopping it)"
        if self._applied_seen_at_s is not None and \
                (quiet := now - self._applied_seen_at_s) > self.stale_after_s:
            return f"the arm side has applied none of our rates for {quiet * 1e3:.0f} ms"
        return None

    def _due_end(self, now: float) -> str | None:
        if self.duration_s is not None and self._elapsed_s(now) >= self.duration_s:
            return f"--duration {self.duration_s:g} s reached"
        finite = self._finite
        if finite is not None and self.duration_s is None and finite.finished(now):
            if self._script_done_at is None:
                self._script_done_at = now
            elif now - self._script_done_at >= SCRIPT_TAIL_S:
                return "the script finished"
        return None

    def _keep_going(self, now: float) -> bool:
        if self._force:
            self.stop_outcome = "ended at once (second stop request)"
            return False
        if self._ending_since is None:
            return True
        waited = now - self._ending_since
        fresh = self.freshness.is_fresh(int(now * 1e9))
        applied = self._applied_seen >= self._ending_first_seq > 0
        if fresh and applied and self.qd is not None:
            top = float(np.max(np.abs(self.qd))) if len(self.qd) else 0.0
            if top <= REST_SPEED:
                self.stop_outcome = (f"zero rates applied; arm measured at rest "
                                     f"{waited * 1e3:.0f} ms after the stop "
                                     f"(max |q̇| {top:.1e})")
                return False
        if waited < SETTLE_TIMEOUT_S:        # (a late state may still come: keep waiting)
            return True
        if not fresh:
            self.stop_outcome = (f"zero rates sent; no fresh arm state within "
                                 f"{SETTLE_TIMEOUT_S:g} s to confirm the stop (the arm side's "
                                 "watchdog ramps to zero)")
        else:
            top = float(np.max(np.abs(self.qd))) if self.qd is not None else math.nan
            self.stop_outcome = (f"zero rates sent; arm not measured at rest within "
                                 f"{SETTLE_TIMEOUT_S:g} s (max |q̇| {top:.3g})")
        return False

    # -- the status snapshot ---------------------------------------------------------------

    def _snapshot(self, now: float, out: CycleOutput, age: float | None):
        intent, sol = out.intent, out.solution
        sigma = manip = damping = None
        binding = None
        if sol is not None:
            sigma, manip, damping, binding = (sol.sigma_min, sol.manipulability, sol.damping,
                                              sol.binding_limit)
        elif self.q is not None:
            pose = analyse_pose(self.arm, self.q)     # what the solver would face here
            sigma, manip = float(pose.singular_values[-1]), pose.manipulability
        connected = self.state_received_s is not None and now - self.state_received_s < 1.0
        return self._snapshot_type(
            arm=self.arm, q=self.q, rates=out.rates, twist=intent.twist,
            allowed=out.verdict.allowed, gate_state=out.verdict.state,
            gate_reason=out.verdict.reason, input_name=self.source.name, mode=intent.mode,
            frame=intent.frame, preset=intent.preset, speed_fraction=intent.speed_fraction,
            speed_m_s=self.cycle.mapper.speeds()[0], direct=intent.direct,
            reduced=intent.reduced, joint=intent.joint, sigma_min=sigma,
            manipulability=manip, damping=damping, binding_limit=binding, target=self.target,
            connected=connected, state_age_s=age, stale_after_s=self.stale_after_s,
            rtt_s=self.round_trip.level_s, elapsed_s=self._elapsed_s(now), note=self._note(now),
            cell=self.outlines, contacts=self._contacts_shown(now), **self._clearance(sol))

    def _clearance(self, sol: Any) -> dict[str, Any]:
        """The nearest pair for the window, when the solve measured it (within d_i); else
        the main thread measures it at the pose (`MainThread.snapshot`), off this loop."""
        from ..operator.status_window import clearance_fields
        report = None if sol is None else sol.clearance
        if report is None or report.nearest_pair is None:
            return {}
        return clearance_fields(report.distances)

    def _contacts_shown(self, now: float) -> tuple[tuple[str, str], ...]:
        """The pairs of the newest contact report, for CONTACT_SHOWN_S after it came."""
        pairs, at = self.recent_contacts
        return pairs if now - at <= CONTACT_SHOWN_S else ()

    def _note(self, now: float) -> str:
        notes = []
        if self.ending:
            notes.append("ending")
        if self.arm_status == "stale":     # the arm side's watchdog is ramping it to zero
            notes.append("arm side: no fresh rates")
        if self.recorder is not None and self.recorder.failed:
            notes.append("RECORDING STOPPED")
        if self._finite is not None:
            name, elapsed_s, total_s = self._finite.progress(now)
            notes.append(f"script {name} {elapsed_s:.1f} / {total_s:.1f} s")
        return " · ".join(notes)


def enter_realtime(priority: int) -> str:
    """Put the calling thread under SCHED_FIFO at `priority` (Linux; needs CAP_SYS_NICE or
    an rtprio limit, `ulimit -r`); threads it starts later inherit it. Returns what it got,
    in words."""
    try:
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(priority))  # 0: this thread
    except (AttributeError, OSError) as exc:
        why = "not available on this system" if isinstance(exc, AttributeError) else \
            f"{exc.strerror or exc}; needs CAP_SYS_NICE or an rtprio limit (ulimit -r)"
        return f"normal (real-time refused: {why})"
    return f"real-time SCHED_FIFO {priority}"


def warm_up(arm: Arm, pad: PadMapping, q: np.ndarray, settings: RunSettings,
            cell: Cell | None = None) -> None:
    """Run every piece of a cycle a few times on a throwaway ControlCycle, so the first real
    cycles do not pay for first calls (imports, caches, numpy's first dispatch)."""
    from ..operator.status_window import StatusSnapshot
    cycle = ControlCycle(arm, pad, settings, cell=cell)
    rate_hz = settings.rate_hz
    frames = [InputFrame("warm-up", True, command=DirectCommand(enable=False))] + \
        [InputFrame("warm-up", True, command=DirectCommand(twist=(0.01, 0, 0, 0, 0, 0)))] * 3
    for k, frame in enumerate(frames):
        t = k / rate_hz
        out = cycle.step(frame, t, q, t)
        cycle_record(k, t, frame, out, q, state_age_s=0.0, overrun_streak=0,
                     period_s=1 / rate_hz, compute_s=0.0, overrun=False).to_wire()
        encode(Rates(seq=k + 1, t_ns=k, qd=out.rates))
    analyse_pose(arm, q)
    StatusSnapshot(arm=arm, q=q)


def build_summary(drive: DriveSession, timing: TimingStats, *, priority: str, input_name: str,
                  target: str, recorder_stats: Any, session_path: Path | None,
                  arm_side_log: str, started_s: float, ended_s: float) -> dict[str, Any]:
    arm, s = drive.arm, drive.stats
    period_s = 1.0 / timing.rate_hz
    m = s.motion
    m.flush()
    joints = [{"name": j.name, "unit": "rad/s" if j.is_revolute else "m/s",
               "peak_commanded": float(s.peak_commanded[i]),
               "peak_measured": float(s.peak_measured[i]),
               "max_speed": j.max_speed, "rated_speed": j.rated_speed,
               "peak_accel": float(m.peak_accel[i]),
               "peak_accel_t_s": None if math.isnan(m.peak_accel_t[i])
               else float(m.peak_accel_t[i]),
               "max_accel": j.max_accel, "rated_accel": j.rated_accel,
               "over_max_accel": above(float(m.peak_accel[i]), j.max_accel),
               "over_rated_accel": above(float(m.peak_accel[i]), j.rated_accel)}
              for i, j in enumerate(arm.joints)]
    return {
        "arm": arm.name, "input": input_name, "target": target,
        "duration_s": ended_s - started_s, "cycles": drive.cycles, "rate_hz": timing.rate_hz,
        "end_reason": drive.end_reason, "stop": drive.stop_outcome,
        "thread_priority": priority,
        "gate_time_s": {k: v * period_s for k, v in sorted(drive.stats.gate_cycles.items())},
        "loop": {"window_cycles": timing.window,
                 "period_p50_s": timing.period_p50_s, "period_p99_s": timing.period_p99_s,
                 "period_max_s": timing.period_max_s, "compute_p50_s": timing.compute_p50_s,
                 "compute_p99_s": timing.compute_p99_s, "late_p50_s": timing.late_p50_s,
                 "late_p99_s": timing.late_p99_s, "overruns": timing.overruns,
                 "overrun_fraction": timing.overrun_fraction,
                 "missed_deadlines": timing.missed_deadlines,
                 "max_overrun_streak": timing.max_overrun_streak},
        "link": {"states": s.states, "states_refused": drive.freshness.refused,
                 "states_dropped": dict(drive.client.dropped),
                 "rates_not_sent": drive.client.send_dropped,
                 "arm_side_limited_states": s.arm_limited,
                 "state_age": s.state_age.summary(), "round_trip": s.round_trip.summary(),
                 "round_trip_limit_s": drive.settings.round_trip_limit_s,
                 "round_trip_over_limit_s": s.round_trip_over * period_s,
                 "round_trip_worst_median_s": s.round_trip_worst_s,
                 "read_to_send": s.read_to_send.summary()},
        "joints": joints,
        "tcp_peak_m_s": s.tcp_peak_m_s, "tcp_cap_m_s": arm.tcp_max_linear_m_s,
        "tcp_peak_rad_s": s.tcp_peak_rad_s, "tcp_cap_rad_s": arm.tcp_max_angular_rad_s,
        "limits": {k: {"cycles": c, "episodes": e} for k, (c, e) in
                   sorted(s.limits.items(), key=lambda kv: -kv[1][0])},
        "stops": [stop.as_dict() for stop in m.stops],
        "cell": drive.cell_name,
        "min_clearance_m": s.min_clearance_m,
        "clearance_pair": None if s.min_clearance_pair is None else list(s.min_clearance_pair),
        "min_clearance_t_s": s.min_clearance_t_s,
        # The arm side answered our workcell with the same one: its contacts are checked.
        "contacts_measured": drive.arm_cell is not None and drive.cell_hello is not None
        and drive.arm_cell.digest == drive.cell_hello.digest,
        "contacts": [{"a": a, "b": b, "t_s": t, "depth_m": d, "steps": n}
                     for (a, b), (t, d, n) in s.contacts.items()],
        "session": None if session_path is None else {
            "path": str(session_path), "written": recorder_stats.written,
            "dropped": recorder_stats.dropped, "lost": recorder_stats.lost,
            "failed": recorder_stats.failed},
        "arm_side": arm_side_log,
    }


def _arm_side_log(file: Any) -> str:
    """The simulated arm's last log line (its own summary), from its captured stderr."""
    file.seek(0)
    lines = [ln.strip() for ln in file.read().decode("utf-8", "replace").splitlines()
             if ln.startswith("jogwire sim:")]
    return lines[-1].removeprefix("jogwire sim: ") if lines else ""


# ----------------------------------------------------------------------------------------
# The run
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class DriveInput:
    """The input to open (`--input` spec) and the pad mapping that reads it."""

    spec: str
    pad: PadMapping


@dataclass(frozen=True)
class DriveTarget:
    """The arm side: a simulated arm started as a child (`endpoint` None) loading
    `arm_spec`, or the arm side listening at `endpoint` (CURVE `keys` off this host).
    gui: PyBullet's own window for the child; lockstep: the child steps once per cycle;
    cell_spec: the workcell the child holds as PyBullet bodies (name or file), if any."""

    arm_spec: str
    endpoint: str | None = None
    keys: ClientKeys | None = None
    gui: bool = False
    lockstep: bool = False
    cell_spec: str | None = None


@dataclass(frozen=True)
class DriveResult:
    summary: dict[str, Any]
    child_exit: int | None         # the simulated arm's exit status if it ended early


def _cap_sessions(out: TextIO, folder: str | Path, cap: ArchiveCap, current: Path) -> None:
    """Trim the sessions folder to `cap` (never the session just started), saying what went
    (and what could not be removed)."""
    for r in prune_sessions(folder, cap, keep=current, now_s=time.time()):
        what = f"{r.path.name} ({r.size_bytes / BYTES_PER_MB:.1f} MB, {r.reason})"
        say(out, f"jogwire drive: sessions: could not remove {what}: {r.error}" if r.error
            else f"jogwire drive: sessions: removed {what}")


def sim_child_options(settings: RunSettings, target: DriveTarget,
                      duration_s: float | None) -> list[str]:
    """The simulated arm's command line: its watchdog is our stale_after; in lockstep it
    steps once per control cycle."""
    options = ["--endpoint", "tcp://127.0.0.1:*", "--stale-after", f"{settings.stale_after_s:g}"]
    if target.gui:
        options.append("--gui")
    if target.lockstep:
        options += ["--lockstep", "--step-hz", f"{settings.rate_hz:g}"]
    if target.cell_spec is not None:
        options += ["--cell", target.cell_spec]
    if duration_s is not None:  # a bound even if we are killed
        options += ["--duration", f"{duration_s + 60:g}"]
    return options


def run_drive(settings: RunSettings, arm: Arm, source: DriveInput, target: DriveTarget,
              ui: DriveUI, *, duration_s: float | None = None,
              sessions_dir: str | Path | None = "sessions",
              sessions_cap: ArchiveCap | None = None,
              realtime: bool = False, cell: Cell | None = None) -> DriveResult:
    """Drive `arm` from `source` until a stop (duration, end of a script, window closed,
    a signal, the arm side gone); record the session to `sessions_dir` (None: no log),
    whose older logs `sessions_cap` trims at the start. In `cell` the velocity damper keeps
    the arm clear of the workcell and the arm side is asked for contact reports."""
    out = ui.out
    clock = time.perf_counter
    with contextlib.ExitStack() as stack:
        stops = stack.enter_context(StopSignals())
        input_source = open_source(source.spec, arm=arm, stale_after_s=settings.stale_after_s)
        stack.callback(input_source.close)
        child = None
        arm_log: list[str] = []
        if target.endpoint is None:
            # The simulated arm's stderr (its log) goes to a file: a pipe nobody reads
            # could fill up and stall it. Its last line (its own summary) is shown at the end.
            sim_log = stack.enter_context(tempfile.TemporaryFile())
            stack.callback(lambda: arm_log.append(_arm_side_log(sim_log)))
            child = ArmProcess("sim", target.arm_spec,
                               sim_child_options(settings, target, duration_s),
                               stderr=sim_log, new_session=True)
            stack.callback(child.stop)
            endpoint = child.endpoint
            target_text = f"simulated {arm.name} (child pid {child.pid}) on {endpoint}"
            link_label = f"sim {endpoint.removeprefix('tcp://')} (pid {child.pid})"
        else:
            endpoint = target.endpoint
            curve = target.keys is not None
            target_text = f"arm side at {endpoint}" + (" (CURVE)" if curve else "")
            link_label = endpoint.removeprefix("tcp://") + (" CURVE" if curve else "")
        client = ArmClient(endpoint, hello=hello_for(arm, "runtime",
                                                      stale_after_s=settings.stale_after_s),
                           keys=target.keys, clock=clock)
        stack.callback(client.close)
        theirs, first_state = client.handshake(timeout_s=HANDSHAKE_TIMEOUT_S)
        same_clock = child is not None and time.get_clock_info("perf_counter").implementation \
            == time.get_clock_info("monotonic").implementation
        header = settings.to_header(
            command="drive", input=source.spec, pad=source.pad.name,
            pad_source=source.pad.source, target=endpoint,
            target_kind=theirs.role if child is None else
            "sim child, lockstep" if target.lockstep else "sim child, paced",
            target_arm=theirs.arm, duration_s=duration_s,
            **({} if target.cell_spec is None else {"cell": target.cell_spec}))
        # Real-time priority from here on: the recorder's writer, the control loop and the
        # window are created after this and inherit it; the simulated arm, started before,
        # does not. All of our threads have it, so none can be preempted by other programs
        # while it holds the GIL the control loop is waiting for.
        priority = "normal"
        if realtime:
            priority = enter_realtime(REALTIME_PRIORITY)
            if priority.startswith("normal"):
                say(out, f"jogwire drive: priority {priority}")
        recorder = session_path = None
        started = clock()
        if sessions_dir is not None:
            session_path = new_session_path(sessions_dir, arm.name)
            recorder = SessionRecorder.start(session_path, arm, header,
                                             started_monotonic_ns=int(started * 1e9))
            stack.callback(recorder.close)
            if sessions_cap is not None:
                _cap_sessions(out, sessions_dir, sessions_cap, session_path)

        drive = DriveSession(arm=arm, pad=source.pad, settings=settings, source=input_source,
                             client=client, recorder=recorder, clock=clock,
                             duration_s=duration_s, same_clock=same_clock, target=link_label,
                             lockstep=target.lockstep, cell=cell)
        if drive.cell_hello is not None:   # ask the arm side for contact reports (§5a)
            client.send(drive.cell_hello)
        warm_up(arm, source.pad, np.asarray(first_state.q), settings, cell)
        drive.offer_state(first_state, clock())
        window_s = min(max(duration_s or 10.0, 10.0) + 1.0, 60.0)
        loop = FixedRateLoop(settings.rate_hz, clock=clock, window_s=window_s)
        say(out, f"jogwire drive: {arm.name} via {target_text}; input {input_source.name}; "
            f"{settings.rate_hz:g} Hz" + (", reduced speed" if settings.reduced_locked else "")
            + (f"; recording to {session_path}" if session_path else "")
            + ("; Ctrl-C stops" if not ui.window else ""))

        stops.drive = drive
        previous_switch = sys.getswitchinterval()
        sys.setswitchinterval(2e-4)    # the loop thread gets the GIL back within ~0.2 ms
        stack.callback(sys.setswitchinterval, previous_switch)
        gc.freeze()                    # setup objects leave the collector's generations:
        stack.callback(gc.unfreeze)    # full collections stay short during the session
        main = MainThread(drive, loop, child, ui.screenshot)
        if ui.window:
            main.open_window(f"jogwire drive · {arm.name}", np.asarray(first_state.q))
        thread = main.thread = loop.start(drive.body, name="jogwire-control")
        try:
            if ui.window:
                main.run_window(input_source)
            else:
                main.run_headless(input_source, out)
        finally:
            if thread.is_alive():            # this thread failed: the loop still ends cleanly
                drive.request_end("stopping after an error")
            thread.join()
            if loop.error is not None:       # the loop died: make sure zero goes out anyway
                client.send(Rates(seq=drive.seq + 1, t_ns=int(clock() * 1e9),
                                  qd=np.zeros(arm.n)))
        ended = clock()
        loop.join()                          # re-raises what ended the loop, if anything
        timing = loop.stats()
        shot = main.save_screenshot()
    # Unwound in order: recorder closed, socket closed, simulated arm stopped, input closed.

    summary = build_summary(drive, timing, priority=priority, input_name=input_source.name,
                            target=target_text,
                            recorder_stats=None if recorder is None else recorder.stats(),
                            session_path=session_path, arm_side_log="".join(arm_log),
                            started_s=drive.t0 if drive.t0 is not None else started,
                            ended_s=ended)
    if shot is not None:
        summary["screenshot"] = str(shot)
    return DriveResult(summary, main.child_exit)
