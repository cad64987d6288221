"""The arm side's serving loop: socket in, `ArmSession` decides, a target moves, state out.

A *target* is anything with `arm`, `step_s`, `command` (the rates commanded on the last
step), `set_rates(qd)`, `step()` and `read_state() -> Reading`: the PyBullet arm
(`sim.arm.SimulatedArm`) or the bridge around a driver (`sim.bridge.BridgeTarget`).

Two ways to serve:
- paced: one step every `step_s` of wall-clock time (sleep, then spin the last
  `SPIN_S` to the deadline); the watchdog ramps to zero when rates go stale. Steps missed
  in a short stall are caught up back to back; after a stall longer than `CATCH_UP_S` the
  schedule restarts from now.
- lockstep: one step per accepted rates message and no pacing, so a run is deterministic
  and as fast as the two processes allow (preflight, tests). A state goes out after every
  step and once when a peer's hello is accepted. With `substeps` N > 1, one rates message
  advances N physics steps (a 500 Hz control rate on a 1 ms physics step needs 2) and
  the state goes out after the last of them.
"""

from __future__ import annotations

import logging
import signal
import time
from typing import Callable, Protocol

import numpy as np

from runtime.arm.model import Arm
from runtime.link.pipes import PipeServer
from runtime.link.transport import ArmServer

from .arm_side import ArmSession, Reading, ramp_to_zero

SPIN_S = 0.0002   # busy-wait the last 200 µs before a deadline; time.sleep overshoots ~70 µs
CATCH_UP_S = 0.05  # a stall up to this long is caught up step by step; longer ones are skipped

log = logging.getLogger("jogwire.arm")


class Target(Protocol):
    arm: Arm
    step_s: float
    command: np.ndarray

    def set_rates(self, qd: np.ndarray) -> None: ...
    def step(self) -> None: ...
    def read_state(self) -> Reading: ...


class ArmEndpoint:
    """Serves one target on one link: an ArmServer socket, or a PipeServer in lockstep."""

    def __init__(self, server: ArmServer | PipeServer, target: Target, session: ArmSession, *,
                 clock_ns: Callable[[], int] = time.monotonic_ns,
                 sleep: Callable[[float], None] = time.sleep, substeps: int = 1) -> None:
        if substeps < 1:
            raise ValueError(f"substeps must be at least 1, got {substeps}")
        self.server = server
        self.target = target
        self.session = session
        self.clock_ns = clock_ns
        self.sleep = sleep
        self.substeps = substeps  # physics steps per rates message (lockstep)
        self.steps = 0
        self.late_steps = 0      # steps that started after their deadline (then caught up)
        self.overruns = 0        # stalls longer than CATCH_UP_S: simulated time fell behind
        self.send_failures = 0
        self.worked_ns = 0       # lockstep: time spent on messages (not waiting for them)

    # -- one cycle -----------------------------------------------------------------------

    def receive(self, now_ns: int) -> None:
        """Drain the socket into the session and send its replies."""
        for peer, item in self.server.drain():
            for to, reply in self.session.on_message(peer, item, now_ns):
                self._send(to, reply)
        for text in self.session.events:
            log.warning(text)
        self.session.events.clear()

    def _send(self, peer: bytes, msg) -> None:
        result = self.server.send(peer, msg)
        if result == "gone":
            self.session.forget(peer)
        elif result == "full":
            self.send_failures += 1

    def publish(self, now_ns: int) -> None:
        """The step's state to the controller and observers; before it, to those who read
        contacts, the step's contact report if it ended in contact (PROTOCOL.md §5a)."""
        reading = self.target.read_state()
        state = self.session.state(reading, now_ns)
        contact = self.session.contact(reading, state)
        for peer in self.session.recipients():
            if contact is not None and peer in self.session.contact_readers:
                self._send(peer, contact)
            self._send(peer, state)

    def cycle_paced(self) -> None:
        """Receive, decide (follow or ramp to zero), step once, publish."""
        now = self.clock_ns()
        self.receive(now)
        target = self.target
        decision = self.session.decide(now, int(target.step_s * 1e9))
        qd = decision.qd if decision.qd is not None else \
            ramp_to_zero(target.command, target.arm.rated_accel, target.step_s)
        target.set_rates(qd)
        target.step()
        self.steps += 1
        self.publish(self.clock_ns())

    def cycle_lockstep(self, timeout_s: float) -> bool:
        """Wait up to timeout_s for messages (unless rates already wait); step `substeps`
        times with the next rates and publish the state. True if stepped."""
        if not self.session.waiting and not self.server.poll(timeout_s):
            return False
        started = time.perf_counter_ns()
        try:
            return self._serve_pending()
        finally:
            self.worked_ns += time.perf_counter_ns() - started

    def _serve_pending(self) -> bool:
        now = self.clock_ns()
        self.receive(now)
        rates = self.session.take_pending(now)
        if rates is not None:
            self.target.set_rates(np.asarray(rates.qd))
            for _ in range(self.substeps):
                self.target.step()
            self.steps += self.substeps
            self.publish(self.clock_ns())
            return True
        if self.session.greet:
            self.publish(self.clock_ns())
        return False

    # -- loops ---------------------------------------------------------------------------

    def serve_paced(self, should_stop: Callable[[], bool]) -> None:
        """One step per step_s of wall-clock time. Steps missed by a short stall are run
        back to back (simulated time keeps up with the clock); after a stall longer than
        CATCH_UP_S the schedule restarts from now instead (counted in `overruns`)."""
        step_ns = int(round(self.target.step_s * 1e9))
        deadline = self.clock_ns()
        while not should_stop():
            self.cycle_paced()
            deadline += step_ns
            late = self.clock_ns() - deadline
            if late > 0:
                self.late_steps += 1
                if late > CATCH_UP_S * 1e9:
                    self.overruns += 1
                    deadline = self.clock_ns()
                continue
            self.wait_until(deadline)

    def wait_until(self, deadline_ns: int) -> None:
        """Sleep until SPIN_S before the deadline, then spin (sleep alone is too coarse)."""
        remaining = (deadline_ns - self.clock_ns()) * 1e-9
        if remaining > SPIN_S:
            self.sleep(remaining - SPIN_S)
        while self.clock_ns() < deadline_ns:
            pass

    def serve_lockstep(self, should_stop: Callable[[], bool], *, poll_s: float = 0.05) -> None:
        """Until told to stop, or until the link ends (a pipe whose runtime is gone)."""
        while not should_stop() and not self.server.ended:
            self.cycle_lockstep(poll_s)

    def summary(self) -> str:
        dropped = self.server.dropped + self.session.dropped
        drops = ", ".join(f"{k} {v}" for k, v in sorted(dropped.items())) or "none"
        worked = f", worked {self.worked_ns * 1e-9:.3f} s on messages" if self.worked_ns else ""
        return (f"{self.steps} steps, {self.late_steps} late, {self.overruns} overruns, "
                f"{self.server.received} "
                f"messages received, dropped: {drops}{worked}")


class StopFlag:
    """True once SIGTERM/SIGINT arrived or `duration_s` ran out. A context manager that
    installs its signal handlers on entry and puts the previous ones back on exit."""

    SIGNALS = (signal.SIGTERM, signal.SIGINT)

    def __init__(self, duration_s: float | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.stopped = False
        self.clock = clock
        self.deadline = None if duration_s is None else clock() + duration_s
        self._previous: dict = {}

    def _stop(self, *_: object) -> None:
        self.stopped = True

    def __call__(self) -> bool:
        return self.stopped or (self.deadline is not None and self.clock() >= self.deadline)

    def __enter__(self) -> "StopFlag":
        self._previous = {sig: signal.signal(sig, self._stop) for sig in self.SIGNALS}
        return self

    def __exit__(self, *exc: object) -> None:
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)
