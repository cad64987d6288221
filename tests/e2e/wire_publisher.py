"""A minimal runtime-side publisher for the end-to-end wire tests (run as its own process).

    python tests/e2e/wire_publisher.py ENDPOINT ARM --rates v1,v2,… [--duration S]
                                       [--then-zero S] [--period S] [--garbage]

Says hello (exit 3 with the ModelMismatch text on stderr if refused), sends the constant
rates every period for `duration` seconds, then zero rates for `then_zero` seconds. Prints
one JSON line per phase on stdout: {"event": "moving" | "zero" | "done", "t_ns": …} with the
send time of the phase's first message (monotonic clock, shared with the test on Linux).
With --garbage, every good message is followed by a malformed one (cycling through kinds).
"""

from __future__ import annotations

import argparse
import json
import sys
import time

import msgpack

from runtime.arm.load import load_arm
from runtime.errors import ModelMismatch, TransportError
from runtime.link.protocol import PROTOCOL_VERSION, Rates, encode, hello_for
from runtime.link.transport import ArmClient


def garbage(n: int, k: int) -> bytes:
    good = {"v": PROTOCOL_VERSION, "kind": "rates", "seq": 10**9 + k, "t_ns": time.monotonic_ns(),
            "qd": [5.0] * n, "flags": 0}
    kinds = [b"\xc1\xc1\xc1",                                          # not msgpack
             encode(Rates(10**9 + k, 0, (5.0,) * n))[:-4],             # truncated
             msgpack.packb({**good, "qd": [float("nan")] * n}),        # NaN
             msgpack.packb({**good, "qd": [5.0] * (n + 1)}),           # wrong length
             msgpack.packb({**good, "v": PROTOCOL_VERSION + 1}),       # future version
             msgpack.packb({**good, "qd": "fast"}),                    # wrong type
             msgpack.packb({**good, "qd": [5.0] * 60}),                # long array
             msgpack.packb({**good, "qd": [5.0] * 1000})]              # huge array
    return kinds[k % len(kinds)]


def main() -> int:
    p = argparse.ArgumentParser()
    p.add_argument("endpoint")
    p.add_argument("arm")
    p.add_argument("--rates", required=True)
    p.add_argument("--duration", type=float, default=1.0)
    p.add_argument("--then-zero", type=float, default=0.3)
    p.add_argument("--period", type=float, default=0.002)
    p.add_argument("--garbage", action="store_true")
    args = p.parse_args()
    arm = load_arm(args.arm)
    qd = [float(v) for v in args.rates.split(",")]
    with ArmClient(args.endpoint, hello=hello_for(arm, "runtime", stale_after_s=0.1)) as client:
        try:
            client.handshake(10.0)
        except (ModelMismatch, TransportError) as exc:
            print(f"{type(exc).__name__}: {exc}", file=sys.stderr, flush=True)
            # A careless runtime would send anyway: the arm side must still not move.
            for seq in range(1, 200):
                client.send(Rates(seq, time.monotonic_ns(), qd))
                time.sleep(args.period)
            return 3
        seq = 0
        for event, values, duration in (("moving", qd, args.duration),
                                        ("zero", [0.0] * len(qd), args.then_zero)):
            start = time.monotonic_ns()
            print(json.dumps({"event": event, "t_ns": start}), flush=True)
            next_t = start
            while time.monotonic_ns() - start < duration * 1e9:
                seq += 1
                client.send(Rates(seq, time.monotonic_ns(), values))
                if args.garbage:
                    client.socket.send(garbage(len(qd), seq))
                client.receive()          # keep the state queue drained
                next_t += int(args.period * 1e9)
                time.sleep(max(0.0, (next_t - time.monotonic_ns()) * 1e-9))
        print(json.dumps({"event": "done", "t_ns": time.monotonic_ns(), "sent": seq}), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
