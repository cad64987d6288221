"""The arm side of the wire, without sockets or clocks: who commands, what to follow, when to stop.

Shared by the simulated arm (`sim/arm.py`) and the bridge (`sim/bridge.py`); `sim/endpoint.py`
feeds it messages and times. A bridge written in another language implements the same rules
from docs/PROTOCOL.md; this module is the reference.

- `ArmSession`: the hello exchange (mismatch → refuse, nothing moves), one controller at a
  time, sequence and lateness filtering of rates, the status reported in `state`.
- `ramp_to_zero`: the watchdog's stop: all joints slow down together (the direction of
  motion is kept) so that the joint that needs longest stops at its rated deceleration.
- `guard_rates`: the arm's own speed and position limits, applied again at its boundary.
"""

from __future__ import annotations

import math
from collections import Counter, deque
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.typing import NDArray

from runtime.arm.model import Arm
from runtime.errors import ProtocolError
from runtime.link.protocol import (
    MAX_CONTACTS,
    CellHello,
    Contact,
    Hello,
    LatenessFilter,
    Message,
    Rates,
    Refuse,
    SequenceGate,
    State,
    hello_differences,
)

Vector = NDArray[np.float64]

# Lockstep: rates waiting their turn at most (a runtime runs at most one cycle ahead; a
# peer that never waits for states must not grow the queue without bound).
MAX_IN_ORDER = 64


@dataclass(frozen=True, eq=False)
class Reading:
    """One measurement of the arm side: joint positions (rad or m) and rates (rad/s or m/s).

    t_s: the target's own time (simulated seconds, or seconds since the bridge opened);
    command: the rates actually commanded on the last step (after `guard_rates`);
    limited: the guard had to reduce the requested rates on that step;
    contacts: (part of the arm, what it touches, penetration depth m) at the end of the
    step, deepest first; empty for a target that measures no contact.
    """

    t_s: float
    q: Vector
    qd: Vector
    command: Vector
    limited: bool = False
    contacts: tuple[tuple[str, str, float], ...] = ()


# ----------------------------------------------------------------------------------------
# Motion rules
# ----------------------------------------------------------------------------------------

def guard_rates(arm: Arm, q: Vector, qd: Vector, dt: float) -> tuple[Vector, bool]:
    """`qd` scaled down uniformly (direction kept) so that every joint

    - stays within its max speed: |q̇_i| ≤ max_speed_i, and
    - can still stop before its position limit at rated deceleration: moving toward a limit
      at distance d_i, |q̇_i| ≤ sqrt(2·a_i·d_i) (v² = 2ad, elementary kinematics) and
      |q̇_i|·dt ≤ d_i (one step never crosses it).

    A joint already past a limit and pushed further gets a bound of zero, which stops the
    whole arm: at this boundary a command like that is a fault, not something to slide along.
    Returns (rates, True if they had to be reduced). Runs every step: a plain loop over a
    handful of joints is several times quicker than numpy's per-call overhead here.
    """
    qd = np.asarray(qd, dtype=np.float64)
    scale = 1.0
    sqrt = math.sqrt
    # min/max/abs written as comparisons: the same values, without a call each (this runs
    # twice per lockstep cycle)
    for v, qi, lo, hi, vmax, a in zip(qd.tolist(), np.asarray(q).tolist(), *_limits(arm)):
        if v == 0.0:
            continue
        d = hi - qi if v > 0.0 else qi - lo          # inf for an unlimited joint
        if d < 0.0:
            d = 0.0
        bound = vmax                                 # min(vmax, √(2ad), d/dt)
        braking = sqrt(2.0 * a * d)
        if braking < bound:
            bound = braking
        one_step = d / dt
        if one_step < bound:
            bound = one_step
        ratio = bound / (v if v > 0.0 else -v)
        if ratio < scale:
            scale = ratio
    if scale >= 1.0:
        return qd, False
    return qd * scale, True


@lru_cache(maxsize=16)
def _limits(arm: Arm) -> tuple[list[float], ...]:
    """lower, upper, max_speed, rated_accel as lists (arms are immutable)."""
    return (arm.lower.tolist(), arm.upper.tolist(), arm.max_speed.tolist(),
            arm.rated_accel.tolist())


def ramp_to_zero(qd: Vector, decel: Vector, dt: float) -> Vector:
    """One step of a stop that keeps the direction of motion.

    Every joint is scaled by the same factor; the factor falls so that the joint needing the
    longest stop, T = max_i |q̇_i|/a_i, decelerates at exactly a_i: s = 1 − dt/T per step.
    """
    speed = np.abs(qd)
    if not (speed > 0.0).any():
        return np.zeros_like(qd)
    stop_time = float(np.max(speed / decel))
    return qd * max(0.0, 1.0 - dt / stop_time)


def stop_time_s(qd: Vector, decel: Vector) -> float:
    """How long `ramp_to_zero` takes from `qd` (s): max_i |q̇_i|/a_i."""
    return float(np.max(np.abs(qd) / decel)) if len(qd) else 0.0


# ----------------------------------------------------------------------------------------
# The session: hello, control, sequence, status
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Decision:
    """What the arm follows this step: rates (tracking) or None (ramp to zero), and why."""

    qd: Vector | None
    status: str


class ArmSession:
    """Protocol state of the arm side. Feed it every received message with its arrival time.

    Peers are the opaque identities the ROUTER socket gives. The controller is the one
    runtime whose hello was accepted; it keeps control while it keeps talking. Another
    runtime's hello is refused ("busy") until the controller has been silent for
    stale_after_s. Observers (role "observer") only receive state.

    cell: this side's `CellHello` when it measures contact (docs/PROTOCOL.md §5a): a peer
    that sends `cell` gets it back and becomes a contact reader. None: a side that measures
    no contact, which treats `cell` like any kind it does not take (no answer).
    """

    def __init__(self, hello: Hello, *, stale_after_s: float, max_observers: int = 8,
                 refuse_every_s: float = 0.1, in_order: bool = False,
                 cell: CellHello | None = None) -> None:
        self.hello = hello
        self.cell = cell
        self.contact_readers: set[bytes] = set()
        self.stale_after_ns = int(stale_after_s * 1e9)
        self.max_observers = max_observers
        self.refuse_every_ns = int(refuse_every_s * 1e9)
        self.controller: bytes | None = None
        self.controller_heard_ns = 0
        self.observers: set[bytes] = set()
        self.gate = SequenceGate()
        self.lateness = LatenessFilter(stale_after_s)
        # Accepted, not yet followed, with arrival times. Paced: only the newest waits (an
        # older one is superseded). Lockstep (in_order): each is followed once, in order,
        # so a runtime may send the next rates before the state after the last came back.
        self.in_order = in_order
        self.waiting: deque[tuple[Rates, int]] = deque()
        self.applied: Rates | None = None      # the rates being followed
        self.applied_ns = 0                    # when they arrived
        self.greet: set[bytes] = set()         # peers accepted since the last state
        self.status = "waiting"
        self.state_seq = 0
        self.dropped: Counter[str] = Counter()  # valid messages not acted on, by reason
        self.events: list[str] = []             # human-readable notes for the log
        self._refused_at: dict[bytes, int] = {}

    # -- incoming ------------------------------------------------------------------------

    def on_message(self, peer: bytes, msg: Message | ProtocolError, now_ns: int
                   ) -> list[tuple[bytes, Message]]:
        """Update the session with one received item; return the replies to send."""
        if isinstance(msg, ProtocolError):
            if msg.reason == "version":
                return self._refuse(peer, "version", str(msg), now_ns)
            return []
        if isinstance(msg, Hello):
            return self._on_hello(peer, msg, now_ns)
        if isinstance(msg, Rates):
            return self._on_rates(peer, msg, now_ns)
        if isinstance(msg, CellHello) and self.cell is not None:
            return self._on_cell(peer, msg)
        self.dropped["unexpected"] += 1
        return []

    def _on_cell(self, peer: bytes, theirs: CellHello) -> list[tuple[bytes, Message]]:
        if peer != self.controller and peer not in self.observers:
            self.dropped["no_hello"] += 1
            return []
        assert self.cell is not None
        if theirs.digest != self.cell.digest:
            self.events.append(f"the peer holds workcell {theirs.name or 'none'!r} "
                               f"({theirs.digest or 'no digest'}), this side "
                               f"{self.cell.name or 'none'!r} ({self.cell.digest or 'no digest'}): "
                               "contacts name this side's objects")
        self.contact_readers.add(peer)
        return [(peer, self.cell)]

    def _on_hello(self, peer: bytes, theirs: Hello, now_ns: int) -> list[tuple[bytes, Message]]:
        reply: list[tuple[bytes, Message]] = [(peer, self.hello)]
        if theirs.role not in ("runtime", "observer"):
            return reply + self._refuse(peer, "mismatch",
                                        f"this is the arm side ({self.hello.role}); a "
                                        f"{theirs.role} cannot connect to it", now_ns, force=True)
        diffs = hello_differences(self.hello, theirs)
        if diffs:
            text = f"refused {theirs.role} hello for arm {theirs.arm!r}: " + "; ".join(diffs)
            self.events.append(text)
            self.forget(peer)
            return reply + self._refuse(peer, "mismatch", text, now_ns, force=True)
        if theirs.role == "observer":
            if peer not in self.observers and len(self.observers) >= self.max_observers:
                return reply + self._refuse(peer, "busy", f"{self.max_observers} observers "
                                            "already connected", now_ns, force=True)
            self.observers.add(peer)
            self.greet.add(peer)
            return reply
        if peer != self.controller:
            if self.controller is not None and \
                    now_ns - self.controller_heard_ns <= self.stale_after_ns:
                return reply + self._refuse(peer, "busy", "another runtime is commanding "
                                            "this arm", now_ns, force=True)
            self.events.append(f"runtime for arm {theirs.arm!r} took control")
            self.controller = peer
            self.observers.discard(peer)
            self.gate.reset()
            self.lateness.reset()
            self.waiting.clear()
            self.applied = None
        self.controller_heard_ns = now_ns
        self.greet.add(peer)
        return reply

    def _on_rates(self, peer: bytes, rates: Rates, now_ns: int) -> list[tuple[bytes, Message]]:
        if peer != self.controller:
            code = "not_controller" if peer in self.observers else "no_hello"
            self.dropped[code] += 1
            return self._refuse(peer, code, "say hello first" if code == "no_hello" else
                                "observers cannot command", now_ns)
        self.controller_heard_ns = now_ns
        if not self.gate.accept(rates.seq):
            self.dropped["old_seq"] += 1
        elif not self.lateness.accept(rates.t_ns, now_ns):
            self.dropped["late"] += 1
        else:
            if self.waiting and (not self.in_order or len(self.waiting) >= MAX_IN_ORDER):
                self.waiting.popleft()
                self.dropped["superseded"] += 1
            self.waiting.append((rates, now_ns))
        return []

    def _refuse(self, peer: bytes, code: str, text: str, now_ns: int, *, force: bool = False
                ) -> list[tuple[bytes, Message]]:
        """A refusal, at most one per peer per refuse_every_s unless forced (hello answers)."""
        last = self._refused_at.get(peer)
        if not force and last is not None and now_ns - last < self.refuse_every_ns:
            return []
        if len(self._refused_at) > 256:  # forget peers not refused for a while
            self._refused_at = {p: t for p, t in self._refused_at.items()
                                if now_ns - t < 10 * self.refuse_every_ns}
        self._refused_at[peer] = now_ns
        return [(peer, Refuse(code, text[:512]))]

    def forget(self, peer: bytes) -> None:
        """The peer is gone (or refused): it no longer controls or observes."""
        self.observers.discard(peer)
        self.greet.discard(peer)
        self.contact_readers.discard(peer)
        if peer == self.controller:
            self.controller = None
            self.waiting.clear()

    # -- per step ------------------------------------------------------------------------

    def take_pending(self, now_ns: int) -> Rates | None:
        """The next accepted rates not yet followed (lockstep: step once with them)."""
        if not self.waiting:
            return None
        self.applied, self.applied_ns = self.waiting.popleft()
        self.status = "tracking"
        return self.applied

    def decide(self, now_ns: int, step_ns: int = 0) -> Decision:
        """Paced mode: follow the newest rates while they are fresh and their sender is
        connected, else ramp to zero.

        Fresh means they will still be no older than stale_after at the end of the step
        about to run (now + step_ns): rates are never followed past stale_after.
        """
        self.take_pending(now_ns)
        if self.applied is None:
            self.status = "waiting"
            return Decision(None, self.status)
        age_at_step_end = now_ns + step_ns - self.applied_ns
        if self.controller is not None and age_at_step_end <= self.stale_after_ns:
            self.status = "tracking"
            return Decision(np.asarray(self.applied.qd), self.status)
        if self.status != "stale":
            self.events.append("the runtime's connection is gone: ramping to zero"
                               if self.controller is None else
                               f"no fresh rates for {self.stale_after_ns / 1e9:g} s: "
                               "ramping to zero")
        self.status = "stale"
        return Decision(None, self.status)

    def recipients(self) -> list[bytes]:
        """Who gets this step's state: the controller and the observers."""
        self.greet.clear()
        peers = list(self.observers)
        if self.controller is not None:
            peers.append(self.controller)
        return peers

    def contact(self, reading: Reading, state: State) -> Contact | None:
        """The contact report that goes with `state` (same seq and time), None if the step
        ended without contact or nobody reads contacts."""
        if not reading.contacts or not self.contact_readers:
            return None
        listed = reading.contacts[:MAX_CONTACTS]
        return Contact(seq=state.seq, t_ns=state.t_ns, a=[a for a, _, _ in listed],
                       b=[b for _, b, _ in listed], depth_m=[d for _, _, d in listed],
                       total=len(reading.contacts))

    def state(self, reading: Reading, t_ns: int) -> State:
        """The state message for `reading`, measured at t_ns (the arm side's clock)."""
        self.state_seq += 1
        applied = self.applied
        return State(seq=self.state_seq, t_ns=t_ns, q=reading.q, qd=reading.qd,
                     applied_seq=applied.seq if applied else 0,
                     echo_ns=applied.t_ns if applied else 0, status=self.status,
                     limited=bool(reading.limited))
