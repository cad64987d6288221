"""Preflight and replay: how much faster than real time, and what bounds it.

Measured in one run, on the same machine state:

  preflight      a 60 s profile on reach7 (the shipped `gentle`, repeated), 500 Hz control,
                 1 ms physics step (2 steps per cycle): wall time and real-time factor,
                 with the default state lag of one cycle (this process computes a cycle
                 while the child steps the last) and
                 with lag 0 (strictly one after the other); the HTML report's time apart
  rerun          `replay --rerun` (open loop) of that 60 s session log: wall time, factor
  components     what one preflight cycle is made of, each timed alone (medians):
                   control cycle      ControlCycle.step on the run's recorded poses
                   bookkeeping        the cycle's record (built and encoded), the trace
                   lockstep exchange  one rates → state exchange with the simulated arm
                                      child over its pipes (2 physics steps inside)
                   arm side's work    the child's handling of one message, in process
                                      (decode, rules, 2 physics steps, state encoded)
                   physics            2 × SimulatedArm.step + read_state in this process
                   pipe round trip    a small message to a child process and back, bare,
                                      and with each side busy 300 µs between messages
                                      (each then finds its reader asleep: the wake-up cost)
                   socket round trip  the same over ZeroMQ DEALER ↔ ROUTER on 127.0.0.1

The runtime never imports the simulator (the child process is the arm); this script
imports `sim` only to time the physics and the arm side's work alone.

  workcell       with --cell NAME: the lag-1 preflight again in that workcell (the damper
                 in the solve, the simulated arm holding the objects and reading contacts,
                 the verdict's distances at every measured pose), against the run without
                 it from the same invocation; and the physics step with and without it

    python benchmarks/bench_preflight.py [--seconds 60] [--cycles 5000] [--cell bench]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from collections import Counter  # noqa: E402

from runtime.arm.cell import load_cell
from runtime.arm.load import load_arm
from runtime.arm.model import configs_dir
from runtime.control.cycle import ControlCycle  # noqa: E402
from runtime.control.pads import load_pad  # noqa: E402
from runtime.control.settings import RunSettings  # noqa: E402
from runtime.link.arm_process import child_env  # noqa: E402
from runtime.link.pipes import PIPE_PEER  # noqa: E402
from runtime.link.protocol import Rates, decode, encode, hello_for  # noqa: E402
from runtime.operator.progress import Progress  # noqa: E402
from runtime.sessions.cell_check import CellRun
from runtime.sessions.lockstep import LockstepSim  # noqa: E402
from runtime.sessions.log_reader import read_session  # noqa: E402
from runtime.sessions.log_schema import (
    cycle_record,  # noqa: E402
    frame_from_wire,  # noqa: E402
)
from runtime.sessions.log_writer import SessionRecorder  # noqa: E402
from runtime.sessions.preflight import TraceBuilder  # noqa: E402
from runtime.sessions.preflight_run import load_profile, preflight_settings, run_preflight  # noqa: E402
from runtime.sessions.rerun import cycle_settings, inputs_of, rerun_open_loop  # noqa: E402

RATE_HZ = 500.0
STEP_HZ = 1000.0
ARM = "reach7"

ECHO_CHILD = r"""
import os, sys, time, zmq
if sys.argv[1] == "pipe":
    r, w, work_s = int(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4])
    while (data := os.read(r, 4096)) != b"stop":
        t = time.perf_counter()
        while time.perf_counter() - t < work_s:
            pass
        os.write(w, data)
    sys.exit(0)
ctx = zmq.Context()
s = ctx.socket(zmq.ROUTER)
s.linger = 0
port = s.bind_to_random_port("tcp://127.0.0.1")
print(port, flush=True)
while True:
    frames = s.recv_multipart()
    if frames[1] == b"stop":
        break
    s.send_multipart(frames)
"""


def long_profile(folder: Path, seconds: float) -> Path:
    """The shipped `gentle` profile repeated to at least `seconds` (each repeat starts
    with a fresh press of enable)."""
    text = (configs_dir() / "profiles" / "gentle.toml").read_text()
    one = 5.5   # its segments' length, s
    repeat = int(np.ceil((seconds - 0.3) / one))
    path = folder / "gentle_long.toml"
    path.write_text(text.replace('name = "gentle"', 'name = "gentle_long"')
                    .replace("lead_in_s = 0.3", f"lead_in_s = 0.3\nrepeat = {repeat}"))
    return path


def load_average() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


def bench_preflight(folder: Path, seconds: float, state_lag: int,
                    with_report: bool, cell: str | None = None) -> tuple[Path, dict]:
    arm = load_arm(ARM)
    profile = load_profile(str(long_profile(folder, seconds)), arm, RATE_HZ)
    log = folder / f"run-lag{state_lag}{'-' + cell if cell else ''}.jwlog"
    settings = preflight_settings(rate_hz=RATE_HZ, reduced=False, state_lag=state_lag)
    t = time.perf_counter()
    run = run_preflight(ARM, arm, profile, settings, step_hz=STEP_HZ, log_path=log,
                        progress=Progress("", 1, enabled=False),
                        cell=None if cell is None else CellRun(load_cell(cell, arm), cell))
    total_s = time.perf_counter() - t       # the run and its verdict (workcell included)
    report_s = None
    if with_report:
        t = time.perf_counter()
        from runtime.sessions.report import ReportContext, write_report
        write_report(folder / "run.html", run.result, ReportContext(
            arm=arm, profile=profile.name, profile_source=profile.source, rate_hz=RATE_HZ,
            step_hz=STEP_HZ, started_at=run.started_at, wall_s=run.wall_s,
            session_log=str(run.log_path)))
        report_s = time.perf_counter() - t
    return log, {"motion_s": run.result.duration_s, "cycles": run.cycles,
                 "run_s": run.wall_s, "total_s": total_s, "report_s": report_s,
                 "verdict": run.result.verdict}


def bench_cell_physics(cell: str, steps: int) -> tuple[float, float]:
    """Median µs of SimulatedArm.step + read_state without and with the workcell."""
    from sim.arm import SimulatedArm
    from sim.cell_bodies import sim_cell
    arm = load_arm(ARM)
    out = []
    for held in (None, sim_cell(arm, load_cell(cell, arm))):
        with SimulatedArm(arm, cell=held) as sim:
            sim.set_rates(0.05 * arm.max_speed)
            times = []
            for _ in range(steps):
                t = time.perf_counter()
                sim.step()
                sim.read_state()
                times.append(time.perf_counter() - t)
        out.append(1e6 * statistics.median(times))
    return out[0], out[1]


def bench_rerun(log: Path) -> dict:
    t = time.perf_counter()
    session = read_session(log)
    read_s = time.perf_counter() - t
    settings = cycle_settings(session.header.settings)
    frames = inputs_of(session.records)
    t = time.perf_counter()
    diff = rerun_open_loop(settings.control_cycle(session.header.arm), session.records, frames)
    rerun_s = time.perf_counter() - t
    motion = session.records[-1].t_s - session.records[0].t_s
    return {"motion_s": motion, "read_s": read_s, "rerun_s": rerun_s,
            "largest_difference": diff.largest, "cycles": diff.cycles}


def bench_components(log: Path, cycles: int) -> dict[str, float]:
    """Medians in µs per cycle."""
    session = read_session(log)
    records = session.records[:cycles]
    arm = session.header.arm
    frames = [frame_from_wire(r.input) for r in records]
    out: dict[str, float] = {}

    cycle = ControlCycle(arm, load_pad("keyboard"), RunSettings(rate_hz=RATE_HZ))
    outs, times = [], []
    for rec, frame in zip(records, frames):
        q = np.array(rec.q)
        t = time.perf_counter_ns()
        outs.append(cycle.step(frame, rec.t_s, q, rec.t_s))
        times.append(time.perf_counter_ns() - t)
    out["control cycle"] = statistics.median(times) / 1e3

    times = []
    with tempfile.TemporaryDirectory() as tmp, \
            SessionRecorder.start(Path(tmp) / "b.jwlog", arm, {"rate_hz": RATE_HZ},
                                  queue_size=1 << 16, encode_in_caller=True) as recorder:
        trace = TraceBuilder(arm, arm.home(), np.zeros(arm.n), capacity=len(records))
        for k, (rec, frame, o) in enumerate(zip(records, frames, outs)):
            t = time.perf_counter_ns()
            r = cycle_record(k, rec.t_s, frame, o, rec.q, state_age_s=0.0, overrun_streak=0,
                             period_s=1 / RATE_HZ, compute_s=0.0, overrun=False)
            recorder.record(r)
            trace.add_cycle(r, commanded_twist=o.solution.commanded_twist
                            if o.solution is not None else np.zeros(6))
            trace.add_state(rec.q, rec.rates)
            times.append(time.perf_counter_ns() - t)
    out["bookkeeping (record built + encoded, trace)"] = statistics.median(times) / 1e3

    rates = np.array([r.rates for r in records])
    times = []
    with LockstepSim(ARM, arm, rate_hz=RATE_HZ, step_hz=STEP_HZ) as sim:
        for k in range(len(records)):
            t = time.perf_counter_ns()
            sim.step(rates[k])
            times.append(time.perf_counter_ns() - t)
    out["lockstep exchange (pipe + child)"] = statistics.median(times) / 1e3

    from sim.arm import SimulatedArm  # the benchmark may; the runtime never does
    times = []
    with SimulatedArm(arm, step_s=1.0 / STEP_HZ) as sim_arm:
        for k in range(len(records)):
            t = time.perf_counter_ns()
            sim_arm.set_rates(rates[k])
            sim_arm.step()
            sim_arm.step()
            sim_arm.read_state()
            times.append(time.perf_counter_ns() - t)
    out["physics (2 steps, in process)"] = statistics.median(times) / 1e3
    out["arm side's work per message, in process"] = arm_side_work(arm, rates)

    out["pipe round trip (bare)"] = pipe_round_trip(len(records))
    out["pipe round trip, 300 µs of work each side"] = pipe_round_trip(len(records) // 2, 3e-4)
    out["socket round trip (bare ZeroMQ)"] = echo_round_trip(len(records))
    return out


class _InProcessLink:
    """Stands in for the child's PipeServer: hands the endpoint one encoded rates message
    per cycle and takes its state, so the arm side's work is timed without any I/O."""

    ended = False

    def __init__(self, n_joints: int) -> None:
        self.n_joints, self.inbox, self.received = n_joints, [], 0
        self.dropped: Counter[str] = Counter()

    def poll(self, timeout_s: float) -> bool:
        return bool(self.inbox)

    def drain(self) -> list:
        out = [(PIPE_PEER, decode(m, n_joints=self.n_joints)) for m in self.inbox]
        self.inbox = []
        return out

    def send(self, peer: bytes, msg) -> str:
        encode(msg)
        return "sent"


def arm_side_work(arm, rates: np.ndarray) -> float:
    """Median µs of one lockstep message at the arm side, as the child does it (decode,
    the session's rules, 2 physics steps with the guard, the state built and encoded),
    without the pipe: the child's share of a cycle when neither process waits."""
    from sim.arm import SimulatedArm
    from sim.arm_side import ArmSession
    from sim.endpoint import ArmEndpoint
    link = _InProcessLink(arm.n)
    times = []
    with SimulatedArm(arm, step_s=1.0 / STEP_HZ) as sim_arm:
        session = ArmSession(hello_for(arm, "sim", stale_after_s=3600.0),
                             stale_after_s=3600.0, in_order=True)
        endpoint = ArmEndpoint(link, sim_arm, session, substeps=round(STEP_HZ / RATE_HZ))
        link.inbox.append(encode(hello_for(arm, "runtime", stale_after_s=3600.0)))
        endpoint.cycle_lockstep(0.0)
        for k in range(len(rates)):
            link.inbox.append(encode(Rates(seq=k + 1, t_ns=time.monotonic_ns(), qd=rates[k])))
            t = time.perf_counter_ns()
            endpoint.cycle_lockstep(0.0)
            times.append(time.perf_counter_ns() - t)
    return statistics.median(times) / 1e3


def pipe_round_trip(n: int, work_s: float = 0.0) -> float:
    """Median µs of a 120-byte message to a child and back over two pipes, both ends
    blocking in read. With work_s, each side works that long between messages (busy, as
    the control cycle and the physics do), so each message finds its reader asleep; the
    result is the round trip less the two work periods: what waking a reader costs."""
    to_child, from_child = os.pipe(), os.pipe()
    child = subprocess.Popen([sys.executable, "-c", ECHO_CHILD, "pipe", str(to_child[0]),
                              str(from_child[1]), repr(work_s)],
                             pass_fds=(to_child[0], from_child[1]), env=child_env())
    os.close(to_child[0])
    os.close(from_child[1])
    payload = b"x" * 120
    times = []
    try:
        for _ in range(n):
            t = time.perf_counter_ns()
            os.write(to_child[1], payload)
            os.read(from_child[0], 4096)
            times.append(time.perf_counter_ns() - t - int(work_s * 1e9))
            busy = time.perf_counter()
            while time.perf_counter() - busy < work_s:
                pass
        os.write(to_child[1], b"stop")
    finally:
        child.wait(timeout=10)
        os.close(to_child[1])
        os.close(from_child[0])
    return statistics.median(times[100:]) / 1e3


def echo_round_trip(n: int) -> float:
    import zmq
    child = subprocess.Popen([sys.executable, "-c", ECHO_CHILD, "zmq"], stdout=subprocess.PIPE,
                             text=True, env=child_env())
    try:
        port = int(child.stdout.readline())
        ctx = zmq.Context()
        s = ctx.socket(zmq.DEALER)
        s.linger = 0
        s.connect(f"tcp://127.0.0.1:{port}")
        payload = b"x" * 120          # about a rates message for 7 joints
        times = []
        for _ in range(n):
            t = time.perf_counter_ns()
            s.send(payload)
            s.poll(1000)
            s.recv()
            times.append(time.perf_counter_ns() - t)
        s.send(b"stop")
        s.close()
        ctx.term()
    finally:
        child.wait(timeout=10)
    return statistics.median(times[100:]) / 1e3


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--seconds", type=float, default=60.0, help="profile length (default 60)")
    p.add_argument("--cycles", type=int, default=5000,
                   help="cycles per component measurement (default 5000)")
    p.add_argument("--cell", metavar="NAME", help="also run the lag-1 preflight in this "
                                                  "workcell (e.g. bench)")
    p.add_argument("--only-cell", action="store_true",
                   help="with --cell: only the workcell comparison")
    args = p.parse_args()
    if args.cell and args.only_cell:
        return bench_cell(args)
    print(f"load average at start: {load_average()}")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        runs = {}
        for lag in (1, 0):
            log, pre = bench_preflight(folder, args.seconds, lag, with_report=lag == 1)
            runs[lag] = (log, pre)
            print(f"preflight {ARM}, state lag {lag}: {pre['motion_s']:.1f} s of motion, "
                  f"{pre['cycles']} cycles ({RATE_HZ:g} Hz, physics {STEP_HZ:g} Hz): run "
                  f"{pre['run_s']:.2f} s = {pre['motion_s'] / pre['run_s']:.2f}x real time "
                  f"({1e6 * pre['run_s'] / pre['cycles']:.0f} µs per cycle); verdict "
                  f"{pre['verdict']}")
        print(f"  the HTML report of the lag-1 run: {runs[1][1]['report_s']:.2f} s")
        log = runs[1][0]
        re = bench_rerun(log)
        print(f"replay --rerun (open loop): {re['motion_s']:.1f} s session, {re['cycles']} "
              f"cycles: read {re['read_s']:.2f} s, re-run {re['rerun_s']:.2f} s = "
              f"{re['motion_s'] / (re['read_s'] + re['rerun_s']):.1f}x real time; largest "
              f"difference {re['largest_difference']:g}")
        parts = bench_components(log, args.cycles)
    print("one preflight cycle, its parts (medians, µs):")
    for name, value in parts.items():
        print(f"  {name:<46} {value:8.1f}")
    period = 1e6 / RATE_HZ
    here = parts["control cycle"] + parts["bookkeeping (record built + encoded, trace)"]
    there = parts["arm side's work per message, in process"]
    exchange = parts["lockstep exchange (pipe + child)"]
    print(f"  work per cycle: here (control cycle + bookkeeping) {here:.0f} µs, at the arm "
          f"side {there:.0f} µs")
    print(f"  one after the other (lag 0: this work plus an exchange with the child) bounds "
          f"it at {period / (here + exchange):.1f}x real time; side by side (lag 1) the "
          f"slower side's work at {period / max(here, there):.1f}x")
    print(f"load average at end: {load_average()}")
    if args.cell:
        bench_cell(args)
    return 0


def bench_cell(args: argparse.Namespace) -> int:
    """The lag-1 preflight without and with the workcell, one after the other."""
    print(f"workcell {args.cell}, load average at start: {load_average()}")
    with tempfile.TemporaryDirectory() as tmp:
        runs = {name: bench_preflight(Path(tmp), args.seconds, 1, False, cell)[1]
                for name, cell in (("without", None), ("with", args.cell))}
    for name, r in runs.items():
        print(f"  preflight {ARM} {name} the workcell: {r['motion_s']:.1f} s of motion: run "
              f"{r['run_s']:.2f} s = {r['motion_s'] / r['run_s']:.2f}x real time; with the "
              f"verdict {r['total_s']:.2f} s = {r['motion_s'] / r['total_s']:.2f}x; "
              f"verdict {r['verdict']}")
    ratio = runs["with"]["run_s"] / runs["without"]["run_s"]
    print(f"  the workcell's run takes {ratio:.2f}x the time of the run without it")
    plain, held = bench_cell_physics(args.cell, args.cycles)
    print(f"  physics step + read: {plain:.1f} µs without, {held:.1f} µs with the workcell "
          f"(contacts read every step): +{held - plain:.1f} µs")
    print(f"  load average at end: {load_average()}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
