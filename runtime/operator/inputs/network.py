"""Network input: another program sends `twist` messages (runtime.link.protocol) over ZeroMQ.

A 3-D mouse driver, a VR controller script or a test harness publishes `Twist` messages
(PUB, connects) to the runtime's subscriber (SUB with CONFLATE, binds on
`transport.DEFAULT_TWIST_ENDPOINT`, loopback unless CURVE keys are given); see
docs/PROTOCOL.md, "twist". Each `read` drains to the newest valid message:

- newest wins (sequence numbers) and a message late by more than `stale_after_s` is
  dropped (`protocol.SequenceGate`, `protocol.LatenessFilter`);
- malformed messages are counted by reason in `dropped` and never acted on;
- a sender silent for `stale_after_s` counts as a lost device (present=False): the safety
  gate stops motion and wants enable released (enable=false sent) before it moves again.
  A sender that starts over (sequence from 1) after such a silence is accepted.
"""

from __future__ import annotations

from collections import Counter

from ...control.intent import DirectCommand, InputFrame
from ...link.protocol import LatenessFilter, SequenceGate, Twist
from ...link.transport import DEFAULT_TWIST_ENDPOINT, Keys, LatestSubscriber


class NetworkSource:
    """Twists from another program. `read(now_s)` never blocks."""

    def __init__(self, endpoint: str = DEFAULT_TWIST_ENDPOINT, *, stale_after_s: float,
                 keys: Keys | None = None) -> None:
        self.stale_after_s = stale_after_s
        self._socket = LatestSubscriber(endpoint, bind=True, keys=keys)
        self.endpoint = self._socket.endpoint
        self.name = f"network {self.endpoint}"
        self._sequence = SequenceGate()
        self._lateness = LatenessFilter(stale_after_s)
        self._latest: Twist | None = None
        self._received_s: float | None = None
        self.accepted = 0
        self.refused: Counter[str] = Counter()  # well-formed but not used: order, lateness, kind

    @property
    def dropped(self) -> Counter[str]:
        """Malformed messages by reason (counted by the socket, never acted on)."""
        return self._socket.dropped

    @property
    def latest(self) -> Twist | None:
        """The newest accepted message (None before the first)."""
        return self._latest

    def wait(self, timeout_s: float) -> bool:
        """Block up to timeout_s until a message is waiting (for tools and tests)."""
        return self._socket.poll(timeout_s)

    def read(self, now_s: float) -> InputFrame:
        msg = self._socket.receive()
        if msg is not None:
            self._offer(msg, now_s)
        fresh = self._received_s is not None and now_s - self._received_s <= self.stale_after_s
        if not fresh or self._latest is None:
            return InputFrame(device=self.name, present=False)
        t = self._latest
        return InputFrame(device=self.name, present=True,
                          command=DirectCommand(twist=t.twist, frame=t.frame, enable=t.enable))

    def _offer(self, msg: object, now_s: float) -> None:
        if not isinstance(msg, Twist):
            self.refused["kind"] += 1
            return
        silent = self._received_s is None or now_s - self._received_s > self.stale_after_s
        if silent:  # a new or restarted sender: its sequence and clock start afresh
            self._sequence.reset()
            self._lateness.reset()
        recv_ns = int(now_s * 1e9)
        if not self._lateness.accept(msg.t_ns, recv_ns):
            self.refused["late"] += 1
            return
        if not self._sequence.accept(msg.seq):
            self.refused["order"] += 1
            return
        self._latest, self._received_s = msg, now_s
        self.accepted += 1

    def close(self) -> None:
        self._socket.close()
