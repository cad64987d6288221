"""The terminal side of the operator: one live status line, the drive summary, aligned
tables, JSON-ready values and a write that survives a closed pipe.

Everything here takes plain values (a status snapshot, a summary dict, rows of text), never a
session object, so every command and runner can print through it.
"""

from __future__ import annotations

import math
import os
from typing import Any

import numpy as np

from ..arm.kinematics import tcp_pose
from ..control.loop import TimingStats

__all__ = ["format_summary", "format_table", "json_safe", "say", "status_line",
           "terminal_width"]


def status_line(snap: Any, timing: TimingStats | None) -> str:
    """One line for the terminal from a status snapshot, most important first (a narrow
    terminal cuts the end): time, gate state and why not / commanded speed, TCP, link, loop."""
    parts = [f"{snap.elapsed_s:6.1f} s", f"{snap.gate_state.upper():7s}"]
    if not snap.allowed:
        parts.append(snap.gate_reason)
    elif snap.twist is not None:
        parts.append(f"v {np.linalg.norm(snap.twist[:3]) * 1e3:3.0f} mm/s")
    if snap.q is not None:
        p = tcp_pose(snap.arm, np.asarray(snap.q))[:3, 3]
        parts.append(f"TCP {p[0]:+.3f} {p[1]:+.3f} {p[2]:+.3f} m")
    fresh = snap.connected and snap.state_age_s is not None and \
        snap.state_age_s <= snap.stale_after_s
    link = "link ok" if fresh else "link STALE"
    if snap.state_age_s is not None:
        link += f" age {snap.state_age_s * 1e3:.1f} ms"
    if snap.rtt_s is not None:
        link += f" rtt {snap.rtt_s * 1e3:.1f} ms"
    parts.append(link)
    if timing is not None and timing.cycles:
        parts.append(f"loop p99 {timing.period_p99_s * 1e3:.2f} ms, "
                     f"{timing.overruns} overruns")
    return " | ".join(parts)


def _ms(x: float | None, digits: int = 2) -> str:
    return "—" if x is None else f"{x * 1e3:.{digits}f}"


def format_summary(m: dict[str, Any]) -> str:
    """The end-of-session summary of `jogwire drive` for the terminal, from the plain dict
    `runtime.sessions.drive.build_summary` makes."""
    loop, link = m["loop"], m["link"]
    gate = ", ".join(f"{k} {v:.1f} s" for k, v in m["gate_time_s"].items()) or "—"
    window = "" if loop["window_cycles"] >= m["cycles"] else \
        f" (percentiles over the last {loop['window_cycles']} cycles)"
    out = [f"jogwire drive: {m['end_reason'] or 'ended'} after {m['duration_s']:.1f} s",
           f"  input     {m['input']}",
           f"  target    {m['target']}",
           f"  cycles    {m['cycles']} at {m['rate_hz']:g} Hz ({m['thread_priority']} "
           f"priority); gate: {gate}",
           f"  loop      period p50 {_ms(loop['period_p50_s'], 3)} / p99 "
           f"{_ms(loop['period_p99_s'], 3)} / max {_ms(loop['period_max_s'], 3)} ms, compute "
           f"p50 {_ms(loop['compute_p50_s'], 3)} / p99 {_ms(loop['compute_p99_s'], 3)} ms; "
           f"overruns {loop['overruns']} ({100 * loop['overrun_fraction']:.2f} %), longest "
           f"streak {loop['max_overrun_streak']}{window}"]
    age, rtt = link["state_age"], link["round_trip"]
    out.append(f"  link      state age p50 {_ms(age['p50_s'])} / p99 {_ms(age['p99_s'])} ms, "
               f"round trip p50 {_ms(rtt['p50_s'])} / p99 {_ms(rtt['p99_s'])} ms (rates sent → "
               f"state showing them applied)")
    if link["round_trip_over_limit_s"] > 0:
        out.append(f"            ROUND TRIP over the {_ms(link['round_trip_limit_s'], 0)} ms "
                   f"limit for {link['round_trip_over_limit_s']:.1f} s (median up to "
                   f"{_ms(link['round_trip_worst_median_s'], 0)} ms): motion refused then")
    dropped = sum(link["states_dropped"].values()) + link["states_refused"]
    out.append(f"            {link['states']} states, {dropped} dropped or refused, "
               f"{link['rates_not_sent']} rates not sent, arm side limited "
               f"{link['arm_side_limited_states']}")
    out.append("  joints    peak speed commanded / measured against max / rated")
    width = max(len(j["name"]) for j in m["joints"])
    for j in m["joints"]:
        k, unit = (180.0 / math.pi, "°/s") if j["unit"] == "rad/s" else (1e3, "mm/s")
        pct = 100.0 * max(j["peak_commanded"], j["peak_measured"]) / j["rated_speed"]
        out.append(f"    {j['name']:<{width}}  {j['peak_commanded'] * k:7.1f} / "
                   f"{j['peak_measured'] * k:7.1f}  of {j['max_speed'] * k:6.1f} / "
                   f"{j['rated_speed'] * k:6.1f} {unit:4s}  ({pct:3.0f} % of rated)")
    out.append(f"  TCP       peak {m['tcp_peak_m_s'] * 1e3:.1f} mm/s commanded (cap "
               f"{m['tcp_cap_m_s'] * 1e3:.0f} mm/s), {math.degrees(m['tcp_peak_rad_s']):.1f} °/s "
               f"(cap {math.degrees(m['tcp_cap_rad_s']):.0f} °/s)")
    limits = ", ".join(f"{k} {v['cycles']} cycles in {v['episodes']} episodes"
                       for k, v in m["limits"].items()) or "no limit bound"
    out.append(f"  limits    {limits}")
    out.append(f"  stop      {m['stop']}")
    if m["arm_side"]:
        out.append(f"  arm side  {m['arm_side']}")
    ses = m["session"]
    if ses is None:
        out.append("  session   not recorded (--no-record)")
    else:
        state = f"{ses['written']} cycles written, {ses['dropped']} dropped"
        if ses["failed"]:
            state += f"; recording FAILED: {ses['failed']}"
        out.append(f"  session   {ses['path']} ({state}); see `jogwire inspect {ses['path']}`")
    return "\n".join(out)


def format_table(headers: list[str], rows: list[list[str]], indent: int = 2) -> list[str]:
    """Columns aligned: the first left, the rest right."""
    widths = [max(len(str(c)) for c in col) for col in zip(headers, *rows)]

    def line(cells: list[str]) -> str:
        parts = [f"{cells[0]:<{widths[0]}}"] + [f"{c:>{w}}" for c, w in zip(cells[1:],
                                                                             widths[1:])]
        return (" " * indent + "  ".join(parts)).rstrip()
    return [line(headers)] + [line(r) for r in rows]


def json_safe(value: Any) -> Any:
    """JSON has no inf, NaN or bytes: those become null and hex text."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, bytes):
        return value.hex()
    if isinstance(value, dict):
        return {k: json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return value


def say(out: Any, text: str, end: str = "\n") -> None:
    """Write to the terminal. A closed pipe (`jogwire drive | head`) is not the drive's
    problem: stdout then goes to /dev/null (so the exit flush does not fail either)."""
    try:
        out.write(text + end)
        out.flush()
    except BrokenPipeError:
        os.dup2(os.open(os.devnull, os.O_WRONLY), out.fileno())


def terminal_width() -> int:
    try:
        return os.get_terminal_size().columns
    except OSError:
        return 120
