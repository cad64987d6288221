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
(Ctrl-C, SIGTERM or --duration) and, with --json-file, written as JSON.

The relay itself (`runtime.link.relay_runner.Relay`) binds a ROUTER like an arm side and
connects one DEALER to the target per peer. Loopback only, unless --keys: then it is the
CURVE server to its peers (arm.key_secret, authorized/) and a CURVE client to the target
(runtime.key_secret, arm.key), all from the same `jogwire keys` folder.
"""

from __future__ import annotations

import argparse
import json
import random
import signal
import sys
import time
from pathlib import Path
from typing import Any, TextIO

from ..errors import ConfigError
from ..link.relay import DIRECTIONS, GARBAGE_KINDS, Link, faults_from_options
from ..link.relay_runner import Relay
from ..link.transport import DEFAULT_ARM_ENDPOINT, load_client_keys, load_server_keys

DEFAULT_LISTEN_ENDPOINT = "tcp://127.0.0.1:47812"

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
    parser.add_argument("--json-file", metavar="FILE",
                        help="write the counters and settings as JSON at exit")
    parser.add_argument("--report", dest="json_file", help=argparse.SUPPRESS)  # old spelling


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
        self._previous: dict[int, Any] = {}

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
    if args.json_file:
        Path(args.json_file).write_text(json.dumps({"seed": seed, "listen": relay.endpoint,
                                                 "target": args.target, **relay.report()},
                                                indent=2) + "\n", encoding="utf-8")
    return 0
