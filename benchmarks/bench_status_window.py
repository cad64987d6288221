"""Status window: what a frame costs, and what drawing it on the main thread costs a control
loop running in another thread of the same process.

Two measurements:

  draw     time of one `draw_status` frame per shipped arm (median, p99, ms), against the
           reference of a plain full-window blit in the same run.
  loop     a 500 Hz (--rate) `FixedRateLoop` in a thread, its body one real `solver.solve` per cycle
           (plus publishing a snapshot now and then), while the main thread either waits
           (the reference) or runs `StatusWindow.run` at 30 Hz under the dummy video driver:
           as shipped (GIL handed over between the pieces of a frame, 0.2 ms switch
           interval) and without the hand-overs. Rounds of the variants alternate, so the
           machine's load hits all alike; medians over rounds of overrun fraction, wake-up
           lateness p99 and body time p50/p99.

Run from the repository root (headless is fine):

    SDL_VIDEODRIVER=dummy python benchmarks/bench_status_window.py [--seconds S] [--rounds R]
        [--rate HZ]
"""

from __future__ import annotations

import argparse
import os
import sys
import threading
import time
from pathlib import Path

os.environ.setdefault("SDL_VIDEODRIVER", "dummy")
os.environ.setdefault("SDL_AUDIODRIVER", "dummy")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runtime.arm.load import load_arm  # noqa: E402
from runtime.control.loop import FixedRateLoop, TimingStats  # noqa: E402
from runtime.control.solver import solve  # noqa: E402
from runtime.operator import status_window  # noqa: E402
from runtime.operator.inputs.pygame_init import pygame  # noqa: E402
from runtime.operator.status_window import SIZE, StatusSnapshot, StatusWindow, draw_status  # noqa: E402

ARMS = ("elbow6", "reach7", "scara4", "planar3")


def snapshot(arm, stats: TimingStats | None = None) -> StatusSnapshot:
    q = arm.home()
    return StatusSnapshot(arm=arm, q=q, rates=0.2 * arm.max_speed, twist=np.r_[0.05, 0, 0, 0, 0, 0],
                          allowed=True, gate_state="moving", gate_reason="enable held",
                          sigma_min=0.05, manipulability=0.01, damping=0.0, connected=True,
                          state_age_s=0.002, rtt_s=0.0005, timing=stats, elapsed_s=1.0)


def bench_draw(frames: int) -> None:
    surf = pygame.Surface(SIZE)
    plain = pygame.Surface(SIZE)
    print(f"draw: one frame, {frames} frames per arm (ms)")
    for name in ARMS:
        arm = load_arm(name)
        snap = snapshot(arm, FixedRateLoop(500).stats())
        draw_status(surf, snap)  # builds the cached background
        t_draw, t_blit = [], []
        for _ in range(frames):
            t0 = time.perf_counter()
            draw_status(surf, snap)
            t1 = time.perf_counter()
            surf.blit(plain, (0, 0))
            t2 = time.perf_counter()
            t_draw.append(t1 - t0)
            t_blit.append(t2 - t1)
        d, b = np.array(t_draw) * 1e3, np.array(t_blit) * 1e3
        print(f"  {name:8s} draw p50 {np.median(d):6.2f}  p99 {np.percentile(d, 99):6.2f}   "
              f"reference blit p50 {np.median(b):5.2f}   ratio {np.median(d) / np.median(b):5.1f}")


def loop_round(variant: str, seconds: float, rate_hz: float) -> TimingStats:
    arm = load_arm("elbow6")
    q = arm.home()
    twist = np.array([0.05, 0.0, 0.0, 0.0, 0.0, 0.1])
    loop = FixedRateLoop(rate_hz)
    latest = {"snap": snapshot(arm)}

    def body(tick) -> None:
        solve(arm, q, twist, dt_s=1.0 / rate_hz)
        latest["snap"] = snapshot(arm) if tick.index % 17 == 0 else latest["snap"]

    thread = threading.Thread(target=loop.run, args=(body,), kwargs={"duration_s": seconds})
    thread.start()
    if variant == "no window":
        thread.join()
    else:
        hand_over = status_window._yield_gil
        if variant == "window, no hand-overs":
            status_window._yield_gil = lambda: None
        try:
            window = StatusWindow()
            window.open()
            window.run(lambda: StatusSnapshot(**{**latest["snap"].__dict__,
                                                 "timing": loop.stats()}),
                       should_stop=lambda: not thread.is_alive())
            window.close()
        finally:
            status_window._yield_gil = hand_over
        thread.join()
    return loop.stats()


def bench_loop(seconds: float, rounds: int, rate_hz: float) -> None:
    variants = ("no window", "window (as shipped)", "window, no hand-overs")
    results: dict[str, list[TimingStats]] = {v: [] for v in variants}
    for _ in range(rounds):
        for v in variants:
            results[v].append(loop_round(v, seconds, rate_hz))
    print(f"\nloop: {rate_hz:.0f} Hz, one solve per cycle, {rounds} rounds × {seconds:.0f} s "
          "per variant "
          f"(medians over rounds)")
    for v in variants:
        rs = results[v]
        over = np.median([r.overrun_fraction for r in rs]) * 100
        late = np.median([r.late_p99_s for r in rs]) * 1e3
        comp = np.median([r.compute_p99_s for r in rs]) * 1e3
        comp50 = np.median([r.compute_p50_s for r in rs]) * 1e3
        print(f"  {v:24s} overruns {over:6.2f} %   late p99 {late:6.3f} ms   "
              f"body p50 {comp50:5.3f} p99 {comp:6.3f} ms")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=3.0)
    ap.add_argument("--rounds", type=int, default=4)
    ap.add_argument("--frames", type=int, default=200)
    ap.add_argument("--rate", type=float, default=500.0, help="control loop rate, Hz")
    args = ap.parse_args()
    bench_draw(args.frames)
    bench_loop(args.seconds, args.rounds, args.rate)


if __name__ == "__main__":
    main()
