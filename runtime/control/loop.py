"""Fixed-rate cycle runner with live timing statistics; clock and sleep injected.

The loop knows nothing about inputs, solvers or sockets: it calls `body(tick)` once per
period and keeps time. The drive command composes input → mapping → safety → solver → wire
→ recorder inside that body.

Timing. Cycle k is due at t0 + k·T (a fixed grid, so errors do not accumulate). The wait
sleeps until `spin_s` before the deadline, then spins on the clock: `time.sleep` overshoots
by tens of microseconds on a loaded machine, a short spin absorbs that at a small CPU cost
(REFERENCES §10: ≈70 µs median overshoot; sleep + ~300 µs spin hits deadlines within µs).

Overruns. A cycle overruns when it ends after the next deadline. The loop does not try to
catch up with a burst of back-to-back cycles: it skips to the first grid slot still in the
future, counts the deadlines it skipped, and extends the overrun streak (consecutive
overrunning cycles), which the safety gate turns into a stop of motion when it gets long.

Statistics of the last `window_s` seconds (period = start-to-start, compute = body time,
lateness = start − deadline) sit in a bounded ring; counters cover the whole run.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np


class Tick(NamedTuple):
    """What the body learns about its cycle. Times are clock readings in seconds."""

    index: int  # type: ignore[assignment]  # cycle number, from 0 (shadows tuple.index)
    deadline_s: float      # when this cycle was due
    start_s: float         # when it started
    period_s: float        # nominal period T = 1/rate
    overrun_streak: int    # consecutive overrunning cycles just before this one


@dataclass(frozen=True)
class TimingStats:
    """Timing of a loop: percentiles over the recent window, counters over the whole run."""

    rate_hz: float
    cycles: int
    overruns: int              # cycles that ended after the next deadline
    missed_deadlines: int      # grid slots skipped because of overruns
    overrun_streak: int        # current run of consecutive overruns
    max_overrun_streak: int
    window: int                # samples the percentiles below are taken over
    period_p50_s: float
    period_p99_s: float
    period_max_s: float
    compute_p50_s: float
    compute_p99_s: float
    compute_max_s: float
    late_p50_s: float
    late_p99_s: float
    late_max_s: float

    @property
    def overrun_fraction(self) -> float:
        return self.overruns / self.cycles if self.cycles else 0.0

    def line(self) -> str:
        """One line for a terminal or a log."""
        ms = 1e3
        return (f"{self.rate_hz:.0f} Hz  period p50 {self.period_p50_s * ms:.3f} "
                f"p99 {self.period_p99_s * ms:.3f} max {self.period_max_s * ms:.3f} ms  "
                f"compute p50 {self.compute_p50_s * ms:.3f} p99 {self.compute_p99_s * ms:.3f} ms  "
                f"overruns {self.overruns} ({100 * self.overrun_fraction:.2f} %)")


class TimingRing:
    """Bounded ring of per-cycle samples (s) and the run's counters."""

    def __init__(self, rate_hz: float, size: int) -> None:
        self.rate_hz = rate_hz
        self._period = np.zeros(size)
        self._compute = np.zeros(size)
        self._late = np.zeros(size)
        self._n = 0           # samples written (the ring holds the last min(n, size))
        self._periods = 0     # period samples exclude the first cycle (it has no predecessor)
        self.cycles = 0
        self.overruns = 0
        self.missed_deadlines = 0
        self.streak = 0
        self.max_streak = 0

    def record(self, period_s: float | None, compute_s: float, late_s: float, overran: bool,
               missed: int) -> None:
        i = self._n % len(self._compute)
        self._compute[i] = compute_s
        self._late[i] = late_s
        self._period[i] = math.nan if period_s is None else period_s
        self._n += 1
        self.cycles += 1
        if overran:
            self.overruns += 1
            self.missed_deadlines += missed
            self.streak += 1
            self.max_streak = max(self.max_streak, self.streak)
        else:
            self.streak = 0

    def snapshot(self) -> TimingStats:
        """Percentiles over the ring (safe to call from another thread: reads copies)."""
        k = min(self._n, len(self._compute))
        compute, late, period = self._compute[:k].copy(), self._late[:k].copy(), \
            self._period[:k].copy()
        period = period[~np.isnan(period)]

        def pct(a: np.ndarray) -> tuple[float, float, float]:
            if a.size == 0:
                return 0.0, 0.0, 0.0
            p50, p99 = np.percentile(a, (50, 99))
            return float(p50), float(p99), float(a.max())

        p, c, lt = pct(period), pct(compute), pct(late)
        return TimingStats(rate_hz=self.rate_hz, cycles=self.cycles, overruns=self.overruns,
                           missed_deadlines=self.missed_deadlines, overrun_streak=self.streak,
                           max_overrun_streak=self.max_streak, window=k,
                           period_p50_s=p[0], period_p99_s=p[1], period_max_s=p[2],
                           compute_p50_s=c[0], compute_p99_s=c[1], compute_max_s=c[2],
                           late_p50_s=lt[0], late_p99_s=lt[1], late_max_s=lt[2])


class FixedRateLoop:
    """Calls `body(tick)` at `rate_hz` until stopped, the body returns False, or a limit.

    clock: monotonic seconds (default time.perf_counter); sleep: seconds → None.
    spin_s: how long before a deadline sleeping stops and spinning starts.
    window_s: how much recent history the percentile statistics cover.
    """

    def __init__(self, rate_hz: float, *, clock: Callable[[], float] = time.perf_counter,
                 sleep: Callable[[float], None] = time.sleep, spin_s: float = 3e-4,
                 window_s: float = 10.0) -> None:
        if not (math.isfinite(rate_hz) and rate_hz > 0):
            raise ValueError(f"rate_hz must be a positive number, got {rate_hz}")
        if spin_s < 0 or window_s <= 0:
            raise ValueError("spin_s must be ≥ 0 and window_s > 0")
        self.rate_hz = float(rate_hz)
        self.period_s = 1.0 / self.rate_hz
        self._clock = clock
        self._sleep = sleep
        self.spin_s = spin_s
        self._ring = TimingRing(self.rate_hz, max(16, math.ceil(window_s * self.rate_hz)))
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.error: BaseException | None = None

    def stop(self) -> None:
        """Ask the loop to end after the current cycle (any thread)."""
        self._stop.set()

    @property
    def stopping(self) -> bool:
        return self._stop.is_set()

    def stats(self) -> TimingStats:
        return self._ring.snapshot()

    def run(self, body: Callable[[Tick], bool | None], *, duration_s: float | None = None,
            max_cycles: int | None = None) -> TimingStats:
        """Run cycles until `stop()`, `body` returns False, `duration_s` of grid time or
        `max_cycles` cycles; return the final statistics."""
        T, ring, clock = self.period_s, self._ring, self._clock
        end_slot = math.inf if duration_s is None else round(duration_s * self.rate_hz)
        t0 = clock()
        slot = 0
        prev_start: float | None = None
        done = 0
        while not self._stop.is_set() and slot < end_slot and \
                (max_cycles is None or done < max_cycles):
            deadline = t0 + slot * T
            self._wait_until(deadline)
            start = clock()
            keep = body(Tick(index=done, deadline_s=deadline, start_s=start, period_s=T,
                             overrun_streak=ring.streak))
            end = clock()
            # Next slot: the first grid point after `end` (no catch-up burst).
            late_by = end - deadline
            skipped = math.floor(late_by / T) if late_by > T else 0
            ring.record(None if prev_start is None else start - prev_start, end - start,
                        start - deadline, overran=skipped > 0, missed=skipped)
            prev_start = start
            slot += 1 + skipped
            done += 1
            if keep is False:
                break
        return ring.snapshot()

    def start(self, body: Callable[[Tick], bool | None], *, duration_s: float | None = None,
              max_cycles: int | None = None, name: str = "jogwire-control"
              ) -> threading.Thread:
        """Run the loop in its own thread (the status window keeps the main thread).

        An exception from the body ends the loop and is kept in `error`; `join` re-raises it.
        """
        def target() -> None:
            try:
                self.run(body, duration_s=duration_s, max_cycles=max_cycles)
            except BaseException as exc:  # handed to the thread that joins
                self.error = exc

        self.error = None
        self._thread = threading.Thread(target=target, name=name)
        self._thread.start()
        return self._thread

    def join(self, timeout_s: float | None = None) -> TimingStats:
        """Wait for a loop started with `start`; re-raise what ended it, if anything."""
        if self._thread is not None:
            self._thread.join(timeout_s)
        if self.error is not None:
            raise self.error
        return self.stats()

    def _wait_until(self, deadline: float) -> None:
        wait_until(deadline, self._clock, self._sleep, self.spin_s)


def wait_until(deadline: float, clock: Callable[[], float],
               sleep: Callable[[float], None] = time.sleep, spin_s: float = 3e-4) -> None:
    """Sleep until `spin_s` before `deadline` (s on `clock`), then spin on the clock to it."""
    remaining = deadline - clock()
    if remaining > spin_s:
        sleep(remaining - spin_s)
    while clock() < deadline:
        pass
