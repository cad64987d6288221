"""The preflight report: one self-contained HTML file with the verdict, the tables and
embedded PNG plots.

matplotlib is imported here only, lazily (inside `render_plots`), with the Agg backend: no
display is needed and importing jogwire never pulls it in. Every plot shares the time
axis (s from the start of the run):

    speeds        |q̇_i| as % of each joint's rated speed, commanded and measured
    accelerations |Δq̇_i|/dt as % of the rated acceleration (stops left out)
    limits        distance of each joint to its nearer position limit, with the margin
    tcp           TCP linear speed, commanded and measured, against the cap in force
    sigma         σ_min of the task Jacobian, the damping threshold and the damping λ
    tracking      commanded vs measured twist: linear (mm/s) and angular (deg/s) error
    timeline      when motion was allowed, when damped, which limit bound; stops
    clearance     with a workcell: the nearest pairs' distances against d_s and d_i, and
                  the contacts the simulated arm reported

With a workcell the report also shows a picture of the arm in the cell at the closest
approach (`ReportContext.closest_picture`, rendered by the simulated arm).
"""

from __future__ import annotations

import base64
import html
import io
import math
import string
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from .. import palette
from ..arm.model import Arm
from .preflight import PreflightResult, Series

PLOT_POINTS = 3000          # longer series are reduced to this many bins (peaks kept)
FIG_SIZE_IN = (9.0, 3.0)
DPI = 100
PLOT_NAMES = ("clearance", "speeds", "accelerations", "limits", "tcp", "sigma", "tracking",
              "timeline")

# Colours from jogwire's palette, in the variants made for white paper.
_PASS, _FAIL = palette.hex_code(palette.PASS_ON_PAPER), palette.hex_code(palette.FAIL_ON_PAPER)
_SERIES = [palette.hex_code(c) for c in palette.SERIES]
_ALLOWED = palette.hex_code(palette.ACCENT)
_COMMANDED, _MEASURED, _SIGMA, _ANGULAR = _SERIES[1], _SERIES[2], _SERIES[3], _SERIES[4]
_DAMPING = palette.hex_code(palette.INK_MUTED)
_CMD_STYLE = {"linewidth": 1.2}
_MEAS_STYLE = {"linewidth": 0.8, "linestyle": (0, (2, 2)), "alpha": 0.9}
_LIMIT_STYLE = {"color": _FAIL, "linewidth": 1.0, "linestyle": "--"}


@dataclass(frozen=True)
class ReportContext:
    """What the report says about the run besides the result."""

    arm: Arm
    profile: str
    profile_source: str
    rate_hz: float
    step_hz: float
    started_at: str
    wall_s: float
    session_log: str
    closest_picture: bytes | None = None   # PNG: the arm in its workcell at the closest approach


# ----------------------------------------------------------------------------------------
# Plots
# ----------------------------------------------------------------------------------------

def reduce_series(t: NDArray[np.float64], y: NDArray[np.float64], points: int = PLOT_POINTS,
                  how: np.ufunc = np.fmax) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """At most `points` samples: consecutive bins reduced with `how` (np.fmax keeps peaks,
    np.fmin closest approaches; both skip NaN). y may be (N,) or (N, k)."""
    n = len(t)
    if n <= points:
        return t, y
    starts = np.linspace(0, n, points + 1).astype(int)[:-1]
    return t[starts], how.reduceat(y, starts, axis=0)


def render_plots(result: PreflightResult, arm: Arm) -> dict[str, bytes]:
    """Every plot as PNG bytes, by name (PLOT_NAMES). matplotlib's object interface with
    its Agg canvas: no pyplot, no global backend, nothing left open."""
    from matplotlib.figure import Figure

    s = result.series
    makers = {"speeds": _plot_speeds, "accelerations": _plot_accels, "limits": _plot_limits,
              "tcp": _plot_tcp, "sigma": _plot_sigma, "tracking": _plot_tracking,
              "timeline": _plot_timeline, "clearance": _plot_clearance}
    out = {}
    for name in PLOT_NAMES:
        if name == "clearance" and result.cell is None:
            continue
        fig = Figure(figsize=FIG_SIZE_IN, dpi=DPI)
        ax = fig.subplots()
        # Fixed margins: an automatic layout draws every figure twice.
        fig.subplots_adjust(left=0.15 if name == "timeline" else 0.08, right=0.92, top=0.88,
                            bottom=0.16)
        makers[name](ax, s, result, arm)
        ax.set_xlim(0.0, max(result.duration_s, 1e-3))
        ax.set_xlabel("time (s)")
        ax.grid(True, linewidth=0.4, alpha=0.5)
        buf = io.BytesIO()
        fig.savefig(buf, format="png")
        out[name] = buf.getvalue()
    return out


def _joint_colors(n: int) -> list[str]:
    return [_SERIES[i % len(_SERIES)] for i in range(n)]


def _percent_plot(ax, s: Series, cmd: NDArray[np.float64], meas: NDArray[np.float64],
                  rated: NDArray[np.float64], arm: Arm, title: str) -> None:
    t1, c = reduce_series(s.t, 100.0 * cmd / rated)
    _, m = reduce_series(s.t, 100.0 * meas / rated)
    for i, (name, color) in enumerate(zip(arm.joint_names, _joint_colors(arm.n))):
        ax.plot(t1, c[:, i], color=color, label=name, **_CMD_STYLE)
        ax.plot(t1, m[:, i], color=color, **_MEAS_STYLE)
    top = max(110.0, _peak(c, m) * 1.08)
    ax.axhline(100.0, label="rated", **_LIMIT_STYLE)
    ax.axhspan(100.0, top, color=_FAIL, alpha=0.06, linewidth=0)
    ax.set_ylim(0.0, top)
    ax.set_ylabel("% of rated")
    ax.set_title(title + "  (solid: commanded, dotted: measured)", fontsize=10, loc="left")
    ax.legend(fontsize=7, ncol=min(arm.n + 1, 8), loc="upper right")


def _peak(*arrays: NDArray[np.float64]) -> float:
    """The largest finite value in any of the arrays (0 if none)."""
    values = np.concatenate([a.ravel() for a in arrays])
    values = values[np.isfinite(values)]
    return float(values.max()) if values.size else 0.0


def _plot_speeds(ax, s: Series, r: PreflightResult, arm: Arm) -> None:
    _percent_plot(ax, s, s.speed_cmd, s.speed_meas, arm.rated_speed, arm,
                  "Joint speeds against rated speed")


def _plot_accels(ax, s: Series, r: PreflightResult, arm: Arm) -> None:
    _percent_plot(ax, s, s.accel_cmd, s.accel_meas, arm.rated_accel, arm,
                  "Joint accelerations against rated acceleration (stops left out)")


def _plot_limits(ax, s: Series, r: PreflightResult, arm: Arm) -> None:
    """Revolute joints in degrees, prismatic in millimetres, on a log axis: close
    approaches are what matters."""
    scale = np.where(arm.is_revolute, 180.0 / math.pi, 1000.0)
    t1, d = reduce_series(s.t, s.limit_distance * scale, how=np.fmin)
    floor = 1e-2
    for i, (name, color) in enumerate(zip(arm.joint_names, _joint_colors(arm.n))):
        ax.plot(t1, np.maximum(d[:, i], floor), color=color, label=name, **_CMD_STYLE)
    margins = sorted(set((arm.limit_margin * scale).round(9).tolist()))
    for k, m in enumerate(margins):
        ax.axhline(max(m, floor), label="margin" if k == 0 else None, **_LIMIT_STYLE)
    ax.set_yscale("log")
    ax.set_ylim(bottom=min(floor * 5, min(margins) / 3 if margins and min(margins) > 0
                           else floor))
    unit = "deg" if arm.is_revolute.all() else ("mm" if not arm.is_revolute.any()
                                                 else "deg (revolute) / mm (prismatic)")
    ax.set_ylabel(f"distance ({unit})")
    ax.set_title("Distance to the nearer position limit", fontsize=10, loc="left")
    ax.legend(fontsize=7, ncol=min(arm.n + 1, 8), loc="lower right")


def _plot_tcp(ax, s: Series, r: PreflightResult, arm: Arm) -> None:
    t1, c = reduce_series(s.t, s.tcp_cmd)
    _, m = reduce_series(s.t, s.tcp_meas)
    _, cap = reduce_series(s.t, s.tcp_cap, how=np.fmin)
    ax.plot(t1, c, color=_COMMANDED, label="commanded", **_CMD_STYLE)
    ax.plot(t1, m, color=_MEASURED, label="measured", **_MEAS_STYLE)
    ax.step(t1, cap, where="post", label="cap", **_LIMIT_STYLE)
    top = max(_peak(c, m, cap), 1e-3) * 1.12      # the cap always in view: "against" it
    ax.set_ylim(0.0, top)
    ax.set_ylabel("TCP linear speed (m/s)")
    ax.set_title("TCP linear speed against the cap in force", fontsize=10, loc="left")
    ax.legend(fontsize=7, loc="upper right")


def _plot_sigma(ax, s: Series, r: PreflightResult, arm: Arm) -> None:
    t1, sig = reduce_series(s.t, s.sigma_min, how=np.fmin)
    _, lam = reduce_series(s.t, s.damping)
    ax.plot(t1, sig, color=_SIGMA, label="σ_min", **_CMD_STYLE)
    ax.axhline(r.damping_threshold, color=_SIGMA, linewidth=0.8, linestyle=":",
               label=f"damping starts ({r.damping_threshold:g})")
    _shade(ax, t1, np.nan_to_num(lam) > 0.0, _SIGMA, 0.08)
    ax.set_ylim(bottom=0.0)
    ax.set_ylabel("σ_min")
    twin = ax.twinx()
    twin.plot(t1, lam, color=_DAMPING, linewidth=0.9, label="damping λ")
    twin.set_ylim(0.0, max(arm.solver.damping_max, 1e-6) * 1.1)
    twin.set_ylabel("damping λ")
    lines = ax.get_legend_handles_labels()
    more = twin.get_legend_handles_labels()
    ax.legend(lines[0] + more[0], lines[1] + more[1], fontsize=7, loc="upper right")
    ax.set_title("Smallest singular value and damping (shaded: damped)", fontsize=10,
                 loc="left")


def _plot_tracking(ax, s: Series, r: PreflightResult, arm: Arm) -> None:
    t1, lin = reduce_series(s.t, 1e3 * s.tracking_linear)
    _, ang = reduce_series(s.t, np.degrees(s.tracking_angular))
    ax.plot(t1, lin, color=_COMMANDED, label="linear (mm/s)", **_CMD_STYLE)
    ax.set_ylabel("linear error (mm/s)")
    # Axes reach at least 1 % of the arm's caps, so the simulator's tiny velocity error
    # does not fill the plot.
    ax.set_ylim(bottom=0.0, top=max(_peak(lin), 10.0 * arm.tcp_max_linear_m_s) * 1.12)
    twin = ax.twinx()
    twin.plot(t1, ang, color=_ANGULAR, linewidth=0.9, label="angular (deg/s)")
    twin.set_ylabel("angular error (deg/s)")
    twin.set_ylim(bottom=0.0,
                  top=max(_peak(ang), 0.01 * math.degrees(arm.tcp_max_angular_rad_s)) * 1.12)
    lines = ax.get_legend_handles_labels()
    more = twin.get_legend_handles_labels()
    ax.legend(lines[0] + more[0], lines[1] + more[1], fontsize=7, loc="upper right")
    ax.set_title("Tracking error: commanded vs measured twist (limits' slowing included)",
                 fontsize=10, loc="left")


def _plot_timeline(ax, s: Series, r: PreflightResult, arm: Arm) -> None:
    rows = [("motion allowed", s.allowed, _ALLOWED),
            ("damping active", s.damping > 0.0, _SIGMA)]
    colors = _joint_colors(len(s.binding_names) + 1)
    rows += [(name, s.binding == k, colors[k + 1]) for k, name in enumerate(s.binding_names)]
    dt = 1.0 / r.rate_hz
    for y, (_, mask, color) in enumerate(rows):
        ax.broken_barh(_spans(s.t, mask, dt), (y - 0.35, 0.7), color=color, linewidth=0)
    for stop in r.stops:
        ax.axvline(stop.t_s, color=_FAIL, linewidth=0.8, linestyle=":")
    ax.set_yticks(range(len(rows)), [label for label, _, _ in rows], fontsize=8)
    ax.set_ylim(-0.6, len(rows) - 0.4)
    ax.invert_yaxis()
    ax.set_title("When motion was allowed, damped, and which limit bound (dotted: stops)",
                 fontsize=10, loc="left")


def _plot_clearance(ax, s: Series, r: PreflightResult, arm: Arm) -> None:
    """The nearest pairs in mm against d_s and d_i; red marks where the simulated arm
    reported contact. The axis stops a little above d_i: farther than that nothing acts."""
    c = r.cell
    mm = 1e3
    t1, d = reduce_series(c.t, c.plotted_distance_m * mm, how=np.fmin)
    for i, ((a, b), color) in enumerate(zip(c.plotted, _joint_colors(len(c.plotted)))):
        ax.plot(t1, d[:, i], color=color, label=f"{a}–{b}", **_CMD_STYLE)
    ax.axhline(c.safety_m * mm, label=f"safety d_s {c.safety_m * mm:g} mm", **_LIMIT_STYLE)
    ax.axhline(c.influence_m * mm, color="#8a8a8a", linewidth=0.9, linestyle=":",
               label=f"influence d_i {c.influence_m * mm:g} mm")
    for e in c.contacts:
        ax.plot([e.t_s], [0.0], marker="x", color=_FAIL, markersize=8, linestyle="none",
                label=f"contact {e.pair}")
    low = min(0.0, _low(d)) * 1.1
    top = max(1.6 * c.influence_m * mm, 1.2 * (c.min_clearance_m or 0.0) * mm)
    ax.axhspan(low, c.safety_m * mm, color=_FAIL, alpha=0.06, linewidth=0)
    ax.set_ylim(low, top)
    ax.set_ylabel("distance (mm)")
    ax.set_title(f"Clearance in workcell {c.cell}: the nearest pairs (measured pose)",
                 fontsize=10, loc="left")
    ax.legend(fontsize=7, loc="lower left", ncol=2)


def _low(values: NDArray[np.float64]) -> float:
    finite = values[np.isfinite(values)]
    return float(finite.min()) if finite.size else 0.0


def _spans(t: NDArray[np.float64], mask: NDArray[np.bool_], dt: float
           ) -> list[tuple[float, float]]:
    """(start, width) of each run of True in mask."""
    if not mask.any():
        return []
    m = np.concatenate(([False], mask, [False])).astype(np.int8)
    starts = np.flatnonzero(np.diff(m) == 1)
    ends = np.flatnonzero(np.diff(m) == -1)
    return [(float(t[a]), float(t[b - 1] - t[a] + dt)) for a, b in zip(starts, ends)]


def _shade(ax, t: NDArray[np.float64], mask: NDArray[np.bool_], color: str, alpha: float
           ) -> None:
    dt = float(t[1] - t[0]) if len(t) > 1 else 0.0
    for start, width in _spans(t, mask, dt):
        ax.axvspan(start, start + width, color=color, alpha=alpha, linewidth=0)


# ----------------------------------------------------------------------------------------
# HTML
# ----------------------------------------------------------------------------------------

_CSS = string.Template("""
body { font: 14px/1.45 system-ui, sans-serif; margin: 24px auto; max-width: 980px;
       color: $ink; padding: 0 16px; }
h1 { font-size: 22px; margin: 0 0 4px; } h2 { font-size: 17px; margin: 28px 0 8px; }
.verdict { display: inline-block; padding: 4px 14px; border-radius: 4px; color: #fff;
           font-weight: 600; letter-spacing: .04em; }
.meta { color: $muted; font-size: 13px; }
table { border-collapse: collapse; font-size: 13px; margin: 6px 0; }
th, td { padding: 3px 10px; border-bottom: 1px solid #e0e0e0; text-align: right; }
th { background: #f4f5f7; font-weight: 600; }
td:first-child, th:first-child { text-align: left; }
td.over { color: $fail; font-weight: 600; }
ul { margin: 4px 0 4px 20px; padding: 0; } li { margin: 2px 0; }
.reasons li { color: $fail; }
img { display: block; max-width: 100%; margin: 6px 0 18px; border: 1px solid #eee; }
.caution { margin-top: 32px; padding: 10px 14px; background: #fff8e1; font-size: 13px;
           border-left: 4px solid $warn; }
""").substitute(
    ink=palette.hex_code(palette.INK), muted=palette.hex_code(palette.INK_MUTED), fail=_FAIL,
    warn=palette.hex_code(palette.WARN))


def write_report(path: str | Path, result: PreflightResult, ctx: ReportContext) -> Path:
    """Render the plots and write the report; returns the path."""
    path = Path(path)
    plots = render_plots(result, ctx.arm)
    path.write_text(render_html(result, ctx, plots), encoding="utf-8")
    return path


def render_html(r: PreflightResult, ctx: ReportContext, plots: dict[str, bytes]) -> str:
    e = html.escape
    arm = ctx.arm
    color = _PASS if r.passed else _FAIL
    speed = r.duration_s / ctx.wall_s if ctx.wall_s else math.inf
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>preflight {e(arm.name)} / {e(ctx.profile)}: {e(r.verdict)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>Preflight: {e(arm.name)} / {e(ctx.profile)} "
        f"<span class='verdict' style='background:{color}'>{e(r.verdict.upper())}</span></h1>",
        f"<p class='meta'>{e(ctx.started_at)} · profile {e(ctx.profile_source)} · "
        f"{r.duration_s:.2f} s of motion, {r.cycles} cycles at {ctx.rate_hz:g} Hz, physics "
        f"{ctx.step_hz:g} Hz · {'reduced speed locked on · ' if r.reduced else ''}"
        f"{speed:.1f}× real time · session log {e(ctx.session_log)}</p>",
    ]
    if r.findings:
        parts.append("<h2>Why it fails</h2><ul class='reasons'>"
                     + "".join(f"<li>{e(f.message)}</li>" for f in r.findings) + "</ul>")
    else:
        clear = "" if r.cell is None else (
            f", and every part of the arm at least the safety distance "
            f"({1e3 * r.cell.safety_m:g} mm) from the workcell {e(r.cell.cell)}, with no contact")
        parts.append("<p>Every joint stayed within its rated speed and acceleration and "
                     f"clear of its position limits, and the TCP within its cap{clear}.</p>")
    if r.cell is not None:
        parts.append("<h2>Workcell</h2>" + _cell_section(r, ctx))
    parts.append("<h2>Joints</h2>" + _joint_table(r, arm))
    parts.append("<h2>Tool</h2>" + _tcp_table(r))
    if r.notes:
        parts.append("<h2>Notes</h2><ul>" + "".join(f"<li>{e(n)}</li>" for n in r.notes)
                     + "</ul>")
    if r.limit_episodes:
        parts.append("<h2>Binding-limit episodes</h2>" + _episode_table(r))
    parts.append("<h2>Plots</h2>")
    for name in PLOT_NAMES:
        if name in plots:
            data = base64.b64encode(plots[name]).decode("ascii")
            parts.append(f"<img alt='{name}' src='data:image/png;base64,{data}'>")
    parts.append(
        "<p class='caution'>A preflight run shows what jogwire commands and how a simulated "
        "arm follows it. Software limits are not safety functions: a real arm needs a "
        "safety-rated stop, an enabling device and a risk assessment, and local codes and "
        "licensed practice come first (docs/SAFETY.md).</p></body></html>")
    return "\n".join(parts)


def _cell_section(r: PreflightResult, ctx: ReportContext) -> str:
    """The closest approach, the contacts and the picture of the arm at that moment."""
    c, e = r.cell, html.escape
    rows = [("workcell", c.cell),
            ("safety distance d_s / influence distance d_i",
             f"{1e3 * c.safety_m:.1f} / {1e3 * c.influence_m:.1f} mm")]
    if c.min_clearance_m is not None:
        rows.append(("closest approach", f"{c.pair[0]}–{c.pair[1]} "
                     f"{1e3 * c.min_clearance_m:.1f} mm at t = {c.min_clearance_t_s:.2f} s"))
    rows.append(("contacts (simulated arm)", "not measured" if not c.contacts_measured else
                 "none" if not c.contacts else
                 "; ".join(f"{x.pair} from t = {x.t_s:.2f} s, {1e3 * x.depth_m:.1f} mm deep, "
                           f"{x.cycles} cycles" for x in c.contacts)))
    table = "<table>" + "".join(f"<tr><td>{e(a)}</td><td>{e(b)}</td></tr>" for a, b in rows) \
        + "</table>"
    if ctx.closest_picture is None:
        return table
    data = base64.b64encode(ctx.closest_picture).decode("ascii")
    caption = "" if c.min_clearance_t_s is None else \
        f"The arm at the closest approach, t = {c.min_clearance_t_s:.2f} s (measured pose)."
    return table + f"<img alt='closest approach' src='data:image/png;base64,{data}'>" \
        f"<p class='meta'>{e(caption)}</p>"


def _joint_table(r: PreflightResult, arm: Arm) -> str:
    head = ("<table><tr><th>joint</th><th>unit</th><th>peak speed<br>cmd / meas</th>"
            "<th>max</th><th>rated</th><th>of rated</th><th>peak accel<br>cmd / meas</th>"
            "<th>max</th><th>rated</th><th>of rated</th><th>closest to limit</th>"
            "<th>margin</th></tr>")
    rows = []
    failed = {(f.joint, f.code) for f in r.findings}
    for j, rep in zip(arm.joints, r.joints):
        k = 180.0 / math.pi if j.is_revolute else 1.0
        unit = "deg" if j.is_revolute else "m"
        nd = 2 if j.is_revolute else 4

        def cell(text: str, bad: bool) -> str:
            return f"<td class='over'>{text}</td>" if bad else f"<td>{text}</td>"
        speed_bad = (j.name, "rated_speed") in failed
        accel_bad = (j.name, "rated_accel") in failed
        limit_bad = (j.name, "position_limit") in failed
        rows.append(
            f"<tr><td>{html.escape(j.name)}</td><td>{unit}</td>"
            + cell(f"{rep.peak_speed * k:.{nd}f} / {rep.peak_speed_measured * k:.{nd}f}",
                   speed_bad)
            + f"<td>{rep.max_speed * k:.{nd}f}</td><td>{rep.rated_speed * k:.{nd}f}</td>"
            + cell(f"{100 * max(rep.peak_speed, rep.peak_speed_measured) / rep.rated_speed:.0f} %",
                   speed_bad)
            + cell(f"{rep.peak_accel * k:.1f} / {rep.peak_accel_measured * k:.1f}", accel_bad)
            + f"<td>{rep.max_accel * k:.1f}</td><td>{rep.rated_accel * k:.1f}</td>"
            + cell(f"{100 * max(rep.peak_accel, rep.peak_accel_measured) / rep.rated_accel:.0f} %",
                   accel_bad)
            + cell(f"{rep.min_limit_distance * k:.{nd}f} ({rep.limit_side})", limit_bad)
            + f"<td>{rep.limit_margin * k:.{nd}f}</td></tr>")
    return head + "".join(rows) + "</table>" + \
        "<p class='meta'>Speeds per second, accelerations per second²; max = the software " \
        "limit jogwire commands, rated = the hardware rating preflight proves against.</p>"


def _tcp_table(r: PreflightResult) -> str:
    cap = f"{r.tcp_cap:.3f} m/s" + (" (reduced speed, ISO 10218-1)" if r.reduced else "")
    rows = [("TCP linear speed, peak commanded / measured",
             f"{r.tcp_peak_speed:.3f} / {r.tcp_peak_speed_measured:.3f} m/s"),
            ("cap", cap)]
    if r.tcp_peak_speed_reduced is not None and not r.reduced:
        rows.append(("peak in reduced-speed segments (cap 0.25 m/s)",
                     f"{r.tcp_peak_speed_reduced:.3f} m/s"))
    rows += [("TCP angular speed, peak commanded",
              f"{math.degrees(r.tcp_peak_angular_speed):.1f} deg/s "
              f"(cap {math.degrees(r.tcp_angular_cap):.1f})"),
             ("lowest σ_min", "—" if r.min_sigma is None else
              f"{r.min_sigma:.4g} at t = {r.min_sigma_t_s:.2f} s"),
             ("time under damping", f"{r.time_damped_s:.2f} s of {r.time_enabled_s:.2f} s "
                                    "enabled"),
             ("tracking error, linear peak / RMS",
              f"{1e3 * r.tracking_linear_peak:.1f} / {1e3 * r.tracking_linear_rms:.1f} mm/s"),
             ("tracking error, angular peak", f"{math.degrees(r.tracking_angular_peak):.2f} "
                                             "deg/s"),
             ("following error (rates sent vs measured), linear peak",
              f"{1e3 * r.following_linear_peak:.2f} mm/s")]
    return "<table>" + "".join(f"<tr><td>{html.escape(a)}</td><td>{html.escape(b)}</td></tr>"
                               for a, b in rows) + "</table>"


def _episode_table(r: PreflightResult, most: int = 40) -> str:
    rows = "".join(f"<tr><td>{html.escape(e.limit)}</td><td>{e.t_start_s:.3f}</td>"
                   f"<td>{e.t_end_s:.3f}</td><td>{e.cycles}</td></tr>"
                   for e in r.limit_episodes[:most])
    more = len(r.limit_episodes) - most
    tail = f"<p class='meta'>… and {more} more episodes.</p>" if more > 0 else ""
    return ("<table><tr><th>limit</th><th>from (s)</th><th>to (s)</th><th>cycles</th></tr>"
            + rows + "</table>" + tail)
