"""Clearance as a limit: the velocity damper in the solve (pure: no I/O, no clock).

Velocity damper (B. Faverjon & P. Tournassoud, ICRA 1987; REFERENCES §11): for every pair
closer than the influence distance d_i, the distance may shrink at most at

    ḋ ≥ −gain·(d − d_s),   gain·(d_i − d_s) = ξ, the approach speed allowed at d_i,

so it decays toward the safety distance d_s and never crosses it (in discrete time, with
control period Δt, while gain·Δt < 1). Moving away is never limited. Inside d_s the same
bound asks ḋ ≥ gain·(d_s − d) > 0: a pose that starts too close, or that a slide along a
curved path has carried a little below d_s (the rows are linear, the motion is not), moves
back out while the operator commands motion; with no command the arm holds still (a jog
moves only when asked). Where two such rows conflict, they fall back to ḋ ≥ 0. The TCP
keep-in box enters the same way, one row per face. ḋ = row·q̇ with the rows from
`runtime.arm.distance`.

Formulation: a small bounded least-squares problem after the damped solve,

    q̇ = argmin ½ (q̇ − q̇₀)ᵀ H (q̇ − q̇₀)   subject to  row_i·q̇ ≥ −b_i,
    H = J_tᵀ J_t + μ I,   μ = max(λ², μ_min),

where q̇₀ is the solver's unconstrained answer and J_t the task Jacobian. Why this and not
extra rows in the damped solve: rows in a least-squares solve are soft (they trade against
the task, and a pair could still close in); as hard constraints of a least-squares problem
they hold exactly, and the metric H makes the correction cost as little *task* motion as
possible, so the component of the command along a surface survives: a diagonal jog into the
bench slides along it instead of freezing, and a redundant arm first spends its null space
(cost μ) to keep clear. Outside d_s, q̇ = 0 satisfies every row, so the problem is
feasible. It is solved by an active set on its dual (few rows bind at once: one to three in
practice): x = q̇₀ + H⁻¹Aᵀλ, λ ≥ 0 for the binding rows.

The other limits then act on the result. Uniform scaling (joint speed, position brake, TCP
caps) keeps every row with b_i ≥ 0 satisfied (outside d_s); the acceleration ramp steps
from last cycle's rates, which were clear at last cycle's pose and may not be at this one.
So after the limits every row is checked once more as ḋ ≥ min(−b_i, 0), and the rates are
scaled down if needed: clearance outranks the ramp, as the TCP caps do. (Scaled-down
motion may then push out of d_s more slowly than asked: never closer.)

Distances are taken at the measured pose. With one cycle of state lag the rates act one
period later, after the arm has moved by at most the last cycle's allowed approach,
gain·(d − d_s)·Δt: 1 % of the margin at 5 /s and 2 ms, inside the tolerance of the
first-order rows.

The reported factor is the share of the commanded task motion kept along its direction,
(J_t q̇ · J_t q̇₀)/‖J_t q̇₀‖², in [0, 1]; the binding pair is the closest pair among the
binding rows.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..arm.cell import Cell, ClearanceSettings
from ..arm.collision import CollisionModel
from ..arm.distance import Clearances, clearances, reach_weights
from ..arm.kinematics import joint_frames
from ..arm.model import Arm
from .limits import Limited

Vector = NDArray[np.float64]

METRIC_FLOOR = 1e-3
"""μ_min: the smallest weight of plain joint motion in H (same units as JᵀJ). It keeps H
invertible for a redundant arm and makes the null space cheap, not free."""

CLEARANCE_OVER_ACCELERATION = "clearance_over_acceleration"
"""Named in the solution's conflicts (as limits.CONFLICTS) when the rates had to drop faster
than max_accel to keep a pair from approaching faster than the damper allows."""

_SLACK_M_S = 1e-9  # a row counts as met within this (m/s)
_MOVABLE = 1e-12   # rows with a smaller squared norm: the joints cannot change that distance
_BOUND_MARGIN_M = 1e-9  # a pair is taken as beyond d_i on its bound only this far beyond (m)


class _Memo:
    """Per pair, a lower bound of its distance and the pose it holds at (`reach_weights`)."""

    __slots__ = ("q", "bound_m")

    def __init__(self) -> None:
        self.q: NDArray[np.float64] | None = None   # (P, n)
        self.bound_m: NDArray[np.float64] = np.zeros(0)

    def bounds_at(self, q: Vector, weights: NDArray[np.float64]) -> NDArray[np.float64] | None:
        """A lower bound of every pair's distance at q, or None before the first pose."""
        if self.q is None:
            return None
        moved = np.einsum("pj,pj->p", weights, np.abs(q - self.q))
        return np.asarray(self.bound_m - moved, dtype=float)

    def update(self, q: Vector, fresh: NDArray[np.float64],
               now: NDArray[np.float64] | None) -> None:
        """Keep `fresh` (bounds taken at q) wherever it beats the bound carried to q."""
        if self.q is None or now is None:
            self.q, self.bound_m = np.tile(q, (len(fresh), 1)), fresh.copy()
            return
        better = fresh > now
        self.bound_m = np.where(better, fresh, self.bound_m)
        self.q[better] = q


@dataclass(frozen=True, eq=False)
class ClearanceLimit:
    """An arm's collision model in one cell, with the damper settings: built once, passed to
    every `solve`.

    `weights` (`runtime.arm.distance.reach_weights`) bound how fast each pair's distance can
    change with each joint, so a distance once measured (or bounded) at one pose bounds it
    at the next ones: pairs whose bound stays beyond d_i need no measuring, and while every
    pair's does, the cycle needs no distances at all (`_Memo`). The rates are the same
    either way (a pair beyond d_i has no row); only the reported lower bound differs. None
    for arms with prismatic joints: they measure every cycle.
    """

    model: CollisionModel
    settings: ClearanceSettings
    weights: NDArray[np.float64] | None
    memo: _Memo = field(default_factory=_Memo, repr=False)

    @staticmethod
    def of(arm: Arm, cell: Cell) -> "ClearanceLimit":
        model = CollisionModel.build(arm, cell)
        return ClearanceLimit(model, cell.clearance, reach_weights(model))


@dataclass(frozen=True, eq=False)
class ClearanceReport:
    """Clearance at one solve.

    min_distance_m  the smallest distance over all pairs (m; negative: overlap); exact
                    inside the influence distance d_i, a lower bound beyond it
    nearest_pair    the pair measured at that distance (None when it is only a lower bound)
    binding_pair    the pair whose row bound the motion this cycle, or None
    factor          share of the commanded task motion kept (1.0: clearance did not bind)
    distances       the pairs measured this cycle, those that may be inside d_i
                    (runtime.arm.distance.Clearances)
    """

    min_distance_m: float
    nearest_pair: tuple[str, str] | None
    binding_pair: tuple[str, str] | None
    factor: float
    distances: Clearances = field(repr=False)

    def as_dict(self) -> dict[str, Any]:
        """Plain JSON-ready values (min_distance_m null when there is no pair at all)."""
        finite = self.min_distance_m < float("inf")
        return {"min_distance_m": float(self.min_distance_m) if finite else None,
                "nearest_pair": None if self.nearest_pair is None else list(self.nearest_pair),
                "binding_pair": None if self.binding_pair is None else list(self.binding_pair),
                "factor": self.factor}


class _Rows:
    """The damper's rows at one pose, row·q̇ ≥ floor, for the pairs inside d_i whose
    distance the joints can change at all.

    floor = −gain·(d − d_s): negative outside d_s (approach allowed, slower and slower),
    positive inside it (any commanded motion also carries the pair back out). `stop` is the
    same with the floors clamped at 0 (no approach, nothing more), which the zero motion
    always meets."""

    def __init__(self, limit: ClearanceLimit, found: Clearances) -> None:
        s = limit.settings
        if not len(found.distances):  # the usual cycle: nothing near
            self.index, self.A = found.index, found.rate_rows
            self.floor = self.stop = found.distances
            return
        near = found.distances < s.influence_distance_m
        near &= np.einsum("ij,ij->i", found.rate_rows, found.rate_rows) > _MOVABLE
        self.index = np.flatnonzero(near)
        self.A = found.rate_rows[self.index]
        self.floor = -s.gain_per_s * (found.distances[self.index] - s.safety_distance_m)
        self.stop = np.minimum(self.floor, 0.0)

    def violated(self, rates: Vector, floor: Vector) -> bool:
        return bool(len(self.index)) and bool((self.A.dot(rates) < floor
                                               - _SLACK_M_S).any())

    def scale_into(self, rates: Vector) -> float:
        """Largest c ≤ 1 with c·rates meeting the `stop` rows (c = 0 always does)."""
        if not len(self.index):
            return 1.0
        approach = self.A.dot(rates)
        over = approach < self.stop - _SLACK_M_S
        if not over.any():
            return 1.0
        return float(max(0.0, np.min(self.stop[over] / approach[over])))


class ClearanceGuard:
    """The damper around the other limits, for one solve:

        guard = ClearanceGuard(limit, q, Jt, damping, rates)               # restrict
        limited = guard.settle(apply_limits(arm, q, guard.rates, ...))     # re-check

    `q` is the measured pose (rad, m), `rates` the solver's unconstrained answer, `Jt` its task
    Jacobian and `damping` its λ.
    With no motion commanded (rates all zero) the arm holds still, whatever the distances.
    After `settle`, `report` holds the clearance of this solve."""

    def __init__(self, limit: ClearanceLimit, q: Vector, Jt: NDArray[np.float64],
                 damping: float, rates: Vector) -> None:
        found = _measure(limit, q)
        self._rows = rows = _Rows(limit, found)
        self._Jt, self._commanded = Jt, rates
        binding: tuple[str, str] | None = None
        self.rates = rates
        if rows.violated(rates, rows.floor) and bool(rates.any()):
            mu = max(damping * damping, METRIC_FLOOR)
            H = Jt.T.dot(Jt) + mu * np.eye(len(rates))
            # Pairs inside d_s pinched from two sides can make the push-out rows conflict:
            # then only approach is refused.
            for floor in (rows.floor, rows.stop):
                self.rates, active, met = _project(rates, rows.A, floor, H)
                if met:
                    break
            if len(active):
                pairs = rows.index[active]
                binding = found.pairs[int(pairs[np.argmin(found.distances[pairs])])]
        i = found.nearest()
        nearest = found.beyond_m if i is None else min(float(found.distances[i]), found.beyond_m)
        self.report = ClearanceReport(
            min_distance_m=nearest,
            nearest_pair=None if i is None or nearest < found.distances[i] else found.pairs[i],
            binding_pair=binding, factor=_kept(Jt, rates, self.rates), distances=found)

    def settle(self, limited: Limited) -> Limited:
        """The limited rates, scaled down if the acceleration ramp left an approach faster
        than a row allows, with the clearance factor added to the scales."""
        rates, twist, report = limited.rates, limited.twist, self.report
        c = self._rows.scale_into(rates)
        if c < 1.0:
            binding = report.binding_pair
            if binding is None:
                margin = self._rows.A.dot(rates) - self._rows.stop
                binding = report.distances.pairs[int(self._rows.index[int(np.argmin(margin))])]
            rates, twist = rates * c, twist * c
            report = ClearanceReport(report.min_distance_m, report.nearest_pair, binding,
                                     min(report.factor, _kept(self._Jt, self._commanded, rates)),
                                     report.distances)
            self.report = report
            conflicts = limited.conflicts + (CLEARANCE_OVER_ACCELERATION,)
            return Limited(rates, twist, {**limited.scales, "clearance": report.factor},
                           conflicts)
        return limited._replace(scales={**limited.scales, "clearance": report.factor})


def _measure(limit: ClearanceLimit, q: Vector) -> Clearances:
    """The pairs that may be inside d_i at q (see `ClearanceLimit` for the shortcut)."""
    d_i, memo, weights = limit.settings.influence_distance_m, limit.memo, limit.weights
    known = None if weights is None else memo.bounds_at(q, weights)
    if known is not None:
        nearest = float(known.min(initial=np.inf))
        if nearest >= d_i + _BOUND_MARGIN_M:
            return Clearances.none_within(len(q), nearest)
    frames, T_tcp = joint_frames(limit.model.arm, q)
    # Only pairs within d_i can bind: the rest are culled by a lower bound of their
    # distance, which then stands in for the nearest distance (never overstated).
    found = clearances(limit.model, frames, T_tcp, d_i, known)
    if weights is not None and found.lower_m is not None:
        memo.update(q, found.lower_m, known)
    return found


def _kept(Jt: NDArray[np.float64], before: Vector, after: Vector) -> float:
    """(J·after · J·before)/‖J·before‖² in [0, 1]; 1 when nothing was commanded or changed."""
    if after is before:
        return 1.0
    v0 = Jt.dot(before)
    size = float(v0.dot(v0))
    if size <= 0.0:
        return 1.0
    return min(1.0, max(0.0, float(Jt.dot(after).dot(v0)) / size))


def _project(x0: Vector, A: NDArray[np.float64], floor: Vector, H: NDArray[np.float64]
             ) -> tuple[Vector, NDArray[np.intp], bool]:
    """argmin ½(x − x0)ᵀH(x − x0) subject to A·x ≥ floor, by an active set on the dual:
    x = x0 + H⁻¹Aᵀλ with λ ≥ 0 on the active rows. Returns x, the active rows and whether
    every row is met.

    Rows join while violated and leave when their multiplier turns negative. If that does
    not settle within a few rounds (conflicting or degenerate rows), the last x is scaled
    toward zero as far as that meets the rows: feasible though not closest when every
    floor is ≤ 0, and reported as not met otherwise."""
    HiAt = np.linalg.solve(H, A.T)           # (n, m)
    W = A.dot(HiAt)                          # (m, m), positive semi-definite
    slack0 = A.dot(x0) - floor
    active = [int(np.argmin(slack0))]
    x = x0
    for _ in range(2 * len(floor) + 2):
        idx = np.array(active)
        Waa = W[np.ix_(idx, idx)]
        ridge = 1e-12 * (float(np.trace(Waa)) + 1e-30) * np.eye(len(idx))  # parallel rows
        lam = np.linalg.solve(Waa + ridge, -slack0[idx])
        if (lam < 0.0).any():
            active.pop(int(np.argmin(lam)))
            if not active:
                break
            continue
        x = x0 + HiAt[:, idx].dot(lam)
        slack = A.dot(x) - floor
        worst = int(np.argmin(slack))
        if slack[worst] >= -_SLACK_M_S:
            return x, idx, True
        if worst in active:
            break
        active.append(worst)
    if (floor > 0.0).any():
        return x0, np.array(active, dtype=np.intp), False
    approach = A.dot(x)
    over = approach < floor - _SLACK_M_S
    c = 1.0 if not over.any() else max(0.0, float(np.min(floor[over] / approach[over])))
    return x * c, np.array(active, dtype=np.intp), True


__all__ = ["CLEARANCE_OVER_ACCELERATION", "ClearanceGuard", "ClearanceLimit", "ClearanceReport",
           "METRIC_FLOOR"]
