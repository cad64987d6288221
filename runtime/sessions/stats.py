"""One analysis of commanded motion for every reader of a run: accelerations and stops
(pure: arrays in, arrays out; no I/O, no clock).

`jogwire inspect`, `jogwire preflight` and the drive summary all judge a run's commanded
accelerations here, so the three agree on every peak and speak one vocabulary:

- A **commanded acceleration** is the change between two consecutive cycles' rates over
  the control period, or over the real time between them where that was shorter (a
  cycle that caught up after a late one): |q̇_k − q̇_{k−1}| / min(dt, t_k − t_{k−1}). That
  is what an arm applying each command on arrival sees, and the bound the limit layer
  keeps (runtime/control/limits.py, `acceleration_step`: |Δq̇_i| ≤ max_accel_i·step),
  so a session that kept its limits never shows a peak above max_accel, however the
  loop's timing jittered. Cycles missing from a log (a gap) pair with nothing.
- A **stop** is a cycle where motion was not allowed (enable released, stop pressed, the
  safety gate blocked, the link was lost) after a cycle that moved. jogwire sends zero at
  once and leaves the braking to the arm side (docs/SAFETY.md, "Stops"), so the step to
  zero is not an acceleration jogwire commanded: it is listed on its own, with the
  deceleration it asks of an arm that would follow it literally (`Stop.asked_decel`), and
  left out of the acceleration peaks.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

Vector = NDArray[np.float64]


ROUNDING = 1e-9
"""Relative allowance for rounding when a commanded peak is judged against a limit: a rate
stepped by exactly max_accel·dt comes back as an acceleration a few ulp off max_accel."""


def above(peak: float | None, limit: float) -> bool:
    """A commanded peak above a limit beyond rounding (None: nothing was commanded)."""
    return peak is not None and peak > limit * (1.0 + ROUNDING)


@dataclass(frozen=True)
class Stop:
    """Motion stopped while the arm moved.

    t_s           when (s, the run's clock)
    tcp_speed     commanded TCP linear speed just before (m/s)
    reason        why motion was not allowed (the safety gate's reason)
    joint         the joint with the largest step to zero relative to its max_accel
    asked_decel   that joint's step to zero over one period (rad/s² or m/s²): what an arm
                  following the zero literally would do; the arm side brakes instead
    """

    t_s: float
    tcp_speed: float
    reason: str
    joint: str
    asked_decel: float

    def as_dict(self) -> dict[str, Any]:
        return {"t_s": self.t_s, "tcp_speed": self.tcp_speed, "reason": self.reason,
                "joint": self.joint, "asked_decel": self.asked_decel}


class MotionStats:
    """Commanded-motion peaks over a run fed in order: in chunks of cycles (`add`, a log
    reader) or one cycle at a time (`add_cycle`, a live loop: buffered and taken in chunks,
    so the loop pays a list append, not numpy calls, per cycle). Read `flush()` first when
    cycles were added one at a time.

    joint_names, max_accel: the arm's (for naming a stop's worst joint).
    rate_hz: the nominal control rate; accelerations are per nominal period.
    """

    def __init__(self, joint_names: tuple[str, ...], max_accel: Vector, rate_hz: float
                 ) -> None:
        n = len(joint_names)
        self.joint_names = joint_names
        self.inv_accel = 1.0 / np.asarray(max_accel, dtype=float)
        self.rate_hz = rate_hz
        self.peak_speed = np.zeros(n)
        self.peak_speed_t = np.full(n, math.nan)
        self.peak_accel = np.zeros(n)
        self.peak_accel_t = np.full(n, math.nan)
        self.stops: list[Stop] = []
        # cycle, rates, allowed, TCP speed and time of the last cycle taken
        self._last: tuple[int, Vector, bool, float, float] | None = None
        self._pending: list[tuple[int, float, Vector, bool, str, float]] = []

    PENDING_MAX = 128
    """Cycles `add_cycle` gathers before it analyses them as one chunk: about 0.1 ms of
    numpy work once per 128 cycles on a loaded machine (0.2 ms for 512), so no single
    cycle of a live loop takes a large share of its period."""

    def add_cycle(self, cycle: int, t_s: float, rates: Vector, allowed: bool, reason: str,
                  tcp_speed: float) -> None:
        """Take one cycle (its rates are kept, not copied: pass an array not changed later)."""
        self._pending.append((cycle, t_s, rates, allowed, reason, tcp_speed))
        if len(self._pending) >= self.PENDING_MAX:
            self.flush()

    def flush(self) -> None:
        """Analyse the cycles `add_cycle` has gathered."""
        if self._pending:
            cycle, t, rates, allowed, reasons, tcp = zip(*self._pending)
            self._pending = []
            self.add(np.array(cycle), np.array(t, dtype=float), np.array(rates, dtype=float),
                     np.array(allowed, dtype=bool), reasons, np.array(tcp, dtype=float))

    def add(self, cycle: NDArray[np.int_], t: Vector, rates: Vector,
            allowed: NDArray[np.bool_], reasons: list[str] | tuple[str, ...],
            tcp_speed: Vector) -> NDArray[np.float64]:
        """Take the next chunk (N cycles: cycle numbers, times, rates (N, n), motion
        allowed, the gate's reasons, commanded TCP linear speed); returns the commanded
        accelerations (N, n), NaN where a cycle pairs with nothing or is a stop."""
        if self._pending:       # cycles taken one at a time come first
            self.flush()
        n_rows = len(t)
        accel = np.full(rates.shape, math.nan)
        if n_rows == 0:
            return accel
        speed = np.abs(rates)
        _update_peaks(self.peak_speed, self.peak_speed_t, speed, t)
        if self._last is not None:
            c0, r0, a0, v0, t0 = self._last
            prev_t = np.concatenate(([t0], t[:-1]))
            prev_cycle = np.concatenate(([c0], cycle[:-1]))
            prev_rates = np.vstack((r0, rates[:-1]))
            prev_moving = np.concatenate(([bool(r0.any())], rates[:-1].any(axis=1)))
            prev_tcp = np.concatenate(([v0], tcp_speed[:-1]))
        else:
            prev_t = np.concatenate(([t[0] - 1.0 / self.rate_hz], t[:-1]))
            prev_cycle = np.concatenate(([cycle[0] - 1], cycle[:-1]))
            prev_rates = np.vstack((np.zeros(rates.shape[1]), rates[:-1]))
            prev_moving = np.concatenate(([False], rates[:-1].any(axis=1)))
            prev_tcp = np.concatenate(([0.0], tcp_speed[:-1]))
        paired = cycle - prev_cycle == 1
        step = np.abs(rates - prev_rates) * self.rate_hz
        # Over the real spacing where a cycle came early (after a late one): what an arm
        # that applies each command on arrival sees; the limit layer holds the same bound
        # (control.limits.acceleration_step's step_s).
        dt = 1.0 / self.rate_hz
        spacing = t - prev_t
        early = (spacing > 0.0) & (spacing < dt * (1.0 - 1e-9))
        over = np.where(early, dt / np.where(early, spacing, dt), 1.0)
        change = step * over[:, None]
        stop = paired & ~allowed & prev_moving
        counted = paired & ~stop
        accel[counted] = change[counted]
        if counted.any():
            _update_peaks(self.peak_accel, self.peak_accel_t, change[counted], t[counted])
        for k in np.flatnonzero(stop).tolist():
            worst = int(np.argmax(step[k] * self.inv_accel))
            self.stops.append(Stop(t_s=float(t[k]), tcp_speed=float(prev_tcp[k]),
                                   reason=str(reasons[k]), joint=self.joint_names[worst],
                                   asked_decel=float(step[k, worst])))
        self._last = (int(cycle[-1]), rates[-1].copy(), bool(allowed[-1]),
                      float(tcp_speed[-1]), float(t[-1]))
        return accel


def _update_peaks(peak: Vector, peak_t: Vector, values: Vector, t: Vector) -> None:
    """Raise each joint's running peak (and its time) to the chunk's, where higher."""
    i = np.argmax(values, axis=0)
    best = values[i, np.arange(values.shape[1])]
    better = best > peak
    peak[better] = best[better]
    peak_t[better] = t[i][better]


__all__ = ["ROUNDING", "MotionStats", "Stop", "above"]
