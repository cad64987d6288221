"""Session recorder: what it costs the control loop, and how fast it writes and reads.

Three measurements, each beside a reference taken in the same run:

  record()   per-call time on the loop's side, paced at 500 Hz while the writer thread
             runs; reference: encoding the same record in the loop instead
             (to_wire + encode_frame), which is what record() avoids
  writer     records/s from a burst of handed-over records to a closed file; reference:
             encoding alone. Reader records/s for the same file.
  loop       a 500 Hz sleep-then-spin loop with a small numpy solve per cycle, run without
             and with a recorder: wake-up lateness p50/p99/max and cycles late by more
             than 0.5 ms / a whole period (an overrun). The writer's Python work holds the
             GIL, so this is the recorder's real cost to the loop.

Run from the repository root:

    python benchmarks/bench_recorder.py [--seconds S]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runtime.arm.load import load_arm  # noqa: E402
from runtime.sessions.recorder import CycleRecord, SessionReader, SessionRecorder, encode_frame  # noqa: E402

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


def bench_throughput(folder: Path, n: int) -> None:
    recs = records(n)
    arm = load_arm("elbow6")
    t0 = time.perf_counter()
    for r in recs:
        encode_frame(r.to_wire())
    encode_s = time.perf_counter() - t0

    path = folder / "burst.jwlog"
    t0 = time.perf_counter()
    rec = SessionRecorder.start(path, arm, {}, queue_size=n, flush_interval_s=0.05)
    for r in recs:
        rec.record(r)
    stats = rec.close(timeout_s=60)
    write_s = time.perf_counter() - t0
    assert stats.written == n and stats.failed is None

    t0 = time.perf_counter()
    with SessionReader(path) as reader:
        count = sum(1 for _ in reader)
    read_s = time.perf_counter() - t0
    assert count == n
    size = os.path.getsize(path)
    print(f"writer and reader, {n} records, {size / n:.0f} bytes per record "
          f"({size / n * RATE_HZ * 3600 / 1e9:.2f} GB per hour at {RATE_HZ} Hz):")
    print(f"  encode only (reference)     {n / encode_s:9.0f} records/s")
    print(f"  writer: hand over → closed  {n / write_s:9.0f} records/s  "
          f"({n / write_s / RATE_HZ:.0f}x a {RATE_HZ} Hz loop)")
    print(f"  reader (streaming)          {n / read_s:9.0f} records/s")


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
    conditions = [("without recorder", None), ("recorder, flush 0.2 s", 0.2),
                  ("recorder, flush 0.05 s", 0.05)]
    late: dict[str, list[np.ndarray]] = {label: [] for label, _ in conditions}
    k = 0
    for _ in range(max(1, round(seconds))):
        for label, interval in conditions:
            rec = None
            if interval is not None:
                k += 1
                rec = SessionRecorder.start(folder / f"loop-{k}.jwlog", load_arm("elbow6"), {},
                                            flush_interval_s=interval)
            late[label].append(run_loop(1.0, rec))
            if rec is not None:
                rec.close()
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
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        bench_record_call(folder, args.seconds)
        print()
        bench_throughput(folder, args.burst)
        print()
        bench_loop(folder, args.seconds)


if __name__ == "__main__":
    main()
