"""The workcell part of a preflight verdict: contacts and clearance (pure: no I/O, no clock).

Two pieces of evidence, from two different sources:

  contact    the simulated arm's own collision detection (PyBullet contact points between
             the arm's links, its tool and the workcell's static bodies, reported over the
             wire, docs/PROTOCOL.md §5a). Any contact fails the run.
  clearance  the distance of every pair (arm part, object) at the arm's *measured* pose
             after each cycle, from jogwire's distance code (runtime/arm/distance.py). A
             pair closer than the safety distance d_s fails the run; the velocity damper
             in the solve is there to prevent exactly that.

Each finding names the pair and the time. The series for the report are the distances of
the pairs that came nearest, against d_s and the influence distance d_i.

The measured clearance may dip below d_s by a little without a fault of the damper: the
damper bounds the approach at the pose the cycle solved at, which lags the arm by one
cycle (state lag), and the simulated motors follow a command to about 6e-4 rad/s. At the
demo arms' reach (< 1.2 m) and speeds both stay well below CLEARANCE_ALLOWANCE_M.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any, Sequence

import numpy as np
from numpy.typing import NDArray

from ..arm.cell import Cell
from ..arm.distance import collision_model, distance_table
from ..arm.model import Arm
from ..link.protocol import CellHello, cell_digest
from .preflight import Finding, PreflightResult, Trace

CLEARANCE_ALLOWANCE_M = 2e-4
"""A measured clearance counts below d_s only beyond this (m): one cycle of state lag and
the simulator's velocity error (see the module docstring); our margin, not a standard."""

PLOTTED_PAIRS = 4
"""The report plots the distances of this many pairs, those that came nearest."""

Pair = tuple[str, str]


@dataclass(frozen=True)
class CellRun:
    """The workcell of a run: the model, what the simulated arm loads (name or file), and
    whether the velocity damper is in the solve."""

    cell: Cell
    spec: str
    clearance: bool = True


@dataclass(frozen=True)
class ContactEpisode:
    """One pair's contacts in a run: first touch, how deep at worst and when, how long."""

    a: str
    b: str
    t_s: float                # the first cycle that ended in contact (s)
    depth_m: float            # the deepest penetration PyBullet reported (m)
    depth_t_s: float
    cycles: int               # cycles that ended in contact

    @property
    def pair(self) -> str:
        return f"{self.a}–{self.b}"


@dataclass(frozen=True, eq=False)
class CellVerdict:
    """What a run did in its workcell. Distances in m, times in s from the start."""

    cell: str
    safety_m: float                       # d_s
    influence_m: float                    # d_i
    min_clearance_m: float | None         # None: no pair (or no cycles)
    min_clearance_t_s: float | None
    pair: Pair | None                     # the pair of the minimum
    closest_cycle: int | None             # the cycle after whose step it was measured
    closest_q: tuple[float, ...] | None   # the measured pose there (rad or m)
    contacts: tuple[ContactEpisode, ...]
    contacts_measured: bool               # the simulated arm reported contacts at all
    t: NDArray[np.float64]                # (N,) for the plot
    plotted: tuple[Pair, ...]             # the nearest pairs, nearest first
    plotted_distance_m: NDArray[np.float64]  # (N, len(plotted))
    nearest_m: NDArray[np.float64]        # (N,) the smallest distance of every cycle

    def as_dict(self) -> dict[str, Any]:
        return {"cell": self.cell, "safety_distance_m": self.safety_m,
                "influence_distance_m": self.influence_m,
                "min_clearance": self.min_clearance_m,
                "min_clearance_t_s": self.min_clearance_t_s,
                "clearance_pair": None if self.pair is None else list(self.pair),
                "contacts_measured": self.contacts_measured,
                "contacts": [dict(vars(c)) for c in self.contacts]}


def contact_episodes(contacts: Sequence[tuple[float, str, str, float]]
                     ) -> tuple[ContactEpisode, ...]:
    """(t, a, b, depth) of every contact reported, in time order → one episode per pair,
    first touched first."""
    by_pair: dict[Pair, list[float]] = {}    # [first t, depth, depth t, cycles]
    for t, a, b, depth in contacts:
        e = by_pair.setdefault((a, b), [t, depth, t, 0])
        if depth > e[1]:
            e[1], e[2] = depth, t
        e[3] += 1
    return tuple(ContactEpisode(a, b, t0, d, dt, int(n))
                 for (a, b), (t0, d, dt, n) in by_pair.items())


def evaluate_cell(t: NDArray[np.float64], q: NDArray[np.float64], *, cell: str,
                  pairs: Sequence[Pair], distances: NDArray[np.float64],
                  safety_m: float, influence_m: float,
                  contacts: Sequence[tuple[float, str, str, float]],
                  contacts_measured: bool) -> tuple[CellVerdict, list[Finding]]:
    """The verdict on a run's clearance and contacts, and its findings.

    t, q: each cycle's time and the measured pose after its step (N,), (N, n);
    distances: (N, len(pairs)), the distance of every pair in `pairs` at each pose (m,
    negative when they overlap; `runtime.arm.distance.distance_table`); contacts:
    (t, a, b, depth) as the simulated arm reported them.
    """
    n = len(t)
    raw = np.asarray(distances, dtype=float).reshape(n, len(pairs))
    # One column per named pair: the keep-in box's six faces are one pair (tcp, box).
    names = [tuple(p) for p in pairs]
    pairs = list(dict.fromkeys(names))
    d = np.full((n, len(pairs)), math.inf)
    for j, name in enumerate(names):
        i = pairs.index(name)
        d[:, i] = np.minimum(d[:, i], raw[:, j])
    nearest = d.min(axis=1) if d.shape[1] else np.full(n, math.inf)
    has_min = bool(n) and d.shape[1] > 0
    k = int(np.argmin(nearest)) if has_min else None
    worst = d.min(axis=0) if has_min else np.zeros(0)
    order = np.argsort(worst, kind="stable")[:PLOTTED_PAIRS]
    episodes = contact_episodes(contacts)
    verdict = CellVerdict(
        cell=cell, safety_m=safety_m, influence_m=influence_m,
        min_clearance_m=float(nearest[k]) if k is not None else None,
        min_clearance_t_s=float(t[k]) if k is not None else None,
        pair=tuple(pairs[int(np.argmin(d[k]))]) if k is not None else None,
        closest_cycle=k, closest_q=tuple(map(float, q[k])) if k is not None else None,
        contacts=episodes, contacts_measured=contacts_measured, t=t,
        plotted=tuple(tuple(pairs[i]) for i in order), plotted_distance_m=d[:, order],
        nearest_m=nearest)
    findings = [Finding("contact", None, e.depth_m, 0.0, e.t_s, "measured",
                        f"contact {e.pair} at t = {e.t_s:.2f} s: {1e3 * e.depth_m:.1f} mm deep "
                        f"at worst (t = {e.depth_t_s:.2f} s), {e.cycles} cycles in contact "
                        "(the simulated arm's collision detection)")
                for e in episodes]
    for i in np.flatnonzero(worst < safety_m - CLEARANCE_ALLOWANCE_M).tolist():
        below = np.flatnonzero(d[:, i] < safety_m - CLEARANCE_ALLOWANCE_M)
        k_min = int(np.argmin(d[:, i]))
        a, b = pairs[i]
        findings.append(Finding(
            "clearance", None, float(d[k_min, i]), safety_m, float(t[below[0]]), "measured",
            f"clearance {a}–{b} below the safety distance {1e3 * safety_m:.1f} mm from "
            f"t = {t[below[0]]:.2f} s, down to {1e3 * d[k_min, i]:.1f} mm at "
            f"t = {t[k_min]:.2f} s"))
    findings.sort(key=lambda f: (f.t_s if f.t_s is not None else math.inf))
    return verdict, findings


def with_cell(result: PreflightResult, verdict: CellVerdict, findings: list[Finding]
              ) -> PreflightResult:
    """`result` with the workcell's verdict, findings and notes added."""
    notes = list(result.notes)
    if verdict.min_clearance_m is not None and verdict.pair is not None:
        a, b = verdict.pair
        notes.append(f"workcell {verdict.cell}: nearest {a}–{b} {1e3 * verdict.min_clearance_m:.1f}"
                     f" mm at t = {verdict.min_clearance_t_s:.2f} s (safety distance "
                     f"{1e3 * verdict.safety_m:.1f} mm, influence {1e3 * verdict.influence_m:.0f}"
                     " mm)")
    if not verdict.contacts_measured:
        findings = findings + [Finding(
            "contact_unchecked", None, None, None, None, "",
            f"the simulated arm did not confirm workcell {verdict.cell}: contact was not "
            "checked, so the run does not prove there was none")]
    all_findings = result.findings + tuple(findings)
    return replace(result, cell=verdict, findings=all_findings, notes=tuple(notes),
                   verdict="fail" if all_findings else "pass")


def judge_cell(arm: Arm, cell: Cell, trace: Trace,
               contacts: Sequence[tuple[float, str, str, float]],
               arm_cell: CellHello | None) -> tuple[CellVerdict, list[Finding]]:
    """The workcell's verdict on a preflight run: jogwire's distances at the measured
    poses, the simulated arm's contacts, and whether it answered with the same workcell."""
    model = collision_model(arm, cell)
    c = cell.clearance
    confirmed = arm_cell is not None and arm_cell.digest == cell_digest(cell)
    return evaluate_cell(trace.t, trace.q, cell=cell.name, pairs=model.pair_names,
                         distances=distance_table(model, trace.q),
                         safety_m=c.safety_distance_m, influence_m=c.influence_distance_m,
                         contacts=contacts, contacts_measured=confirmed)


def format_cell(c: CellVerdict) -> str:
    """The text verdict's workcell line: the closest approach and the contacts."""
    text = f"workcell  {c.cell}: "
    if c.min_clearance_m is not None and c.pair is not None:
        text += (f"nearest {c.pair[0]}–{c.pair[1]} {1e3 * c.min_clearance_m:.1f} mm at "
                 f"t = {c.min_clearance_t_s:.2f} s (safety {1e3 * c.safety_m:.0f} mm); ")
    if not c.contacts_measured:
        return text + "contacts NOT measured"
    return text + ("no contact" if not c.contacts else
                   "CONTACT " + ", ".join(f"{e.pair} at t = {e.t_s:.2f} s" for e in c.contacts))
