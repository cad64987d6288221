"""Terminal text: the summary of `jogwire inspect LOG`, the table of `jogwire inspect DIR`,
aligned tables and JSON-safe values; for a drive, one live status line, its end-of-session
summary and a write that survives a closed pipe. Plain values in (dicts, a status snapshot,
rows of text), never a session object; text out."""

from __future__ import annotations

import math
import os
import textwrap
from typing import Any

import numpy as np

from ..arm.kinematics import tcp_pose
from ..control.loop import TimingStats

__all__ = ["format_catalog", "format_clearance", "format_drive_summary", "format_summary",
           "format_table", "json_safe", "say", "status_line", "terminal_width"]


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


def _num(x: float | None, digits: int = 3, scale: float = 1.0) -> str:
    if x is None:
        return "—"
    if not math.isfinite(x):
        return "inf" if x > 0 else "-inf"
    return f"{round(x * scale, digits) + 0.0:.{digits}f}"


def _pct(x: float | None, of: float) -> str:
    return "—" if x is None or of <= 0 else f"{100.0 * x / of:.0f} %"


def format_clearance(m: dict[str, Any]) -> str:
    """The drive summary's workcell line: the nearest approach and what the arm side
    reported."""
    if m["min_clearance_m"] is None:
        text = f"workcell {m['cell']}: no distance measured"
    elif m["clearance_pair"] is None:     # the solve names pairs within d_i only
        text = (f"workcell {m['cell']}: nothing came within the influence distance (nearest "
                f"≥ {m['min_clearance_m'] * 1e3:.0f} mm)")
    else:
        a, b = m["clearance_pair"]
        text = (f"workcell {m['cell']}: nearest {a}–{b} {m['min_clearance_m'] * 1e3:.1f} mm "
                f"at {m['min_clearance_t_s']:.1f} s")
    if not m["contacts_measured"]:
        return text + "; the arm side did not confirm this workcell: no contact check"
    if not m["contacts"]:
        return text + "; no contact"
    return text + "; CONTACT " + ", ".join(
        f"{c['a']}–{c['b']} from {c['t_s']:.1f} s, {c['depth_m'] * 1e3:.1f} mm deep"
        for c in m["contacts"])


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
    for kind in ("csv", "parquet"):
        if kind in s:
            out += ["", f"cycle table: {s[kind]['rows']} rows written to {s[kind]['path']}"]
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


def format_catalog(rows: list[dict[str, Any]], *, filtered: bool = False) -> str:
    """The table of `jogwire inspect DIR`: one line per session, oldest first."""
    if not rows:
        return "no session log matches the filters" if filtered else "no session logs found"
    table, unreadable = [], []
    for r in rows:
        if "error" in r:
            unreadable.append(f"  {r['file']}: {r['error']}")
            continue
        table.append([r["started_at"][:19].replace("T", " "), r["arm"],
                      _duration(r["duration_s"]), _duration(r["time_moving_s"]),
                      _num(r["tcp_peak_speed"]), _sigma(r["min_sigma"]),
                      _num(r["min_clearance"]), str(r["limit_episodes"]),
                      "yes" if r["closed_cleanly"] else "NO",
                      str(r["problems"]) if r["problems"] else "", _name(r["file"])])
    out = format_table(["started", "arm", "length", "moving", "TCP peak m/s", "σ_min",
                        "clearance m", "limit episodes", "clean", "problems", "file"],
                       table, indent=0) if table else []
    if unreadable:
        out += ["", "unreadable:"] + unreadable
    return "\n".join(out)


def _duration(s: float | None) -> str:
    if s is None:
        return "—"
    minutes, seconds = divmod(round(s), 60)
    return f"{minutes // 60}:{minutes % 60:02d}:{seconds:02d}" if minutes >= 60 \
        else f"{minutes}:{seconds:02d}"


def _sigma(x: float | None) -> str:
    return "—" if x is None else f"{x:.3g}"


def _name(path: str) -> str:
    return path.rsplit("/", 1)[-1]


# ----------------------------------------------------------------------------------------
# A drive: the live status line and the end-of-session summary
# ----------------------------------------------------------------------------------------

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
    if snap.cell is not None:
        from .status_window import clearance_text
        parts.append(clearance_text(snap) + (" (LIMITING)" if snap.clearance_binds else ""))
    if timing is not None and timing.cycles:
        parts.append(f"loop p99 {timing.period_p99_s * 1e3:.2f} ms, "
                     f"{timing.overruns} overruns")
    return " | ".join(parts)


def _milli(x: float | None, digits: int = 2) -> str:
    return "—" if x is None else f"{x * 1e3:.{digits}f}"


def format_drive_summary(m: dict[str, Any]) -> str:
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
           f"  loop      period p50 {_milli(loop['period_p50_s'], 3)} / p99 "
           f"{_milli(loop['period_p99_s'], 3)} / max {_milli(loop['period_max_s'], 3)} ms, compute "
           f"p50 {_milli(loop['compute_p50_s'], 3)} / p99 {_milli(loop['compute_p99_s'], 3)} ms; "
           f"overruns {loop['overruns']} ({100 * loop['overrun_fraction']:.2f} %), longest "
           f"streak {loop['max_overrun_streak']}{window}"]
    age, rtt = link["state_age"], link["round_trip"]
    out.append(f"  link      state age p50 {_milli(age['p50_s'])} / p99 {_milli(age['p99_s'])} ms, "
               f"round trip p50 {_milli(rtt['p50_s'])} / p99 {_milli(rtt['p99_s'])} ms "
               "(rates sent → state showing them applied)")
    if link["round_trip_over_limit_s"] > 0:
        out.append(f"            ROUND TRIP over the {_milli(link['round_trip_limit_s'], 0)} ms "
                   f"limit for {link['round_trip_over_limit_s']:.1f} s (median up to "
                   f"{_milli(link['round_trip_worst_median_s'], 0)} ms): motion refused then")
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
    out.append("  accel     peak commanded against max / rated (stops apart)")
    for j in m["joints"]:
        k, unit = (180.0 / math.pi, "°/s²") if j["unit"] == "rad/s" else (1e3, "mm/s²")
        flag = "  OVER RATED" if j["over_rated_accel"] else \
            "  above max" if j["over_max_accel"] else ""
        out.append(f"    {j['name']:<{width}}  {j['peak_accel'] * k:7.1f}  of "
                   f"{j['max_accel'] * k:6.1f} / {j['rated_accel'] * k:6.1f} {unit}{flag}")
    out.append(f"  TCP       peak {m['tcp_peak_m_s'] * 1e3:.1f} mm/s commanded (cap "
               f"{m['tcp_cap_m_s'] * 1e3:.0f} mm/s), {math.degrees(m['tcp_peak_rad_s']):.1f} °/s "
               f"(cap {math.degrees(m['tcp_cap_rad_s']):.0f} °/s)")
    limits = ", ".join(f"{k} {v['cycles']} cycles in {v['episodes']} episodes"
                       for k, v in m["limits"].items()) or "no limit bound"
    out.append(f"  limits    {limits}")
    if m["stops"]:
        out.append(f"  stops     {len(m['stops'])} while moving: zero sent at once, the arm "
                   f"side brakes (not counted as commanded accelerations)")
        scale = {j["name"]: (180.0 / math.pi, "°/s²") if j["unit"] == "rad/s" else
                 (1.0, "m/s²") for j in m["joints"]}
        for st in m["stops"][:5]:
            k, unit = scale[st["joint"]]
            out.append(f"            t = {st['t_s']:.2f} s from {st['tcp_speed'] * 1e3:.1f} "
                       f"mm/s ({st['reason']}): {st['joint']} would brake at "
                       f"{st['asked_decel'] * k:.1f} {unit} if the arm followed the zero "
                       f"literally")
    if m.get("cell") is not None:
        out.append(f"  clearance {format_clearance(m)}")
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
