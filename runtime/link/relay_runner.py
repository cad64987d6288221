"""The relay's sockets and loop (`jogwire relay`): a perturbing relay on the arm link.

The relay binds a ROUTER like an arm side and, for each peer that talks to it, connects one
DEALER to the target with that peer's routing id, so the target sees each runtime or
observer as itself. A peer that disconnects (a send to it fails) has its DEALER closed, so
the target learns of it as it would directly. What each fault does is in
`runtime.link.relay` (pure); this module is its sockets and clock.
"""

from __future__ import annotations

import math
import time
from typing import Callable, cast

import zmq

from .relay import Delivery, Link, message_kind
from .transport import DRAIN_LIMIT, ArmServer, ClientKeys, ServerKeys, _Socket, check_endpoint

__all__ = ["Relay"]

POLL_MAX_S = 0.01          # longest wait in one poll (stop flags and stalls are checked after)
HELLO_RETRY_S = 1.0        # a hello the target's fresh connection cannot take yet is retried
HELLO_RETRY_EVERY_S = 0.002


# ----------------------------------------------------------------------------------------
# Sockets
# ----------------------------------------------------------------------------------------

class _Upstream(_Socket):
    """DEALER to the target on behalf of one peer, with that peer's routing id.

    Same options as the runtime's own socket (`transport.ArmClient`): ZMQ_IMMEDIATE, so
    nothing queues while the target is away and is delivered late.
    """

    def __init__(self, endpoint: str, identity: bytes, keys: ClientKeys | None) -> None:
        self.identity = identity
        self.answered = False       # the target has sent this peer something
        super().__init__(zmq.DEALER, endpoint, bind=False, keys=keys)

    def _configure(self, s: zmq.Socket) -> None:
        s.setsockopt(zmq.IMMEDIATE, 1)
        s.setsockopt(zmq.ROUTING_ID, self.identity)


class Relay:
    """The relay's sockets and loop around one `Link` per direction.

    clock_ns: monotonic ns (its zero does not matter); `emit` gets one line per event
    (stall began/ended, peer came/went), each with t_ns on that clock.
    """

    def __init__(self, listen: str, target: str, links: dict[str, Link], *,
                 server_keys: ServerKeys | None = None, client_keys: ClientKeys | None = None,
                 clock_ns: Callable[[], int] = time.monotonic_ns,
                 emit: Callable[[str], None] = print) -> None:
        check_endpoint(target, client_keys, action="connect to")   # now, not at the first peer
        self.links = links
        self.target = target
        self.client_keys = client_keys
        self.clock_ns = clock_ns
        self.emit = emit
        self.t0_ns = clock_ns()
        self.upstreams: dict[bytes, _Upstream] = {}
        self.peers_seen = 0
        self.peers_gone = 0
        self._retry: list[tuple[float, Delivery]] = []
        self._stall_requests = 0
        self._start_requests = 0
        self._active = {name: link.is_active(0.0) for name, link in links.items()}
        # The listening side acts as an arm side: ROUTER with ROUTER_MANDATORY (a send to a
        # vanished peer fails, which is how the relay notices it) and ROUTER_HANDOVER.
        # Its frames are forwarded as bytes, never decoded here.
        self.front = ArmServer(listen, n_joints=1, keys=server_keys)
        self.endpoint = self.front.endpoint
        self.poller = zmq.Poller()
        self.poller.register(self.front.socket, zmq.POLLIN)

    def now_s(self) -> float:
        return (self.clock_ns() - self.t0_ns) * 1e-9

    def request_stall(self) -> None:
        """Start the on-demand stalls (safe from a signal handler: applied in the loop)."""
        self._stall_requests += 1

    def request_start(self) -> None:
        """Start the faults that wait for a signal (signal-safe, applied in the loop)."""
        self._start_requests += 1

    # -- the loop ------------------------------------------------------------------------

    def run(self, should_stop: Callable[[], bool]) -> None:
        while not should_stop():
            self.cycle()

    def cycle(self) -> None:
        """Wait for traffic or the next delivery (≤ POLL_MAX_S), take it in, send what is due."""
        now = self.now_s()
        wait = POLL_MAX_S
        for link in self.links.values():
            due = link.next_release_s()
            if due is not None:
                wait = min(wait, max(0.0, due - now))
        if self._retry:
            wait = min(wait, HELLO_RETRY_EVERY_S)
        # zmq counts whole ms: round up (a delivery is at most 1 ms late) rather than spin.
        ready = dict(self.poller.poll(math.ceil(wait * 1e3)))
        now = self.now_s()
        self._apply_requests(now)
        if self.front.socket in ready:
            self._take_front(now)
        for identity, up in list(self.upstreams.items()):
            if up.socket in ready:
                self._take_upstream(identity, up, now)
        self._note_stalls(now)
        self._send_due(now)

    def _take_front(self, now: float) -> None:
        link = self.links["rates"]
        for _ in range(DRAIN_LIMIT):
            try:
                frames = self.front.socket.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return
            identity, payload = frames[0], tuple(frames[1:])
            if identity not in self.upstreams:
                self._open_upstream(identity, now)
            link.offer(payload, identity, now)

    def _take_upstream(self, identity: bytes, up: _Upstream, now: float) -> None:
        link = self.links["state"]
        for _ in range(DRAIN_LIMIT):
            try:
                frames = up.socket.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return
            up.answered = True
            link.offer(tuple(frames), identity, now)

    def _open_upstream(self, identity: bytes, now: float) -> None:
        up = _Upstream(self.target, identity, self.client_keys)
        self.upstreams[identity] = up
        self.poller.register(up.socket, zmq.POLLIN)
        self.peers_seen += 1
        self._event(f"peer {identity.hex()[:8]} connected")

    def _close_upstream(self, identity: bytes) -> None:
        up = self.upstreams.pop(identity, None)
        if up is None:
            return
        self.poller.unregister(up.socket)
        up.close()
        self.peers_gone += 1
        for link in self.links.values():
            link.forget(identity)
        self._event(f"peer {identity.hex()[:8]} gone: its connection to the target closed")

    # -- sending -------------------------------------------------------------------------

    def _send_due(self, now: float) -> None:
        retry, self._retry = self._retry, []
        for deadline, d in retry:
            self._to_target(d, now, deadline)
        for d in self.links["rates"].release(now):
            self._to_target(d, now, None)
        for d in self.links["state"].release(now):
            self._to_peer(d)

    def _to_target(self, d: Delivery, now: float, retry_until: float | None) -> None:
        up = self.upstreams.get(_route(d))
        if up is None:
            self._unsent("rates", d)
            return
        try:
            up.socket.send_multipart(list(d.frames), zmq.NOBLOCK)
        except zmq.Again:
            # A new DEALER has no connection for the first moments (ZMQ_IMMEDIATE): keep the
            # peer's hello for a little while rather than make it wait for its next retry.
            if not up.answered and message_kind(d.frames) == "hello":
                until = retry_until if retry_until is not None else now + HELLO_RETRY_S
                if now < until:
                    self._retry.append((until, d))
                    return
            self._unsent("rates", d)

    def _to_peer(self, d: Delivery) -> None:
        try:
            self.front.socket.send_multipart([_route(d), *d.frames], zmq.NOBLOCK)
        except zmq.Again:
            self._unsent("state", d)
        except zmq.ZMQError as exc:
            if exc.errno != zmq.EHOSTUNREACH:
                raise
            self._unsent("state", d)
            self._close_upstream(_route(d))

    def _unsent(self, direction: str, d: Delivery) -> None:
        counters = self.links[direction].counters
        counters.send_failed += 1
        counters.garbage_unsent += d.what.startswith("garbage")

    # -- stalls and events ---------------------------------------------------------------

    def _apply_requests(self, now: float) -> None:
        """Start what the signals asked for since the last cycle."""
        if self._stall_requests:
            self._stall_requests = 0
            on_demand = [(link, stall) for link in self.links.values()
                         for stall in link.faults.stalls if stall.at_s is None]
            for link, stall in on_demand:
                link.stall_now(now, stall.length_s)
            if not on_demand:
                self._event("stall requested, but no on-demand stall is set (--stall LEN)")
        if self._start_requests:
            self._start_requests = 0
            if not any([link.start(now) for link in self.links.values()]):
                self._event("faults requested, but none waits for a signal "
                            "(--faults-from signal)")

    def _note_stalls(self, now: float) -> None:
        for name, link in self.links.items():
            change = link.stall_changed(now)
            if change is not None:
                self._event(f"{name} direction {'stalled' if change else 'flowing again'}")
            active = link.is_active(now)
            if active != self._active.get(name, True):
                self._event(f"{name} direction faults on")
            self._active[name] = active

    def _event(self, text: str) -> None:
        self.emit(f"jogwire relay: {text} t_ns={self.clock_ns()}")

    # -- the end -------------------------------------------------------------------------

    def close(self) -> None:
        for identity in list(self.upstreams):
            up = self.upstreams.pop(identity)
            up.close()
        self.front.close()

    def report(self) -> dict:
        return {name: {"faults": link.faults.describe(), **link.counters.as_dict()}
                for name, link in self.links.items()} | {
            "peers_seen": self.peers_seen, "peers_gone": self.peers_gone}


def _route(d: Delivery) -> bytes:
    """The peer's routing id: the relay routes by the ROUTER's identity frames (bytes)."""
    return cast(bytes, d.route)
