"""`jogwire relay`: a perturbing relay on the arm link, to rehearse a bad link before it is real.

    jogwire drive --target tcp://127.0.0.1:47812 …          the runtime talks to the relay
    jogwire relay --listen tcp://127.0.0.1:47812 --target tcp://127.0.0.1:47810 \\
                  --delay 40ms --jitter 10ms --loss 5%       the relay talks to the arm side
    jogwire sim reach7                                       listening on 47810

Every fault option takes a value for both directions or, prefixed, for one: `rates=` is the
runtime → arm side direction (hello, rates), `state=` the arm side → runtime direction
(hello, state, refuse); e.g. `--loss rates=20% --delay state=100ms`. What each fault does is
in `runtime/link/relay.py`; stalls without a time start on SIGUSR1, `--faults-from signal` waits
for SIGUSR2 (e.g. `kill -USR2 PID` mid-motion). Counters are printed at exit
(Ctrl-C, SIGTERM or --duration) and, with --report, written as JSON.

The relay binds a ROUTER like an arm side and, for each peer that talks to it, connects one
DEALER to the target with that peer's routing id, so the target sees each runtime or
observer as itself. A peer that disconnects (a send to it fails) has its DEALER closed, so
the target learns of it as it would directly. Loopback only, unless --keys: then it is the
CURVE server to its peers (arm.key_secret, authorized/) and a CURVE client to the target
(runtime.key_secret, arm.key), all from the same `jogwire keys` folder.
"""

from __future__ import annotations

import argparse
import json
import math
import random
import signal
import sys
import time
from pathlib import Path
from typing import Callable, TextIO

import zmq

from ..errors import ConfigError
from ..link.relay import (DIRECTIONS, GARBAGE_KINDS, Delivery, Link, LinkFaults, faults_from_options,
                     message_kind)
from ..link.transport import (DEFAULT_ARM_ENDPOINT, DRAIN_LIMIT, ArmServer, ClientKeys, ServerKeys,
                         _Socket, check_endpoint, load_client_keys,
                         load_server_keys)

DEFAULT_LISTEN_ENDPOINT = "tcp://127.0.0.1:47812"
POLL_MAX_S = 0.01          # longest wait in one poll (stop flags and stalls are checked after)
HELLO_RETRY_S = 1.0        # a hello the target's fresh connection cannot take yet is retried
HELLO_RETRY_EVERY_S = 0.002

FAULT_OPTIONS = (  # (option, Link field, metavar, help)
    ("--delay", "delay_s", "[DIR=]TIME", "added one-way latency, e.g. 40ms"),
    ("--jitter", "jitter_s", "[DIR=]TIME", "latency varies uniformly by ± this; order is kept"),
    ("--loss", "loss", "[DIR=]P", "drop messages with probability P, e.g. 5%%"),
    ("--duplicate", "duplicate", "[DIR=]P", "deliver messages twice with probability P"),
    ("--reorder", "reorder", "[DIR=]P", "hold messages back with probability P so that "
                                        "later ones overtake them"),
    ("--reorder-hold", "reorder_hold_s", "[DIR=]TIME", "how long a reordered message is held "
                                                       "back (default 6ms)"),
    ("--garbage", "garbage", "[DIR=]P", "before a message, with probability P, a burst of "
                                        "malformed frames derived from it"),
    ("--garbage-burst", "garbage_burst", "[DIR=]N", "malformed frames per burst (default 3)"),
    ("--garbage-kinds", "garbage_kinds", "[DIR=]K,K…", "which malformations (default all): "
                                                     + ", ".join(GARBAGE_KINDS)),
    ("--stall", "stall", "[DIR=]LEN[@AT[/EVERY]]",
     "nothing goes out for LEN: at AT s after start (every EVERY s), or on SIGUSR1 without @AT"),
    ("--faults-from", "from_s", "[DIR=]TIME|signal",
     "a clean link until TIME after start (or until SIGUSR2), then the faults above; "
     "stalls keep their own times"),
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.epilog = ("DIR is rates (runtime → arm side) or state (arm side → runtime); without "
                     "it a fault applies to both.\nExample: jogwire relay --target "
                     "tcp://127.0.0.1:47810 --delay 40ms --jitter 10ms --loss rates=5%")
    parser.add_argument("--listen", default=DEFAULT_LISTEN_ENDPOINT, metavar="ENDPOINT",
                        help=f"where the runtime connects (default {DEFAULT_LISTEN_ENDPOINT}; "
                             "tcp://127.0.0.1:* picks a free port)")
    parser.add_argument("--target", default=DEFAULT_ARM_ENDPOINT, metavar="ENDPOINT",
                        help=f"the arm side (default {DEFAULT_ARM_ENDPOINT})")
    parser.add_argument("--keys", metavar="DIR", help="CURVE keys from `jogwire keys DIR` "
                                                      "(needed off loopback)")
    for option, name, metavar, text in FAULT_OPTIONS:
        parser.add_argument(option, dest=f"fault_{name}", action="append", default=[],
                            metavar=metavar, help=text)
    parser.add_argument("--stall-hold", action="store_true",
                        help="keep what comes due during a stall and send it all when the "
                             "stall ends (a buffering link), instead of dropping it")
    parser.add_argument("--seed", type=int, default=None,
                        help="random seed (default: a new one, printed at start)")
    parser.add_argument("--duration", type=float, metavar="S", help="stop after S seconds")
    parser.add_argument("--report", metavar="FILE.json",
                        help="write the counters and settings as JSON at exit")


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
        up = self.upstreams.get(d.route)
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
            self.front.socket.send_multipart([d.route, *d.frames], zmq.NOBLOCK)
        except zmq.Again:
            self._unsent("state", d)
        except zmq.ZMQError as exc:
            if exc.errno != zmq.EHOSTUNREACH:
                raise
            self._unsent("state", d)
            self._close_upstream(d.route)

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


# ----------------------------------------------------------------------------------------
# Command
# ----------------------------------------------------------------------------------------

class _Signals:
    """SIGINT/SIGTERM stop the relay; SIGUSR1 starts the on-demand stalls, SIGUSR2 the faults
    that wait for a signal."""

    def __init__(self, relay: Relay, duration_s: float | None) -> None:
        self.stopped = False
        self.deadline = None if duration_s is None else time.monotonic() + duration_s
        self.relay = relay
        self._previous = {}

    def __call__(self) -> bool:
        return self.stopped or (self.deadline is not None and time.monotonic() >= self.deadline)

    def __enter__(self) -> "_Signals":
        def stop(*_: object) -> None:
            self.stopped = True

        def stall(*_: object) -> None:
            self.relay.request_stall()

        def start(*_: object) -> None:
            self.relay.request_start()
        self._previous = {signal.SIGINT: signal.signal(signal.SIGINT, stop),
                          signal.SIGTERM: signal.signal(signal.SIGTERM, stop),
                          signal.SIGUSR1: signal.signal(signal.SIGUSR1, stall),
                          signal.SIGUSR2: signal.signal(signal.SIGUSR2, start)}
        return self

    def __exit__(self, *exc: object) -> None:
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)


def links_from_args(args: argparse.Namespace, seed: int) -> dict[str, Link]:
    options = {name: getattr(args, f"fault_{name}") for _, name, _, _ in FAULT_OPTIONS}
    faults = faults_from_options({k: v for k, v in options.items() if v},
                                 hold_in_stall=args.stall_hold)
    # One generator per direction, both from the seed: a fault in one direction does not
    # change the random draws of the other.
    return {d: Link(faults[d], random.Random(f"{seed}:{d}")) for d in DIRECTIONS}


def print_counters(relay: Relay, out: TextIO) -> None:
    arrows = {"rates": "runtime → target", "state": "target → runtime"}
    for name, link in relay.links.items():
        print(f"jogwire relay: {name} ({arrows[name]}): {link.counters.line()}", file=out)
    print(f"jogwire relay: {relay.peers_seen} peers connected, {relay.peers_gone} gone",
          file=out)


def run(args: argparse.Namespace) -> int:
    if args.duration is not None and not args.duration > 0:
        raise ConfigError("--duration must be positive", field="duration")
    seed = args.seed if args.seed is not None else random.SystemRandom().randrange(2**32)
    links = links_from_args(args, seed)
    server_keys = load_server_keys(args.keys) if args.keys else None
    client_keys = load_client_keys(args.keys) if args.keys else None
    relay = Relay(args.listen, args.target, links, server_keys=server_keys,
                  client_keys=client_keys, emit=lambda line: print(line, flush=True))
    try:
        print(f"jogwire relay ready: listen={relay.endpoint} target={args.target} seed={seed}",
              flush=True)
        for name, link in links.items():
            print(f"jogwire relay: {name} direction: {link.faults.describe()}", flush=True)
        with _Signals(relay, args.duration) as should_stop:
            relay.run(should_stop)
    finally:
        relay.close()
    print_counters(relay, sys.stdout)
    if args.report:
        Path(args.report).write_text(json.dumps({"seed": seed, "listen": relay.endpoint,
                                                 "target": args.target, **relay.report()},
                                                indent=2) + "\n", encoding="utf-8")
    return 0
