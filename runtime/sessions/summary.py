"""What happened in a recorded session: peaks, limits, loop timing, the file's problems.

`summarise(path)` streams a session log block by block (bounded memory, whatever its
length) through `SessionStats` and returns the summary of `jogwire inspect` (its `--json`
object: SI units, None where a value does not exist). The one place that turns a log into
a summary: `jogwire inspect LOG` and the table of `jogwire inspect DIR` both call it.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from ..arm.model import Arm
from .log_blocks import CycleBlock, Strings
from .log_reader import SessionReader
from .log_schema import SessionHeader
from .stats import MotionStats, above


def summarise(path: str | Path) -> dict[str, Any]:
    """The summary of one session log (LogError if it cannot be read at all)."""
    return session_stats(path)[0]


def session_stats(path: str | Path) -> tuple[dict[str, Any], SessionStats]:
    """The summary and the statistics behind it (the exports need their column set)."""
    with SessionReader(path) as reader:
        stats = SessionStats(reader.header.arm, reader.header.settings.get("rate_hz"))
        for block in reader.blocks():
            stats.add(block)
        return stats.summary(reader), stats


class Distribution:
    """Count, total, maximum and quantiles of a stream of durations (s) in fixed memory: a
    histogram of logarithmic bins, each RELATIVE_WIDTH wide, from 0.1 µs to 100 s (zero and
    below in a bin of their own, reported as 0). Quantiles are bin middles: within
    RELATIVE_WIDTH / 2 of the exact value."""

    RELATIVE_WIDTH = 1e-4
    LOWEST_S = 1e-7
    BINS = int(math.log(1e9) / math.log1p(RELATIVE_WIDTH)) + 1    # 0.1 µs … 100 s

    def __init__(self) -> None:
        self.counts = np.zeros(self.BINS + 2, dtype=np.int64)   # [≤ 0, bins…, ≥ 100 s]
        self.n = 0
        self.total = 0.0
        self.max: float | None = None

    def add(self, values: np.ndarray) -> None:
        values = values[np.isfinite(values)]
        if not values.size:
            return
        with np.errstate(divide="ignore", invalid="ignore"):
            scaled = (np.log(np.maximum(values, 0.0) / self.LOWEST_S)
                      / np.log1p(self.RELATIVE_WIDTH))
        index = np.where(values > 0.0, np.clip(np.floor(scaled), 0, self.BINS) + 1, 0)
        bins, counts = np.unique(index.astype(np.int64), return_counts=True)
        self.counts[bins] += counts
        self.n += values.size
        self.total += float(values.sum())
        top = float(values.max())
        self.max = top if self.max is None else max(self.max, top)

    def mean(self) -> float | None:
        return self.total / self.n if self.n else None

    def quantile(self, p: float) -> float | None:
        if not self.n:
            return None
        i = int(np.searchsorted(np.cumsum(self.counts), max(1, math.ceil(p * self.n))))
        if i == 0:
            return 0.0
        if i > self.BINS:
            return self.max
        middle = self.LOWEST_S * (1.0 + self.RELATIVE_WIDTH) ** (i - 0.5)
        return min(middle, self.max) if self.max is not None else middle


class SessionStats:
    """Running peaks and counts over a session's cycle records (fed in order, in chunks)."""

    def __init__(self, arm: Arm, rate_hz: float | None = None) -> None:
        """rate_hz: the session's nominal loop rate (header settings); accelerations are
        per nominal cycle (runtime.sessions.stats). Without it, the first chunk's median
        period stands in."""
        n = arm.n
        self.arm = arm
        self.rate_hz = rate_hz if isinstance(rate_hz, (int, float)) and \
            not isinstance(rate_hz, bool) and math.isfinite(rate_hz) and rate_hz > 0 else None
        self.motion: MotionStats | None = None
        self.cycles = 0
        self.t_first: float | None = None
        self.t_last: float | None = None
        self.time_enabled_s = 0.0
        self.time_moving_s = 0.0
        self.time_reduced_s = 0.0
        self.time_damped_s = 0.0
        self.min_limit_distance = np.full(n, math.inf)
        self.tcp_peak = (-math.inf, math.nan)        # (m/s, t_s)
        self.tcp_peak_reduced: tuple[float, float] | None = None
        self.tcp_peak_angular = (-math.inf, math.nan)  # (rad/s, t_s)
        self.min_sigma = (math.inf, math.nan)        # (σ, t_s)
        self.limits: dict[str, list[int]] = {}       # name → [cycles, episodes]
        self.overruns = 0
        self.periods = Distribution()
        self.computes = Distribution()
        self.scale_names: set[str] = set()
        self.n_axes = 0
        self.n_buttons = 0
        self._last_binding: str | None = None

    def add(self, block: CycleBlock) -> None:
        """Fold in the next cycles (in file order)."""
        if not block.n:
            return
        n = self.arm.n
        t = block["t_s"]
        cycle = block["cycle"]
        rates = block.matrix("rates", n)
        q = block.matrix("q", n)
        achieved = block.matrix("achieved_twist", 6)
        period = block["period_s"]
        enabled = block["enabled"]
        reduced = block["reduced"]
        damped = block["damping"] > 0.0
        sigma = block["sigma_min"]

        if self.t_first is None:
            self.t_first = float(t[0])
        self.t_last = float(t[-1])
        self.cycles += block.n
        self.time_enabled_s += float(period[enabled].sum())
        self.time_moving_s += float(period[np.any(rates != 0.0, axis=1)].sum())
        self.time_reduced_s += float(period[reduced].sum())
        self.time_damped_s += float(period[damped].sum())
        self.periods.add(period)
        self.computes.add(block["compute_s"])
        self.overruns += int(block["overrun"].sum())

        if self.motion is None:
            rate = self.rate_hz or 1.0 / float(np.median(period))
            self.motion = MotionStats(self.arm.joint_names, self.arm.max_accel, rate)
        self.motion.add(cycle, t, rates, enabled, block["enable_reason"].tolist(),
                        np.linalg.norm(achieved[:, :3], axis=1))
        distance = np.minimum(q - self.arm.lower, self.arm.upper - q).min(axis=0)
        self.min_limit_distance = np.minimum(self.min_limit_distance, distance)

        linear = np.linalg.norm(achieved[:, :3], axis=1)
        angular = np.linalg.norm(achieved[:, 3:], axis=1)
        self.tcp_peak = _peak(self.tcp_peak, linear, t)
        self.tcp_peak_angular = _peak(self.tcp_peak_angular, angular, t)
        if reduced.any():
            self.tcp_peak_reduced = _peak(self.tcp_peak_reduced or (-math.inf, math.nan),
                                          linear[reduced], t[reduced])
        solved = np.flatnonzero(np.isfinite(sigma))   # NaN: no solve (motion not allowed)
        if solved.size:
            i = int(solved[np.argmin(sigma[solved])])
            if sigma[i] < self.min_sigma[0]:
                self.min_sigma = (float(sigma[i]), float(t[i]))

        self._add_limits(block["binding_limit"])
        self.scale_names.update(block["scales"].names())
        self.n_axes = max(self.n_axes, int(block["axes"].lengths.max()))
        self.n_buttons = max(self.n_buttons, int(block["buttons"].lengths.max()))

    def _add_limits(self, binding: Strings) -> None:
        """Cycles and episodes (runs of cycles) in which each limit bound."""
        codes = binding.codes
        starts = np.ones(len(codes), dtype=bool)
        starts[1:] = codes[1:] != codes[:-1]
        first = binding.table[codes[0]]
        starts[0] = first != self._last_binding
        for code, name in enumerate(binding.table):
            if name is None:
                continue
            mine = codes == code
            counts = self.limits.setdefault(name, [0, 0])
            counts[0] += int(mine.sum())
            counts[1] += int((mine & starts).sum())
        self._last_binding = binding.table[codes[-1]]

    def summary(self, reader: SessionReader) -> dict[str, Any]:
        """The summary object (the JSON of `inspect --json`); call after the last add."""
        h: SessionHeader = reader.header
        arm = self.arm
        has = self.cycles > 0
        first, last = self.t_first, self.t_last
        duration = last - first if has and first is not None and last is not None else 0.0
        joints = []
        m = self.motion
        for k, j in enumerate(arm.joints):
            peak_speed = float(m.peak_speed[k]) if m else None
            peak_accel = float(m.peak_accel[k]) if m else None
            joints.append({
                "name": j.name, "kind": j.kind,
                "unit": "rad" if j.is_revolute else "m",
                "peak_speed": peak_speed, "peak_speed_t_s": _t(m.peak_speed_t[k]) if m else None,
                "max_speed": j.max_speed, "rated_speed": j.rated_speed,
                "peak_accel": peak_accel, "peak_accel_t_s": _t(m.peak_accel_t[k]) if m else None,
                "max_accel": j.max_accel, "rated_accel": j.rated_accel,
                "min_limit_distance": float(self.min_limit_distance[k]) if has else None,
                "over_max_speed": above(peak_speed, j.max_speed),
                "over_rated_speed": above(peak_speed, j.rated_speed),
                "over_max_accel": above(peak_accel, j.max_accel),
                "over_rated_accel": above(peak_accel, j.rated_accel),
            })
        end = reader.end
        return {
            "file": str(reader.path),
            "format_version": h.format_version,
            "software_version": h.software_version,
            "protocol_version": h.protocol_version,
            "started_at": h.started_at,
            "arm": arm.name,
            "joint_names": list(arm.joint_names),
            "settings": h.settings,
            "cycles": self.cycles,
            "duration_s": duration,
            "rate_hz": (self.cycles - 1) / duration if duration > 0 else None,
            "time_enabled_s": self.time_enabled_s,
            "time_recorded_s": self.periods.total,
            "time_moving_s": self.time_moving_s,
            "time_reduced_s": self.time_reduced_s,
            "joints": joints,
            "tcp_peak_speed": _value(self.tcp_peak[0]),
            "tcp_peak_speed_t_s": _t(self.tcp_peak[1]),
            "tcp_cap": arm.tcp_max_linear_m_s,
            "tcp_peak_speed_reduced": None if self.tcp_peak_reduced is None
            else self.tcp_peak_reduced[0],
            "tcp_peak_angular_speed": _value(self.tcp_peak_angular[0]),
            "tcp_angular_cap": arm.tcp_max_angular_rad_s,
            "min_sigma": self.min_sigma[0] if has else None,
            "min_sigma_t_s": _t(self.min_sigma[1]),
            "time_damped_s": self.time_damped_s,
            "stops": [stop.as_dict() for stop in m.stops] if m else [],
            "limit_events": [{"limit": name, "cycles": c, "episodes": e}
                             for name, (c, e) in sorted(self.limits.items(),
                                                        key=lambda kv: (-kv[1][0], kv[0]))],
            "loop": {
                "overruns": self.overruns,
                "period_mean_s": self.periods.mean(),
                "period_p99_s": self.periods.quantile(0.99),
                "period_max_s": self.periods.max,
                "compute_median_s": self.computes.quantile(0.5),
                "compute_p99_s": self.computes.quantile(0.99),
                "compute_max_s": self.computes.max,
            },
            "recorder": {
                "closed_cleanly": end is not None,
                "handed": None if end is None else end.handed,
                "written": None if end is None else end.written,
                "dropped": None if end is None else end.dropped,
            },
            "problems": [{"kind": p.kind, "offset": p.offset, "message": p.message}
                         for p in reader.problems],
        }


def _peak(current: tuple[float, float], values: np.ndarray, t: np.ndarray
          ) -> tuple[float, float]:
    i = int(np.argmax(values))
    return (float(values[i]), float(t[i])) if values[i] > current[0] else current


def _value(x: float) -> float | None:
    """A peak, or None where nothing was measured (-inf)."""
    return float(x) if x != -math.inf else None


def _t(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None
