"""`jogwire inspect LOG [--csv FILE] [--json] [--deg]`: what happened in a recorded session.

The summary: duration, cycles, time enabled, per joint the peak speed and acceleration
against the commanded (max) and the hardware's rated limits and the closest approach to a
position limit, the TCP's peak speed against its cap, the lowest σ_min, how often each limit
bound, loop overruns, and what the reader found wrong with the file (torn tail, corruption,
gaps). `--csv` exports the cycle table, one column per scalar; `--json` prints the summary
as one object for tools (SI units, null where a value does not exist).

The log is streamed in chunks, so an hour-long session is summarised in bounded memory.
"""

from __future__ import annotations

import argparse
import contextlib
import csv
import json
import math
import sys
import textwrap
from array import array
from pathlib import Path
from typing import Any, Iterable, Iterator, TextIO

import numpy as np

from ..errors import ConfigError
from ..arm.model import Arm
from ..sessions.recorder import CycleRecord, SessionHeader, SessionReader
from ..sessions.stats import MotionStats

TWIST_AXES = ("vx", "vy", "vz", "wx", "wy", "wz")
_CHUNK = 4096      # records turned into arrays at a time


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("log", metavar="LOG", help="a session log (.jwlog)")
    parser.add_argument("--csv", metavar="FILE",
                        help="also write the cycle table as CSV (one column per scalar, per-joint "
                             "columns named after the joints; '-' for standard output)")
    parser.add_argument("--json", action="store_true",
                        help="print the summary as one JSON object (SI units)")
    parser.add_argument("--deg", action="store_true",
                        help="revolute joint values in the table in degrees")


def run(args: argparse.Namespace) -> int:
    if args.csv == "-" and args.json:
        raise ConfigError("--csv - and --json both want standard output; give --csv a file",
                          field="--csv")
    with SessionReader(args.log) as reader:
        stats = SessionStats(reader.header.arm, reader.header.settings.get("rate_hz"))
        for chunk in _chunks(reader, _CHUNK):
            stats.add(chunk)
        summary = stats.summary(reader)
    if args.csv:
        rows = write_csv(Path(args.log), args.csv, stats)
        summary["csv"] = {"path": args.csv, "rows": rows}
        if args.csv == "-":
            return 0
    if args.json:
        print(json.dumps(_json_safe(summary), indent=2, allow_nan=False))
    else:
        print(format_summary(summary, degrees=args.deg))
    return 0


def _chunks(records: Iterable[CycleRecord], size: int) -> Iterator[list[CycleRecord]]:
    chunk: list[CycleRecord] = []
    for rec in records:
        chunk.append(rec)
        if len(chunk) == size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


# ----------------------------------------------------------------------------------------
# Statistics, streamed chunk by chunk
# ----------------------------------------------------------------------------------------

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
        self.time_reduced_s = 0.0
        self.time_damped_s = 0.0
        self.min_limit_distance = np.full(n, math.inf)
        self.tcp_peak = (-math.inf, math.nan)        # (m/s, t_s)
        self.tcp_peak_reduced: tuple[float, float] | None = None
        self.tcp_peak_angular = (-math.inf, math.nan)  # (rad/s, t_s)
        self.min_sigma = (math.inf, math.nan)        # (σ, t_s)
        self.limits: dict[str, list[int]] = {}       # name → [cycles, episodes]
        self.overruns = 0
        self.periods = array("d")
        self.computes = array("d")
        self.scale_names: set[str] = set()
        self.n_axes = 0
        self.n_buttons = 0
        self._last_binding: str | None = None

    def add(self, records: list[CycleRecord]) -> None:
        if not records:
            return
        t = np.array([r.t_s for r in records])
        cycle = np.array([r.cycle for r in records])
        rates = np.array([r.rates for r in records])
        q = np.array([r.q for r in records])
        achieved = np.array([r.achieved_twist for r in records])
        period = np.array([r.period_s for r in records])
        enabled = np.array([r.enabled for r in records])
        reduced = np.array([r.reduced for r in records])
        damped = np.array([r.damping > 0.0 for r in records])
        sigma = np.array([r.sigma_min for r in records])

        if self.t_first is None:
            self.t_first = float(t[0])
        self.t_last = float(t[-1])
        self.cycles += len(records)
        self.time_enabled_s += float(period[enabled].sum())
        self.time_reduced_s += float(period[reduced].sum())
        self.time_damped_s += float(period[damped].sum())
        self.periods.extend(period.tolist())
        self.computes.extend(r.compute_s for r in records)
        self.overruns += sum(r.overrun for r in records)

        if self.motion is None:
            rate = self.rate_hz or 1.0 / float(np.median(period))
            self.motion = MotionStats(self.arm.joint_names, self.arm.max_accel, rate)
        self.motion.add(cycle, t, rates, enabled, [r.enable_reason for r in records],
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

        for r in records:
            name = r.binding_limit
            if name is not None:
                counts = self.limits.setdefault(name, [0, 0])
                counts[0] += 1
                if name != self._last_binding:
                    counts[1] += 1
            self._last_binding = name
            self.scale_names.update(r.scales)
            self.n_axes = max(self.n_axes, len(r.axes))
            self.n_buttons = max(self.n_buttons, len(r.buttons))

    def summary(self, reader: SessionReader) -> dict[str, Any]:
        """The summary object (the JSON of `inspect --json`); call after the last add."""
        h: SessionHeader = reader.header
        arm = self.arm
        has = self.cycles > 0
        duration = (self.t_last - self.t_first) if has else 0.0
        periods = np.frombuffer(self.periods, dtype=float) if has else np.zeros(0)
        computes = np.frombuffer(self.computes, dtype=float) if has else np.zeros(0)
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
                "over_max_speed": _over(peak_speed, j.max_speed),
                "over_rated_speed": _over(peak_speed, j.rated_speed),
                "over_max_accel": _over(peak_accel, j.max_accel),
                "over_rated_accel": _over(peak_accel, j.rated_accel),
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
            "time_recorded_s": float(periods.sum()),
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
                "period_mean_s": float(periods.mean()) if has else None,
                "period_p99_s": float(np.percentile(periods, 99)) if has else None,
                "period_max_s": float(periods.max()) if has else None,
                "compute_median_s": float(np.median(computes)) if has else None,
                "compute_p99_s": float(np.percentile(computes, 99)) if has else None,
                "compute_max_s": float(computes.max()) if has else None,
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


def _over(peak: float | None, limit: float) -> bool:
    """Above the limit beyond rounding: a rate stepped by exactly max_accel·dt comes back
    as an acceleration a few ulp off max_accel (the same 1e-9 as runtime.sessions.preflight)."""
    return peak is not None and peak > limit * (1.0 + 1e-9)


def _value(x: float) -> float | None:
    """A peak, or None where nothing was measured (-inf)."""
    return float(x) if x != -math.inf else None


def _t(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _json_safe(value: Any) -> Any:
    """JSON has no inf, NaN or bytes: those become null and hex text."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, bytes):
        return value.hex()
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    return value


# ----------------------------------------------------------------------------------------
# CSV
# ----------------------------------------------------------------------------------------

def csv_columns(stats: SessionStats) -> list[str]:
    names = stats.arm.joint_names
    return (["cycle", "t_s", "enabled", "enable_reason", "reduced", "frame"]
            + [f"twist_{a}" for a in TWIST_AXES]
            + [f"q_{n}" for n in names] + [f"rate_{n}" for n in names]
            + [f"achieved_{a}" for a in TWIST_AXES]
            + ["damping", "sigma_min", "manipulability", "tracking_error"]
            + [f"scale_{s}" for s in sorted(stats.scale_names)]
            + ["binding_limit", "period_s", "compute_s", "overrun"]
            + [f"axis_{i}" for i in range(stats.n_axes)]
            + [f"button_{i}" for i in range(stats.n_buttons)])


def csv_row(r: CycleRecord, stats: SessionStats, scale_names: list[str]) -> list[Any]:
    """One record as CSV cells (booleans as 1/0, a missing value as an empty cell)."""
    def pad(values: tuple, n: int, fill: Any = "") -> list[Any]:
        return list(values) + [fill] * (n - len(values))
    return ([r.cycle, r.t_s, int(r.enabled), r.enable_reason, int(r.reduced), r.frame]
            + list(r.twist) + list(r.q) + list(r.rates) + list(r.achieved_twist)
            + [r.damping, r.sigma_min, r.manipulability, r.tracking_error]
            + [r.scales.get(s, "") for s in scale_names]
            + [r.binding_limit or "", r.period_s, r.compute_s, int(r.overrun)]
            + pad(r.axes, stats.n_axes) + pad(tuple(int(b) for b in r.buttons), stats.n_buttons))


def write_csv(log: Path, target: str, stats: SessionStats) -> int:
    """Write the cycle table of `log` to `target` ('-' = stdout); returns the row count."""
    try:
        with _open_text(target) as out:
            writer = csv.writer(out, lineterminator="\n")
            writer.writerow(csv_columns(stats))
            rows = 0
            scale_names = sorted(stats.scale_names)
            with SessionReader(log) as reader:
                for rec in reader:
                    writer.writerow(csv_row(rec, stats, scale_names))
                    rows += 1
    except OSError as exc:
        raise ConfigError(f"cannot write {target}: {exc.strerror or exc}", field="--csv"
                          ) from None
    return rows


@contextlib.contextmanager
def _open_text(target: str) -> Iterator[TextIO]:
    if target == "-":
        yield sys.stdout
    else:
        with open(target, "w", encoding="utf-8", newline="") as f:
            yield f


# ----------------------------------------------------------------------------------------
# Human-readable output
# ----------------------------------------------------------------------------------------

def _num(x: float | None, digits: int = 3, scale: float = 1.0) -> str:
    if x is None:
        return "—"
    if not math.isfinite(x):
        return "inf" if x > 0 else "-inf"
    return f"{round(x * scale, digits) + 0.0:.{digits}f}"


def _pct(x: float | None, of: float) -> str:
    return "—" if x is None or of <= 0 else f"{100.0 * x / of:.0f} %"


def format_table(headers: list[str], rows: list[list[str]], indent: int = 2) -> list[str]:
    """Columns aligned: the first left, the rest right."""
    widths = [max(len(str(c)) for c in col) for col in zip(headers, *rows)]

    def line(cells: list[str]) -> str:
        parts = [f"{cells[0]:<{widths[0]}}"] + [f"{c:>{w}}" for c, w in zip(cells[1:],
                                                                             widths[1:])]
        return (" " * indent + "  ".join(parts)).rstrip()
    return [line(headers)] + [line(r) for r in rows]


def format_summary(s: dict[str, Any], *, degrees: bool = False) -> str:
    """The human-readable summary of `jogwire inspect`."""
    out = [f"session   {s['file']}",
           f"recorded  {s['started_at']} with jogwire {s['software_version']} "
           f"(session format {s['format_version']}, protocol "
           f"{s['protocol_version'] if s['protocol_version'] is not None else 'unknown'})",
           f"arm       {s['arm']}, {len(s['joints'])} joints"]
    scalars = [f"{k}={v}" for k, v in s["settings"].items()
               if isinstance(v, (str, int, float, bool)) or v is None]
    if scalars:
        out += textwrap.wrap(", ".join(scalars), width=96, initial_indent="settings  ",
                             subsequent_indent="          ")
    if s["cycles"] == 0:
        out += ["", "no cycles recorded"]
        out += _format_recorder(s)
        return "\n".join(out)

    dur = s["duration_s"]
    rate = f", {s['rate_hz']:.1f} Hz mean" if s["rate_hz"] else ""
    out += [f"cycles    {s['cycles']} over {dur:.2f} s{rate}",
            f"enabled   {s['time_enabled_s']:.2f} s "
            f"({_pct(s['time_enabled_s'], s['time_recorded_s'])})"
            + (f"; reduced speed {s['time_reduced_s']:.2f} s" if s["time_reduced_s"] else ""),
            ""]

    out.append("joints    peaks vs max (commanded) and rated (hardware); "
               "speed in unit/s, accel in unit/s²")
    rows = []
    for j in s["joints"]:
        k = 180.0 / math.pi if degrees and j["unit"] == "rad" else 1.0
        unit = "deg" if k != 1.0 else j["unit"]
        flag = ", ".join(_flag(what, j[f"over_max_{what}"], j[f"over_rated_{what}"])
                         for what in ("speed", "accel")
                         if j[f"over_max_{what}"] or j[f"over_rated_{what}"])
        rows.append([j["name"], unit,
                     _num(j["peak_speed"], scale=k), _num(j["max_speed"], scale=k),
                     _num(j["rated_speed"], scale=k), _pct(j["peak_speed"], j["rated_speed"]),
                     _num(j["peak_accel"], scale=k), _num(j["max_accel"], scale=k),
                     _num(j["rated_accel"], scale=k), _pct(j["peak_accel"], j["rated_accel"]),
                     f"{_num(j['min_limit_distance'], scale=k)} {unit}", flag])
    out += format_table(["joint", "unit", "peak speed", "max", "rated", "of rated",
                         "peak accel", "max", "rated", "of rated", "closest to limit", ""],
                        rows)

    reduced = "" if s["tcp_peak_speed_reduced"] is None else \
        f"; in reduced speed {_num(s['tcp_peak_speed_reduced'])} m/s"
    out += ["",
            f"TCP       peak linear speed {_num(s['tcp_peak_speed'])} m/s at "
            f"t = {_num(s['tcp_peak_speed_t_s'], 2)} s (cap {_num(s['tcp_cap'])} m/s){reduced}",
            f"          peak angular speed {_num(s['tcp_peak_angular_speed'])} rad/s "
            f"(cap {_num(s['tcp_angular_cap'])} rad/s)",
            f"σ_min     lowest {s['min_sigma']:.4g} at t = {_num(s['min_sigma_t_s'], 2)} s; "
            f"damping active {s['time_damped_s']:.2f} s"]

    if s["limit_events"]:
        out += ["", "limits    cycles and episodes in which each limit bound"]
        out += format_table(["limit", "cycles", "episodes"],
                            [[e["limit"], str(e["cycles"]), str(e["episodes"])]
                             for e in s["limit_events"]])
    else:
        out += ["", "limits    no limit bound"]
    stops = s["stops"]
    if stops:
        out += ["", f"stops     {len(stops)} while moving: zero sent at once, the arm side "
                    f"brakes (not counted as commanded accelerations)"]
        out += [f"  t = {st['t_s']:.2f} s from {st['tcp_speed'] * 1e3:.1f} mm/s "
                f"({st['reason']})" for st in stops[:10]]
        if len(stops) > 10:
            out.append(f"  … and {len(stops) - 10} more (--json lists all)")

    loop = s["loop"]
    out += ["",
            f"loop      {loop['overruns']} overruns in {s['cycles']} cycles "
            f"({100.0 * loop['overruns'] / s['cycles']:.2f} %); period mean "
            f"{_ms(loop['period_mean_s'])}, p99 {_ms(loop['period_p99_s'])}, max "
            f"{_ms(loop['period_max_s'])}",
            f"          compute median {_ms(loop['compute_median_s'])}, p99 "
            f"{_ms(loop['compute_p99_s'])}, max {_ms(loop['compute_max_s'])}"]
    out += _format_recorder(s)
    if "csv" in s:
        out += ["", f"cycle table: {s['csv']['rows']} rows written to {s['csv']['path']}"]
    return "\n".join(out)


def _flag(what: str, over_max: bool, over_rated: bool) -> str:
    return f"{what} OVER RATED" if over_rated else f"{what} above max"


def _ms(x: float | None) -> str:
    return "—" if x is None else f"{x * 1e3:.3f} ms"


def _format_recorder(s: dict[str, Any]) -> list[str]:
    rec = s["recorder"]
    if rec["closed_cleanly"]:
        state = f"closed cleanly; {rec['written']} records written, {rec['dropped']} dropped"
    else:
        state = "did not close cleanly (crash, kill or power loss)"
    out = ["", f"recorder  {state}"]
    if s["problems"]:
        out.append(f"problems  {len(s['problems'])}")
        out += [f"  {p['kind']} at byte {p['offset']}: {p['message']}" for p in s["problems"]]
    else:
        out.append("problems  none")
    return out
