"""`jogwire drive`: move an arm's tool by hand — the main job, end to end.

    input (pad, keys, script, network) ─► ControlCycle: mapping ─► safety gate ─► solver
    and limits ─► rates over the wire ─► arm side (the simulated arm as a child process,
    or a bridge with --target) ─► measured state ─► back into the next cycle
                                                     every cycle ─► session log

With no arguments it starts the built-in simulated demo arm as a child on a free loopback
port, opens the status window and takes the first gamepad, or the keyboard when there is
none. Where no window can open and no pad is plugged in (a server, CI, a container) it plays
the shipped demo script headless, prints a live status line and a summary, and says so.

Threads. The control loop runs in its own thread (`FixedRateLoop.start`); the main thread
owns pygame (SDL wants its window and event queue there) and runs the status window, or,
without one, pumps the pad's events and prints the status line. The loop publishes a
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

import argparse
import contextlib
import dataclasses
import gc
import json
import math
import os
import signal
import sys
import tempfile
import threading
import time
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np

from ..link.arm_process import ArmProcess
from ..errors import ConfigError, TransportError
from ..operator.inputs import open_source, parse_input_spec
from ..arm.kinematics import analyse_pose, tcp_pose
from ..control.loop import FixedRateLoop, Tick, TimingStats
from ..control.mapping import DirectCommand, InputFrame, load_pad
from ..arm.model import Arm, load_arm
from ..control.cycle import ControlCycle, CycleOutput
from ..arm.cell import Cell, load_cell
from ..arm.distance import cell_distances
from ..link.protocol import FLAG_REDUCED_SPEED, CellHello, Contact, Hello, Rates, \
    RoundTripMeter, State, StateFreshness, cell_hello_for, encode, hello_differences, \
    hello_for
from ..operator.cell_outlines import CellOutlines
from ..sessions.log_writer import SessionRecorder, new_session_path
from ..sessions.log_schema import cycle_record
from ..sessions.archive import BYTES_PER_MB, SECONDS_PER_DAY, ArchiveCap, prune_sessions
from ..control.safety import SafetySettings
from ..link.transport import ArmClient, check_endpoint, load_client_keys

DEMO_SCRIPT = "square"            # configs/profiles/square.toml: a 10 cm square at 5 cm/s
DEMO_ARM, DEMO_CELL = "elbow6", "bench"   # the demo arm works in the demo workcell
DEFAULT_PADS = {"gamepad": "twinstick", "keyboard": "keyboard"}
SCRIPT_TAIL_S = 0.5               # after a script's last segment: watch the arm stop, then end
SETTLE_TIMEOUT_S = 1.0            # ending: longest wait for the arm to be measured at rest
REST_SPEED = 1e-3                 # |q̇| at or below this (rad/s or m/s) counts as at rest
REFUSAL_HOLD_S = 0.5              # motion held this long after the arm side refused us
CONTACT_SHOWN_S = 0.5             # a contact report stays on the screen at least this long
HANDSHAKE_TIMEOUT_S = 10.0
STATS_REFRESH_S = 0.25            # how often the main thread recomputes timing percentiles
SNAPSHOT_HZ = 60.0                # status snapshots per second published by the loop
# The window redraws at up to WINDOW_MAX_HZ, fewer where a frame is slow to draw and show
# (a software X server takes ~11 ms per frame here), so that it takes about WINDOW_CPU_SHARE
# of a core: on two cores the control loop and the simulated arm need the rest.
WINDOW_MAX_HZ, WINDOW_MIN_HZ, WINDOW_CPU_SHARE = 30.0, 5.0, 0.15
RATE_RANGE_HZ = (1.0, 2000.0)
REALTIME_PRIORITY = 50            # SCHED_FIFO level for --realtime: above ordinary work and
                                  # below the kernel's own threads (common practice)


# ----------------------------------------------------------------------------------------
# Command line
# ----------------------------------------------------------------------------------------

def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.description = (
        "Drive an arm's tool by hand. With no arguments: start the simulated demo arm, open "
        "the status window and take the first gamepad (or the keyboard). Without a display "
        "and a pad: play the demo script headless and print a summary.")
    parser.add_argument("--arm", default=DEMO_ARM,
                        help="shipped arm name, arm .toml or .urdf (default elbow6)")
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
    parser.add_argument("--rate", type=float, default=500.0, metavar="HZ",
                        help="control loop rate (default 500)")
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
    parser.add_argument("--stale-after", type=float, default=0.1, metavar="S",
                        help="arm state older than S stops motion here, and the simulated arm "
                             "ramps to zero when our rates are older than S (default 0.1)")
    parser.add_argument("--max-round-trip", type=float, metavar="S",
                        help="refuse motion while the link's round trip (rates sent → state "
                             "showing them applied, median of the last 0.5 s) is above S "
                             "(default: --stale-after; above it a release can take longer "
                             "than stale_after to reach the arm)")
    parser.add_argument("--screenshot", metavar="FILE.png",
                        help="save the status window to a PNG once, after --screenshot-after")
    parser.add_argument("--screenshot-after", type=float, metavar="S",
                        help="when to take --screenshot (default: half of --duration, else 3 s)")
    parser.add_argument("--cell", metavar="NAME|FILE",
                        help="the workcell around the arm (shipped name or .toml); clearance "
                             "keeps the arm out of it, the simulated arm holds it and reports "
                             "contacts. Default: the demo workcell `bench` for the built-in "
                             f"demo arm ({DEMO_ARM}), none otherwise; `none` for none")
    parser.add_argument("--summary-json", metavar="FILE",
                        help="also write the end-of-session summary as JSON (SI units)")


@dataclass(frozen=True)
class InputPlan:
    """Which input to open, whether a window shows, and what to tell the user about it."""

    spec: str
    window: bool
    note: str = ""


def plan_input(requested: str | None, *, headless: bool, display: bool, pads: int
               ) -> InputPlan:
    """The input and window for this run (pure: the caller probes the display and pads)."""
    window = display and not headless
    if requested is not None:
        kind, _ = parse_input_spec(requested)
        if kind == "keyboard" and not window:
            raise ConfigError("the keyboard input needs the status window, and "
                              + ("--headless was given" if headless else
                                 "no window can open here (no display)")
                              + "; use a gamepad or --input script:FILE", field="input")
        return InputPlan(requested, window)
    if pads:
        return InputPlan("gamepad", window, "taking the first gamepad")
    if window:
        return InputPlan("keyboard", True, "no gamepad found: keyboard in the status window "
                                           "(hold space and use W/S A/D R/F to move)")
    why = "--headless and no gamepad" if headless else "no display and no gamepad"
    return InputPlan(f"script:{DEMO_SCRIPT}", False,
                     f"{why}: playing the demo script {DEMO_SCRIPT!r} headless against the "
                     "arm (choose with --input)")


def _probe_display_and_pads(headless: bool, need_pads: bool) -> tuple[bool, int]:
    """(a window can open, pads plugged in). Without a display SDL gets its dummy video
    driver, so pygame can still read pads; a display that fails to open counts as none."""
    from ..operator.inputs.pygame_init import display_available
    display = display_available() and not headless
    if not display:
        os.environ.setdefault("SDL_VIDEODRIVER", "dummy")
    if not need_pads:
        return display, 0
    from ..operator.inputs.pygame_init import pads_present, pygame
    try:
        return display, pads_present()
    except pygame.error:
        if not display:
            return False, 0
    # the display is announced but cannot be opened: go on without it
    pygame.display.quit()
    os.environ["SDL_VIDEODRIVER"] = "dummy"
    try:
        return False, pads_present()
    except pygame.error:
        return False, 0


def _check_options(args: argparse.Namespace) -> None:
    lo, hi = RATE_RANGE_HZ
    if not (math.isfinite(args.rate) and lo <= args.rate <= hi):
        raise ConfigError(f"--rate must be between {lo:g} and {hi:g} Hz, got {args.rate:g}",
                          field="rate")
    if args.duration is not None and not args.duration > 0:
        raise ConfigError("--duration must be positive", field="duration")
    if not (0.005 <= args.stale_after <= 5.0):
        raise ConfigError("--stale-after must be between 0.005 and 5 s", field="stale-after")
    if args.max_round_trip is not None and not (0.001 <= args.max_round_trip <= 5.0):
        raise ConfigError("--max-round-trip must be between 0.001 and 5 s",
                          field="max-round-trip")
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


# ----------------------------------------------------------------------------------------
# Statistics that last a whole session in bounded memory
# ----------------------------------------------------------------------------------------

class LogHistogram:
    """Durations (s) in log-spaced bins from 100 ns to 100 s: whole-session percentiles in
    bounded memory, each to within one bin (BINS_PER_DECADE = 100: 2.3 %); max is exact."""

    LOW_S = 1e-7
    DECADES = 9
    BINS_PER_DECADE = 100

    def __init__(self) -> None:
        self.counts = [0] * (self.DECADES * self.BINS_PER_DECADE + 2)
        self.n = 0
        self.max = -math.inf
        self._log_low = math.log10(self.LOW_S)

    def add(self, x: float) -> None:
        if x <= self.LOW_S:
            i = 0
        else:
            i = min(int((math.log10(x) - self._log_low) * self.BINS_PER_DECADE) + 1,
                    len(self.counts) - 1)
        self.counts[i] += 1
        self.n += 1
        if x > self.max:
            self.max = x

    def percentile(self, p: float) -> float | None:
        """The p-th percentile (0–100), nearest rank: the geometric centre of the bin that
        holds the ceil(p·n/100)-th smallest value, at most the max."""
        if self.n == 0:
            return None
        rank = max(1, math.ceil(p / 100.0 * self.n - 1e-9))   # 99.9 % of 20000 is 19980
        seen = 0
        for i, c in enumerate(self.counts):
            seen += c
            if seen >= rank:
                break
        if i == 0:
            return min(self.LOW_S, self.max)
        centre = 10 ** (self._log_low + (i - 0.5) / self.BINS_PER_DECADE)
        return min(centre, self.max)

    def summary(self) -> dict[str, float | int | None]:
        return {"count": self.n, "p50_s": self.percentile(50), "p99_s": self.percentile(99),
                "max_s": self.max if self.n else None}


class RunStats:
    """What the summary reports, gathered by the loop thread cycle by cycle."""

    def __init__(self, arm: Arm) -> None:
        self.gate_cycles: Counter[str] = Counter()
        self.limits: dict[str, list[int]] = {}         # name → [cycles, episodes]
        self._last_limit: str | None = None
        self.peak_commanded = np.zeros(arm.n)          # |rates| sent (rad/s or m/s)
        self.peak_measured = np.zeros(arm.n)           # |q̇| in the arm side's states
        self.tcp_peak_m_s = 0.0                        # ‖J·rates‖ linear, base frame
        self.tcp_peak_rad_s = 0.0
        self.read_to_send = LogHistogram()             # input read → rates on the wire
        self.round_trip = LogHistogram()               # rates sent → first state applying them
        self.round_trip_over = 0                       # cycles with the median over the limit
        self.round_trip_worst_s: float | None = None   # highest median a cycle saw
        self.state_age = LogHistogram()                # age of q when a cycle uses it
        self.arm_limited = 0                           # states in which the arm side limited
        self.states = 0
        self.min_clearance_m: float | None = None      # nearest pair over the session
        self.min_clearance_pair: tuple[str, str] | None = None
        self.min_clearance_t_s: float | None = None
        self.contacts: dict[tuple[str, str], list[float]] = {}  # pair → [first t, depth, steps]

    def add_cycle(self, out: CycleOutput) -> None:
        self.gate_cycles[out.verdict.state] += 1
        np.maximum(self.peak_commanded, np.abs(out.rates), out=self.peak_commanded)
        sol = out.solution
        name = None if sol is None else sol.binding_limit
        if name is not None:
            counts = self.limits.setdefault(name, [0, 0])
            counts[0] += 1
            if name != self._last_limit:
                counts[1] += 1
        self._last_limit = name
        if sol is not None:
            a = sol.achieved_twist
            self.tcp_peak_m_s = max(self.tcp_peak_m_s, math.sqrt(a[0]**2 + a[1]**2 + a[2]**2))
            self.tcp_peak_rad_s = max(self.tcp_peak_rad_s,
                                      math.sqrt(a[3]**2 + a[4]**2 + a[5]**2))

    def add_round_trip(self, level_s: float | None, limit_s: float) -> None:
        """One cycle's round-trip median (s, None before the first) against the limit."""
        if level_s is not None:
            self.round_trip_over += level_s > limit_s
            self.round_trip_worst_s = max(level_s, self.round_trip_worst_s or 0.0)

    def add_clearance(self, out: CycleOutput, t_s: float) -> None:
        """The nearest pair the cycle's solve measured (with a workcell), session low."""
        report = None if out.solution is None else out.solution.clearance
        if report is not None and (self.min_clearance_m is None or
                                   report.min_distance_m < self.min_clearance_m):
            self.min_clearance_m = report.min_distance_m
            self.min_clearance_pair = report.nearest_pair
            self.min_clearance_t_s = t_s

    def add_contact(self, contact: Contact, t_s: float) -> None:
        """One step's contact report from the arm side (docs/PROTOCOL.md §5a)."""
        for a, b, depth in contact.pairs:
            c = self.contacts.setdefault((a, b), [t_s, 0.0, 0])
            c[1] = max(c[1], depth)
            c[2] += 1

    def add_state(self, state: State, qd: np.ndarray) -> None:
        self.states += 1
        self.arm_limited += state.limited
        np.maximum(self.peak_measured, np.abs(qd), out=self.peak_measured)


# ----------------------------------------------------------------------------------------
# The loop body
# ----------------------------------------------------------------------------------------

class DriveSession:
    """One drive session's control loop body and what it publishes.

    `body(tick)` runs on the loop thread; `request_end`, `latest` and `stats` are for the
    main thread. Times are readings of `clock` (s); the same clock drives the loop.
    """

    def __init__(self, *, arm: Arm, cycle: ControlCycle, source: Any, client: ArmClient,
                 recorder: SessionRecorder | None, clock: Callable[[], float],
                 stale_after_s: float, duration_s: float | None, same_clock: bool,
                 target: str, rate_hz: float, lockstep: bool = False,
                 cell: Cell | None = None, outlines: CellOutlines | None = None) -> None:
        self.arm = arm
        self.cell = cell
        self.cell_hello = None if cell is None else cell_hello_for(cell)  # sent after hellos
        self.cell_name = None if cell is None else cell.name
        self.outlines = outlines               # the workcell in the window's views
        self.cycle = cycle
        self.source = source
        self.client = client
        self.recorder = recorder
        self.clock = clock
        self.stale_after_s = stale_after_s
        self.duration_s = duration_s
        self.same_clock = same_clock
        self.target = target
        self.lockstep = lockstep
        self.stats = RunStats(arm)
        self.freshness = StateFreshness(stale_after_s)
        self.round_trip = RoundTripMeter()
        self.publish_every = max(1, round(rate_hz / SNAPSHOT_HZ))
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
        from ..operator.status_window import StatusSnapshot   # pygame: imported only when driving
        self._snapshot_type = StatusSnapshot

    # -- other threads -------------------------------------------------------------------

    def request_end(self, why: str) -> None:
        """Ask the loop to end (any thread). A second request ends it without settling."""
        if self._end_request is None:
            self._end_request = why
        else:
            self._force = True

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
        self.stats.add_round_trip(rtt, self.cycle.gate.settings.round_trip_limit_s)
        self.seq += 1
        sent = self._last_sent_s = self.clock()
        self.client.send(Rates(seq=self.seq, t_ns=int(sent * 1e9), qd=out.rates,
                               flags=FLAG_REDUCED_SPEED if out.intent.reduced else 0))
        if self.lockstep:
            self._await_applied(self.seq, sent + self.stale_after_s)
        if self.ending and not self._ending_first_seq:
            self._ending_first_seq = self.seq
        self.stats.read_to_send.add(sent - now)
        self.stats.add_cycle(out)
        self.stats.add_clearance(out, now - self.t0)
        # (a state that came in after `now` was read has a stamp a little after it)
        age = None if self.state_stamp_s is None else max(now - self.state_stamp_s, 0.0)
        if age is not None:
            self.stats.state_age.add(age)
        if self.recorder is not None and self.q is not None:
            period = tick.period_s if self._prev_start is None else now - self._prev_start
            end = self.clock()
            self.recorder.record(cycle_record(
                tick.index, now - self.t0, frame, out, self.q, state_age_s=age,
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
        if self.duration_s is not None and now - self.t0 >= self.duration_s:
            return f"--duration {self.duration_s:g} s reached"
        finished = getattr(self.source, "finished", None)
        if finished is not None and self.duration_s is None and finished(now):
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
            rtt_s=self.round_trip.level_s, elapsed_s=now - self.t0, note=self._note(now),
            cell=self.outlines, contacts=self._contacts_shown(now),
            **self._clearance(sol))

    def _clearance(self, sol: Any) -> dict[str, Any]:
        """The nearest pair for the window, when the solve measured it (within d_i); else
        the main thread measures it at the pose (`_MainThread.snapshot`), off this loop."""
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
        script = getattr(self.source, "script", None)
        if script is not None:
            notes.append(f"script {script.name} {self.source.elapsed_s(now):.1f} / "
                         f"{script.duration_s:.1f} s")
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


def warm_up(arm: Arm, pad: Any, q: np.ndarray, rate_hz: float, cell: Cell | None = None
            ) -> None:
    """Run every piece of a cycle a few times on a throwaway ControlCycle, so the first real
    cycles do not pay for first calls (imports, caches, numpy's first dispatch)."""
    from ..operator.status_window import StatusSnapshot
    cycle = ControlCycle(arm, pad, rate_hz=rate_hz, cell=cell)
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


# ----------------------------------------------------------------------------------------
# The terminal: one live line, and the summary
# ----------------------------------------------------------------------------------------

def status_line(snap: Any, timing: TimingStats | None) -> str:
    """One line for the terminal from a status snapshot, most important first (a narrow
    terminal cuts the end): time, gate state and why not / commanded speed, TCP, link, loop."""
    parts = [f"{snap.elapsed_s:6.1f} s", f"{snap.gate_state.upper():7s}"]
    if not snap.allowed:
        parts.append(snap.gate_reason)
    elif snap.twist is not None:
        parts.append(f"v {np.linalg.norm(snap.twist[:3]) * 1e3:3.0f} mm/s")
    if snap.q is not None:
        p = tcp_pose(snap.arm, np.asarray(snap.q))[:3, 3]
        parts.append(f"TCP {p[0]:+.3f} {p[1]:+.3f} {p[2]:+.3f} m")
    fresh = snap.connected and snap.state_age_s is not None and \
        snap.state_age_s <= snap.stale_after_s
    link = "link ok" if fresh else "link STALE"
    if snap.state_age_s is not None:
        link += f" age {snap.state_age_s * 1e3:.1f} ms"
    if snap.rtt_s is not None:
        link += f" rtt {snap.rtt_s * 1e3:.1f} ms"
    parts.append(link)
    if snap.cell is not None:
        from ..operator.status_window import clearance_text
        parts.append(clearance_text(snap) + (" (LIMITING)" if snap.clearance_binds else ""))
    if timing is not None and timing.cycles:
        parts.append(f"loop p99 {timing.period_p99_s * 1e3:.2f} ms, "
                     f"{timing.overruns} overruns")
    return " | ".join(parts)


def build_summary(drive: DriveSession, timing: TimingStats, *, priority: str, input_name: str,
                  target: str, recorder_stats: Any, session_path: Path | None,
                  arm_side_log: str, started_s: float, ended_s: float) -> dict[str, Any]:
    arm, s = drive.arm, drive.stats
    period_s = 1.0 / timing.rate_hz
    joints = [{"name": j.name, "unit": "rad/s" if j.is_revolute else "m/s",
               "peak_commanded": float(s.peak_commanded[i]),
               "peak_measured": float(s.peak_measured[i]),
               "max_speed": j.max_speed, "rated_speed": j.rated_speed}
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
                 "round_trip_limit_s": drive.cycle.gate.settings.round_trip_limit_s,
                 "round_trip_over_limit_s": s.round_trip_over * period_s,
                 "round_trip_worst_median_s": s.round_trip_worst_s,
                 "read_to_send": s.read_to_send.summary()},
        "joints": joints,
        "tcp_peak_m_s": s.tcp_peak_m_s, "tcp_cap_m_s": arm.tcp_max_linear_m_s,
        "tcp_peak_rad_s": s.tcp_peak_rad_s, "tcp_cap_rad_s": arm.tcp_max_angular_rad_s,
        "limits": {k: {"cycles": c, "episodes": e} for k, (c, e) in
                   sorted(s.limits.items(), key=lambda kv: -kv[1][0])},
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


def _ms(x: float | None, digits: int = 2) -> str:
    return "—" if x is None else f"{x * 1e3:.{digits}f}"


def format_summary(m: dict[str, Any]) -> str:
    """The end-of-session summary for the terminal."""
    loop, link = m["loop"], m["link"]
    gate = ", ".join(f"{k} {v:.1f} s" for k, v in m["gate_time_s"].items()) or "—"
    window = "" if loop["window_cycles"] >= m["cycles"] else \
        f" (percentiles over the last {loop['window_cycles']} cycles)"
    out = [f"jogwire drive: {m['end_reason'] or 'ended'} after {m['duration_s']:.1f} s",
           f"  input     {m['input']}",
           f"  target    {m['target']}",
           f"  cycles    {m['cycles']} at {m['rate_hz']:g} Hz ({m['thread_priority']} "
           f"priority); gate: {gate}",
           f"  loop      period p50 {_ms(loop['period_p50_s'], 3)} / p99 "
           f"{_ms(loop['period_p99_s'], 3)} / max {_ms(loop['period_max_s'], 3)} ms, compute "
           f"p50 {_ms(loop['compute_p50_s'], 3)} / p99 {_ms(loop['compute_p99_s'], 3)} ms; "
           f"overruns {loop['overruns']} ({100 * loop['overrun_fraction']:.2f} %), longest "
           f"streak {loop['max_overrun_streak']}{window}"]
    age, rtt = link["state_age"], link["round_trip"]
    out.append(f"  link      state age p50 {_ms(age['p50_s'])} / p99 {_ms(age['p99_s'])} ms, "
               f"round trip p50 {_ms(rtt['p50_s'])} / p99 {_ms(rtt['p99_s'])} ms (rates sent → "
               f"state showing them applied)")
    if link["round_trip_over_limit_s"] > 0:
        out.append(f"            ROUND TRIP over the {_ms(link['round_trip_limit_s'], 0)} ms "
                   f"limit for {link['round_trip_over_limit_s']:.1f} s (median up to "
                   f"{_ms(link['round_trip_worst_median_s'], 0)} ms): motion refused then")
    dropped = sum(link["states_dropped"].values()) + link["states_refused"]
    out.append(f"            {link['states']} states, {dropped} dropped or refused, "
               f"{link['rates_not_sent']} rates not sent, arm side limited "
               f"{link['arm_side_limited_states']}")
    out.append("  joints    peak speed commanded / measured against max / rated")
    width = max(len(j["name"]) for j in m["joints"])
    for j in m["joints"]:
        k, unit = (180.0 / math.pi, "°/s") if j["unit"] == "rad/s" else (1e3, "mm/s")
        pct = 100.0 * max(j["peak_commanded"], j["peak_measured"]) / j["rated_speed"]
        out.append(f"    {j['name']:<{width}}  {j['peak_commanded'] * k:7.1f} / "
                   f"{j['peak_measured'] * k:7.1f}  of {j['max_speed'] * k:6.1f} / "
                   f"{j['rated_speed'] * k:6.1f} {unit:4s}  ({pct:3.0f} % of rated)")
    out.append(f"  TCP       peak {m['tcp_peak_m_s'] * 1e3:.1f} mm/s commanded (cap "
               f"{m['tcp_cap_m_s'] * 1e3:.0f} mm/s), {math.degrees(m['tcp_peak_rad_s']):.1f} °/s "
               f"(cap {math.degrees(m['tcp_cap_rad_s']):.0f} °/s)")
    limits = ", ".join(f"{k} {v['cycles']} cycles in {v['episodes']} episodes"
                       for k, v in m["limits"].items()) or "no limit bound"
    out.append(f"  limits    {limits}")
    if m["cell"] is not None:
        out.append(f"  clearance {format_clearance(m)}")
    out.append(f"  stop      {m['stop']}")
    if m["arm_side"]:
        out.append(f"  arm side  {m['arm_side']}")
    ses = m["session"]
    if ses is None:
        out.append("  session   not recorded (--no-record)")
    else:
        state = f"{ses['written']} cycles written, {ses['dropped']} dropped"
        if ses["failed"]:
            state += f"; recording FAILED: {ses['failed']}"
        out.append(f"  session   {ses['path']} ({state}); see `jogwire inspect {ses['path']}`")
    return "\n".join(out)


def format_clearance(m: dict[str, Any]) -> str:
    """The summary's workcell line: the nearest approach and what the arm side reported."""
    if m["min_clearance_m"] is None:
        text = f"workcell {m['cell']}: no distance measured"
    elif m["clearance_pair"] is None:     # the solve names pairs within d_i only
        text = (f"workcell {m['cell']}: nothing came within the influence distance (nearest "
                f"≥ {m['min_clearance_m'] * 1e3:.0f} mm)")
    else:
        a, b = m["clearance_pair"]
        text = (f"workcell {m['cell']}: nearest {a}–{b} {m['min_clearance_m'] * 1e3:.1f} mm "
                f"at {m['min_clearance_t_s']:.1f} s")
    if not m["contacts_measured"]:
        return text + "; the arm side did not confirm this workcell: no contact check"
    if not m["contacts"]:
        return text + "; no contact"
    return text + "; CONTACT " + ", ".join(
        f"{c['a']}–{c['b']} from {c['t_s']:.1f} s, {c['depth_m'] * 1e3:.1f} mm deep"
        for c in m["contacts"])


def _json_safe(value: Any) -> Any:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    return value


# ----------------------------------------------------------------------------------------
# The main thread
# ----------------------------------------------------------------------------------------

class _MainThread:
    """What the main thread does while the loop runs: timing statistics for the snapshot,
    the screenshot, watching the simulated arm, and the window or the status line.

    The screenshot is captured at its time (the window's pixels, or the snapshot without a
    window) and written after the loop has ended: encoding a PNG holds the GIL for tens of
    milliseconds, which the control loop must not wait for.
    """

    def __init__(self, drive: DriveSession, loop: FixedRateLoop, child: ArmProcess | None,
                 screenshot: tuple[Path, float] | None) -> None:
        self.drive = drive
        self.loop = loop
        self.child = child
        self.screenshot = screenshot
        self.thread: threading.Thread | None = None
        self.window = None
        self.frame_hz = WINDOW_MAX_HZ
        self.child_exit: int | None = None
        self._told_recording = False
        self._shot: Any = None            # a pygame Surface or a StatusSnapshot
        self._timing: TimingStats | None = None
        self._timing_at = -math.inf

    def timing(self) -> TimingStats:
        now = time.perf_counter()
        if self._timing is None or now - self._timing_at >= STATS_REFRESH_S:
            self._timing, self._timing_at = self.loop.stats(), now
        return self._timing

    def snapshot(self):
        """The newest snapshot with the loop's timing and, where the solve did not name
        the nearest pair (nothing within d_i, or no solve), that pair measured here."""
        snap = self.drive.latest
        if snap is None:
            return None
        from ..operator.status_window import clearance_fields
        more: dict[str, Any] = {"timing": self.timing()}
        drive = self.drive
        if drive.cell is not None and snap.q is not None and snap.clearance_points is None:
            more.update(clearance_fields(cell_distances(drive.arm, drive.cell, snap.q)))
        return dataclasses.replace(snap, **more)

    def watch(self) -> bool:
        """Checks shared by both modes; True while the loop runs."""
        recorder = self.drive.recorder
        if recorder is not None and recorder.failed and not self._told_recording:
            self._told_recording = True
            print(f"\njogwire drive: RECORDING STOPPED: {recorder.failed}; driving goes on "
                  "without a log", file=sys.stderr, flush=True)
        if self.child is not None and self.child_exit is None and \
                (status := self.child.proc.poll()) is not None:
            self.child_exit = status
            self.drive.request_end(f"the simulated arm exited (status {status})")
        if self.screenshot is not None and self._shot is None:
            snap = self.drive.latest
            if snap is not None and snap.elapsed_s >= self.screenshot[1]:
                if self.window is not None and self.window.frames_drawn:
                    from ..operator.inputs.pygame_init import pygame
                    self._shot = pygame.display.get_surface().copy()
                elif self.window is None:
                    self._shot = self.snapshot()
        return self.thread is not None and self.thread.is_alive()

    def save_screenshot(self) -> Path | None:
        if self._shot is None:
            return None
        from ..operator.inputs.pygame_init import pygame
        from ..operator.status_window import StatusSnapshot, render_png
        path = self.screenshot[0]
        if isinstance(self._shot, StatusSnapshot):
            return render_png(self._shot, path)
        path.parent.mkdir(parents=True, exist_ok=True)
        pygame.image.save(self._shot, str(path))
        return path

    def open_window(self, title: str, q0: np.ndarray) -> None:
        """Open the window and draw a first frame before the loop starts: the first frame
        builds the fonts and the static background, which takes a while."""
        from ..operator.inputs.pygame_init import pygame
        from ..operator.status_window import StatusSnapshot, StatusWindow
        window = StatusWindow(title=title)
        try:
            window.open()
        except pygame.error as exc:
            raise TransportError(f"the status window could not open ({exc}); "
                                 "use --headless") from None
        first = StatusSnapshot(arm=self.drive.arm, q=q0, gate_state="blocked",
                               gate_reason="starting", target=self.drive.target)
        window.draw(first)                       # fonts, background
        t0 = time.perf_counter()
        for _ in range(3):
            window.draw(first)
        frame_s = (time.perf_counter() - t0) / 3
        self.frame_hz = min(WINDOW_MAX_HZ, max(WINDOW_MIN_HZ, WINDOW_CPU_SHARE / frame_s))
        self.window = window
        if self.frame_hz < WINDOW_MAX_HZ:
            say(sys.stdout, f"jogwire drive: this display takes {frame_s * 1e3:.0f} ms per "
                f"frame: the status window redraws at {self.frame_hz:.0f} Hz to leave the CPU "
                "to the control loop")

    def run_window(self, source: Any) -> None:
        handle = getattr(source, "handle_event", None)
        try:
            result = self.window.run(self.snapshot, on_event=handle, frame_hz=self.frame_hz,
                                     should_stop=lambda: not self.watch())
            if result == "closed":
                self.drive.request_end("the window was closed")
                while self.watch():      # the loop settles the arm; nothing left to draw
                    time.sleep(0.01)
        finally:
            self.window.close()

    def run_headless(self, source: Any, out: Any) -> None:
        pump = getattr(source, "pump", None)
        tty = out.isatty()
        every_s = 0.2 if tty else 2.0
        next_line = time.perf_counter() + (0.2 if tty else 1.0)
        last_state = None
        while self.watch():
            if pump is not None:
                pump()
            now = time.perf_counter()
            snap = self.drive.latest
            if snap is not None and (now >= next_line or (not tty and
                                                          snap.gate_state != last_state)):
                snap = self.snapshot()
                line = status_line(snap, snap.timing)
                if tty:
                    say(out, "\r" + line[:_terminal_width() - 1] + "\x1b[K", end="")
                else:
                    say(out, line)
                last_state = snap.gate_state
                next_line = now + every_s
            time.sleep(0.004 if pump is not None else 0.05)
        if tty:
            say(out, "\r\x1b[K", end="")


def _cap_sessions(out: Any, args: argparse.Namespace, current: Path) -> None:
    """Apply --sessions-max-mb / --sessions-max-days to the sessions folder, and say what
    went (and what could not be removed)."""
    cap = ArchiveCap(
        max_bytes=None if args.sessions_max_mb is None
        else int(args.sessions_max_mb * BYTES_PER_MB),
        max_age_s=None if args.sessions_max_days is None
        else args.sessions_max_days * SECONDS_PER_DAY)
    for r in prune_sessions(args.sessions, cap, keep=current, now_s=time.time()):
        what = f"{r.path.name} ({r.size_bytes / BYTES_PER_MB:.1f} MB, {r.reason})"
        say(out, f"jogwire drive: sessions: could not remove {what}: {r.error}" if r.error
            else f"jogwire drive: sessions: removed {what}")


def say(out: Any, text: str, end: str = "\n") -> None:
    """Write to the terminal. A closed pipe (`jogwire drive | head`) is not the drive's
    problem: stdout then goes to /dev/null (so the exit flush does not fail either)."""
    try:
        out.write(text + end)
        out.flush()
    except BrokenPipeError:
        os.dup2(os.open(os.devnull, os.O_WRONLY), out.fileno())


def _terminal_width() -> int:
    try:
        return os.get_terminal_size().columns
    except OSError:
        return 120


class _StopSignals:
    """SIGINT and SIGTERM: while the loop runs they ask it to end (twice: at once); before,
    they unwind the start-up like Ctrl-C does, so the simulated arm is stopped either way
    (it runs in its own session and would not see a terminal's Ctrl-C)."""

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __init__(self) -> None:
        self.drive: DriveSession | None = None
        self._previous: dict = {}

    def _handle(self, signum: int, _frame: Any) -> None:
        why = "stopped by " + signal.Signals(signum).name
        if self.drive is None:
            raise KeyboardInterrupt(why)
        self.drive.request_end(why)

    def __enter__(self) -> "_StopSignals":
        self._previous = {s: signal.signal(s, self._handle) for s in self.SIGNALS}
        return self

    def __exit__(self, *exc: object) -> None:
        for s, h in self._previous.items():
            signal.signal(s, h)


def _arm_side_log(file: Any) -> str:
    """The simulated arm's last log line (its own summary), from its captured stderr."""
    file.seek(0)
    lines = [ln.strip() for ln in file.read().decode("utf-8", "replace").splitlines()
             if ln.startswith("jogwire sim:")]
    return lines[-1].removeprefix("jogwire sim: ") if lines else ""


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
    display, pads = _probe_display_and_pads(args.headless, need_pads)
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
    out = sys.stdout
    for note in (plan.note, pad_note):
        if note:
            say(out, f"jogwire drive: {note}")

    clock = time.perf_counter
    with contextlib.ExitStack() as stack:
        stops = stack.enter_context(_StopSignals())
        source = open_source(plan.spec, arm=arm, stale_after_s=args.stale_after)
        stack.callback(source.close)
        child = None
        arm_log: list[str] = []
        if args.target is None:
            # The simulated arm's stderr (its log) goes to a file: a pipe nobody reads
            # could fill up and stall it. Its last line (its own summary) is shown at the end.
            sim_log = stack.enter_context(tempfile.TemporaryFile())
            stack.callback(lambda: arm_log.append(_arm_side_log(sim_log)))
            options = ["--endpoint", "tcp://127.0.0.1:*", "--stale-after", f"{args.stale_after:g}"]
            if args.gui:
                options.append("--gui")
            if args.lockstep:
                options += ["--lockstep", "--step-hz", f"{args.rate:g}"]
            if args.duration is not None:  # a bound even if we are killed
                options += ["--duration", f"{args.duration + 60:g}"]
            if cell_spec is not None:
                options += ["--cell", cell_spec]
            child = ArmProcess("sim", args.arm, options, stderr=sim_log, new_session=True)
            stack.callback(child.stop)
            endpoint = child.endpoint
            target = f"simulated {arm.name} (child pid {child.pid}) on {endpoint}"
            link_label = f"sim {endpoint.removeprefix('tcp://')} (pid {child.pid})"
        else:
            endpoint = args.target
            target = f"arm side at {endpoint}" + (" (CURVE)" if keys else "")
            link_label = endpoint.removeprefix("tcp://") + (" CURVE" if keys else "")
        client = ArmClient(endpoint, hello=hello_for(arm, "runtime",
                                                      stale_after_s=args.stale_after),
                           keys=keys, clock=clock)
        stack.callback(client.close)
        theirs, first_state = client.handshake(timeout_s=HANDSHAKE_TIMEOUT_S)
        same_clock = child is not None and time.get_clock_info("perf_counter").implementation \
            == time.get_clock_info("monotonic").implementation

        safety = SafetySettings(stale_after_s=args.stale_after,
                                max_round_trip_s=args.max_round_trip)
        settings = {"command": "drive", "input": plan.spec, "pad": pad.name,
                    "pad_source": pad.source, "rate_hz": args.rate,
                    "reduced_locked": args.reduced, "stale_after_s": args.stale_after,
                    "overrun_limit": SafetySettings().overrun_limit,
                    "max_round_trip_s": safety.round_trip_limit_s, "target": endpoint,
                    "target_kind": theirs.role if child is None else
                    "sim child, lockstep" if args.lockstep else "sim child, paced",
                    "target_arm": theirs.arm, "duration_s": args.duration,
                    "cell": cell_spec}
        # Real-time priority from here on: the recorder's writer, the control loop and the
        # window are created after this and inherit it; the simulated arm, started before,
        # does not. All of our threads have it, so none can be preempted by other programs
        # while it holds the GIL the control loop is waiting for.
        priority = "normal"
        if args.realtime:
            priority = enter_realtime(REALTIME_PRIORITY)
            if priority.startswith("normal"):
                say(out, f"jogwire drive: priority {priority}")
        recorder = session_path = None
        started = clock()
        if not args.no_record:
            session_path = new_session_path(args.sessions, arm.name)
            recorder = SessionRecorder.start(session_path, arm, settings,
                                             started_monotonic_ns=int(started * 1e9))
            stack.callback(recorder.close)
            _cap_sessions(out, args, session_path)

        cycle = ControlCycle(arm, pad, rate_hz=args.rate, reduced_locked=args.reduced,
                             safety=safety, cell=cell)
        drive = DriveSession(arm=arm, cycle=cycle, source=source, client=client,
                             recorder=recorder, clock=clock, stale_after_s=args.stale_after,
                             duration_s=args.duration, same_clock=same_clock,
                             target=link_label, rate_hz=args.rate, lockstep=args.lockstep,
                             cell=cell,
                             outlines=None if cell is None else CellOutlines.of_cell(cell))
        if drive.cell_hello is not None:   # ask the arm side for contact reports (§5a)
            client.send(drive.cell_hello)
        warm_up(arm, pad, np.asarray(first_state.q), args.rate, cell)
        drive.offer_state(first_state, clock())
        window_s = min(max(args.duration or 10.0, 10.0) + 1.0, 60.0)
        loop = FixedRateLoop(args.rate, clock=clock, window_s=window_s)
        say(out, f"jogwire drive: {arm.name} via {target}; input {source.name}; "
            f"{args.rate:g} Hz" + (", reduced speed" if args.reduced else "")
            + (f"; workcell {cell.name}" if cell is not None else "")
            + (f"; recording to {session_path}" if session_path else "")
            + ("; Ctrl-C stops" if not plan.window else ""))

        stops.drive = drive
        previous_switch = sys.getswitchinterval()
        sys.setswitchinterval(2e-4)    # the loop thread gets the GIL back within ~0.2 ms
        stack.callback(sys.setswitchinterval, previous_switch)
        gc.freeze()                    # setup objects leave the collector's generations:
        stack.callback(gc.unfreeze)    # full collections stay short during the session
        main = _MainThread(drive, loop, child, screenshot)
        if plan.window:
            main.open_window(f"jogwire drive · {arm.name}", np.asarray(first_state.q))
        thread = main.thread = loop.start(drive.body, name="jogwire-control")
        try:
            if plan.window:
                main.run_window(source)
            else:
                main.run_headless(source, out)
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

    summary = build_summary(drive, timing, priority=priority, input_name=source.name,
                            target=target,
                            recorder_stats=None if recorder is None else recorder.stats(),
                            session_path=session_path, arm_side_log="".join(arm_log),
                            started_s=drive.t0 if drive.t0 is not None else started,
                            ended_s=ended)
    if shot is not None:
        summary["screenshot"] = str(shot)
    say(out, format_summary(summary))
    if shot is not None:
        say(out, f"  screenshot {shot}")
    if args.summary_json:
        Path(args.summary_json).write_text(json.dumps(_json_safe(summary), indent=2) + "\n",
                                           encoding="utf-8")
    if main.child_exit is not None:
        print(f"jogwire drive: the simulated arm exited early (status {main.child_exit})",
              file=sys.stderr)
        return 1
    return 0

