"""The simulated arm stepped in lockstep with the control cycle, faster than real time.

    runtime (this process)                      sim child (`python -m sim.arm … --lockstep`)
    ControlCycle.step(q_k) ─► rates_k ──wire──► N physics steps with rates_k
              ▲                                        │
              └──────────── state (q, q̇) after them ◄──┘

`runtime` never imports the simulator: the arm runs in a child process and every cycle is
one round trip over a pair of pipes (`runtime.link.pipes`: the wire's messages, in the pipes
or, where two cores allow, in shared-memory rings beside them; docs/PROTOCOL.md, "Lockstep
over pipes"). One rates
message advances `substeps` physics steps, so a 500 Hz cycle on a 1 ms physics step is two
steps per message. The run is deterministic: the next rates go out only after the state
whose `applied_seq` is the last rates' `seq` has come back, and each cycle's time is the
simulated time k·dt, not the wall clock.

`run_closed_loop` is the loop that preflight and `replay --rerun --closed-loop` share: an
input frame per cycle in, the cycle's output and the arm's state after it out.
"""

from __future__ import annotations

import gc
import math
import os
import subprocess
import time
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

import numpy as np
from numpy.typing import NDArray

from ..arm.load import load_arm
from ..arm.model import Arm, configs_dir, limits_digest
from ..control.cycle import STATE_LAGS, ControlCycle, CycleOutput
from ..control.intent import InputFrame
from ..errors import ConfigError, TransportError
from ..link import shared_rings
from ..link.arm_process import ArmProcess
from ..link.pipes import PipeClient, child_link, link_spec
from ..link.protocol import (
    CellHello,
    Contact,
    Refuse,
    State,
    geometry_digest,
    hello_for,
    rates_message,
)

Vector = NDArray[np.float64]

# In lockstep nothing is late: the runtime waits for every state. The arm side's lateness
# filter would still drop a message delayed by a stall of this machine longer than its
# stale_after, and the run would hang waiting for a state that never comes; so the child
# gets a stale_after far beyond any stall.
LOCKSTEP_STALE_AFTER_S = 3600.0
ANSWER_TIMEOUT_S = 10.0     # no state this long after a rates message: the child is gone
CELL_ANSWER_TIMEOUT_S = 5.0  # no answer to our workcell this long: the child reports no contacts
LINKS = ("auto", "shm", "pipe")


def link_kind(choice: str) -> str:
    """The link a lockstep run takes: "shm" (frames through shared rings, the pipes as
    doorbell) where `shared_rings.usable()`, "pipe" otherwise; or the one asked for.
    ConfigError if shared rings are asked for where they do not work."""
    if choice not in LINKS:
        raise ConfigError(f"the lockstep link is one of {', '.join(LINKS)}, got {choice!r}",
                          field="lockstep-link")
    why_not = shared_rings.usable() if choice != "pipe" else None
    if choice == "shm" and why_not:
        raise ConfigError(f"no shared-memory lockstep link here: {why_not}",
                          field="lockstep-link")
    return "pipe" if choice == "pipe" or why_not else "shm"


def substeps_for(rate_hz: float, step_hz: float) -> int:
    """Physics steps per control cycle; the control period must be a whole number of them."""
    if not (math.isfinite(rate_hz) and rate_hz > 0):
        raise ConfigError(f"the control rate must be a positive number, got {rate_hz:g}",
                          field="rate")
    if not (math.isfinite(step_hz) and 1.0 <= step_hz <= 20000.0):
        raise ConfigError(f"the physics step rate must be within 1…20000 Hz, got {step_hz:g}",
                          field="step-hz")
    ratio = step_hz / rate_hz
    n = round(ratio)
    if n < 1 or abs(ratio - n) > 1e-9 * ratio:
        raise ConfigError(f"the physics step rate ({step_hz:g} Hz) must be a whole multiple "
                          f"of the control rate ({rate_hz:g} Hz)", field="step-hz")
    return n


def same_arm(a: Arm, b: Arm) -> bool:
    """The two models agree on everything the wire compares (limits and geometry)."""
    return (a.joint_names == b.joint_names and limits_digest(a) == limits_digest(b)
            and geometry_digest(a) == geometry_digest(b))


def arm_file_for(arm: Arm) -> str:
    """A name or path the child can load that gives the very same arm: the file the model
    came from, or a shipped arm of that name. The child cannot be handed a model in
    memory, only a file, and the hello exchange checks it is the same arm."""
    for candidate in (arm.source, arm.name):
        if not candidate:
            continue
        path = Path(candidate)
        if not path.exists() and not (configs_dir() / "arms" / f"{candidate}.toml").exists():
            continue
        try:
            if same_arm(load_arm(candidate), arm):
                return str(candidate)
        except ConfigError:
            continue
    raise ConfigError(
        f"the arm {arm.name!r} of this session (from {arm.source or 'an unknown file'}) is "
        f"not available as a file with the same limits and geometry; pass --arm with the "
        f"arm file to use", field="arm")


Touch = tuple[str, str, float]       # (part of the arm, what it touches, depth m)


@dataclass(frozen=True, eq=False)
class SimStep:
    """The arm after one lockstep cycle: q (rad or m), q̇ (rad/s or m/s), whether the
    arm side had to reduce the rates at its own limits, and the contacts PyBullet found at
    the end of the cycle's last physics step (deepest first; docs/PROTOCOL.md §5a)."""

    q: Vector
    qd: Vector
    limited: bool
    contacts: tuple[Touch, ...] = ()


class LockstepSim:
    """A `sim.arm` child in lockstep mode on a free loopback port, and the link to it.

    arm_spec: what the child loads (a shipped name or a file); `arm` is our model of it,
    and the hello exchange refuses a child whose arm differs (ModelMismatch).
    start_q: the pose the arm starts in (rad or m); None = the arm's home pose.
    cell_spec, cell: the workcell the child loads (a shipped name or a file) and our
    `CellHello` for it: the child then holds its objects and reports contacts, and
    `arm_cell` is its answer (None: it reports no contacts).
    link: "auto", "shm" or "pipe" (`link_kind`); the one taken is in `link`.
    """

    def __init__(self, arm_spec: str, arm: Arm, *, rate_hz: float, step_hz: float,
                 start_q: Sequence[float] | None = None, cell_spec: str | None = None,
                 cell: CellHello | None = None, ready_timeout_s: float = 30.0,
                 link: str = "auto") -> None:
        self.arm = arm
        self.substeps = substeps_for(rate_hz, step_hz)
        self.step_s = 1.0 / step_hz
        self.link = link_kind(link)
        options = ["--lockstep", "--step-hz", repr(float(step_hz)), "--substeps",
                   str(self.substeps), "--stale-after", repr(LOCKSTEP_STALE_AFTER_S)]
        if start_q is not None:
            q0 = np.asarray(start_q, dtype=float)
            if q0.shape != (arm.n,) or not np.all(np.isfinite(q0)):
                raise ConfigError(f"the start pose needs {arm.n} finite values", field="q")
            if np.any(q0 < arm.lower) or np.any(q0 > arm.upper):
                raise ConfigError("the start pose is outside the joint limits", field="q")
            options.append("--q=" + ",".join(repr(float(v)) for v in q0))
        if cell_spec is not None:
            options += ["--cell", cell_spec]
        # Two pipes, ours to write rates into and the child's to write states into; with
        # shared rings, the frames go through the memory and the pipes ring the bells.
        channel, child_ends = child_link(self.link)
        options += ["--link", link_spec(*child_ends)]
        self.seq = 0
        self.states: deque[State] = deque()    # arrived, not yet waited for
        self.contacts: dict[int, Contact] = {}  # by the seq of the state they go with
        self.arm_cell: CellHello | None = None
        self.client: PipeClient | None = PipeClient(
            channel, endpoint=f"the simulated arm's {self.link} link",
            hello=hello_for(arm, "runtime", stale_after_s=LOCKSTEP_STALE_AFTER_S))
        try:
            # Its own session: a Ctrl-C reaches only us, and we end the child in order.
            self.child = ArmProcess("sim", arm_spec, options, ready_timeout_s=ready_timeout_s,
                                    stderr=subprocess.PIPE, new_session=True,
                                    pass_fds=child_ends)
        except BaseException:
            self.client.close()
            raise
        finally:
            for fd in child_ends:   # the child holds them now: its exit ends our reads
                os.close(fd)
        try:
            _, first = self.client.handshake(timeout_s=ready_timeout_s)
            if cell is not None:
                self.arm_cell = self._exchange_cell(cell, min(ready_timeout_s,
                                                              CELL_ANSWER_TIMEOUT_S))
        except BaseException:
            self.close()
            raise
        self.first = SimStep(np.array(first.q), np.array(first.qd), bool(first.limited))

    def _exchange_cell(self, ours: CellHello, timeout_s: float) -> CellHello | None:
        """Send our workcell; the child answers with its own before anything else (a pipe
        keeps the order). None if it does not answer: it reports no contacts."""
        assert self.client is not None
        if not self.client.send(ours):
            raise TransportError(self._gone("the link to the simulated arm is down"))
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline and not self.client.ended:
            for msg in self.client.messages(timeout_s=0.5):
                if isinstance(msg, CellHello):
                    return msg
                if isinstance(msg, State):
                    self.states.append(msg)
        return None

    def step(self, rates: Vector, *, reduced: bool = False) -> SimStep:
        """Send one cycle's rates; return the arm's state after its `substeps` steps."""
        return self.wait(self.send(rates, reduced=reduced))

    def send(self, rates: Vector, *, reduced: bool = False) -> int:
        """Send one cycle's rates without waiting; returns their sequence number, which
        `wait` takes to collect the state after them."""
        assert self.client is not None
        self.seq += 1
        sent = self.client.send(rates_message(self.seq, time.monotonic_ns(), rates,
                                              reduced=reduced))
        if not sent:
            raise TransportError(self._gone("the link to the simulated arm is down"))
        return self.seq

    def wait(self, seq: int) -> SimStep:
        """The arm's state after the rates numbered `seq` (sent, and not yet waited for)."""
        state = self._wait_for(seq)
        contact = None
        if self.contacts:                      # with a workcell only
            contact = self.contacts.pop(state.seq, None)
            for older in [k for k in self.contacts if k < state.seq]:  # a state not waited for
                del self.contacts[older]
        return SimStep(np.array(state.q), np.array(state.qd), bool(state.limited),
                       () if contact is None else tuple(contact.pairs))

    def _wait_for(self, seq: int) -> State:
        """States come in the order of the rates they follow; a later one may already be
        here (the arm side stepped the next rates meanwhile): it waits its turn."""
        assert self.client is not None
        deadline = time.monotonic() + ANSWER_TIMEOUT_S
        while True:
            while self.states and self.states[0].applied_seq < seq:
                self.states.popleft()          # the state after a hello or an older step
            if self.states and self.states[0].applied_seq == seq:
                return self.states.popleft()
            messages = self.client.messages(timeout_s=0.5)
            for msg in messages:
                if isinstance(msg, State):
                    self.states.append(msg)
                elif isinstance(msg, Contact):
                    self.contacts[msg.seq] = msg
                elif isinstance(msg, Refuse):
                    raise TransportError(self._gone(f"the simulated arm refused us "
                                                    f"({msg.code}): {msg.reason}"))
            if not messages and (self.client.ended or time.monotonic() > deadline or
                                 self.child.proc.poll() is not None):
                raise TransportError(self._gone(f"no answer from the simulated arm to rates "
                                                f"#{seq} within {ANSWER_TIMEOUT_S:g} s"))

    def _gone(self, what: str) -> str:
        status = self.child.proc.poll()
        if status is None and self.client is not None and self.client.ended:
            # The pipe closes while the child exits, a moment before its status can be read
            try:
                status = self.child.proc.wait(timeout=1.0)
            except subprocess.TimeoutExpired:
                status = None
        if status is None:
            return what
        self.child.stop()
        tail = self.child.errors.strip().splitlines()[-3:]
        return f"{what}; the simulated arm exited with status {status}" + \
            (": " + " / ".join(tail) if tail else "")

    def close(self) -> None:
        if self.client is not None:
            self.client.close()
            self.client = None
        self.child.stop()

    def __enter__(self) -> "LockstepSim":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


@dataclass(frozen=True, eq=False)
class ClosedLoopCycle:
    """One cycle of a closed-loop run: what went in, what the cycle decided, where the arm
    was when it decided (q_used, state_age_s old), where it was after the step (after),
    and what the caller's `prepare` made of the cycle while the arm was stepping."""

    k: int
    t_s: float
    frame: InputFrame
    out: CycleOutput
    q_used: Vector
    after: SimStep
    compute_s: float       # wall time of the control cycle alone
    prepared: Any = None
    state_age_s: float = 0.0


Prepare = Callable[[int, float, InputFrame, CycleOutput, Vector, float, float], Any]


def run_closed_loop(cycle: ControlCycle, sim: LockstepSim,
                    frame_at: Callable[[int, float], InputFrame], n_cycles: int,
                    *, state_lag: int = 1, prepare: Prepare | None = None,
                    clock: Callable[[], float] = time.perf_counter
                    ) -> Iterator[ClosedLoopCycle]:
    """Cycles 0…n_cycles−1 at simulated times t = k·dt, each on the arm's measured pose.

    state_lag: how many cycles the pose a cycle works on lags behind the arm.
      0  each cycle waits for the arm's state after the previous cycle's rates (a link
         without delay);
      1  each cycle works on the state the arm sent a cycle earlier, as `jogwire drive`
         does over a real link: the rates it sent last cycle have not yet acted on the state
         it reads (the position brake in `limits` allows one cycle of it). This process
         then computes cycle k while the simulated arm steps cycle k−1 (two cores busy).
    Either way the run is deterministic: the arm side follows lockstep rates once each, in
    order (`ArmSession(in_order=True)`), and each state is paired with its rates by seq.

    `prepare(k, t, frame, out, q_used, compute_s, state_age_s)` runs while the simulated
    arm steps; its result comes back in `prepared`. Cycles come out in order, each once
    the arm's state after its rates is known. The clock is simulated (cycle k is at k·dt,
    a state one cycle old is dt old) and the loop never overruns: the run proves the
    motion, not the timing of the machine it runs on.
    """
    if state_lag not in STATE_LAGS:
        raise ConfigError(f"the state lag must be one of {STATE_LAGS} cycles, got "
                          f"{state_lag!r}", field="state-lag")
    # Everything made before the loop outlives it: frozen, a full collection of the cyclic
    # garbage collector skips it (else each walks some 36,000 objects of modules, arm and
    # profile and stalls the loop 10–20 ms, a few times a minute of motion).
    gc.freeze()
    try:
        yield from _cycles(cycle, sim, frame_at, n_cycles, state_lag, prepare, clock)
    finally:
        gc.unfreeze()


def _cycles(cycle: ControlCycle, sim: LockstepSim, frame_at: Callable[[int, float], InputFrame],
            n_cycles: int, state_lag: int, prepare: Prepare | None,
            clock: Callable[[], float]) -> Iterator[ClosedLoopCycle]:
    q = sim.first.q
    dt = cycle.dt_s
    # Each cycle whose rates are sent, until the arm's state after them comes back: its
    # rates' seq and the rest of its ClosedLoopCycle, in field order.
    in_flight: deque[tuple[int, tuple[Any, ...]]] = deque()
    for k in range(n_cycles):
        t = k * dt
        age = min(k, state_lag) * dt
        frame = frame_at(k, t)
        started = clock()
        out = cycle.step(frame, t, q, t - age)
        compute = clock() - started
        seq = sim.send(out.rates, reduced=out.intent.reduced)
        prepared = None if prepare is None else prepare(k, t, frame, out, q, compute, age)
        in_flight.append((seq, (k, t, frame, out, q, compute, prepared, age)))
        if len(in_flight) > state_lag:
            done = _landed(sim, *in_flight.popleft())
            q = done.after.q
            yield done
    while in_flight:
        yield _landed(sim, *in_flight.popleft())


def _landed(sim: LockstepSim, seq: int, sent: tuple[Any, ...]) -> ClosedLoopCycle:
    k, t, frame, out, q, compute, prepared, age = sent
    return ClosedLoopCycle(k, t, frame, out, q, sim.wait(seq), compute, prepared, age)
