"""The status window: what the operator needs to see while jogging, drawn with pygame.

It renders from a plain `StatusSnapshot` (numbers and strings, no solver or socket objects),
so anything can feed it and a test can draw one frame to a PNG (`render_png`).

Threads. SDL wants its window and event queue on the main thread, so the window runs
there: `StatusWindow.run` pumps pygame's events every few milliseconds (handing each to
the input sources, so pad latency stays low) and redraws at about 30 Hz from the newest
snapshot, which the control loop (in its own thread) publishes by replacing one reference.
The window never blocks the loop: it only reads, and it hands the GIL over between the
pieces of a frame (`draw_status(pause=...)`) and keeps the switch interval short while it
runs, so the control thread waits for at most one short piece (bench_status_window.py).

Layout (ours): a header with the gate's state and the reason; a line of operating
settings; joints on the left (position within limits, speed against the software and
rated limits); on the right the arm seen from above and from the side, then solver, link
and loop figures.
"""

from __future__ import annotations

import math
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .. import palette
from ..arm.kinematics import joint_frames
from ..arm.model import Arm
from ..control.loop import TimingStats
from ..control.safety import STALE_AFTER_S
from .cell_outlines import CellOutlines
from .inputs.pygame_init import init_events, init_fonts, pygame

SIZE = (1120, 720)
ARM_PANEL_TITLE = "arm (measured)   top · side"

# Colours: jogwire's palette (runtime/palette.py), shared with the sim, URDF and report.
GROUND, PANEL, TRACK, LINE = palette.GROUND, palette.PANEL, palette.TRACK, palette.LINE
TEXT, MUTED = palette.TEXT, palette.MUTED
GOOD, WARN, BAD = palette.GOOD, palette.WARN, palette.BAD
STATE_COLOURS = palette.STATE_COLOURS
CELL_OBJECT, CELL_FLOOR = palette.CELL_OBJECT, palette.CELL_FLOOR
CLEARANCE_LINE, CLEARANCE_WARN, CLEARANCE_STOP = (palette.CLEARANCE_LINE,
                                                  palette.CLEARANCE_WARN,
                                                  palette.CLEARANCE_STOP)


@dataclass(frozen=True, eq=False)
class StatusSnapshot:
    """Everything the window shows, as plain values. SI units (rad, m, s).

    q: measured joint positions (None before the first state arrives).
    rates: joint rates commanded this cycle. twist: the commanded TCP twist (6,).
    speed_m_s: full-stick linear speed of the current preset (after reduced speed).
    direct: the input sends twists itself (script, network): no preset applies.
    state_age_s / rtt_s: age of the newest arm state; command → state round trip.
    cell: the workcell's outlines (None: no workcell). clearance_m, clearance_pair,
    clearance_points: the nearest pair at the measured pose, its distance (m) and its two
    witness points (2, 3) in the base frame; contacts: pairs the arm side reports touching.
    """

    arm: Arm
    q: NDArray[np.float64] | None = None
    rates: NDArray[np.float64] | None = None
    twist: NDArray[np.float64] | None = None
    allowed: bool = False
    gate_state: str = "ready"
    gate_reason: str = ""
    input_name: str = ""
    mode: str = "cartesian"
    frame: str = "base"
    preset: int = 0
    speed_fraction: float = 0.0
    speed_m_s: float = 0.0
    direct: bool = False
    reduced: bool = False
    joint: int = 0
    sigma_min: float | None = None
    manipulability: float | None = None
    damping: float | None = None
    binding_limit: str | None = None
    target: str = ""
    connected: bool = False
    state_age_s: float | None = None
    stale_after_s: float = STALE_AFTER_S
    rtt_s: float | None = None
    timing: TimingStats | None = None
    elapsed_s: float = 0.0
    note: str = ""
    cell: CellOutlines | None = None
    clearance_m: float | None = None
    clearance_pair: tuple[str, str] | None = None
    clearance_points: NDArray[np.float64] | None = None
    contacts: tuple[tuple[str, str], ...] = ()

    @property
    def clearance_binds(self) -> bool:
        return (self.binding_limit or "").startswith("clearance")


# ----------------------------------------------------------------------------------------
# Drawing helpers
# ----------------------------------------------------------------------------------------

@lru_cache(maxsize=None)
def _font(size: int, bold: bool = False) -> pygame.font.Font:
    init_fonts()
    f = pygame.font.Font(None, size)
    f.set_bold(bold)
    return f


@lru_cache(maxsize=2048)
def _fit(text: str, size: int, bold: bool, max_width: int) -> str:
    """`text`, cut and ended with an ellipsis if it is wider than max_width pixels."""
    font = _font(size, bold)
    if font.size(text)[0] <= max_width:
        return text
    while text and font.size(text + "…")[0] > max_width:
        text = text[:-1]
    return text + "…"


@lru_cache(maxsize=2048)
def _rendered(text: str, size: int, colour: tuple[int, int, int], bold: bool) -> pygame.Surface:
    # Most labels repeat every frame; rendering a string costs ~0.1 ms with the GIL held.
    return _font(size, bold).render(text, True, colour)


def _text(surf: pygame.Surface, text: str, pos: tuple[int, int], size: int = 20,
          colour: tuple[int, int, int] = TEXT, *, bold: bool = False, anchor: str = "topleft",
          max_width: int | None = None) -> pygame.Rect:
    if max_width is not None:
        text = _fit(text, size, bold, max_width)
    img = _rendered(text, size, colour, bold)
    rect = img.get_rect(**{anchor: pos})
    surf.blit(img, rect)
    return rect


def _mix(a: tuple[int, int, int], b: tuple[int, int, int], t: float) -> tuple[int, int, int]:
    return tuple(int(round(x + (y - x) * t)) for x, y in zip(a, b))  # type: ignore[return-value]


def _fmt_joint(value: float, revolute: bool, rate: bool = False) -> str:
    if revolute:
        return f"{math.degrees(value):+7.1f}°" + ("/s" if rate else "")
    return f"{value * 1e3:+7.1f} mm" + ("/s" if rate else "")


def _ms(x: float | None) -> str:
    return "—" if x is None else f"{x * 1e3:.2f} ms"


# ----------------------------------------------------------------------------------------
# Layout. Everything that does not change while one arm is shown (panels, labels, tracks,
# limits, grids) is drawn once into a background; a frame blits it and draws the values.
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class _JointRow:
    y: int
    position: pygame.Rect
    speed: pygame.Rect


class _Layout:
    def __init__(self, size: tuple[int, int], arm: Arm) -> None:
        W, H = size
        self.size = size
        self.width = W
        top = 128
        left_w = int(W * 0.50)
        rx, rw = left_w + 2, W - left_w - 18
        view_h = int((H - top) * 0.44)
        half = (rw - 10) // 2
        y2 = top + view_h + 10
        panel_h = 150
        self.joints = pygame.Rect(16, top, left_w - 24, H - top - 16)
        self.arm = pygame.Rect(rx, top, rw, view_h)
        self.solver = pygame.Rect(rx, y2, half, panel_h)
        self.link = pygame.Rect(rx + half + 10, y2, rw - half - 10, panel_h)
        self.loop = pygame.Rect(rx, y2 + panel_h + 10, rw, H - y2 - panel_h - 26)
        # joints
        inner = _inner(self.joints)
        self.joints_inner = inner
        self.row_h = min(78, inner.h // max(arm.n, 1))
        self.name_w, self.value_w = 118, 104
        bar_x, bar_w = inner.x + self.name_w, inner.w - self.name_w - self.value_w
        self.rows = [_JointRow(y, pygame.Rect(bar_x, y + 6, bar_w, 14),
                               pygame.Rect(bar_x, y + 30, bar_w, 10))
                     for y in (inner.y + i * self.row_h for i in range(arm.n))]
        # arm views: top (x, y) and side (x, z), base at the centre (side: a bit lower)
        ai = _inner(self.arm)
        gap = 14
        w, h = (ai.w - gap) // 2, ai.h - 24
        self.views = [(pygame.Rect(ai.x, ai.y, w, h), (0, 1), "top: x right, y up"),
                      (pygame.Rect(ai.x + w + gap, ai.y, w, h), (0, 2), "side: x right, z up")]
        self.view_scale = 0.45 * min(w, h) / _reach_m(arm)
        self.command = pygame.Rect(ai.x, ai.bottom - 18, ai.w, 18)

    @staticmethod
    def view_centre(rect: pygame.Rect, axes: tuple[int, int]) -> tuple[int, int]:
        return rect.centerx, rect.centery + (rect.h // 6 if axes[1] == 2 else 0)

    def view_mapper(self, rect: pygame.Rect, axes: tuple[int, int], arm: Arm
                    ) -> Callable[[NDArray[np.float64]], tuple[int, int]]:
        """Base-frame metres (a 3-D point, or a 2-D one already in the view's axes) →
        pixels in one view; the arm's base sits at the view's centre."""
        cx, cy = self.view_centre(rect, axes)
        a, b = axes
        ox, oy = float(arm.base[a, 3]), float(arm.base[b, 3])
        scale = self.view_scale

        def px(p: NDArray[np.float64]) -> tuple[int, int]:
            x, y = (p[0], p[1]) if len(p) == 2 else (p[a], p[b])
            return int(cx + scale * (x - ox)), int(cy - scale * (y - oy))
        return px


def _inner(rect: pygame.Rect) -> pygame.Rect:
    """The content area of a panel (below its title)."""
    return rect.inflate(-24, -34).move(0, 11)


def _panel(surf: pygame.Surface, rect: pygame.Rect, title: str) -> None:
    pygame.draw.rect(surf, PANEL, rect, border_radius=6)
    _text(surf, title.upper(), (rect.x + 12, rect.y + 8), 17, MUTED, bold=True)


@lru_cache(maxsize=16)
def _reach_m(arm: Arm) -> float:
    """Sum of the distances along the chain at home (plus prismatic travel): the view scale."""
    frames, T = joint_frames(arm, arm.home())
    pts = np.vstack([arm.base[:3, 3], frames[:, :3, 3], T[:3, 3]])
    reach = float(np.linalg.norm(np.diff(pts, axis=0), axis=1).sum())
    travel = np.where(arm.is_revolute, 0.0, np.maximum(np.abs(arm.lower), np.abs(arm.upper)))
    return max(reach + float(travel.sum()), 0.1)


@lru_cache(maxsize=8)
def _background(size: tuple[int, int], arm: Arm, cell: CellOutlines | None = None
                ) -> tuple[pygame.Surface, _Layout]:
    L = _Layout(size, arm)
    surf = pygame.Surface(size)
    surf.fill(GROUND)
    _panel(surf, L.joints, "joints   position within limits · speed against limits")
    _panel(surf, L.arm, ARM_PANEL_TITLE)
    _panel(surf, L.solver, "solver")
    _panel(surf, L.link, "link")
    _panel(surf, L.loop, "loop")
    inner = L.joints_inner
    for i, (j, row) in enumerate(zip(arm.joints, L.rows)):
        _text(surf, j.name, (inner.x, row.y + 4), 20, TEXT, max_width=L.name_w - 8)
        _text(surf, f"J{i + 1} · {'revolute' if j.is_revolute else 'prismatic'}",
              (inner.x, row.y + 25), 16, MUTED)
        pos, spd = row.position, row.speed
        pygame.draw.rect(surf, TRACK, pos, border_radius=3)
        span = j.upper - j.lower
        if math.isfinite(span) and span > 0:
            mw = max(2, int(pos.w * float(arm.limit_margin[i]) / span))
            shade = _mix(TRACK, BAD, 0.55)
            pygame.draw.rect(surf, shade, (pos.x, pos.y, mw, pos.h))
            pygame.draw.rect(surf, shade, (pos.right - mw, pos.y, mw, pos.h))
            zero = -j.lower / span
            if 0.0 < zero < 1.0:
                zx = pos.x + int(zero * pos.w)
                pygame.draw.line(surf, LINE, (zx, pos.y - 2), (zx, pos.bottom + 1))
        # speed: the centre is zero, the ends the rated speed; ticks at the software limit
        pygame.draw.rect(surf, TRACK, spd, border_radius=3)
        tick = int(spd.w / 2 * min(j.max_speed / j.rated_speed, 1.0))
        for tx in (spd.centerx - tick, spd.centerx + tick):
            pygame.draw.line(surf, MUTED, (tx, spd.y - 3), (tx, spd.bottom + 2), 2)
        pygame.draw.line(surf, LINE, (spd.centerx, spd.y - 2), (spd.centerx, spd.bottom + 1))
        if L.row_h >= 60:
            f = _fmt_joint
            _text(surf, f"limits {f(j.lower, j.is_revolute).strip()} … "
                        f"{f(j.upper, j.is_revolute).strip()}   speed ≤ "
                        f"{f(j.max_speed, j.is_revolute, True).strip()} "
                        f"(rated {f(j.rated_speed, j.is_revolute, True).strip()})",
                  (pos.x, row.y + 45), 16, MUTED, max_width=pos.w + L.value_w)
    step = 0.1 * L.view_scale  # a 0.1 m grid gives the eye a scale
    for rect, axes, _ in L.views:
        pygame.draw.rect(surf, GROUND, rect, border_radius=4)
        cx, cy = L.view_centre(rect, axes)
        if step >= 6:
            k = int(max(rect.w, rect.h) / step) + 1
            for m in range(-k, k + 1):
                gx, gy = int(cx + m * step), int(cy + m * step)
                if rect.left + 2 < gx < rect.right - 2:
                    pygame.draw.line(surf, PANEL, (gx, rect.top + 2), (gx, rect.bottom - 3))
                if rect.top + 2 < gy < rect.bottom - 2:
                    pygame.draw.line(surf, PANEL, (rect.left + 2, gy), (rect.right - 3, gy))
        if axes[1] == 2:
            pygame.draw.line(surf, LINE, (rect.left + 6, cy), (rect.right - 6, cy), 2)
        if cell is not None:
            _draw_cell(surf, cell, rect, axes, L.view_mapper(rect, axes, arm))
    return surf, L


def _draw_cell(surf: pygame.Surface, cell: CellOutlines, rect: pygame.Rect, axes,
               px: Callable[[NDArray[np.float64]], tuple[int, int]]) -> None:
    """The workcell's objects in one view: solids as filled outlines, half-spaces seen
    edge-on as a line with short strokes on their solid side."""
    clip = surf.get_clip()
    surf.set_clip(rect.inflate(-4, -4))
    for _, point, normal in cell.halfplanes[axes]:
        along = np.array([-normal[1], normal[0]])
        span = 4.0 * max(rect.w, rect.h)            # metres enough to cross the view
        a, b = px(point - span * along), px(point + span * along)
        pygame.draw.line(surf, CELL_FLOOR, a, b, 3)
        n_px = np.array([normal[0], -normal[1]])     # screen y points down
        step = 14
        length = math.hypot(b[0] - a[0], b[1] - a[1])
        for k in range(int(length // step)):
            t = k * step / length
            x0, y0 = a[0] + t * (b[0] - a[0]), a[1] + t * (b[1] - a[1])
            pygame.draw.line(surf, CELL_FLOOR, (x0, y0),
                             (x0 - 8 * n_px[0] - 6 * n_px[1], y0 - 8 * n_px[1] + 6 * n_px[0]), 1)
    for name, polygon in cell.polygons[axes]:
        screen = [px(p) for p in polygon]
        if len(screen) >= 3:
            pygame.draw.polygon(surf, _mix(GROUND, CELL_OBJECT, 0.45), screen)
            pygame.draw.polygon(surf, CELL_OBJECT, screen, 2)
            xs, ys = zip(*screen)
            label = _rendered(name, 15, _mix(CELL_OBJECT, TEXT, 0.4), False)
            if max(xs) - min(xs) > label.get_width() + 4:    # named where the name fits
                surf.blit(label, label.get_rect(center=(sum(xs) // len(xs),
                                                        sum(ys) // len(ys))))
    if cell.keep_in is not None:
        screen = [px(p) for p in cell.keep_in[axes]]
        if len(screen) >= 3:
            pygame.draw.polygon(surf, _mix(CELL_OBJECT, TEXT, 0.3), screen, 1)
    surf.set_clip(clip)


# ----------------------------------------------------------------------------------------
# Values, drawn every frame
# ----------------------------------------------------------------------------------------

def _header(surf: pygame.Surface, s: StatusSnapshot, width: int) -> None:
    colour = STATE_COLOURS.get(s.gate_state, LINE)
    box = pygame.Rect(16, 14, 200, 60)
    pygame.draw.rect(surf, colour, box, border_radius=8)
    _text(surf, s.gate_state.upper(), box.center, 36, GROUND, bold=True, anchor="center")
    reason = s.gate_reason or ("motion allowed" if s.allowed else "")
    _text(surf, reason, (232, 18), 28, TEXT, max_width=width - 232 - 250)
    _text(surf, f"input: {s.input_name or '—'}", (232, 52), 19, MUTED,
          max_width=width - 232 - 250)
    _text(surf, s.arm.name, (width - 16, 18), 26, TEXT, bold=True, anchor="topright")
    _text(surf, f"session {s.elapsed_s:7.1f} s", (width - 16, 52), 19, MUTED,
          anchor="topright")


def _settings_line(surf: pygame.Surface, s: StatusSnapshot, y: int, width: int) -> None:
    if s.direct:
        v = 0.0 if s.twist is None else float(np.linalg.norm(s.twist[:3]))
        speed = f"as sent ({v * 1e3:.0f} mm/s)"
    else:
        speed = f"{100 * s.speed_fraction:.0f} %  ({s.speed_m_s * 1e3:.0f} mm/s)"
    chips = [("mode", s.mode, None), ("frame", s.frame, None), ("speed", speed, None),
             ("reduced", "ON" if s.reduced else "off", WARN if s.reduced else None)]
    if s.mode == "joint":
        chips.append(("joint", s.arm.joint_names[s.joint], STATE_COLOURS["ready"]))
    if s.note:
        chips.append(("", s.note, None))
    x = 16
    for label, value, accent in chips:
        lw = _rendered(label.upper(), 17, MUTED, True).get_width() + 8 if label else 0
        vw = _rendered(value, 21, TEXT, False).get_width()
        rect = pygame.Rect(x, y, lw + vw + 22, 30)
        if rect.right > width - 16:
            break
        pygame.draw.rect(surf, PANEL, rect, border_radius=15)
        if accent:
            pygame.draw.rect(surf, accent, rect, width=2, border_radius=15)
        if label:
            _text(surf, label.upper(), (x + 11, y + 8), 17, MUTED, bold=True)
        _text(surf, value, (x + 11 + lw, y + 7), 21, TEXT)
        x += rect.w + 10


def _joints(surf: pygame.Surface, s: StatusSnapshot, L: _Layout,
            pause: Callable[[], object]) -> None:
    inner = L.joints_inner
    for i, (j, row) in enumerate(zip(s.arm.joints, L.rows)):
        pause()
        if s.mode == "joint" and i == s.joint:  # the jogged joint's name stands out
            pygame.draw.rect(surf, PANEL, (inner.x, row.y + 2, L.name_w - 4, 22))
            _text(surf, j.name, (inner.x, row.y + 4), 20, STATE_COLOURS["ready"], bold=True,
                  max_width=L.name_w - 8)
        pos, spd = row.position, row.speed
        span = j.upper - j.lower
        if s.q is not None and math.isfinite(span) and span > 0:
            qi = float(s.q[i])
            margin = float(s.arm.limit_margin[i])
            near = min(qi - j.lower, j.upper - qi) < 3 * margin
            mx = pos.x + int(min(max((qi - j.lower) / span, 0.0), 1.0) * pos.w)
            pygame.draw.rect(surf, WARN if near else TEXT,
                             (mx - 3, pos.y - 3, 6, pos.h + 6), border_radius=2)
            _text(surf, _fmt_joint(qi, j.is_revolute), (inner.right, row.y + 4), 19,
                  WARN if near else TEXT, anchor="topright")
        else:
            _text(surf, "—", (inner.right, row.y + 4), 19, MUTED, anchor="topright")
        if s.rates is not None:
            r = float(s.rates[i])
            w = int(spd.w / 2 * min(abs(r) / j.rated_speed, 1.0))
            colour = BAD if abs(r) > j.max_speed * 1.0001 else \
                WARN if abs(r) > 0.9 * j.max_speed else GOOD
            if w > 0:
                pygame.draw.rect(surf, colour, (spd.centerx if r > 0 else spd.centerx - w,
                                                spd.y, w, spd.h), border_radius=2)
            _text(surf, _fmt_joint(r, j.is_revolute, rate=True), (inner.right, row.y + 27),
                  16, MUTED, anchor="topright")


def _arm_view(surf: pygame.Surface, s: StatusSnapshot, L: _Layout) -> None:
    _command_line(surf, s, L.command)
    if s.q is not None:
        _draw_chain(surf, s, L)
    if s.cell is not None:
        _draw_clearance(surf, s, L)
    for rect, _, label in L.views:
        lw, lh = _rendered(label, 16, MUTED, False).get_size()
        pygame.draw.rect(surf, GROUND, (rect.x + 4, rect.bottom - 24, lw + 8, lh + 6))
        _text(surf, label, (rect.x + 8, rect.bottom - 21), 16, MUTED)
        if s.q is None:
            _text(surf, "no arm state", rect.center, 20, MUTED, anchor="center")


def _draw_chain(surf: pygame.Surface, s: StatusSnapshot, L: _Layout) -> None:
    """The link chain from the measured pose, in each orthographic view."""
    frames, T = joint_frames(s.arm, np.asarray(s.q, dtype=float))
    base = s.arm.base[:3, 3]
    pts = np.vstack([base, frames[:, :3, 3], T[:3, 3]])
    tool_end = T[:3, 3] + T[:3, 2] * 0.08 * _reach_m(s.arm)  # the tool's z axis
    scale = L.view_scale
    clip = surf.get_clip()
    for rect, (a, b), _ in L.views:
        cx, cy = L.view_centre(rect, (a, b))

        def px(p: NDArray[np.float64]) -> tuple[int, int]:
            return int(cx + scale * (p[a] - base[a])), int(cy - scale * (p[b] - base[b]))

        surf.set_clip(rect)
        screen = [px(p) for p in pts]
        # As the simulated arm looks: light links, dark housings, the tool in the accent.
        pygame.draw.rect(surf, palette.ARM_HOUSING, (screen[0][0] - 9, screen[0][1] - 5, 18, 10),
                         border_radius=2)
        pygame.draw.lines(surf, palette.ARM_LINK, False, screen, 4)
        for p in screen[1:-1]:
            pygame.draw.circle(surf, palette.ARM_HOUSING, p, 6)
            pygame.draw.circle(surf, palette.ARM_LINK, p, 6, 2)
        pygame.draw.line(surf, palette.TOOL, screen[-1], px(tool_end), 3)
        pygame.draw.circle(surf, palette.TOOL, screen[-1], 6)
    surf.set_clip(clip)
    tcp = T[:3, 3]
    _text(surf, f"TCP  x {tcp[0]:+.3f}  y {tcp[1]:+.3f}  z {tcp[2]:+.3f} m",
          (L.views[1][0].right, L.views[0][0].y - 25), 17, MUTED, anchor="topright")


def clearance_fields(found: Any) -> dict[str, Any]:
    """StatusSnapshot's clearance fields from a `runtime.arm.distance.Clearances`: the
    nearest pair, its distance and witness points (nothing without any pair)."""
    i = found.nearest()
    if i is None:
        return {}
    return {"clearance_m": float(found.distances[i]), "clearance_pair": found.pairs[i],
            "clearance_points": np.array([found.points_arm[i], found.points_other[i]])}


def clearance_colour(s: StatusSnapshot) -> tuple[int, int, int]:
    """Red at or below the safety distance (or touching), amber inside the influence
    distance (the damper is acting), muted while clear."""
    c, d = s.cell, s.clearance_m
    if s.contacts or (d is not None and c is not None and d <= c.safety_m):
        return CLEARANCE_STOP
    if d is not None and c is not None and d < c.influence_m:
        return CLEARANCE_WARN
    return CLEARANCE_LINE


def clearance_text(s: StatusSnapshot) -> str:
    """"nearest tool–bench 23.4 mm", with the contacts first when there are any."""
    parts = [f"CONTACT {a}–{b}" for a, b in s.contacts[:2]]
    if s.clearance_m is not None and s.clearance_pair is not None:
        a, b = s.clearance_pair
        parts.append(f"nearest {a}–{b} {s.clearance_m * 1e3:.1f} mm")
    elif not parts:
        parts.append("nearest —")
    return "   ".join(parts)


def _draw_clearance(surf: pygame.Surface, s: StatusSnapshot, L: _Layout) -> None:
    """The nearest pair as a line between its witness points in each view, labelled with
    its distance; above the views, the pair and whether clearance is limiting motion."""
    colour = clearance_colour(s)
    if s.clearance_points is not None and s.q is not None and s.clearance_m is not None:
        clip = surf.get_clip()
        for rect, axes, _ in L.views:
            px = L.view_mapper(rect, axes, s.arm)
            a, b = (px(p) for p in np.asarray(s.clearance_points))
            surf.set_clip(rect)
            pygame.draw.line(surf, colour, a, b, 2)
            for p in (a, b):
                pygame.draw.circle(surf, colour, p, 3)
            mid = ((a[0] + b[0]) // 2 + 6, (a[1] + b[1]) // 2 - 8)
            _text(surf, f"{s.clearance_m * 1e3:.0f} mm", mid, 16, colour, anchor="midleft")
        surf.set_clip(clip)
    if s.clearance_binds:       # beside the panel's title, clear of the TCP figures
        title = _rendered(ARM_PANEL_TITLE.upper(), 17, MUTED, True)
        badge = _rendered("CLEARANCE LIMITS", 16, GROUND, True)
        box = pygame.Rect(L.arm.x + 12 + title.get_width() + 12, L.arm.y + 6,
                          badge.get_width() + 12, 19)
        pygame.draw.rect(surf, CLEARANCE_WARN, box, border_radius=4)
        surf.blit(badge, badge.get_rect(center=box.center))
    _text(surf, clearance_text(s), L.command.topright, 18,
          colour if colour != CLEARANCE_LINE else MUTED, anchor="topright",
          max_width=L.command.w // 2 - 8)


def _command_line(surf: pygame.Surface, s: StatusSnapshot, rect: pygame.Rect) -> None:
    """The commanded motion: the twist (mm/s, °/s, in its frame) or the jogged joint."""
    if s.mode == "joint" and s.rates is not None:
        j = s.arm.joints[s.joint]
        text = f"command  {j.name}  {_fmt_joint(float(s.rates[s.joint]), j.is_revolute, True)}"
    elif s.twist is not None:
        v = np.asarray(s.twist[:3]) * 1e3
        w = np.degrees(np.asarray(s.twist[3:]))
        text = (f"command ({s.frame})  v {v[0]:+.0f} {v[1]:+.0f} {v[2]:+.0f} mm/s   "
                f"ω {w[0]:+.1f} {w[1]:+.1f} {w[2]:+.1f} °/s")
    else:
        text = "command  —"
    width = rect.w if s.cell is None else rect.w // 2 + 20   # the clearance takes the rest
    _text(surf, text, rect.topleft, 18, TEXT if s.allowed else MUTED, max_width=width)


def _gauge(surf: pygame.Surface, rect: pygame.Rect, frac: float, colour: tuple[int, int, int],
           mark: float | None = None) -> None:
    pygame.draw.rect(surf, TRACK, rect)
    w = int(rect.w * min(max(frac, 0.0), 1.0))
    if w > 0:
        pygame.draw.rect(surf, colour, (rect.x, rect.y, w, rect.h))
    if mark is not None:
        mx = rect.x + int(rect.w * min(max(mark, 0.0), 1.0))
        pygame.draw.line(surf, TEXT, (mx, rect.y - 3), (mx, rect.bottom + 2), 2)


def _row(surf: pygame.Surface, x: int, y: int, w: int, label: str, value: str,
         colour: tuple[int, int, int] = TEXT) -> None:
    _text(surf, label, (x, y), 19, MUTED)
    _text(surf, value, (x + w, y), 19, colour, anchor="topright")


def _solver(surf: pygame.Surface, s: StatusSnapshot, area: pygame.Rect) -> None:
    inner = _inner(area)
    x, y, w = inner.x, inner.y, inner.w
    eps = s.arm.solver.damping_threshold
    lam_max = s.arm.solver.damping_max
    if s.sigma_min is None:
        _text(surf, "no solve yet", (x, y + 4), 19, MUTED)
        return
    # σ_min: the gauge is full at 4ε; the mark is ε, where damping starts
    near = s.sigma_min < eps
    _row(surf, x, y, w, "σ_min", f"{s.sigma_min:.4f}", WARN if near else TEXT)
    _gauge(surf, pygame.Rect(x, y + 22, w, 8), s.sigma_min / (4 * eps), WARN if near else GOOD,
           mark=0.25)
    lam = s.damping or 0.0
    _row(surf, x, y + 38, w, "damping λ", f"{lam:.4f}  (max {lam_max:.3f})",
         WARN if lam > 0 else TEXT)
    _gauge(surf, pygame.Rect(x, y + 60, w, 8), lam / lam_max if lam_max > 0 else 0.0, WARN)
    _row(surf, x, y + 76, w, "manipulability",
         "—" if s.manipulability is None else f"{s.manipulability:.3g}")
    _row(surf, x, y + 98, w, "binding limit", s.binding_limit or "none",
         WARN if s.binding_limit else MUTED)


def _link(surf: pygame.Surface, s: StatusSnapshot, area: pygame.Rect) -> None:
    inner = _inner(area)
    x, y, w = inner.x, inner.y, inner.w
    fresh = s.connected and s.state_age_s is not None and s.state_age_s <= s.stale_after_s
    status, colour = ("connected", GOOD) if fresh else \
        ("stale", BAD) if s.connected else ("not connected", BAD)
    pygame.draw.circle(surf, colour, (x + 7, y + 9), 7)
    _text(surf, status, (x + 22, y), 20, colour, bold=True)
    _text(surf, s.target or "—", (x, y + 22), 17, MUTED, max_width=w)
    _row(surf, x, y + 44, w, "state age", _ms(s.state_age_s), TEXT if fresh else BAD)
    _gauge(surf, pygame.Rect(x, y + 66, w, 8),
           0.0 if s.state_age_s is None else s.state_age_s / (2 * s.stale_after_s),
           GOOD if fresh else BAD, mark=0.5)
    _row(surf, x, y + 82, w, "round trip", _ms(s.rtt_s))


def _timing(surf: pygame.Surface, s: StatusSnapshot, area: pygame.Rect) -> None:
    inner = _inner(area)
    x, y, w = inner.x, inner.y, inner.w
    t = s.timing
    if t is None:
        _text(surf, "not running", (x, y + 4), 19, MUTED)
        return
    over = t.overrun_fraction
    _row(surf, x, y, w, "rate", f"{t.rate_hz:.0f} Hz   {t.cycles} cycles")
    _row(surf, x, y + 22, w, "period p50 / p99 / max",
         f"{t.period_p50_s * 1e3:.3f} / {t.period_p99_s * 1e3:.3f} / {t.period_max_s * 1e3:.2f} ms")
    _row(surf, x, y + 44, w, "compute p50 / p99",
         f"{t.compute_p50_s * 1e3:.3f} / {t.compute_p99_s * 1e3:.3f} ms")
    _row(surf, x, y + 66, w, "wake-up late p50 / p99",
         f"{t.late_p50_s * 1e6:.0f} / {t.late_p99_s * 1e6:.0f} µs")
    _row(surf, x, y + 88, w, "overruns", f"{t.overruns} ({100 * over:.2f} %)   streak "
         f"{t.overrun_streak} (max {t.max_overrun_streak})",
         BAD if t.overrun_streak else WARN if over > 0.005 else TEXT)


def draw_status(surf: pygame.Surface, s: StatusSnapshot,
                pause: Callable[[], object] | None = None) -> pygame.Surface:
    """Draw one frame of the status window onto `surf` (sized about 1000×660 or more).

    `pause` is called between the pieces of the frame. The window passes `time.sleep(0)`,
    which hands the GIL to a waiting control thread at once; a short switch interval alone
    did not (benchmarks/bench_status_window.py, 2 cores: a 500 Hz loop beside the 30 Hz
    window overran in about 2.8 % of its cycles without the hand-overs, 0.4–0.5 % with
    them, 0.2–0.3 % with no window at all).
    """
    pause = pause or (lambda: None)
    background, L = _background(surf.get_size(), s.arm, s.cell)
    surf.blit(background, (0, 0))
    pause()
    _header(surf, s, L.width)
    _settings_line(surf, s, 86, L.width)
    pause()
    _joints(surf, s, L, pause)
    pause()
    _arm_view(surf, s, L)
    pause()
    _solver(surf, s, L.solver)
    pause()
    _link(surf, s, L.link)
    _timing(surf, s, L.loop)
    return surf


def render_png(snapshot: StatusSnapshot, path: str | Path, size: tuple[int, int] = SIZE
               ) -> Path:
    """Draw one frame into an off-screen surface and save it as PNG (no window needed)."""
    init_fonts()
    surf = pygame.Surface(size)
    draw_status(surf, snapshot)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    pygame.image.save(surf, str(path))
    return path


def _yield_gil() -> None:
    time.sleep(0)


class StatusWindow:
    """The on-screen window. Create and `run` it on the main thread."""

    def __init__(self, size: tuple[int, int] = SIZE, title: str = "jogwire") -> None:
        self.size = size
        self.title = title
        self.frames_drawn = 0
        self._screen: pygame.Surface | None = None

    def open(self) -> None:
        init_events()
        init_fonts()
        pygame.display.set_caption(self.title)
        self._screen = pygame.display.set_mode(self.size)
        pygame.key.set_repeat()  # key-hold semantics: one KEYDOWN per press

    def draw(self, snapshot: StatusSnapshot) -> None:
        assert self._screen is not None, "open() first"
        draw_status(self._screen, snapshot, pause=_yield_gil)
        _yield_gil()
        pygame.display.flip()
        self.frames_drawn += 1

    def run(self, get_snapshot: Callable[[], StatusSnapshot | None], *,
            on_event: Callable[[pygame.event.Event], object] | None = None,
            should_stop: Callable[[], bool] = lambda: False, frame_hz: float = 30.0,
            pump_hz: float = 250.0, switch_interval_s: float = 2e-4,
            clock: Callable[[], float] = time.perf_counter,
            sleep: Callable[[float], None] = time.sleep) -> str:
        """Pump events and redraw until the window is closed ("closed") or `should_stop()`
        ("stopped"). Every event goes to `on_event` (the input sources) first."""
        if self._screen is None:
            self.open()
        previous = sys.getswitchinterval()
        sys.setswitchinterval(switch_interval_s)
        try:
            next_frame = clock()
            while not should_stop():
                for event in pygame.event.get():
                    if on_event is not None:
                        on_event(event)
                    if event.type in (pygame.QUIT, pygame.WINDOWCLOSE):
                        return "closed"
                now = clock()
                if now >= next_frame:
                    snap = get_snapshot()
                    _yield_gil()
                    if snap is not None:
                        self.draw(snap)
                    next_frame = max(next_frame + 1.0 / frame_hz, now)
                sleep(min(1.0 / pump_hz, max(next_frame - clock(), 0.0)))
            return "stopped"
        finally:
            sys.setswitchinterval(previous)

    def close(self) -> None:
        if self._screen is not None:
            pygame.display.quit()
            self._screen = None
