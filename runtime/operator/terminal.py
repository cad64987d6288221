"""Terminal text for session logs: the summary of `jogwire inspect LOG`, the table of
`jogwire inspect DIR`, aligned tables and JSON-safe values. Plain dicts in, text out."""

from __future__ import annotations

import math
import textwrap
from typing import Any


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
