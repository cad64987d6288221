"""The wire: latency of rates and state over ZeroMQ, and how fast the simulated arm steps.

Measured between separate processes on this machine (CLOCK_MONOTONIC is shared by all
processes on Linux, so a send time stamped in one process can be subtracted from a receive
time in another):

  one-way    rates from `ArmClient.send` (stamped t_ns) to decoded at an `ArmServer` in a
             child process (recv_ns − t_ns), 1 message per ms
  round trip rates sent → the child answers a state at once → decoded back here
             (now − echo_ns); tcp://127.0.0.1 and ipc:// (socket in a temporary folder)
  reference  the same two with bare pyzmq DEALER/ROUTER and a 100-byte payload (no
             msgpack, no validation), in the same run
  sim        steps per second of `python -m sim.arm reach7` at a 1 ms step: lockstep over
             loopback sockets (one rates → one step → one state, waited for; and with
             --substeps 2, two steps per message as for a 500 Hz runtime), paced (wall
             clock), and PyBullet alone in-process as the reference

Run from the repository root:

    python benchmarks/bench_wire.py [--count 3000] [--steps 5000] [--append-results]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import zmq

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runtime.arm.load import load_arm  # noqa: E402
from runtime.link.arm_process import ArmProcess, child_env  # noqa: E402
from runtime.link.protocol import Hello, Rates, State, hello_for  # noqa: E402
from runtime.link.transport import ArmClient, ArmServer  # noqa: E402

ARM = "reach7"


def stats_us(values_ns) -> tuple[float, float]:
    a = np.asarray(values_ns, dtype=np.float64) / 1e3
    return float(np.median(a)), float(np.percentile(a, 99))


# ----------------------------------------------------------------------------------------
# Child: the echoing arm side
# ----------------------------------------------------------------------------------------

def echo(endpoint: str, count: int, raw: bool) -> int:
    """Answer each message at once; print the one-way delays (ns) as JSON at the end.

    Serves until nothing came for 2 s: closing right after the last reply (LINGER 0) could
    drop that reply before it left."""
    n = load_arm(ARM).n
    one_way = []
    if raw:
        ctx = zmq.Context()
        s = ctx.socket(zmq.ROUTER)
        s.linger = 0
        s.bind(endpoint)
        print(json.dumps({"endpoint": s.getsockopt_string(zmq.LAST_ENDPOINT)}), flush=True)
        while s.poll(2000):          # until the parent has been quiet for 2 s
            peer, payload = s.recv_multipart()
            one_way.append(time.monotonic_ns() - int.from_bytes(payload[:8], "little"))
            s.send_multipart([peer, payload])
        s.close()
        ctx.term()
    else:
        with ArmServer(endpoint, n_joints=n) as server:
            print(json.dumps({"endpoint": server.endpoint}), flush=True)
            zeros = (0.0,) * n
            while server.poll(2.0):   # until the parent has been quiet for 2 s
                now = time.monotonic_ns()
                for peer, msg in server.drain():
                    if isinstance(msg, Rates):
                        one_way.append(now - msg.t_ns)
                        server.send(peer, State(len(one_way), time.monotonic_ns(), zeros,
                                                msg.qd, msg.seq, msg.t_ns, "tracking"))
                    elif isinstance(msg, Hello):
                        server.send(peer, msg)
    print(json.dumps({"one_way_ns": one_way}), flush=True)
    return 0


def start_echo(endpoint: str, count: int, raw: bool) -> tuple[subprocess.Popen, str]:
    argv = [sys.executable, __file__, "--echo", endpoint, "--count", str(count)]
    proc = subprocess.Popen(argv + (["--raw"] if raw else []), stdout=subprocess.PIPE,
                            text=True, env=child_env())
    return proc, json.loads(proc.stdout.readline())["endpoint"]


def pace(next_ns: int, period_ns: int) -> int:
    next_ns += period_ns
    while (left := next_ns - time.monotonic_ns()) > 0:
        if left > 300_000:
            time.sleep((left - 300_000) / 1e9)
    return next_ns


def latency(endpoint: str, count: int, raw: bool) -> dict:
    proc, bound = start_echo(endpoint, count, raw)
    rtt = []
    arm = load_arm(ARM)
    try:
        if raw:
            ctx = zmq.Context()
            s = ctx.socket(zmq.DEALER)
            s.linger = 0
            s.connect(bound)
            pad = b"\x00" * 92
            next_ns = time.monotonic_ns()
            for _ in range(count):
                t = time.monotonic_ns()
                s.send(t.to_bytes(8, "little") + pad)
                if not s.poll(2000):
                    raise RuntimeError("no answer from the echo process")
                s.recv()
                rtt.append(time.monotonic_ns() - t)
                next_ns = pace(next_ns, 1_000_000)
            s.close()
            ctx.term()
        else:
            with ArmClient(bound, hello=hello_for(arm, "runtime", stale_after_s=0.1)) as c:
                while c.receive(0.05).hello is None:
                    c.say_hello()
                qd = np.linspace(-0.1, 0.1, arm.n)
                next_ns = time.monotonic_ns()
                for seq in range(1, count + 1):
                    c.send(Rates(seq, time.monotonic_ns(), qd))
                    state = c.receive(2.0).state
                    if state is None:
                        raise RuntimeError(f"no answer to rates {seq}")
                    rtt.append(time.monotonic_ns() - state.echo_ns)
                    next_ns = pace(next_ns, 1_000_000)
        one_way = json.loads(proc.stdout.readline())["one_way_ns"]
    finally:
        proc.wait(10)
    return {"one_way": stats_us(one_way), "rtt": stats_us(rtt)}


# ----------------------------------------------------------------------------------------
# Simulated arm steps per second
# ----------------------------------------------------------------------------------------

def pybullet_alone(steps: int) -> float:
    from sim.arm import SimulatedArm
    arm = load_arm(ARM)
    qd = 0.2 * arm.max_speed * np.cos(np.arange(arm.n))
    with SimulatedArm(arm) as sim:
        t = time.perf_counter()
        for _ in range(steps):
            sim.set_rates(qd)
            sim.step()
        return steps / (time.perf_counter() - t)


def lockstep(endpoint: str, steps: int, substeps: int = 1) -> float:
    """Physics steps per second, `substeps` of them per rates message."""
    arm = load_arm(ARM)
    qd = 0.2 * arm.max_speed * np.cos(np.arange(arm.n))
    with ArmProcess("sim", ARM, ["--lockstep", "--endpoint", endpoint, "--substeps",
                                 str(substeps)]) as sim, \
            ArmClient(sim.endpoint, hello=hello_for(arm, "runtime", stale_after_s=0.1)) as c:
        c.handshake(10.0)
        messages = steps // substeps
        t = time.perf_counter()
        for seq in range(1, messages + 1):
            c.send(Rates(seq, time.monotonic_ns(), qd))
            state = None
            while state is None or state.applied_seq != seq:
                state = c.receive(1.0).state or state
        return messages * substeps / (time.perf_counter() - t)


def paced(seconds: float) -> tuple[float, str]:
    arm = load_arm(ARM)
    with ArmProcess("sim", ARM, ["--endpoint", "tcp://127.0.0.1:*"],
                    stderr=subprocess.PIPE) as sim:
        with ArmClient(sim.endpoint, hello=hello_for(arm, "observer", stale_after_s=0.1)) as c:
            _, first = c.handshake(10.0)
            t_end = time.monotonic() + seconds
            last = first
            while time.monotonic() < t_end:
                last = c.receive(0.01).state or last
        sim.stop()
    summary = next((ln for ln in sim.errors.splitlines() if "stopped:" in ln), "")
    rate = (last.seq - first.seq) / ((last.t_ns - first.t_ns) * 1e-9)
    return rate, summary.split("stopped: ", 1)[-1]


# ----------------------------------------------------------------------------------------

def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--count", type=int, default=3000, help="messages per latency case")
    p.add_argument("--steps", type=int, default=5000, help="steps per sim speed case")
    p.add_argument("--paced-seconds", type=float, default=3.0)
    p.add_argument("--append-results", action="store_true",
                   help="append the table to benchmarks/RESULTS.md")
    p.add_argument("--echo", help=argparse.SUPPRESS)
    p.add_argument("--raw", action="store_true", help=argparse.SUPPRESS)
    args = p.parse_args()
    if args.echo:
        return echo(args.echo, args.count, args.raw)

    rows = []
    with tempfile.TemporaryDirectory(prefix="jogwire-bench-") as tmp:
        for name, endpoint in (("tcp", "tcp://127.0.0.1:*"), ("ipc", f"ipc://{tmp}/arm")):
            for raw in (False, True):
                r = latency(endpoint, args.count, raw)
                label = f"{name}, {'bare pyzmq (reference)' if raw else 'jogwire'}"
                rows.append((label, r))
                print(f"{label:32s} one-way median {r['one_way'][0]:7.1f} µs p99 "
                      f"{r['one_way'][1]:7.1f} µs | round trip median {r['rtt'][0]:7.1f} µs "
                      f"p99 {r['rtt'][1]:7.1f} µs", flush=True)
        alone = pybullet_alone(args.steps)
        print(f"PyBullet alone, in-process: {alone:8.0f} steps/s", flush=True)
        lock_tcp = lockstep("tcp://127.0.0.1:*", args.steps)
        print(f"lockstep over tcp loopback: {lock_tcp:8.0f} steps/s", flush=True)
        lock_ipc = lockstep(f"ipc://{tmp}/lock", args.steps)
        print(f"lockstep over ipc:          {lock_ipc:8.0f} steps/s", flush=True)
        lock_500 = lockstep("tcp://127.0.0.1:*", args.steps, substeps=2)
        print(f"lockstep, tcp, 2 substeps:  {lock_500:8.0f} steps/s", flush=True)
    paced_rate, paced_summary = paced(args.paced_seconds)
    print(f"paced, 1 kHz:               {paced_rate:8.1f} steps/s ({paced_summary})")

    load = os.getloadavg()[0]
    results = ROOT / "benchmarks" / "RESULTS.md"
    heading = "### Wire, another run" if "## Wire" in results.read_text(encoding="utf-8") \
        else "## Wire"
    lines = ["", heading, "",
             f"Command: `python benchmarks/bench_wire.py --count {args.count} --steps "
             f"{args.steps}` (2 cores shared with other work, load average {load:.1f}; "
             f"Python {sys.version.split()[0]}, pyzmq {zmq.__version__} / libzmq "
             f"{zmq.zmq_version()}). Separate processes; {ARM}, 7 joints; one message per "
             "ms for latency.", "",
             "| link | one-way median | one-way p99 | round trip median | round trip p99 |",
             "|---|---|---|---|---|"]
    for label, r in rows:
        lines.append(f"| {label} | {r['one_way'][0]:.0f} µs | {r['one_way'][1]:.0f} µs | "
                     f"{r['rtt'][0]:.0f} µs | {r['rtt'][1]:.0f} µs |")
    lines += ["", "| simulated arm, 1 ms step | steps/s | × real time |", "|---|---|---|",
              f"| lockstep over tcp loopback (rates → step → state, waited for) | "
              f"{lock_tcp:.0f} | {lock_tcp / 1000:.1f} |",
              f"| lockstep over ipc | {lock_ipc:.0f} | {lock_ipc / 1000:.1f} |",
              f"| lockstep over tcp, `--substeps 2` (a 500 Hz runtime on a 1 ms step) | "
              f"{lock_500:.0f} | {lock_500 / 1000:.1f} |",
              f"| paced ({paced_summary}) | {paced_rate:.1f} | {paced_rate / 1000:.3f} |",
              f"| reference: PyBullet alone, in-process, with our guard | {alone:.0f} | "
              f"{alone / 1000:.1f} |", ""]
    text = "\n".join(lines)
    print(text)
    if args.append_results:
        with open(results, "a", encoding="utf-8") as f:
            f.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
