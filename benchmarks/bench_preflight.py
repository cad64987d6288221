"""Preflight and replay: how much faster than real time, and what bounds it.

Measured in one run, on the same machine state:

  preflight      a 60 s profile on reach7 (the shipped `gentle`, repeated), 500 Hz control,
                 1 ms physics step (2 steps per cycle): wall time and real-time factor, the
                 run alone and with the HTML report
  rerun          `replay --rerun` (open loop) of that 60 s session log: wall time, factor
  components     what one preflight cycle is made of, each timed alone (medians):
                   control cycle      ControlCycle.step on the run's recorded poses
                   bookkeeping        the cycle's record, the recorder hand-off, the trace
                   lockstep cycle     one rates → state exchange with the simulated arm
                                      child (2 physics steps inside), nothing else
                   physics            2 × SimulatedArm.step + read_state in this process
                   socket round trip  a small message to a child process and back
                                      (DEALER ↔ ROUTER on 127.0.0.1, the wire's sockets)

The runtime never imports the simulator (the child process is the arm), so every cycle
pays one socket round trip plus the child's message handling; this script imports
`sim.arm` only to time the physics alone.

    python benchmarks/bench_preflight.py [--seconds 60] [--cycles 5000]
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

from runtime.arm_process import child_env  # noqa: E402
from runtime.commands.preflight import load_profile, run_preflight  # noqa: E402
from runtime.lockstep import LockstepSim  # noqa: E402
from runtime.mapping import load_pad  # noqa: E402
from runtime.model import configs_dir, load_arm  # noqa: E402
from runtime.pipeline import ControlCycle, frame_from_wire  # noqa: E402
from runtime.preflight import TraceBuilder  # noqa: E402
from runtime.progress import Progress  # noqa: E402
from runtime.recorder import SessionRecorder, cycle_record, read_session  # noqa: E402
from runtime.rerun import cycle_settings, inputs_of, rerun_open_loop  # noqa: E402

RATE_HZ = 500.0
STEP_HZ = 1000.0
ARM = "reach7"

ECHO_CHILD = r"""
import sys, zmq
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


def bench_preflight(folder: Path, seconds: float) -> tuple[Path, dict]:
    arm = load_arm(ARM)
    profile = load_profile(str(long_profile(folder, seconds)), arm, RATE_HZ)
    run = run_preflight(ARM, arm, profile, rate_hz=RATE_HZ, step_hz=STEP_HZ, reduced=False,
                        log_path=folder / "run.jwlog", progress=Progress("", 1, enabled=False))
    t = time.perf_counter()
    from runtime.report import ReportContext, write_report
    write_report(folder / "run.html", run.result, ReportContext(
        arm=arm, profile=profile.name, profile_source=profile.source, rate_hz=RATE_HZ,
        step_hz=STEP_HZ, started_at=run.started_at, wall_s=run.wall_s,
        session_log=str(run.log_path)))
    report_s = time.perf_counter() - t
    return run.log_path, {"motion_s": run.result.duration_s, "cycles": run.cycles,
                          "run_s": run.wall_s, "report_s": report_s,
                          "verdict": run.result.verdict}


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

    cycle = ControlCycle(arm, load_pad("keyboard"), rate_hz=RATE_HZ)
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
                                  queue_size=1 << 16) as recorder:
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
    out["bookkeeping"] = statistics.median(times) / 1e3

    rates = np.array([r.rates for r in records])
    times = []
    with LockstepSim(ARM, arm, rate_hz=RATE_HZ, step_hz=STEP_HZ) as sim:
        child_cpu0, own_cpu0 = cpu_seconds(sim.child.pid), time.process_time()
        for k in range(len(records)):
            t = time.perf_counter_ns()
            sim.step(rates[k])
            times.append(time.perf_counter_ns() - t)
        child_cpu = cpu_seconds(sim.child.pid) - child_cpu0
        own_cpu = time.process_time() - own_cpu0
    out["lockstep cycle (round trip + child)"] = statistics.median(times) / 1e3
    # CPU time per cycle does not grow with the machine's other load as wall time does.
    out["  CPU in the child per cycle (mean)"] = 1e6 * child_cpu / len(records)
    out["  CPU here per exchange (mean)"] = 1e6 * own_cpu / len(records)

    from sim.arm import SimulatedArm   # the benchmark may; the runtime never does
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

    out["socket round trip"] = echo_round_trip(len(records))
    return out


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process so far (Linux /proc; clock ticks)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def echo_round_trip(n: int) -> float:
    import zmq
    child = subprocess.Popen([sys.executable, "-c", ECHO_CHILD], stdout=subprocess.PIPE,
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
    args = p.parse_args()
    print(f"load average at start: {load_average()}")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        log, pre = bench_preflight(folder, args.seconds)
        print(f"preflight {ARM}: {pre['motion_s']:.1f} s of motion, {pre['cycles']} cycles "
              f"({RATE_HZ:g} Hz, physics {STEP_HZ:g} Hz): run {pre['run_s']:.2f} s = "
              f"{pre['motion_s'] / pre['run_s']:.2f}x real time "
              f"({1e6 * pre['run_s'] / pre['cycles']:.0f} µs per cycle); report "
              f"{pre['report_s']:.2f} s; verdict {pre['verdict']}")
        re = bench_rerun(log)
        print(f"replay --rerun (open loop): {re['motion_s']:.1f} s session, {re['cycles']} "
              f"cycles: read {re['read_s']:.2f} s, re-run {re['rerun_s']:.2f} s = "
              f"{re['motion_s'] / (re['read_s'] + re['rerun_s']):.1f}x real time; largest "
              f"difference {re['largest_difference']:g}")
        parts = bench_components(log, args.cycles)
    print("one preflight cycle, its parts (medians, µs):")
    for name, value in parts.items():
        print(f"  {name:<40} {value:8.1f}")
    child = parts["lockstep cycle (round trip + child)"] - parts["socket round trip"] \
        - parts["physics (2 steps, in process)"]
    print(f"  {'child message handling (derived)':<40} {child:8.1f}")
    cpu = parts["  CPU in the child per cycle (mean)"] + parts["  CPU here per exchange (mean)"] \
        + parts["control cycle"] + parts["bookkeeping"]
    print(f"  CPU per preflight cycle, both processes: about {cpu:.0f} µs "
          f"→ {1e6 / RATE_HZ / cpu:.1f}x real time if nothing ever waited")
    total = parts["control cycle"] + parts["lockstep cycle (round trip + child)"]
    print(f"  sequential sum: control cycle + lockstep cycle = {total:.0f} µs "
          f"→ at most {1e6 / RATE_HZ / total:.2f}x real time at {RATE_HZ:g} Hz")
    print(f"load average at end: {load_average()}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
