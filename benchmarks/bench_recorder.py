"""Session recorder: what it costs the control loop, how fast it writes and reads, and
how large the logs are.

Measurements, each beside a reference taken in the same run:

  size       the headless demo session (`jogwire drive --headless`, elbow6, 500 Hz): bytes
             per cycle and MB per hour in format 2; reference: the same cycles written in
             format 1 (goal: ≤ 100 MB per hour)
  record()   per-call time on the loop's side, paced at 500 Hz while the writer thread
             runs; reference: encoding the same record in the loop instead
             (to_wire + encode_frame), which is what record() avoids
  writer     records/s from a burst of handed-over records to a closed file, formats 2
             and 1; reader records/s for each file
  loop       a 500 Hz sleep-then-spin loop with a small numpy solve per cycle, run without
             and with a recorder (format 2, and format 1): wake-up lateness p50/p99/max and
             cycles late by more than 0.5 ms / a whole period (an overrun). The writer's
             Python work holds the GIL, so this is the recorder's real cost to the loop.

Run from the repository root (about a minute):

    python benchmarks/bench_recorder.py [--seconds S] [--no-demo]
"""

from __future__ import annotations

import argparse
import glob
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runtime.arm.model import load_arm  # noqa: E402
from runtime.sessions.log_schema import CycleRecord  # noqa: E402
from runtime.sessions.log_reader import SessionReader, read_session  # noqa: E402
from runtime.sessions.log_writer import SessionRecorder, encode_frame  # noqa: E402

RATE_HZ = 500
PERIOD_S = 1.0 / RATE_HZ


def make_record(i: int, q: np.ndarray, rates: np.ndarray) -> CycleRecord:
    """A 6-joint cycle as the drive loop would hand it over (6 axes, 12 buttons)."""
    return CycleRecord(
        cycle=i, t_s=i * PERIOD_S, axes=(0.12, -0.5, 0.0, 0.9, -1.0, 0.0),
        buttons=(True,) + (False,) * 11, enabled=True, enable_reason="held",
        twist=(0.1, -0.05, 0.02, 0.0, 0.1, -0.2), frame="tool", q=tuple(q.tolist()),
        rates=tuple(rates.tolist()), damping=0.012, sigma_min=0.081, manipulability=0.0213,
        achieved_twist=(0.0999, -0.0501, 0.0199, 0.0, 0.1, -0.2), tracking_error=2.1e-4,
        scales={"speed": 1.0, "position": 0.93, "accel": 1.0, "tcp": 1.0},
        binding_limit="position", period_s=0.00201, compute_s=0.00012, overrun=False)


def records(n: int) -> list[CycleRecord]:
    rng = np.random.default_rng(3)
    return [make_record(i, rng.uniform(-2, 2, 6), rng.uniform(-1, 1, 6)) for i in range(n)]


def pct(a: np.ndarray, p: float) -> float:
    return float(np.percentile(a, p))


def wait_until(deadline: float) -> float:
    """Sleep to 0.3 ms before the deadline, then spin; returns the wake-up time."""
    clock = time.perf_counter
    rest = deadline - clock() - 0.0003
    if rest > 0:
        time.sleep(rest)
    while (now := clock()) < deadline:
        pass
    return now


def bench_record_call(folder: Path, seconds: float) -> None:
    n = int(seconds * RATE_HZ)
    recs = records(n)
    rec = SessionRecorder.start(folder / "call.jwlog", load_arm("elbow6"), {"rate_hz": RATE_HZ})
    ours = np.empty(n)
    inline = np.empty(n)
    clock = time.perf_counter_ns
    deadline = time.perf_counter()
    for i, r in enumerate(recs):
        deadline += PERIOD_S
        wait_until(deadline)
        t0 = clock()
        rec.record(r)
        t1 = clock()
        encode_frame(r.to_wire())          # the reference: encoding in the loop instead
        t2 = clock()
        ours[i], inline[i] = (t1 - t0) / 1e3, (t2 - t1) / 1e3
    stats = rec.close()
    print(f"record() on the loop's side, {n} calls at {RATE_HZ} Hz "
          f"(written {stats.written}, dropped {stats.dropped}):")
    print(f"  record()                    median {np.median(ours):6.2f} µs  "
          f"p99 {pct(ours, 99):6.2f} µs  max {ours.max():7.1f} µs")
    print(f"  encode in the loop instead  median {np.median(inline):6.2f} µs  "
          f"p99 {pct(inline, 99):6.2f} µs  max {inline.max():7.1f} µs")
    print(f"  ratio of medians            {np.median(inline) / np.median(ours):.1f}x")


def bench_demo_size(folder: Path) -> None:
    """The headless demo session, and the same cycles rewritten in format 1."""
    sessions = folder / "demo"
    env = dict(os.environ, SDL_VIDEODRIVER="dummy", SDL_AUDIODRIVER="dummy",
               PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    subprocess.run([sys.executable, "-m", "runtime.cli", "drive", "--headless", "--sessions",
                    str(sessions)], check=True, capture_output=True, env=env)
    (log,) = glob.glob(str(sessions / "*.jwlog"))
    s = read_session(log)
    v1 = folder / "demo-v1.jwlog"
    with SessionRecorder.start(v1, s.header.arm, s.header.settings, format_version=1,
                               queue_size=len(s.records) + 1) as rec:
        for r in s.records:
            rec.record(r)
    n = len(s.records)
    print(f"headless demo session: {n} cycles ({n / RATE_HZ:.1f} s at {RATE_HZ} Hz), "
          f"load average {os.getloadavg()[0]:.2f}")
    for label, path in (("format 2", Path(log)), ("format 1 (reference)", v1)):
        size = os.path.getsize(path)
        print(f"  {label:<22} {size / n:6.1f} bytes per cycle  "
              f"{size / n * RATE_HZ * 3600 / 1e6:7.0f} MB per hour")


def bench_throughput(folder: Path, n: int) -> None:
    recs = records(n)
    arm = load_arm("elbow6")
    print(f"writer and reader, {n} records (load average {os.getloadavg()[0]:.2f}):")
    for version in (2, 1):
        path = folder / f"burst-{version}.jwlog"
        t0 = time.perf_counter()
        rec = SessionRecorder.start(path, arm, {}, queue_size=n, flush_interval_s=0.05,
                                    format_version=version)
        for r in recs:
            rec.record(r)
        stats = rec.close(timeout_s=120)
        write_s = time.perf_counter() - t0
        assert stats.written == n and stats.failed is None
        t0 = time.perf_counter()
        with SessionReader(path) as reader:
            count = sum(1 for _ in reader)
        read_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        with SessionReader(path) as reader:
            columns = sum(b.n for b in reader.blocks())
        columns_s = time.perf_counter() - t0
        assert count == columns == n
        size = os.path.getsize(path)
        print(f"  format {version}: {size / n:5.0f} bytes per record; writer (hand over → "
              f"closed) {n / write_s:8.0f} records/s ({n / write_s / RATE_HZ:.0f}x a "
              f"{RATE_HZ} Hz loop); reader: records {n / read_s:8.0f}/s, columns "
              f"{n / columns_s:9.0f}/s")


def run_loop(seconds: float, recorder: SessionRecorder | None) -> np.ndarray:
    """A 500 Hz loop doing a small solve per cycle; returns wake-up lateness (µs)."""
    n = int(seconds * RATE_HZ)
    rng = np.random.default_rng(5)
    J = rng.normal(size=(6, 6))
    late = np.empty(n)
    q = np.zeros(6)
    deadline = time.perf_counter()
    for i in range(n):
        deadline += PERIOD_S
        woke = wait_until(deadline)
        late[i] = (woke - deadline) * 1e6
        v = rng.normal(size=6)
        rates = np.linalg.solve(J @ J.T + 1e-4 * np.eye(6), v)   # a DLS-sized solve
        q = q + rates * PERIOD_S
        if recorder is not None:
            recorder.record(make_record(i, q, rates))
    return late


def bench_loop(folder: Path, seconds: float) -> None:
    """Without and with a recorder, in interleaved one-second segments, so that the load
    other programs put on the machine falls on both alike."""
    print(f"{RATE_HZ} Hz loop, {seconds:g} s each, interleaved 1 s segments, "
          f"sys.getswitchinterval() = {sys.getswitchinterval() * 1e3:g} ms; wake-up lateness:")
    conditions = [("without recorder", None), ("recorder, flush 0.2 s", (0.2, 2)),
                  ("recorder, flush 0.05 s", (0.05, 2)), ("format 1, flush 0.2 s", (0.2, 1))]
    late: dict[str, list[np.ndarray]] = {label: [] for label, _ in conditions}
    k = 0
    for _ in range(max(1, round(seconds))):
        for label, how in conditions:
            rec = None
            if how is not None:
                k += 1
                rec = SessionRecorder.start(folder / f"loop-{k}.jwlog", load_arm("elbow6"), {},
                                            flush_interval_s=how[0], format_version=how[1])
            late[label].append(run_loop(1.0, rec))
            if rec is not None:
                rec.close()
    print(f"  (load average {os.getloadavg()[0]:.2f})")
    for label, parts in late.items():
        x = np.concatenate(parts)
        print(f"  {label:<24} p50 {np.median(x):6.1f} µs  p99 {pct(x, 99):7.1f} µs  "
              f"max {x.max():7.0f} µs  late >0.5 ms {np.sum(x > 500):4d}  "
              f"overruns (>1 period) {np.sum(x > PERIOD_S * 1e6):3d} of {len(x)}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=5.0,
                        help="length of each paced run (default 5)")
    parser.add_argument("--burst", type=int, default=50_000,
                        help="records in the throughput run (default 50000)")
    parser.add_argument("--no-demo", action="store_true",
                        help="skip the demo session's size (it runs `jogwire drive`, ~12 s)")
    args = parser.parse_args()
    print(f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f}")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        if not args.no_demo:
            bench_demo_size(folder)
            print()
        bench_record_call(folder, args.seconds)
        print()
        bench_throughput(folder, args.burst)
        print()
        bench_loop(folder, args.seconds)


if __name__ == "__main__":
    main()
