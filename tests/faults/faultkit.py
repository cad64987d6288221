"""The fault campaign's harness: the simulated arm, the relay and `jogwire drive` as separate
processes on loopback, an observer on the arm, one fault injected, and what it did, measured.

    sim     python -m sim.arm elbow6 (paced, 1 kHz)  ◄── observer (this process, direct)
      ▲
    relay   jogwire relay (the fault's link options)
      ▲
    drive   jogwire drive --headless --target <relay> --input script:fault_motion.toml

Clocks. Every process stamps with CLOCK_MONOTONIC (on Linux time.monotonic_ns and
time.perf_counter read the same clock), so the sim's state stamps, the relay's event lines,
the runtime's echoed send times and this process's fault times compare directly.

What is measured (`FaultResult`), per run:
- stop time: from the fault (or, for a link fault the system rides through, from the moment
  the operator lets go of enable) to the first state at the arm with every |q̇| ≤ REST;
- the bound: stale_after + T + one control cycle, T = max_i |q̇_i| / a_rated,i just before;
- restart: any motion at the arm after that stop while enable stays held (the script never
  presses it afresh after the fault), i.e. a restart without a fresh enable;
- acted on, at the arm: applied sequence numbers going backwards, and garbage frames the
  relay delivered that the arm side did not count as malformed; at the runtime (from its
  session log: the q each cycle used is matched to the states the arm sent): a cycle that
  used an older state than an earlier cycle did, or a q the arm never sent;
- counted: the arm side's and the runtime's drop counters, the relay's counters;
- lost: records missing from the session log before the fault.

A run counts only if it exercised its fault: the arm was moving when it came, and the
runtime's overrun guard did not stop the motion on its own between the start of the motion
and the stop (a busy machine, not the fault; `Disturbed` or `exercised=False`, and the run is
repeated). The starved loop is the exception: there the overrun guard is the answer.
"""

from __future__ import annotations

import bisect
import json
import os
import random
import re
import resource
import signal
import socket
import subprocess
import sys
import threading
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import zmq

ROOT = Path(__file__).resolve().parents[2]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from runtime.arm.load import load_arm  # noqa: E402
from runtime.errors import LogError, ProtocolError  # noqa: E402
from runtime.link.arm_process import child_env  # noqa: E402
from runtime.link.protocol import REASONS, State, Twist, decode, hello_for  # noqa: E402
from runtime.link.relay import GARBAGE_KINDS  # noqa: E402
from runtime.link.transport import ArmClient, Publisher  # noqa: E402
from runtime.operator.inputs.script import load_script  # noqa: E402
from runtime.sessions.log_reader import TORN_TAIL, read_session  # noqa: E402

ARM = "elbow6"
STALE_AFTER_S = 0.1         # both sides' watchdog (drive --stale-after, sim --stale-after)
RATE_HZ = float(os.environ.get("JOGWIRE_FAULT_RATE_HZ", "250"))  # the runtime's loop rate
FLUSH_INTERVAL_S = 0.2      # the session log writer's flush interval (one block each)
CYCLE_S = 1.0 / RATE_HZ     # one control cycle
REST = 1e-3                 # |q̇| at or below this (rad/s) counts as standing still
MOVING = 0.02               # |q̇| above this (rad/s) counts as moving
STILL_S = 0.05              # a standstill lasts at least this long (s)
MOTION = Path(__file__).with_name("fault_motion.toml")
FAULT_AFTER_S = 0.6         # into the motion, when a fault is injected
STALL_S = 0.5               # length of the link stalls
MALFORMED = set(REASONS) | {"framing"}
FLUSH_S = 0.2               # the recorder's flush interval (SessionRecorder default)
# The runtime runs with --realtime and the simulated arm at a real-time priority just below
# it, as each would on its own machine (other programs then cannot delay them); where the
# system refuses, both run at normal priority (drive says so in its output).
REALTIME = os.environ.get("JOGWIRE_FAULT_REALTIME", "1") != "0"
ARM_PRIORITY = 40           # SCHED_FIFO level of the simulated arm (drive --realtime: 50)


# ----------------------------------------------------------------------------------------
# Child processes
# ----------------------------------------------------------------------------------------

class Disturbed(RuntimeError):
    """The run could not exercise its fault (the arm never moved: e.g. the runtime's overrun
    guard kept stopping it on a busy machine)."""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Child:
    """A child process whose stdout and stderr go to one file (no pipe can fill up)."""

    def __init__(self, name: str, argv: list[str], folder: Path, *,
                 preexec_fn: Callable[[], None] | None = None) -> None:
        self.name = name
        self.log_path = folder / f"{name}.log"
        self._log = self.log_path.open("wb")
        env = child_env() | {"SDL_VIDEODRIVER": "dummy", "SDL_AUDIODRIVER": "dummy"}
        self.proc = subprocess.Popen(argv, stdout=self._log, stderr=subprocess.STDOUT,
                                     cwd=ROOT, env=env, preexec_fn=preexec_fn)

    @property
    def pid(self) -> int:
        return self.proc.pid

    def text(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace")

    def wait_for(self, pattern: str, timeout_s: float = 30.0) -> re.Match:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            m = re.search(pattern, self.text())
            if m:
                return m
            if self.proc.poll() is not None:
                m = re.search(pattern, self.text())
                if m:
                    return m
                raise RuntimeError(f"{self.name} exited ({self.proc.returncode}) before "
                                   f"{pattern!r}:\n{self.text()[-2000:]}")
            time.sleep(0.01)
        raise RuntimeError(f"{self.name}: no {pattern!r} within {timeout_s} s:\n"
                           f"{self.text()[-2000:]}")

    def stop(self, sig: int = signal.SIGTERM, timeout_s: float = 10.0) -> int | None:
        if self.proc.poll() is None:
            try:
                os.kill(self.proc.pid, signal.SIGCONT)   # in case it was stopped
                self.proc.send_signal(sig)
                self.proc.wait(timeout_s)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout_s)
            except ProcessLookupError:
                pass
        self._log.close()
        return self.proc.returncode


class Observer(threading.Thread):
    """Every state the arm side sends, with its arrival time, as an observer (direct link)."""

    def __init__(self, endpoint: str) -> None:
        super().__init__(daemon=True, name="fault-observer")
        arm = load_arm(ARM)
        self.client = ArmClient(endpoint, hello=hello_for(arm, "observer",
                                                          stale_after_s=STALE_AFTER_S))
        _, first = self.client.handshake(20.0)
        self.states: list[State] = [first]
        self._halt = threading.Event()
        self.start()

    def run(self) -> None:
        sock = self.client.socket
        while not self._halt.is_set():
            if not sock.poll(5):
                continue
            while True:
                try:
                    frame = sock.recv(zmq.NOBLOCK)
                except zmq.Again:
                    break
                try:
                    msg = decode(frame, n_joints=self.client.n_joints)
                except ProtocolError:
                    continue
                if isinstance(msg, State):
                    self.states.append(msg)

    def wait_until(self, predicate: Callable[[State], bool], timeout_s: float) -> State | None:
        deadline = time.monotonic() + timeout_s
        seen = 0
        while time.monotonic() < deadline:
            states = self.states
            for s in states[seen:]:
                if predicate(s):
                    return s
            seen = len(states)
            time.sleep(0.005)
        return None

    def close(self) -> None:
        self._halt.set()
        self.join(5.0)
        self.client.close()


# ----------------------------------------------------------------------------------------
# One run
# ----------------------------------------------------------------------------------------

def arm_side_priority() -> None:
    """preexec_fn of the simulated arm: SCHED_FIFO at ARM_PRIORITY where allowed."""
    try:
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(ARM_PRIORITY))
    except (AttributeError, OSError):
        pass


def limit_file_size(n_bytes: int) -> Callable[[], None]:
    """preexec_fn: writes past n_bytes fail with EFBIG (the disk is full, for this process).
    Python ignores SIGXFSZ, so the write fails instead of killing the process."""
    def apply() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (n_bytes, n_bytes))
    return apply


class Rig:
    """The three processes and the observer for one run. A context manager."""

    def __init__(self, folder: Path, *, relay: list[str] = (), drive_input: str | None = None,
                 drive_options: list[str] = (), drive_preexec=None, seed: int = 1) -> None:
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self.arm = load_arm(ARM)
        self.sim_endpoint = f"tcp://127.0.0.1:{free_port()}"
        self.relay_endpoint = f"tcp://127.0.0.1:{free_port()}"
        self.sessions = folder / "sessions"
        self.summary_path = folder / "summary.json"
        self.relay_report = folder / "relay.json"
        self.children: list[Child] = []
        self.observer: Observer | None = None
        py = sys.executable
        try:
            # All three start at once: drive's hello is repeated until the arm side answers.
            self.sim = self._start("sim", [py, "-m", "sim.arm", ARM, "--endpoint",
                                           self.sim_endpoint, "--stale-after",
                                           f"{STALE_AFTER_S:g}", "--duration", "60"],
                                  preexec_fn=arm_side_priority if REALTIME else None)
            self.relay = self._start("relay", [py, "-m", "runtime.cli", "relay", "--listen",
                                               self.relay_endpoint, "--target",
                                               self.sim_endpoint, "--seed", str(seed),
                                               "--report", str(self.relay_report), *relay])
            self.drive = self._start("drive", [
                py, "-m", "runtime.cli", "drive", "--headless", "--arm", ARM, "--target",
                self.relay_endpoint, "--input", drive_input or f"script:{MOTION}",
                "--stale-after", f"{STALE_AFTER_S:g}", "--rate", f"{RATE_HZ:g}",
                "--sessions", str(self.sessions),
                "--summary-json", str(self.summary_path),
                *(["--realtime"] if REALTIME else []), *drive_options],
                preexec_fn=drive_preexec)
            self.sim.wait_for(r"jogwire sim ready")
            self.relay.wait_for(r"jogwire relay ready")
            self.observer = Observer(self.sim_endpoint)
            self.drive.wait_for(r"jogwire drive: \S+ via")
        except BaseException:
            self.close()
            raise

    def _start(self, name: str, argv: list[str], preexec_fn=None) -> Child:
        child = Child(name, argv, self.folder, preexec_fn=preexec_fn)
        self.children.append(child)
        return child

    def wait_moving(self, timeout_s: float = 10.0) -> int:
        """Monotonic ns of the first state in which the arm moves."""
        s = self.observer.wait_until(lambda s: max(map(abs, s.qd)) > MOVING, timeout_s)
        if s is None:
            raise Disturbed("the arm never started moving: " + " | ".join(
                ln.strip() for ln in self.drive.text().splitlines()[-3:]))
        return s.t_ns

    def wait_drive(self, timeout_s: float = 30.0) -> int | None:
        try:
            return self.drive.proc.wait(timeout_s)
        except subprocess.TimeoutExpired:
            return None

    def relay_event_ns(self, text: str, timeout_s: float = 5.0) -> int:
        m = self.relay.wait_for(re.escape(text) + r" t_ns=(\d+)", timeout_s)
        return int(m.group(1))

    def close(self) -> None:
        try:
            if self.observer is not None:
                self.observer.close()
        finally:
            for child in reversed(self.children):
                child.stop()


@dataclass
class Collected:
    """Everything a run left behind."""

    states: list[State]
    session: object | None           # runtime.sessions.log_reader.Session
    summary: dict | None
    relay: dict | None
    sim_counts: dict[str, int]
    drive_output: str
    drive_exit: int | None


def collect(rig: Rig) -> Collected:
    rig.close()
    sessions = sorted(rig.sessions.glob("*.jwlog")) if rig.sessions.exists() else []
    session = None
    if sessions:
        try:
            session = read_session(sessions[-1])
        except LogError:
            session = None
    summary = json.loads(rig.summary_path.read_text()) if rig.summary_path.exists() else None
    relay = json.loads(rig.relay_report.read_text()) if rig.relay_report.exists() else None
    return Collected(states=rig.observer.states, session=session, summary=summary,
                     relay=relay, sim_counts=sim_counts(rig.sim.text()),
                     drive_output=rig.drive.text(), drive_exit=rig.drive.proc.returncode)


def sim_counts(log: str) -> dict[str, int]:
    """The arm side's drop counters from its summary line ("… dropped: late 3, …")."""
    lines = [ln for ln in log.splitlines() if "stopped:" in ln and "dropped:" in ln]
    if not lines:
        return {}
    return {k: int(v) for k, v in re.findall(r"(\w+) (\d+)", lines[-1].split("dropped:")[1])}


# ----------------------------------------------------------------------------------------
# Measurements
# ----------------------------------------------------------------------------------------

@dataclass
class FaultResult:
    fault: str
    measured_from: str                  # "fault" or "release" (enable let go)
    stop_s: float | None                # event → standstill at the arm
    bound_s: float                      # stale_after + T + one cycle
    braking_s: float                    # T at the event
    restarted: bool                     # moved again after the stop with enable still held
    applied_backwards: int              # states whose applied_seq went down (must be 0)
    garbage_acted_on: int               # garbage delivered to the arm side, not counted there
    arm_dropped: dict[str, int]
    runtime_dropped: dict[str, int]
    runtime_used_older: int = 0         # cycles that used an older state than before (0)
    runtime_used_unknown: int = 0       # cycles whose q matches no state the arm sent (0)
    relay: dict = field(default_factory=dict)
    records_lost_before_fault: int = 0  # cycle records missing before the fault
    tail_lost_s: float | None = None    # kill -9: unflushed end of the log, in seconds
    exercised: bool = True              # the arm was moving when the fault (release) came
    peak_speed: float | None = None     # faults that must not let the arm move: max |q̇| seen
    figures: dict[str, float] = field(default_factory=dict)   # what only this fault has
    notes: list[str] = field(default_factory=list)

    @property
    def within_bound(self) -> bool:
        return self.stop_s is not None and self.stop_s <= self.bound_s

    @property
    def bad_acted_on(self) -> int:
        return (self.applied_backwards + self.garbage_acted_on + self.runtime_used_older
                + self.runtime_used_unknown)

    def as_dict(self) -> dict:
        return asdict(self) | {"within_bound": self.within_bound}


def standstill_after(states: list[State], t_ns: int) -> State | None:
    """The first state from t_ns on that starts a standstill of at least STILL_S (a reversal
    of direction passes through zero speed for a step or two; that is not a stop)."""
    start = None
    for s in states:
        if s.t_ns < t_ns:
            continue
        if max(map(abs, s.qd)) > REST:
            start = None
        elif start is None:
            start = s
        elif s.t_ns - start.t_ns >= STILL_S * 1e9:
            return start
    return start            # still at rest when the record ends


def braking_time_s(states: list[State], t_ns: int, arm) -> float:
    """T = max_i |q̇_i| / a_rated,i from the last state before t_ns (sim/arm_side.stop_time_s)."""
    before = [s for s in states if s.t_ns <= t_ns]
    if not before:
        return 0.0
    return float(np.max(np.abs(before[-1].qd) / arm.rated_accel))


def speed_before(states: list[State], t_ns: int) -> float:
    """Largest |q̇_i| (rad/s) in the last state at or before t_ns."""
    before = [s for s in states if s.t_ns <= t_ns]
    return max(map(abs, before[-1].qd)) if before else 0.0


def moved_between(states: list[State], t_from: int, t_to: int) -> bool:
    return any(t_from < s.t_ns < t_to and max(map(abs, s.qd)) > MOVING for s in states)


def applied_backwards(states: list[State]) -> int:
    return sum(1 for a, b in zip(states, states[1:]) if b.applied_seq < a.applied_seq)


def observer_missed(states: list[State]) -> int:
    """States the observer did not get (the arm side numbers every state it sends)."""
    return sum(b.seq - a.seq - 1 for a, b in zip(states, states[1:]) if b.seq > a.seq + 1)


def runtime_state_use(session, states: list[State]) -> tuple[int, int]:
    """What the runtime acted on, from its session log: (cycles that used an older state than
    an earlier cycle had used, cycles whose q is in no state the arm sent).

    Each cycle's q is matched to the states the arm sent, as the observer saw them (at rest
    many states share one q, hence a greedy match: the oldest candidate not older than the
    previous cycle's). Cycles before the first match used states sent before the observer
    connected and are skipped, and so are cycles after the last match: the observer stops
    reading when the run ends, and the runtime's last cycles may use states sent after
    that. An observer that missed states (`observer_missed`: a busy machine) cannot vouch
    for a q it did not see: then no q counts as unknown."""
    if session is None:
        return 0, 0
    seqs: dict[tuple[float, ...], list[int]] = {}
    for s in states:                                   # states arrive in seq order
        seqs.setdefault(tuple(s.q), []).append(s.seq)
    older = unknown = floor = pending = 0
    matched, missed = False, observer_missed(states)
    for rec in session.records:
        candidates = seqs.get(tuple(rec.q)) if rec.q else None
        if candidates is None:
            pending += matched and bool(rec.q) and not missed
            continue
        matched = True
        unknown, pending = unknown + pending, 0        # unknowns before a later match count
        i = bisect.bisect_left(candidates, floor)
        if i == len(candidates):
            older += 1
        else:
            floor = candidates[i]
    return older, unknown


def runtime_clock_zero_ns(session, states: list[State]) -> int | None:
    """Monotonic ns of the runtime's cycle 0 (its t_s = 0), from the echoed send times: the
    rates of cycle k (seq k + 1) were sent at zero + t_s[k] + a little compute time."""
    if session is None or not session.records:
        return None
    t_of = {r.cycle: r.t_s for r in session.records}
    offsets = [s.echo_ns - int(t_of[s.applied_seq - 1] * 1e9) for s in states
               if s.applied_seq and (s.applied_seq - 1) in t_of]
    return min(offsets) if offsets else None


def release_time_s(script_path: Path = MOTION) -> float:
    """When the script lets go of enable after its motion (s after it starts)."""
    script = load_script(script_path)
    t, moved = script.lead_in_s, False
    for seg in script.segments:
        if moved and not seg.command.enable:
            return t
        moved = moved or seg.command.enable
        t += seg.duration_s
    return t


def malformed(counts: dict[str, int]) -> int:
    return sum(v for k, v in counts.items() if k in MALFORMED)


def overran_between(c: Collected, t_from_ns: int, t_to_ns: int) -> bool:
    """The runtime's gate stopped motion for loop overruns in this window: the machine was
    too busy, and the run says nothing about the fault under test."""
    zero = runtime_clock_zero_ns(c.session, c.states)
    if zero is None:
        return False
    return any("overran" in rec.enable_reason and not rec.enabled
               for rec in c.session.records if t_from_ns <= zero + rec.t_s * 1e9 <= t_to_ns)


def result_for(name: str, c: Collected, t_event_ns: int | None, measured_from: str,
               *, restart_until_ns: int | None = None,
               busy_window: tuple[int, int | None] | None = None) -> FaultResult:
    """The figures of one run. busy_window: (from, to) in which an overrun stop of the
    runtime's loop marks the run as not exercised (to None: until the standstill)."""
    arm = load_arm(ARM)
    states = c.states
    stop = standstill_after(states, t_event_ns) if t_event_ns is not None else None
    braking = braking_time_s(states, t_event_ns, arm) if t_event_ns is not None else 0.0
    restarted = False
    if stop is not None and restart_until_ns is not None:
        restarted = moved_between(states, stop.t_ns, restart_until_ns)
    relay = c.relay or {}
    rates_link = relay.get("rates", {})
    acted = 0
    if rates_link:
        reached = rates_link["garbage"] - rates_link["garbage_unsent"]
        acted = max(0, reached - malformed(c.sim_counts))
    runtime_dropped: dict[str, int] = {}
    if c.summary is not None:
        runtime_dropped = dict(c.summary["link"]["states_dropped"])
        runtime_dropped["refused (old or late)"] = c.summary["link"]["states_refused"]
    exercised = t_event_ns is not None and speed_before(states, t_event_ns) > MOVING
    older, unknown = runtime_state_use(c.session, states)
    notes = []
    figures = {}
    if (missed := observer_missed(states)):
        figures["observer_missed"] = missed
        notes.append(f"the observer missed {missed} states: a q it did not see is not "
                     "counted as unknown")
    if busy_window is not None and busy_window[1] is None:    # until the stop
        busy_window = (busy_window[0], stop.t_ns if stop is not None else t_event_ns)
    if busy_window is not None and overran_between(c, *busy_window):
        exercised = False
        notes.append("disturbed: the runtime's loop overran (machine busy)")
    return FaultResult(
        fault=name, measured_from=measured_from, exercised=exercised, notes=notes,
        figures=figures,
        stop_s=None if stop is None else (stop.t_ns - t_event_ns) * 1e-9,
        bound_s=STALE_AFTER_S + braking + CYCLE_S, braking_s=braking, restarted=restarted,
        applied_backwards=applied_backwards(states), garbage_acted_on=acted,
        runtime_used_older=older, runtime_used_unknown=unknown,
        arm_dropped=dict(c.sim_counts), runtime_dropped=runtime_dropped,
        relay={k: {kk: vv for kk, vv in v.items() if kk != "kinds"} if isinstance(v, dict)
               else v for k, v in relay.items() if k in ("rates", "state")})


def session_gaps(session) -> int:
    """Records missing inside the log (cycle numbers skipped)."""
    cycles = [r.cycle for r in session.records]
    return sum(b - a - 1 for a, b in zip(cycles, cycles[1:]) if b > a + 1)


# ----------------------------------------------------------------------------------------
# The faults
# ----------------------------------------------------------------------------------------

def _script_run(name: str, folder: Path, *, relay: list[str] = (),
                inject: Callable[[Rig, int], int] | None = None, seed: int = 1,
                drive_preexec=None, after_s: float = FAULT_AFTER_S) -> tuple[Collected, int,
                                                                              int, int | None]:
    """Run the scripted motion; inject at motion + after_s. Returns (collected, motion ns,
    release ns, fault ns or None)."""
    rig = Rig(folder, relay=list(relay), seed=seed, drive_preexec=drive_preexec)
    t_fault = None
    try:
        t_motion = rig.wait_moving()
        if inject is not None:
            time.sleep(max(0.0, (t_motion + after_s * 1e9 - time.monotonic_ns()) * 1e-9))
            t_fault = inject(rig, t_motion)
        rig.wait_drive(30.0)
    finally:
        c = collect(rig)
    zero = runtime_clock_zero_ns(c.session, c.states)
    t_release = None if zero is None else zero + int(release_time_s() * 1e9)
    return c, t_motion, t_release, t_fault


def runtime_reasons(c: Collected, t_from_ns: int, most: int = 3) -> list[str]:
    """The first `most` different reasons the runtime gave for refusing motion from t_from_ns
    on, from its session log."""
    zero = runtime_clock_zero_ns(c.session, c.states)
    reasons: list[str] = []
    for rec in c.session.records if zero is not None else ():
        if zero + rec.t_s * 1e9 >= t_from_ns and not rec.enabled and \
                rec.enable_reason not in reasons:
            reasons.append(rec.enable_reason)
    return reasons[:most]


def link_fault(name: str, relay: list[str]) -> Callable[[Path, int], FaultResult]:
    """A link that starts to misbehave mid-motion (the relay's faults wait for SIGUSR2).

    Either the system rides through it (the motion goes on; the stop time is then measured
    from the moment the script lets go of enable) or it stops (measured from the onset); in
    both cases nothing bad may be acted on and the arm must not restart with enable held."""
    def run(folder: Path, seed: int = 1) -> FaultResult:
        def start(rig: Rig, _: int) -> int:
            os.kill(rig.relay.pid, signal.SIGUSR2)
            return rig.relay_event_ns("direction faults on")
        c, t_motion, t_release, t_onset = _script_run(
            name, folder, relay=[*relay, "--faults-from", "signal"], seed=seed, inject=start)
        stop = standstill_after(c.states, t_onset) if t_release is not None else None
        if stop is not None and stop.t_ns < t_release:
            r = result_for(name, c, t_onset, "fault", restart_until_ns=t_release,
                           busy_window=(t_motion, None))
        else:
            r = result_for(name, c, t_release, "release", busy_window=(t_motion, None))
            r.notes.append("rode through: still moving when enable was let go")
        r.exercised = r.exercised and speed_before(c.states, t_onset) > MOVING
        if c.session is not None:
            r.records_lost_before_fault = session_gaps(c.session)
            if r.measured_from == "fault":
                r.notes.append("runtime's reasons: " + "; ".join(runtime_reasons(c, t_onset, 2)))
        return r
    return run


def steady_latency(folder: Path, seed: int = 1) -> FaultResult:
    """200 ms each way from the first message on: a round trip of 400 ms, four times
    stale_after, which neither lateness filter can see (every message is equally late). The
    runtime must refuse motion when the script presses enable, and say why.

    stop_s: from the release to the standstill (0 when the arm never moved); peak_speed:
    the largest |q̇| the arm showed after the press (must stay at rest)."""
    name = "200 ms latency from the start, both directions"
    rig = Rig(folder, relay=["--delay", "200ms"], seed=seed)
    try:
        rig.wait_drive(30.0)
    finally:
        c = collect(rig)
    zero = runtime_clock_zero_ns(c.session, c.states)
    if zero is None:
        raise Disturbed("no session log with echoed rates: " + c.drive_output[-300:])
    t_press = zero + int(load_script(MOTION).lead_in_s * 1e9)
    t_release = zero + int(release_time_s() * 1e9)
    r = result_for(name, c, t_release, "release")
    r.exercised = c.session.records[-1].t_s * 1e9 > t_release - zero   # the script played
    r.peak_speed = max((max(map(abs, st.qd)) for st in c.states if st.t_ns >= t_press),
                       default=0.0)
    r.records_lost_before_fault = session_gaps(c.session)
    reasons = runtime_reasons(c, t_press, 2)
    r.notes.append("runtime's reasons: " + "; ".join(reasons))
    shown = [int(m) for m in re.findall(r"link round trip (\d+) ms", " ".join(reasons))]
    if shown:
        r.figures["round_trip_shown_s"] = shown[0] * 1e-3
    said = re.search(r"BLOCKED \| (link round trip \d+ ms[^|]*)\|", c.drive_output)
    r.notes.append("status line: " + (said.group(1).strip() if said else "(not shown)"))
    if c.summary is not None:
        link = c.summary["link"]
        r.notes.append(f"summary: round trip over the limit for "
                       f"{link['round_trip_over_limit_s']:.1f} s, median up to "
                       f"{link['round_trip_worst_median_s'] * 1e3:.0f} ms")
    return r


def runtime_killed(folder: Path, seed: int = 1) -> FaultResult:
    def kill(rig: Rig, _: int) -> int:
        t = time.monotonic_ns()
        os.kill(rig.drive.pid, signal.SIGKILL)
        time.sleep(1.0)                    # watch the arm stop and stay stopped
        return t
    # The kill lands anywhere in the recorder's flush cycle (a seeded draw), so that the
    # repeats sample the whole range of unflushed tails, not one phase of it.
    after_s = FAULT_AFTER_S + random.Random(seed).uniform(0.0, FLUSH_S)
    c, t_motion, _, t_fault = _script_run("runtime killed (-9)", folder, inject=kill,
                                          seed=seed, after_s=after_s)
    r = result_for("runtime killed (-9)", c, t_fault, "fault",
                   restart_until_ns=t_fault + int(1e9), busy_window=(t_motion, t_fault))
    if c.session is not None and c.session.records:
        zero = runtime_clock_zero_ns(c.session, c.states)
        last = c.session.records[-1]
        r.records_lost_before_fault = session_gaps(c.session)
        if zero is not None:
            r.tail_lost_s = (t_fault - zero) * 1e-9 - last.t_s
        r.notes.append(f"log: {len(c.session.records)} records, problems: "
                       + ", ".join(p.kind for p in c.session.problems))
    return r


def sim_killed(folder: Path, seed: int = 1) -> FaultResult:
    """The arm side dies: nothing to measure at the arm; the runtime must notice (state
    stale) and command zero. stop_s here is fault → first zero-rates cycle in the log.

    States already on their way still arrive after the kill (through the relay), and the
    runtime cannot tell before the last one is in: the bound is stale_after + one cycle from
    the cycle that took in the last state (its age is in the log), i.e. + that in-flight
    time from the kill (noted)."""
    def kill(rig: Rig, _: int) -> int:
        t = time.monotonic_ns()
        os.kill(rig.sim.pid, signal.SIGKILL)
        return t
    c, t_motion, _, t_fault = _script_run("sim killed", folder, inject=kill, seed=seed)
    r = result_for("sim killed (-9)", c, None, "fault")
    r.exercised = speed_before(c.states, t_fault) > MOVING and \
        not overran_between(c, t_motion, t_fault)
    r.braking_s = 0.0
    r.bound_s = STALE_AFTER_S + CYCLE_S
    zero = runtime_clock_zero_ns(c.session, c.states)
    if c.session is None or zero is None:
        r.notes.append("no session log to read the runtime's reaction from")
        return r
    after = [rec for rec in c.session.records if zero + rec.t_s * 1e9 >= t_fault]
    first_zero = next((rec for rec in after if not rec.enabled and not any(rec.rates)), None)
    if first_zero is not None:
        r.stop_s = (zero + first_zero.t_s * 1e9 - t_fault) * 1e-9
        if first_zero.state_age_s is not None:
            last_in_s = (zero - t_fault) * 1e-9 + first_zero.t_s - first_zero.state_age_s
            r.bound_s += max(0.0, last_in_s)
            r.figures["in_flight_s"] = last_in_s
            r.notes.append(f"last state taken in {last_in_s * 1e3:.1f} ms after the kill")
        later = after[after.index(first_zero):]
        r.restarted = any(any(rec.rates) for rec in later)
        r.notes.append(f"runtime's reason: {first_zero.enable_reason}")
    r.notes.append("runtime shows it: " + ("yes" if "arm state stale" in c.drive_output
                                           else "no"))
    r.records_lost_before_fault = session_gaps(c.session)
    return r


def stalled(direction: str) -> Callable[[Path, int], FaultResult]:
    name = f"{direction} stream stalled {STALL_S * 1e3:g} ms"

    def run(folder: Path, seed: int = 1) -> FaultResult:
        def stall(rig: Rig, _: int) -> int:
            os.kill(rig.relay.pid, signal.SIGUSR1)
            return rig.relay_event_ns(f"{direction} direction stalled")
        c, t_motion, t_release, t_fault = _script_run(
            name, folder, seed=seed, inject=stall,
            relay=["--stall", f"{direction}={STALL_S * 1e3:g}ms", "--stall-hold"])
        r = result_for(name, c, t_fault, "fault", restart_until_ns=t_release,
                       busy_window=(t_motion, None))
        if c.session is not None:
            r.records_lost_before_fault = session_gaps(c.session)
        return r
    return run


def loop_starved(folder: Path, seed: int = 1) -> FaultResult:
    """The runtime gets the CPU for run_ms out of every stop_ms + run_ms (SIGSTOP/SIGCONT)
    for starve_s. Stopped longer than a cycle, every cycle overruns (a stop shorter than a
    cycle lets some cycles end in time, which resets the streak); the streak must stop
    motion."""
    stop_ms, run_ms, starve_s = 10.0, 1.0, 0.4

    def starve(rig: Rig, _: int) -> int:
        t0 = time.monotonic_ns()
        pid = rig.drive.pid
        while time.monotonic_ns() - t0 < starve_s * 1e9:
            os.kill(pid, signal.SIGSTOP)
            time.sleep(stop_ms * 1e-3)
            os.kill(pid, signal.SIGCONT)
            time.sleep(run_ms * 1e-3)
        return t0
    name = "loop starved of CPU"
    c, t_motion, t_release, t_fault = _script_run(name, folder, inject=starve, seed=seed)
    r = result_for(name, c, t_fault, "fault", restart_until_ns=t_release,
                   busy_window=(t_motion, t_fault))
    zero = runtime_clock_zero_ns(c.session, c.states)
    if zero is not None:
        after = [rec for rec in c.session.records if zero + rec.t_s * 1e9 >= t_fault]
        r.notes.append("runtime's reasons: " + "; ".join(runtime_reasons(c, t_fault)))
        r.figures["longest_streak"] = max((rec.overrun_streak for rec in after), default=0)
        r.notes.append(f"longest overrun streak: {r.figures['longest_streak']}")
        r.records_lost_before_fault = session_gaps(c.session)
    return r


def disk_full(folder: Path, seed: int = 1) -> FaultResult:
    """Session log writes fail (EFBIG past a file-size limit) about 1.5 s into the motion.

    The limit fits the header (about 3.5 kB) and about 1.9 s of blocks of the format-2 log
    at RATE_HZ (about 29 kB/s for this motion, measured here)."""
    limit = 55_000
    name = "disk full while recording"
    c, t_motion, t_release, _ = _script_run(name, folder, seed=seed,
                                            drive_preexec=limit_file_size(limit))
    r = result_for(name, c, t_release, "release", busy_window=(t_motion, t_release))
    zero = runtime_clock_zero_ns(c.session, c.states)
    if c.session is None or zero is None or not c.session.records:
        r.notes.append("no session log")
        return r
    t_full = zero + int(c.session.records[-1].t_s * 1e9)
    r.records_lost_before_fault = session_gaps(c.session)
    r.figures["full_before_release"] = t_motion < t_full < t_release
    # Everything that fit was kept: the bytes after the last readable record are at most
    # one block, the one being written when the disk filled (a block holds one flush
    # interval of cycles, runtime.sessions.log_writer).
    size = c.session.path.stat().st_size
    torn = next((pr.offset for pr in c.session.problems if pr.kind == TORN_TAIL), size)
    r.figures["unreadable_bytes"] = size - torn
    r.figures["record_bytes"] = torn / len(c.session.records)
    r.figures["block_bytes"] = r.figures["record_bytes"] * RATE_HZ * FLUSH_INTERVAL_S
    written = c.summary["session"]["written"] if c.summary else None
    r.notes.append(f"log full after {len(c.session.records)} records "
                   f"({(t_full - t_motion) * 1e-9:.2f} s into the motion); "
                   f"readable {len(c.session.records)}, writer says written {written}; "
                   f"{size - torn} bytes unreadable at the end of {size}")
    # Said while driving: the line the drive prints when the writer fails, before its
    # summary (which starts "jogwire drive: <why it ended> after …").
    summary_at = c.drive_output.rfind("jogwire drive: ")
    live = c.drive_output[:summary_at]
    r.notes.append("said while driving: " + ("yes" if "RECORDING STOPPED" in live
                                             else "no (only in the end summary)"))
    if c.summary is not None:
        failed = c.summary["session"]["failed"]
        r.notes.append(f"summary: recording stopped: {failed}")
        r.notes.append(f"loop: overruns {c.summary['loop']['overruns']}, longest streak "
                       f"{c.summary['loop']['max_overrun_streak']}")
    # The loop's pace seen at the arm: distinct rates applied per second, 1 s before and after.
    def applied_rate(t_from: int, t_to: int) -> float:
        seqs = {s.applied_seq for s in c.states if t_from <= s.t_ns < t_to}
        return len(seqs) / ((t_to - t_from) * 1e-9)
    span = int(0.5e9)
    r.notes.append(f"rates applied at the arm: {applied_rate(t_full - span, t_full):.0f}/s "
                   f"before, {applied_rate(t_full, t_full + span):.0f}/s after the disk filled")
    r.figures["applied_per_s_before"] = applied_rate(t_full - span, t_full)
    r.figures["applied_per_s_after"] = applied_rate(t_full, t_full + span)
    return r


def pad_unplugged(folder: Path, seed: int = 1) -> FaultResult:
    """The input program (network twist source) goes silent while the arm moves, comes back
    with enable still held (must not move), then releases and presses again (must move)."""
    twist_endpoint = f"tcp://127.0.0.1:{free_port()}"
    plan = [  # (from s, to s, enable, vx m/s); None: silent
        (0.0, 0.4, False, 0.0), (0.4, 1.2, True, 0.1), (1.2, 1.8, None, 0.0),
        (1.8, 2.3, True, 0.1), (2.3, 2.5, False, 0.0), (2.5, 3.0, True, 0.1),
        (3.0, 3.4, False, 0.0)]
    rig = Rig(folder, seed=seed, drive_input=f"network:{twist_endpoint}",
              drive_options=["--duration", "3.8"])
    marks: dict[str, int] = {}
    try:
        with Publisher(twist_endpoint) as pub:
            t0 = time.monotonic_ns()
            seq = 0
            while (t := (time.monotonic_ns() - t0) * 1e-9) < plan[-1][1]:
                phase = next(p for p in plan if p[0] <= t < p[1])
                if phase[2] is not None:
                    seq += 1
                    now = time.monotonic_ns()
                    pub.send(Twist(seq, now, (phase[3], 0, 0, 0, 0, 0), "base", phase[2]))
                    marks.setdefault(f"{phase[0]}", now)
                    if phase[0] == 0.4:
                        marks["last_before_silence"] = now
                time.sleep(0.005)
        rig.wait_drive(10.0)
    finally:
        c = collect(rig)
    name = "pad unplugged while moving"
    t_fault = marks["last_before_silence"]
    r = result_for(name, c, t_fault, "fault", restart_until_ns=marks["2.3"],
                   busy_window=(marks["0.4"], None))
    fresh = marks["2.5"]
    r.notes.append("moves again after a fresh enable: "
                   + ("yes" if moved_between(c.states, fresh, fresh + int(0.6e9)) else "no"))
    if c.session is not None:
        r.records_lost_before_fault = session_gaps(c.session)
    return r


FAULTS: dict[str, Callable[[Path, int], FaultResult]] = {
    "runtime_killed": runtime_killed,
    "sim_killed": sim_killed,
    "state_stalled": stalled("state"),
    "rates_stalled": stalled("rates"),
    "loss_20": link_fault("20 % loss, both directions", ["--loss", "20%"]),
    "latency_200ms": link_fault("latency jumps by 200 ms, both directions",
                                ["--delay", "200ms"]),
    "latency_200ms_steady": steady_latency,
    "dup_reorder": link_fault("20 % duplicated and 20 % reordered, both directions",
                              ["--duplicate", "20%", "--reorder", "20%"]),
    "garbage": link_fault("garbage among good messages, both directions (no foreign "
                          "version toward the arm)",
                          ["--garbage", "20%", "--garbage-kinds",
                           "rates=" + ",".join(k for k in GARBAGE_KINDS if k != "version")]),
    # Every rates message comes after a frame of another protocol version, so the stop is
    # measured from the first one (at 20 % of all kinds it would come at a random time).
    "garbage_version": link_fault("a foreign protocol version toward the arm, garbage toward "
                                  "the runtime",
                                  ["--garbage", "rates=100%", "--garbage-burst", "rates=1",
                                   "--garbage-kinds", "rates=version", "--garbage",
                                   "state=20%"]),
    "pad_unplugged": pad_unplugged,
    "disk_full": disk_full,
    "loop_starved": loop_starved,
}
