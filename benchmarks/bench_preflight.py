"""Preflight and replay: how much faster than real time, and what bounds it.

Measured in one run, on the same machine state:

  preflight      a 60 s profile on reach7 (the shipped `gentle`, repeated), 500 Hz control,
                 1 ms physics step (2 steps per cycle): wall time and real-time factor,
                 over each lockstep link (shm: shared rings, the pipes as doorbell; pipe:
                 the pipes alone), with the default state lag of one cycle (this process
                 computes a cycle while the child steps the last) and with lag 0 (strictly
                 one after the other); the HTML report's time apart
  per side       in each run, what one cycle of the loop (from the handshake on) is on
                 each side: working, and waiting for the other (this process: its time in
                 `LockstepSim.wait`; the child: its time on messages, from the summary it
                 prints when it stops)
  rerun          `replay --rerun` (open loop) of that 60 s session log: wall time, factor
  components     what one preflight cycle is made of, each timed alone (medians):
                   control cycle      ControlCycle.step on the run's recorded poses;
                                      again with this process on one core and a busy
                                      loop on the other (a lag-1 run keeps both busy)
                   bookkeeping        the cycle kept, its block gathered and packed (every
                                      256 cycles), the verdict's trace
                   lockstep exchange  one rates → state exchange with the simulated arm
                                      child over each link (2 physics steps inside)
                   arm side's work    the child's handling of one message, in process
                                      (decode, rules, 2 physics steps, state encoded)
                   physics            2 × SimulatedArm.step + read_state in this process
                   link handling      each side's own part of one exchange, both ends in
                                      this process: encode + send, take + decode
                   link round trip    a small message to a child process and back over
                                      each link's own channel code, bare, and with each
                                      side busy 60 µs between messages (about each side's
                                      work): the round trip less the work, the hand-over
                   socket round trip  the same over ZeroMQ DEALER ↔ ROUTER on 127.0.0.1

The runtime never imports the simulator (the child process is the arm); this script
imports `sim` only to time the physics and the arm side's work alone.

  workcell       with --cell NAME: the lag-1 preflight again in that workcell (the damper
                 in the solve, the simulated arm holding the objects and reading contacts,
                 the verdict's distances at every measured pose), against the run without
                 it from the same invocation; and the physics step with and without it

    python benchmarks/bench_preflight.py [--seconds 60] [--cycles 5000] [--cell bench]
                                         [--links shm,pipe]
"""

from __future__ import annotations

import argparse
import os
import re
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from collections import Counter  # noqa: E402

import runtime.sessions.preflight_run as preflight_run  # noqa: E402
from runtime.arm.cell import load_cell
from runtime.arm.load import load_arm
from runtime.arm.model import configs_dir
from runtime.control.cycle import ControlCycle  # noqa: E402
from runtime.control.pads import load_pad  # noqa: E402
from runtime.control.settings import RunSettings  # noqa: E402
from runtime.link.arm_process import child_env  # noqa: E402
from runtime.link.packed import MARK, decode_packed, encode_packed, packs  # noqa: E402
from runtime.link.pipes import (  # noqa: E402
    PIPE_PEER,
    PipeClient,
    PipeEnd,
    PipeServer,
    arm_side_channel,
    child_link,
    link_spec,
)
from runtime.link.protocol import Rates, State, decode, encode, hello_for  # noqa: E402
from runtime.operator.progress import Progress  # noqa: E402
from runtime.sessions.cell_check import CellRun
from runtime.sessions.cycle_columns import CycleColumns  # noqa: E402
from runtime.sessions.lockstep import LockstepSim  # noqa: E402
from runtime.sessions.log_reader import read_session  # noqa: E402
from runtime.sessions.log_schema import frame_from_wire  # noqa: E402
from runtime.sessions.log_writer import SessionRecorder  # noqa: E402
from runtime.sessions.preflight import TraceBuilder  # noqa: E402
from runtime.sessions.preflight_run import load_profile, preflight_settings, run_preflight  # noqa: E402
from runtime.sessions.rerun import cycle_settings, inputs_of, rerun_open_loop  # noqa: E402

RATE_HZ = 500.0
STEP_HZ = 1000.0
ARM = "reach7"

ECHO_CHILD = r"""
import sys, time, zmq
if sys.argv[1] == "link":
    from runtime.link.pipes import arm_side_channel
    channel, work_s = arm_side_channel(sys.argv[2]), float(sys.argv[3])
    while channel.poll(10.0) and not channel.ended:
        for data in channel.take():
            if data == b"stop":
                sys.exit(0)
            t = time.perf_counter()
            while time.perf_counter() - t < work_s:
                pass
            channel.send(data)
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


class _TimedLockstepSim(LockstepSim):
    """LockstepSim that keeps how long its loop ran (from the handshake to close), how
    long this process waited for states in it, and how long the child worked on messages
    (from the summary line it prints when it stops)."""

    last: "_TimedLockstepSim | None" = None

    def __init__(self, *args, **kwargs) -> None:
        started = time.perf_counter()
        super().__init__(*args, **kwargs)
        self.ready = time.perf_counter()
        self.start_s = self.ready - started
        self.loop_s = self.waited_s = 0.0
        self.child_worked_s = float("nan")
        _TimedLockstepSim.last = self

    def wait(self, seq: int):
        t = time.perf_counter()
        try:
            return super().wait(seq)
        finally:
            now = time.perf_counter()
            self.waited_s += now - t
            self.loop_s = now - self.ready      # the loop ends with its last wait

    def close(self) -> None:
        super().close()
        found = re.search(r"worked ([0-9.]+) s on messages", self.child.errors)
        if found:
            self.child_worked_s = float(found.group(1))


def bench_preflight(folder: Path, seconds: float, state_lag: int,
                    with_report: bool, cell: str | None = None,
                    link: str = "auto") -> tuple[Path, dict]:
    arm = load_arm(ARM)
    profile = load_profile(str(long_profile(folder, seconds)), arm, RATE_HZ)
    log = folder / f"run-lag{state_lag}-{link}{'-' + cell if cell else ''}.jwlog"
    settings = preflight_settings(rate_hz=RATE_HZ, reduced=False, state_lag=state_lag)
    t = time.perf_counter()
    preflight_run.LockstepSim = _TimedLockstepSim
    try:
        run = run_preflight(ARM, arm, profile, settings, step_hz=STEP_HZ, log_path=log,
                            progress=Progress("", 1, enabled=False),
                            cell=None if cell is None else CellRun(load_cell(cell, arm), cell),
                            link=link)
    finally:
        preflight_run.LockstepSim = LockstepSim
    total_s = time.perf_counter() - t       # the run and its verdict (workcell included)
    sim = _TimedLockstepSim.last
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
                 "verdict": run.result.verdict, "start_s": sim.start_s, "loop_s": sim.loop_s,
                 "here_waited_s": sim.waited_s, "child_worked_s": sim.child_worked_s}


# The runtime side's parts of a lockstep run, timed inside the run by wrapping them: the same
# calls take longer there than alone (caches shared with everything else the loop does).
IN_RUN_PARTS = (
    (ControlCycle, "step", "control cycle"),
    (CycleColumns, "add", "the cycle kept for the log and the verdict"),
    (preflight_run, "_hand_over", "a block gathered, packed, traced (one per 256)"),
    (TraceBuilder, "add_state", "the verdict's trace: the state after the cycle"),
    (LockstepSim, "send", "rates built, encoded and sent"),
    (LockstepSim, "wait", "the state taken"),
    (PipeEnd, "poll", "  of it: waiting for the state"),   # nested parts start with a space
    (PipeEnd, "decode", "  of it: the state decoded"),
)


def bench_parts_in_run(folder: Path, seconds: float, link: str) -> tuple[dict[str, float], dict]:
    """µs per cycle of each of IN_RUN_PARTS in a lag-1 preflight (wall time, means), and
    that run's figures."""
    spent: Counter[str] = Counter()
    originals = [(owner, name, getattr(owner, name)) for owner, name, _ in IN_RUN_PARTS]

    def timed(f, label):
        def call(*args, **kwargs):
            t = time.perf_counter()
            try:
                return f(*args, **kwargs)
            finally:
                spent[label] += time.perf_counter() - t
        return call

    for (owner, name, f), (_, _, label) in zip(originals, IN_RUN_PARTS):
        setattr(owner, name, timed(f, label))
    try:
        (folder / "timed").mkdir(exist_ok=True)
        _, run = bench_preflight(folder / "timed", seconds, 1, False, link=link)
    finally:
        for owner, name, f in originals:
            setattr(owner, name, f)
    return {label: 1e6 * spent[label] / run["cycles"] for *_, label in IN_RUN_PARTS}, run


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


def bench_components(log: Path, cycles: int, links: list[str]) -> dict[str, float]:
    """Medians in µs per cycle."""
    session = read_session(log)
    records = session.records[:cycles]
    arm = session.header.arm
    frames = [frame_from_wire(r.input) for r in records]
    out: dict[str, float] = {}

    cycle = ControlCycle(arm, load_pad("keyboard"), RunSettings(rate_hz=RATE_HZ))
    outs, out["control cycle"] = time_control_cycles(cycle, records, frames)
    busy = with_other_core_busy(lambda: time_control_cycles(
        ControlCycle(arm, load_pad("keyboard"), RunSettings(rate_hz=RATE_HZ)), records,
        frames)[1])
    if busy is not None:
        out["control cycle, the other core busy (pure Python loop)"] = busy

    times = []
    with tempfile.TemporaryDirectory() as tmp, \
            SessionRecorder.start(Path(tmp) / "b.jwlog", arm, {"rate_hz": RATE_HZ},
                                  queue_size=1 << 16, encode_in_caller=True) as recorder:
        trace = TraceBuilder(arm, arm.home(), np.zeros(arm.n), capacity=len(records))
        cycles, commanded = CycleColumns(), []
        for k, (rec, frame, o) in enumerate(zip(records, frames, outs)):
            t = time.perf_counter_ns()
            cycles.add(k, rec.t_s, frame, o, rec.q, state_age_s=0.0, overrun_streak=0,
                       period_s=1 / RATE_HZ, compute_s=0.0, overrun=False)
            commanded.append(preflight_run._commanded_twist(o))
            if len(cycles) == preflight_run.BLOCK_CYCLES:
                preflight_run._hand_over(cycles, commanded, recorder, trace)
            trace.add_state(rec.q, rec.rates, cycle=k)
            times.append(time.perf_counter_ns() - t)
    # The mean: a block is gathered and packed every 256 cycles, which a median would not see
    out["bookkeeping (cycle kept, block gathered + packed, trace; mean)"] = \
        statistics.fmean(times) / 1e3

    rates = np.array([r.rates for r in records])
    for link in links:
        times = []
        with LockstepSim(ARM, arm, rate_hz=RATE_HZ, step_hz=STEP_HZ, link=link) as sim:
            for k in range(len(records)):
                t = time.perf_counter_ns()
                sim.step(rates[k])
                times.append(time.perf_counter_ns() - t)
        out[f"lockstep exchange ({link} + child)"] = statistics.median(times) / 1e3

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

    for link in links:
        for name, value in link_ops(arm, link, len(records)).items():
            out[f"{link}: {name}"] = value
    for link in links:
        out[f"{link} round trip (bare)"] = link_round_trip(link, len(records))
        out[f"{link} round trip, 60 µs of work each side, less the work"] = \
            link_round_trip(link, len(records), 6e-5)
    out["socket round trip (bare ZeroMQ)"] = echo_round_trip(len(records))
    return out


def time_control_cycles(cycle: ControlCycle, records, frames) -> tuple[list, float]:
    """The cycle's outputs on the recorded poses, and its median µs."""
    outs, times = [], []
    for rec, frame in zip(records, frames):
        q = np.array(rec.q)
        t = time.perf_counter_ns()
        outs.append(cycle.step(frame, rec.t_s, q, rec.t_s))
        times.append(time.perf_counter_ns() - t)
    return outs, statistics.median(times) / 1e3


def with_other_core_busy(measure):
    """measure() with this process on one core and a busy loop on another (None on a
    machine with fewer than two cores, or without affinity control). In a lag-1 run the
    two sides work at once, one on each core: this is what a core's speed is then, when
    the two share more than memory (hyperthreads of one physical core, a virtual machine's
    vCPUs on a busy host, a shared clock limit)."""
    if not hasattr(os, "sched_setaffinity") or len(os.sched_getaffinity(0)) < 2:
        return None
    mine = os.sched_getaffinity(0)
    here, there = sorted(mine)[:2]
    neighbour = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        os.sched_setaffinity(0, {here})
        os.sched_setaffinity(neighbour.pid, {there})
        time.sleep(0.2)                      # the neighbour past its start
        return measure()
    finally:
        neighbour.kill()
        neighbour.wait()
        os.sched_setaffinity(0, mine)


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
        out = [(PIPE_PEER, decode_packed(m, self.n_joints) if m[:1] == bytes((MARK,))
                else decode(m, n_joints=self.n_joints)) for m in self.inbox]
        self.inbox = []
        return out

    def send(self, peer: bytes, msg) -> str:
        encode_packed(msg, self.n_joints) if packs(msg) else encode(msg)
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
            link.inbox.append(encode_packed(Rates(seq=k + 1, t_ns=time.monotonic_ns(),
                                                  qd=rates[k]), arm.n))
            t = time.perf_counter_ns()
            endpoint.cycle_lockstep(0.0)
            times.append(time.perf_counter_ns() - t)
    return statistics.median(times) / 1e3


def link_ops(arm, link: str, n: int) -> dict[str, float]:
    """Median µs of each side's own message handling per cycle, both ends in this process
    (nothing waits): here the rates encoded and sent and the state taken and decoded; at
    the arm side the rates taken and decoded and the state encoded and sent."""
    ours, child_ends = child_link(link)
    client = PipeClient(ours, hello=hello_for(arm, "runtime", stale_after_s=3600.0))
    server = PipeServer(arm_side_channel(link_spec(*child_ends)), n_joints=arm.n)
    state = State(seq=1, t_ns=1, q=tuple(arm.home().tolist()), qd=(0.0,) * arm.n,
                  applied_seq=1, echo_ns=0, status="tracking")
    qd = np.full(arm.n, 0.1)
    names = ("here: rates encoded and sent", "arm side: rates taken and decoded",
             "arm side: state encoded and sent", "here: state taken and decoded")
    times = {name: [] for name in names}
    clock = time.perf_counter_ns
    try:
        for k in range(n):
            t0 = clock()
            client.send(Rates(seq=k + 1, t_ns=k, qd=qd))
            t1 = clock()
            server.drain()
            t2 = clock()
            server.send(PIPE_PEER, state)
            t3 = clock()
            client.messages()
            t4 = clock()
            for name, t in zip(names, (t1 - t0, t2 - t1, t3 - t2, t4 - t3)):
                times[name].append(t)
            if link == "shm" and k % 1000 == 999:   # the bells nobody waited for
                server.poll(0.0)
                client.poll(0.0)
    finally:
        client.close()
        server.close()
    return {name: statistics.median(t) / 1e3 for name, t in times.items()}


def link_round_trip(link: str, n: int, work_s: float = 0.0) -> float:
    """Median µs of a 120-byte message to a child and back over a lockstep link's own
    channel code (`runtime.link.pipes.child_link`). With work_s, each side works that long
    between messages (busy, as the control cycle and the physics do), so a waiting side
    may have gone to sleep; the result is the round trip less the two work periods: what
    the hand-over costs."""
    channel, child_ends = child_link(link)
    child = subprocess.Popen([sys.executable, "-c", ECHO_CHILD, "link",
                              link_spec(*child_ends), repr(work_s)],
                             pass_fds=child_ends, env=child_env())
    for fd in child_ends:
        os.close(fd)
    payload = b"x" * 120
    times = []
    try:
        for _ in range(n):
            t = time.perf_counter_ns()
            channel.send(payload)
            while not channel.take():
                channel.poll(10.0)
            times.append(time.perf_counter_ns() - t - int(work_s * 1e9))
            busy = time.perf_counter()
            while time.perf_counter() - busy < work_s:
                pass
        channel.send(b"stop")
    finally:
        child.wait(timeout=10)
        channel.close()
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
    p.add_argument("--links", default="shm,pipe",
                   help="lockstep links to measure, the first being the one the "
                        "components and the rerun use (default shm,pipe)")
    p.add_argument("--cell", metavar="NAME", help="also run the lag-1 preflight in this "
                                                  "workcell (e.g. bench)")
    p.add_argument("--only-cell", action="store_true",
                   help="with --cell: only the workcell comparison")
    args = p.parse_args()
    links = args.links.split(",")
    if args.cell and args.only_cell:
        return bench_cell(args)
    print(f"load average at start: {load_average()}")
    runs = {}
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        for lag in (1, 0):
            for link in links:
                log, pre = bench_preflight(folder, args.seconds, lag,
                                           with_report=(lag, link) == (1, links[0]), link=link)
                runs[lag, link] = (log, pre)
                cycles = pre["cycles"]
                per_cycle = 1e6 * pre["run_s"] / cycles
                loop = 1e6 * pre["loop_s"] / cycles
                here_wait = 1e6 * pre["here_waited_s"] / cycles
                there_work = 1e6 * pre["child_worked_s"] / cycles
                print(f"preflight {ARM}, state lag {lag}, {link} link: {pre['motion_s']:.1f} s "
                      f"of motion, {cycles} cycles ({RATE_HZ:g} Hz, physics {STEP_HZ:g} Hz): "
                      f"run {pre['run_s']:.2f} s = {pre['motion_s'] / pre['run_s']:.2f}x real "
                      f"time ({per_cycle:.0f} µs per cycle); verdict {pre['verdict']}; "
                      f"load {load_average()}")
                print(f"    the loop alone {loop:.0f} µs a cycle (starting the child and the "
                      f"handshake: {pre['start_s']:.2f} s); per cycle here: working "
                      f"{loop - here_wait:.0f} µs, waiting for the state {here_wait:.0f} µs; "
                      f"in the child: working {there_work:.0f} µs, waiting or between "
                      f"messages {loop - there_work:.0f} µs")
        base = runs[1, links[0]][1]
        for link in links[1:]:
            for lag in (1, 0):
                speed = runs[lag, link][1]["run_s"] / runs[lag, links[0]][1]["run_s"]
                print(f"  lag {lag}: the {links[0]} link runs {speed:.2f}x as fast as the "
                      f"{link} link (same run)")
        print(f"  the HTML report of the lag-1 {links[0]} run: {base['report_s']:.2f} s")
        log = runs[1, links[0]][0]
        rerun = bench_rerun(log)
        print(f"replay --rerun (open loop): {rerun['motion_s']:.1f} s session, "
              f"{rerun['cycles']} cycles: read {rerun['read_s']:.2f} s, re-run "
              f"{rerun['rerun_s']:.2f} s = "
              f"{rerun['motion_s'] / (rerun['read_s'] + rerun['rerun_s']):.1f}x real time; "
              f"largest difference {rerun['largest_difference']:g}; load {load_average()}")
        parts = bench_components(log, args.cycles, links)
        in_run, run = bench_parts_in_run(folder, args.seconds, links[0])
    loop = 1e6 * run["loop_s"] / run["cycles"]
    print(f"the lag-1 {links[0]} run again, this process's parts timed inside it (µs per "
          f"cycle, wall; the loop {loop:.0f} µs a cycle with the timing; load "
          f"{load_average()}):")
    for name, value in in_run.items():
        print(f"  {name:<62} {value:8.1f}")
    rest = loop - sum(v for name, v in in_run.items() if not name.startswith(" "))
    print(f"  {'the rest (the loop itself, progress, contacts)':<62} {rest:8.1f}")
    print(f"one preflight cycle, its parts (medians, µs; load {load_average()}):")
    for name, value in parts.items():
        print(f"  {name:<62} {value:8.1f}")
    period = 1e6 / RATE_HZ
    here = parts["control cycle"] + \
        parts["bookkeeping (cycle kept, block gathered + packed, trace; mean)"]
    there = parts["arm side's work per message, in process"]
    exchange = parts[f"lockstep exchange ({links[0]} + child)"]
    print(f"  work per cycle: here (control cycle + bookkeeping) {here:.0f} µs, at the arm "
          f"side {there:.0f} µs")
    print(f"  one after the other (lag 0: this work plus an exchange with the child) bounds "
          f"it at {period / (here + exchange):.1f}x real time; side by side (lag 1) the "
          f"slower side's work at {period / max(here, there):.1f}x")
    busy = parts.get("control cycle, the other core busy (pure Python loop)")
    if busy is not None:
        # One sample, not a bound: on a shared host the machine's own speed varies more
        # than this from minute to minute (benchmarks/RESULTS.md, issue 17 section).
        print(f"  the control cycle took {busy / parts['control cycle']:.2f}x as long with a "
              f"busy loop on the other core (one sample; it varies from run to run)")
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
