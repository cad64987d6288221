"""The drive loop end to end: `jogwire drive` at 250, 500 and 1000 Hz against the simulated
arm on loopback, headless, with scripted input that keeps the arm moving.

Each run is the real command (`python -m runtime.cli drive --headless --input script:…
--rate R --duration S --target …`): input, mapping, safety gate, the real solver and limits,
rates over ZeroMQ, states back, the session recorder. The simulated arm (`sim.arm elbow6`,
paced at 1 kHz) is started by this script so that an observer here can take every state it
sends (role "observer"), timestamped on arrival. CLOCK_MONOTONIC is shared by all processes on
Linux, and the runtime stamps each rates message with its send time (`t_ns`, echoed back in
every state as `echo_ns`), so times taken in three processes can be subtracted.

Figures per rate, as shipped and with --realtime (the drive's threads under SCHED_FIFO), and
at 1 kHz also without the session recorder (median over rounds):

  loop       period p50 / p99 / max and wake-up lateness p99, from the drive's own timing
             statistics (every cycle of the run); overruns = cycles that ended after the next
             deadline, as a fraction of cycles
  reference  a bare `FixedRateLoop` with an empty body at the same rate in its own process,
             beside the same simulated arm, in the same round: what the machine allows a
             Python sleep-then-spin loop at that moment
  latency    read → send: input read to rates on the wire, inside the drive (its summary,
             log-binned to 2.3 %); send → applied: rates sent to the end of the arm-side step
             that used them (the first state whose applied_seq is that message, its t_ns −
             echo_ns); round trip: rates sent → that state at a reader that waits for it
             (observer arrival − echo_ns); loop round trip: the same as the drive's loop sees
             it, at its next cycle (includes up to one period of waiting).
             Input-to-target = read → send + send → applied (p50 + p50; p99 + p99 is an upper
             bound of the p99). The arm side cannot report when the rates reached its socket,
             only when its step applied them, so this includes the wait for the next 1 ms step.

Run from the repository root (headless; 2 rounds of 7 runs × 10 s and 3 × 5 s ≈ 4 min; the
realtime rows need CAP_SYS_NICE, else they say "refused" and run at normal priority):

    python benchmarks/bench_loop.py [--seconds 10] [--reference-seconds 5] [--rounds 2]
                                    [--recorder-only]

The last lines compare 1 kHz realtime with and without the recorder (overruns and the
loop's wake-up lateness, same rounds); `--recorder-only` runs just those two.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import zmq

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runtime.link.arm_process import ArmProcess, child_env  # noqa: E402
from runtime.arm.model import load_arm  # noqa: E402
from runtime.link.protocol import State, decode, hello_for  # noqa: E402
from runtime.link.transport import ArmClient  # noqa: E402

ARM = "elbow6"
RATES_HZ = (250.0, 500.0, 1000.0)
# (label, drive options): every rate runs as shipped and with --realtime (SCHED_FIFO for the
# drive's threads; needs CAP_SYS_NICE), and 1 kHz once more without the session recorder.
VARIANTS = [(f"{rate:g} Hz", rate, []) for rate in RATES_HZ] + \
    [(f"{rate:g} Hz realtime", rate, ["--realtime"]) for rate in RATES_HZ] + \
    [("1000 Hz realtime, no recorder", 1000.0, ["--realtime", "--no-record"])]
# A 5 cm square at 5 cm/s, corners without a pause, long enough for any run: the solver
# works on every cycle of the measurement.
SCRIPT = """
name = "bench_square"
lead_in_s = 0.3
repeat = 10
[[segment]]
duration_s = 1.0
twist = [0.05, 0, 0, 0, 0, 0]
[[segment]]
duration_s = 1.0
twist = [0, 0.05, 0, 0, 0, 0]
[[segment]]
duration_s = 1.0
twist = [-0.05, 0, 0, 0, 0, 0]
[[segment]]
duration_s = 1.0
twist = [0, -0.05, 0, 0, 0, 0]
"""

REFERENCE = """
import json, sys
sys.path.insert(0, {root!r})
from runtime.control.loop import FixedRateLoop
stats = FixedRateLoop({rate}, window_s={seconds} + 1).run(lambda tick: None, duration_s={seconds})
print(json.dumps({{"period_p50_s": stats.period_p50_s, "period_p99_s": stats.period_p99_s,
                  "period_max_s": stats.period_max_s, "late_p99_s": stats.late_p99_s,
                  "overrun_fraction": stats.overrun_fraction, "cycles": stats.cycles}}))
"""


class Observer:
    """Every state the arm side sends, with its arrival time (ns, CLOCK_MONOTONIC)."""

    def __init__(self, endpoint: str, arm) -> None:
        self.client = ArmClient(endpoint, hello=hello_for(arm, "observer", stale_after_s=0.1))
        self.client.handshake()
        self.n = arm.n
        self.rows: list[tuple[int, int, int, int]] = []   # arrival, applied_seq, echo, t_ns
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        sock = self.client.socket
        while not self._stop.is_set():
            if not sock.poll(50):
                continue
            while True:
                try:
                    frames = sock.recv_multipart(zmq.NOBLOCK)
                except zmq.Again:
                    break
                arrival = time.monotonic_ns()
                msg = decode(frames[0], n_joints=self.n)
                if isinstance(msg, State) and msg.applied_seq:
                    self.rows.append((arrival, msg.applied_seq, msg.echo_ns, msg.t_ns))

    def take(self) -> list[tuple[int, int, int, int]]:
        rows, self.rows = self.rows, []
        return rows

    def close(self) -> None:
        self._stop.set()
        self._thread.join()
        self.client.close()


def first_application(rows, since_ns: int) -> tuple[np.ndarray, np.ndarray]:
    """Per rates message sent after since_ns: (send → applied, send → state at a reader), s.
    Only the first state that reports each applied_seq counts."""
    applied, back, seen = [], [], set()
    for arrival, seq, echo, t_ns in rows:
        if seq in seen or echo < since_ns:
            continue
        seen.add(seq)
        applied.append((t_ns - echo) * 1e-9)
        back.append((arrival - echo) * 1e-9)
    return np.array(applied), np.array(back)


def run_drive(endpoint: str, script: Path, rate: float, options: list[str], seconds: float,
              workdir: Path) -> dict:
    summary = workdir / "summary.json"
    argv = [sys.executable, "-m", "runtime.cli", "drive", "--headless", "--arm", ARM,
            "--input", f"script:{script}", "--rate", f"{rate:g}", "--duration", f"{seconds:g}",
            "--target", endpoint, "--sessions", str(workdir / "sessions"),
            "--summary-json", str(summary), *options]
    env = child_env()
    env.update(SDL_VIDEODRIVER="dummy", SDL_AUDIODRIVER="dummy")
    done = subprocess.run(argv, cwd=workdir, env=env, capture_output=True, text=True,
                          timeout=seconds + 60)
    if done.returncode != 0:
        raise RuntimeError(f"drive failed ({done.returncode}):\n{done.stdout}\n{done.stderr}")
    return json.loads(summary.read_text(encoding="utf-8"))


def run_reference(rate: float, seconds: float) -> dict:
    code = REFERENCE.format(root=str(ROOT), rate=rate, seconds=seconds)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=seconds + 30, check=True)
    return json.loads(done.stdout)


def pct(a: np.ndarray, p: float) -> float:
    return float(np.percentile(a, p)) if len(a) else float("nan")


def one_round(endpoint: str, observer: Observer, script: Path, variants, seconds: float,
              ref_seconds: float, workdir: Path) -> dict[str, dict]:
    out = {}
    refs = {}
    for label, rate, options in variants:
        observer.take()
        start_ns = time.monotonic_ns()
        m = run_drive(endpoint, script, rate, options, seconds, workdir)
        applied, back = first_application(observer.take(), start_ns)
        if rate not in refs:       # the bare loop, right after the first run at this rate
            refs[rate] = run_reference(rate, ref_seconds)
        ref = refs[rate]
        loop, link = m["loop"], m["link"]
        out[label] = {
            "cycles": m["cycles"],
            "period_p50": loop["period_p50_s"], "period_p99": loop["period_p99_s"],
            "period_max": loop["period_max_s"], "late_p50": loop["late_p50_s"],
            "late_p99": loop["late_p99_s"],
            "overruns": loop["overrun_fraction"], "compute_p50": loop["compute_p50_s"],
            "compute_p99": loop["compute_p99_s"],
            "moving_s": m["gate_time_s"].get("moving", 0.0),
            "ref_period_p99": ref["period_p99_s"], "ref_period_max": ref["period_max_s"],
            "ref_late_p99": ref["late_p99_s"], "ref_overruns": ref["overrun_fraction"],
            "read_send_p50": link["read_to_send"]["p50_s"],
            "read_send_p99": link["read_to_send"]["p99_s"],
            "applied_p50": pct(applied, 50), "applied_p99": pct(applied, 99),
            "back_p50": pct(back, 50), "back_p99": pct(back, 99),
            "loop_rtt_p50": link["round_trip"]["p50_s"],
            "loop_rtt_p99": link["round_trip"]["p99_s"],
            "applied_n": len(applied), "priority": m["thread_priority"],
        }
        r = out[label]
        print(f"  {label:30s} overruns {100 * r['overruns']:5.2f} % (reference "
              f"{100 * r['ref_overruns']:5.2f} %)  period p99 {r['period_p99'] * 1e3:6.3f} ms  "
              f"max {r['period_max'] * 1e3:6.2f} ms  wake-up late p50/p99 "
              f"{r['late_p50'] * 1e6:4.0f}/{r['late_p99'] * 1e6:5.0f} µs  send→applied p50 "
              f"{r['applied_p50'] * 1e3:5.2f} ms  load {os.getloadavg()[0]:.2f}", flush=True)
    return out


RECORDER_PAIR = ("1000 Hz realtime", "1000 Hz realtime, no recorder")


def recorder_cost(rounds: list[dict[str, dict]]) -> None:
    """The session recorder's cost to a 1 kHz realtime loop: the same run with and without
    it, in the same rounds (goal: overruns < 0.1 % and within 2x of the run without)."""
    with_, without = RECORDER_PAIR
    if not all(with_ in r and without in r for r in rounds):
        return
    m = lambda label, k: median_over(rounds, label, k)  # noqa: E731
    a, b = m(with_, "overruns"), m(without, "overruns")
    print(f"\nrecorder at 1 kHz realtime: overruns {100 * a:.3f} % with, {100 * b:.3f} % "
          f"without (ratio {a / b if b else float('inf'):.2f}); wake-up late p50 "
          f"{m(with_, 'late_p50') * 1e6:.0f} vs {m(without, 'late_p50') * 1e6:.0f} µs, p99 "
          f"{m(with_, 'late_p99') * 1e6:.0f} vs {m(without, 'late_p99') * 1e6:.0f} µs")


def median_over(rounds: list[dict[str, dict]], label: str, key: str) -> float:
    return float(np.median([r[label][key] for r in rounds]))


def report(rounds: list[dict[str, dict]]) -> None:
    ms = 1e3
    print("\nmedians over rounds; priorities: " + "; ".join(
        sorted({f"{label}: {r[label]['priority']}" for r in rounds for label in r
                if "realtime" in label})))
    print("| loop | cycles | overruns | reference overruns | period p50 / p99 / max | "
          "reference period p99 / max | wake-up late p99 (ref.) | compute p50 / p99 |")
    print("|---|---|---|---|---|---|---|---|")
    labels = [label for label, _, _ in VARIANTS if label in rounds[0]]
    for label in labels:
        m = lambda k: median_over(rounds, label, k)  # noqa: E731
        print(f"| {label} | {m('cycles'):.0f} | {100 * m('overruns'):.2f} % | "
              f"{100 * m('ref_overruns'):.2f} % | {m('period_p50') * ms:.3f} / "
              f"{m('period_p99') * ms:.3f} / {m('period_max') * ms:.2f} ms | "
              f"{m('ref_period_p99') * ms:.3f} / {m('ref_period_max') * ms:.2f} ms | "
              f"{m('late_p99') * 1e6:.0f} µs ({m('ref_late_p99') * 1e6:.0f} µs) | "
              f"{m('compute_p50') * ms:.3f} / {m('compute_p99') * ms:.3f} ms |")
    print("\n| loop | read → send p50 / p99 | send → applied p50 / p99 | round trip (reader) "
          "p50 / p99 | loop round trip p50 / p99 | input → applied p50 / p99 (bound) |")
    print("|---|---|---|---|---|---|")
    for label in labels:
        m = lambda k: median_over(rounds, label, k)  # noqa: E731
        print(f"| {label} | {m('read_send_p50') * ms:.2f} / {m('read_send_p99') * ms:.2f} "
              f"ms | {m('applied_p50') * ms:.2f} / {m('applied_p99') * ms:.2f} ms | "
              f"{m('back_p50') * ms:.2f} / {m('back_p99') * ms:.2f} ms | "
              f"{m('loop_rtt_p50') * ms:.2f} / {m('loop_rtt_p99') * ms:.2f} ms | "
              f"{(m('read_send_p50') + m('applied_p50')) * ms:.2f} / "
              f"{(m('read_send_p99') + m('applied_p99')) * ms:.2f} ms |")


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--seconds", type=float, default=10.0, help="drive run per rate (s)")
    p.add_argument("--reference-seconds", type=float, default=5.0,
                   help="bare loop run per rate (s)")
    p.add_argument("--rounds", type=int, default=2)
    p.add_argument("--recorder-only", action="store_true",
                   help="only 1 kHz realtime with and without the session recorder")
    args = p.parse_args()
    variants = [v for v in VARIANTS if v[0] in RECORDER_PAIR] if args.recorder_only \
        else VARIANTS
    arm = load_arm(ARM)
    print(f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f}; Python "
          f"{sys.version.split()[0]}, numpy {np.__version__}")
    with tempfile.TemporaryDirectory(prefix="jogwire-bench-loop-") as tmp, \
            open(os.devnull, "w") as quiet, \
            ArmProcess("sim", ARM, ["--endpoint", "tcp://127.0.0.1:*"], stderr=quiet) as sim:
        workdir = Path(tmp)
        script = workdir / "bench_square.toml"
        script.write_text(SCRIPT, encoding="utf-8")
        observer = Observer(sim.endpoint, arm)
        rounds = []
        try:
            for k in range(args.rounds):
                order = variants if k % 2 == 0 else variants[::-1]   # alternate the order
                print(f"round {k + 1}:", flush=True)
                rounds.append(one_round(sim.endpoint, observer, script, order, args.seconds,
                                        args.reference_seconds, workdir))
        finally:
            observer.close()
    report(rounds)
    recorder_cost(rounds)
    print(f"\nload average at the end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
