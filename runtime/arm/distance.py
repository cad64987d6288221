"""Distances between the arm's capsules and the cell's objects, and their rates (pure numpy).

One call, `clearances`, evaluates the pairs of a `CollisionModel` at one pose in a single
vectorised pass per kind of pair (all of them, or in the control cycle only those a cheap
lower bound cannot rule out), and returns each pair's signed distance (negative when the
shapes overlap), witness points, unit normal and distance-rate row:

    ḋ = row · q̇,   row = nᵀ (J_a(p_a) − J_b(p_b))

with n the unit normal from the other side's witness point p_b to the arm side's p_a, and
J(p) the linear point Jacobian of the body that carries p (J_v + ω × offset: for a revolute
joint j, z_j × (p − o_j); for a prismatic one, z_j; zero for a static object). The triple
product n·(z_j × (p − o_j)) is written (p × n)·z_j − n·(z_j × o_j), so one product with the
stacked axes and moments gives every row. Points on one body along n move alike along n, so
the row is the same whichever of them stands for the witness.

Kernels (exact unless stated):
- capsule–capsule and capsule–sphere: closest points of two segments by the clamped-
  parameter algorithm (V. J. Lumelsky, "On fast computation of distance between line
  segments", Inf. Proc. Letters 21(2), 1985; C. Ericson, Real-Time Collision Detection,
  2005, §5.1.9), minus the radii. A sphere is a segment of zero length.
- capsule–cylinder: conservative. The cylinder is taken as its enclosing capsule (its axis
  segment with its radius), exact against the side, and up to the radius short near the flat
  ends (rounded caps). Never more than the true distance, so clearance is never overstated.
- capsule–box: the squared distance from a point moving along the segment to the box is a
  convex piecewise quadratic in the segment parameter, with breaks where the point crosses a
  face plane (at most 6). Each piece is minimised in closed form; the smallest wins. When
  the segment passes through the box, the distance is −(depth below its nearest face of the
  segment's deepest point) − radius, with that face's normal: not always the exact
  penetration depth, but a direction that leads out.
- capsule–half-space: the nearer end point, (n·p − offset) − radius.
- TCP–keep-in box: the TCP point against each face, as half-spaces whose free side is the
  inside.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Any, Callable, cast

import numpy as np
from numpy.typing import NDArray

from .cell import Cell
from .collision import CollisionModel
from .kinematics import joint_frames
from .model import Arm
from .transforms import rotation_aligning_z

Array = NDArray[np.float64]

_EPS = 1e-12  # squared lengths below this are points (m²)
_EMPTY, _EMPTY_3, _NO_INDEX = np.zeros(0), np.zeros((0, 3)), np.zeros(0, np.intp)
for _shared in (_EMPTY, _EMPTY_3, _NO_INDEX):
    _shared.setflags(write=False)
_MARGIN_M = 1e-9
"""A pair is left out on a bound only this far beyond the threshold (m): far above the
rounding of any distance here (~1e-15 m), so a pair the exact pass would place inside is
never left out."""


@lru_cache(maxsize=64)
def _empty_rows(n: int) -> Array:
    rows = np.zeros((0, n))
    rows.setflags(write=False)
    return rows


@dataclass(frozen=True, eq=False)
class Clearances:
    """The measured pairs at one pose; arrays share the pair order of `pairs`.

    pairs         (arm side, other side) names; the other side is an object, another link,
                  or `keep_in` (then the arm side is `tcp`)
    distances     (p,) signed distances, m (negative: overlap)
    points_arm    (p, 3) witness points on the arm side, base frame, m
    points_other  (p, 3) witness points on the other side
    normals       (p, 3) unit normals from the other side toward the arm side
    rate_rows     (p, n) ḋ = rate_rows @ q̇ (m/s per rad/s or m/s)
    index         (p,) each pair's position in the model's `pair_names`
    beyond_m      a lower bound of the distance of every pair not measured (inf: none left
                  out; see `clearances`)
    lower_m       (P,) with a cull (`clearances` with `within_m`): a lower bound of every
                  pair of the model at this pose, in `pair_names` order, exact where measured;
                  None otherwise
    """

    pairs: tuple[tuple[str, str], ...]
    distances: Array
    points_arm: Array
    points_other: Array
    normals: Array
    rate_rows: Array
    index: NDArray[np.intp]
    beyond_m: float = math.inf
    lower_m: Array | None = None

    @staticmethod
    def none_within(n: int, beyond_m: float, lower_m: Array | None = None) -> "Clearances":
        """No pair measured (none can be within reach); `beyond_m` bounds them all."""
        empty = _EMPTY_3
        return Clearances(pairs=(), distances=_EMPTY, points_arm=empty, points_other=empty,
                          normals=empty, rate_rows=_empty_rows(n), index=_NO_INDEX,
                          beyond_m=beyond_m, lower_m=lower_m)

    def nearest(self) -> int | None:
        """Index of the smallest distance, or None without pairs."""
        return int(np.argmin(self.distances)) if len(self.distances) else None

    def as_list(self) -> list[dict[str, Any]]:
        """Plain JSON-ready values, nearest pair first."""
        order = np.argsort(self.distances, kind="stable")
        return [{"pair": list(self.pairs[i]), "distance_m": float(self.distances[i]),
                 "point_arm_m": self.points_arm[i].tolist(),
                 "point_other_m": self.points_other[i].tolist(),
                 "normal": self.normals[i].tolist()} for i in order.tolist()]


# ----------------------------------------------------------------------------------------
# Kernels: arrays of p pairs at once
# ----------------------------------------------------------------------------------------

def _dot(a: Array, b: Array) -> Array:
    return cast(Array, np.einsum("ij,ij->i", a, b))


def _cross(a: Array, b: Array) -> Array:
    """Row-wise cross product, each component a_i·b_j − a_j·b_i rounded as written (np.cross
    costs several times more on small arrays): one gather per operand order, not per
    component."""
    return np.asarray(a[:, _NEXT] * b[:, _AFTER] - a[:, _AFTER] * b[:, _NEXT], dtype=float)


_NEXT, _AFTER = np.array([1, 2, 0]), np.array([2, 0, 1])


def segment_parameters(p1: Array, d1: Array, p2: Array, d2: Array) -> tuple[Array, Array]:
    """Parameters s, t ∈ [0, 1] of the closest points p1 + s·d1 and p2 + t·d2 of two
    segments (Lumelsky 1985; Ericson 2005, §5.1.9, clamped-parameter form).

    Parallel segments have many closest pairs; this picks s = 0 (or its clamp), the distance
    is the same. A segment of zero length is a point.
    """
    r = p1 - p2
    a, e = _dot(d1, d1), _dot(d2, d2)
    b, c, f = _dot(d1, d2), _dot(d1, r), _dot(d2, r)
    a_ok, e_ok = a > _EPS, e > _EPS
    a_s, e_s = np.where(a_ok, a, 1.0), np.where(e_ok, e, 1.0)
    denom = a * e - b * b
    skew = denom > 1e-12 * a * e  # not parallel: the closest points of the lines, clamped
    # (ndarray.clip is what np.clip calls, without its dispatch)
    s = np.where(skew, ((b * f - c * e) / np.where(skew, denom, 1.0)).clip(0.0, 1.0), 0.0)
    t = (b * s + f) / e_s
    s = np.where(t < 0.0, (-c / a_s).clip(0.0, 1.0),
                 np.where(t > 1.0, ((b - c) / a_s).clip(0.0, 1.0), s))
    t = t.clip(0.0, 1.0)
    # Degenerate segments: a point against a segment, or two points (where none is, these
    # would change nothing).
    if not e_ok.all():
        s = np.where(e_ok, s, (-c / a_s).clip(0.0, 1.0))
        t = np.where(e_ok, t, 0.0)
    if not a_ok.all():
        t = np.where(a_ok, t, (f / e_s).clip(0.0, 1.0))
        s = np.where(a_ok, s, 0.0)
    return s, t


def _unit_or(v: Array, fallback: Array | Callable[[], Array]) -> tuple[Array, Array]:
    """v/‖v‖ and ‖v‖, with `fallback` (unit; or a function giving it, called only when
    needed) where v is (nearly) zero."""
    length = np.sqrt(_dot(v, v))
    ok = length > 1e-12
    if ok.all():
        return v / length[:, None], length
    if callable(fallback):
        fallback = fallback()
    return np.where(ok[:, None], v / np.where(ok, length, 1.0)[:, None], fallback), length


def _any_perpendicular(d1: Array, d2: Array) -> Array:
    """A unit vector across two segments that touch: d1 × d2, else anything ⊥ d1."""
    cross = _cross(d1, d2)
    helper = np.where((np.abs(d1[:, :1]) < 0.9), [[1.0, 0.0, 0.0]], [[0.0, 1.0, 0.0]])
    across = _cross(d1, helper)
    fallback = np.where(_dot(across, across)[:, None] > _EPS, across, [[0.0, 0.0, 1.0]])
    unit_fallback = fallback / np.sqrt(_dot(fallback, fallback))[:, None]
    return _unit_or(cross, unit_fallback)[0]


def capsule_capsule(p1: Array, q1: Array, r1: Array, p2: Array, q2: Array, r2: Array
                    ) -> tuple[Array, Array, Array, Array]:
    """Signed distance, witness points on capsule 1 and 2, and the normal from 2 to 1."""
    d1, d2 = q1 - p1, q2 - p2
    s, t = segment_parameters(p1, d1, p2, d2)
    c1 = p1 + s[:, None] * d1
    c2 = p2 + t[:, None] * d2
    n, gap = _unit_or(c1 - c2, lambda: _any_perpendicular(d1, d2))  # touching axes: rare
    return gap - r1 - r2, c1 - r1[:, None] * n, c2 + r2[:, None] * n, n


def segment_box(p: Array, q: Array, pose: Array, half: Array
                ) -> tuple[Array, Array, Array, Array]:
    """Signed distance from segments to boxes, the closest points on segment and box, and
    the unit normal from the box toward the segment (base frame). See the module docstring."""
    R, centre = pose[:, :3, :3], pose[:, :3, 3]
    x0 = np.einsum("pji,pj->pi", R, p - centre)  # box frame: Rᵀ(p − c)
    dx = np.einsum("pji,pj->pi", R, q - p)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # dx ≈ 0: no crossing
        crossings = np.concatenate(((half - x0) / dx, (-half - x0) / dx), axis=1)
    crossings = np.where(np.isfinite(crossings), np.clip(crossings, 0.0, 1.0), 0.0)
    m = len(p)
    knots = np.sort(np.concatenate((np.zeros((m, 1)), crossings, np.ones((m, 1))), axis=1),
                    axis=1)
    t0, t1 = knots[:, :-1], knots[:, 1:]
    h = half[:, None, :]
    inside_mid = x0[:, None, :] + (0.5 * (t0 + t1))[..., None] * dx[:, None, :]
    side = np.where(inside_mid > h, 1.0, 0.0) - np.where(inside_mid < -h, 1.0, 0.0)
    u = (x0[:, None, :] - side * h) * (side != 0.0)  # per piece: Σ_active (u + t·d)²
    w = dx[:, None, :] * (side != 0.0)
    A, B, C = np.sum(w * w, axis=2), np.sum(w * u, axis=2), np.sum(u * u, axis=2)
    t_piece = np.where(A > _EPS, np.clip(-B / np.where(A > _EPS, A, 1.0), t0, t1), t0)
    best = np.argmin((A * t_piece + 2.0 * B) * t_piece + C, axis=1)
    t = t_piece[np.arange(m), best]
    x = x0 + t[:, None] * dx
    on_box = np.clip(x, -half, half)
    n_local, gap = _unit_or(x - on_box, np.zeros(3))
    inside = gap <= 1e-12
    if inside.any():
        rows = np.flatnonzero(inside)
        x[rows], on_box[rows], n_local[rows], gap[rows] = _deepest(
            x0[rows], dx[rows], half[rows], knots[rows])
    n = np.einsum("pij,pj->pi", R, n_local)
    return (gap, np.einsum("pij,pj->pi", R, x) + centre, np.einsum("pij,pj->pi", R, on_box)
            + centre, n)


def _deepest(x0: Array, dx: Array, half: Array, knots: Array
             ) -> tuple[Array, Array, Array, Array]:
    """For segments through their box (box frame): the point of greatest depth below the
    nearest face among the candidates where that depth, a concave piecewise-linear function
    of t, can peak (face crossings, end points, coordinate zero crossings, the point nearest
    the centre), its projection on that face, the face normal and −depth."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        zero = -x0 / dx
        centre = -_dot(x0, dx) / _dot(dx, dx)
    candidates = np.concatenate((knots, zero, centre[:, None]), axis=1)
    candidates = np.where(np.isfinite(candidates), np.clip(candidates, 0.0, 1.0), 0.0)
    points = x0[:, None, :] + candidates[..., None] * dx[:, None, :]
    depth = np.min(half[:, None, :] - np.abs(points), axis=2)
    rows = np.arange(len(x0))
    x = points[rows, np.argmax(depth, axis=1)]
    axis = np.argmin(half - np.abs(x), axis=1)
    sign = np.where(x[rows, axis] < 0.0, -1.0, 1.0)
    normal = np.zeros_like(x)
    normal[rows, axis] = sign
    on_face = x.copy()
    on_face[rows, axis] = sign * half[rows, axis]
    return x, on_face, normal, -(half[rows, axis] - np.abs(x[rows, axis]))


def segment_plane(p: Array, q: Array, normal: Array, offset: Array
                  ) -> tuple[Array, Array, Array]:
    """Signed distance of the nearer end point to each plane (free side n·x ≥ offset), that
    end point and its projection on the plane."""
    dp, dq = _dot(p, normal) - offset, _dot(q, normal) - offset
    near_q = dq < dp
    gap = np.where(near_q, dq, dp)
    end = np.where(near_q[:, None], q, p)
    return gap, end, end - gap[:, None] * normal


# ----------------------------------------------------------------------------------------
# All pairs of a model at one pose
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class _Layout:
    """Per-pair constants of a model, precomputed so that one evaluation costs few numpy calls.

    The point table of a pose stacks: every arm capsule's start, end and centre (placed by the
    joint frames), the static capsule-like objects' starts, ends and centres, the TCP.
    `start`/`end`/`mid` index it per row of the capsule table (arm capsules, static
    capsules, TCP).
    Capsule and box pairs share one cull: the distance |max(|Rᵀ(m_a − c)| − h, 0)| of a
    capsule's centre m_a to a box (centre c, axes R, half extents h) or to another capsule's
    segment (a box of half extents (0, 0, half-length) along its axis), minus the first
    capsule's half-length and both radii, is a lower bound of the pair's distance.
    """

    n_cap: int         # capsule pairs come first, then box pairs, then plane pairs
    n_box: int
    frame_of_point: NDArray[np.intp]   # (3k,) joint frame + 1 of each placed point
    local_points: Array                # (3k, 4) homogeneous, in that frame
    static_points: Array               # (3s, 3) static starts, ends, centres, base frame
    start: NDArray[np.intp]            # (k + s + 1,) rows of the point table
    end: NDArray[np.intp]
    mid: NDArray[np.intp]
    cull_a: NDArray[np.intp]           # capsule + box pairs: the arm capsule
    cull_b: NDArray[np.intp]           # capsule pairs: the other capsule (box pairs: -1)
    cull_centre_row: NDArray[np.intp]  # per pair: its other centre in (mid rows, box centres)
    box_centres: Array                 # (b, 3) per box pair
    cull_frame_b: NDArray[np.intp]     # capsule pairs: joint frame + 1 of the other capsule
    cull_align_b: Array                # capsule pairs: (3, 3) its axis as z, in that frame
    cull_box_axes_T: Array             # box pairs: (3, 3) Rᵀ
    cull_half: Array                   # (p, 3) h
    cull_reach: Array                  # (p,) the first capsule's half-length, both radii
    cap_r_arm: Array
    cap_r_other: Array
    box_r: Array
    box_pose: Array
    box_half: Array
    plane_a: NDArray[np.intp]
    plane_r: Array
    plane_normal: Array
    plane_offset: Array
    plane_normals_T: Array             # (3, h) every plane's normal, once
    plane_start_flat: NDArray[np.intp]  # into (point table × planes), per plane pair
    plane_end_flat: NDArray[np.intp]
    mask_arm: Array    # (p, n) 1 where joint j moves the arm side's body
    mask_other: Array  # (p, n) the same for the other side (0 for static objects)


@lru_cache(maxsize=32)
def _layout(model: CollisionModel) -> _Layout:
    caps = model.capsules
    n, k, s = model.arm.n, len(caps.names), len(model.static_radius)
    frame = np.concatenate((caps.frame, np.full(s, -1), [n - 1]))
    radius = np.concatenate((caps.radius, model.static_radius, [0.0]))
    half_length = 0.5 * np.concatenate((caps.lengths, np.linalg.norm(
        model.static_end - model.static_start, axis=1), [0.0]))
    reach = half_length + radius
    table_start = np.concatenate((caps.start, model.static_start, [np.zeros(3)]))
    table_end = np.concatenate((caps.end, model.static_end, [np.zeros(3)]))
    cp, bp, hp = model.capsule_pairs, model.box_pairs, model.plane_pairs
    arm_frames = np.concatenate((frame[cp[:, 0]], frame[bp[:, 0]], frame[hp[:, 0]]))
    other_frames = np.concatenate((frame[cp[:, 1]], np.full(len(bp) + len(hp), -1)))
    joints = np.arange(n)
    box_pose = model.box_pose[bp[:, 1]]
    local = np.concatenate((caps.start, caps.end, 0.5 * (caps.start + caps.end)))
    statics = 3 * k + np.arange(s)
    tcp_row = 3 * k + 3 * s
    table_start_row = np.concatenate((np.arange(k), statics, [tcp_row]))
    table_end_row = np.concatenate((k + np.arange(k), statics + s, [tcp_row]))
    table_mid_row = np.concatenate((2 * k + np.arange(k), statics + 2 * s, [tcp_row]))
    rows = k + s + 1
    return _Layout(
        n_cap=len(cp), n_box=len(bp),
        frame_of_point=np.concatenate((caps.frame, caps.frame, caps.frame)) + 1,
        local_points=np.concatenate((local, np.ones((3 * k, 1))), axis=1),
        static_points=np.concatenate((model.static_start, model.static_end,
                                      0.5 * (model.static_start + model.static_end))),
        start=table_start_row, end=table_end_row, mid=table_mid_row,
        cull_a=np.concatenate((cp[:, 0], bp[:, 0])), cull_b=cp[:, 1],
        cull_centre_row=np.concatenate((cp[:, 1], rows + np.arange(len(bp)))),
        box_centres=box_pose[:, :3, 3].copy(),
        cull_frame_b=frame[cp[:, 1]] + 1,
        cull_align_b=np.array([rotation_aligning_z(table_end[b] - table_start[b])
                               if half_length[b] > 0.0 else np.eye(3)
                               for b in cp[:, 1]]).reshape(-1, 3, 3),
        cull_box_axes_T=box_pose[:, :3, :3].transpose(0, 2, 1).copy(),
        cull_half=np.concatenate((np.stack((np.zeros(len(cp)), np.zeros(len(cp)),
                                            half_length[cp[:, 1]]), axis=1).reshape(-1, 3),
                                  model.box_half[bp[:, 1]])),
        cull_reach=np.concatenate((reach[cp[:, 0]] + radius[cp[:, 1]], reach[bp[:, 0]])),
        cap_r_arm=radius[cp[:, 0]], cap_r_other=radius[cp[:, 1]], box_r=radius[bp[:, 0]],
        box_pose=box_pose, box_half=model.box_half[bp[:, 1]],
        plane_a=hp[:, 0], plane_r=radius[hp[:, 0]], plane_normal=model.plane_normal[hp[:, 1]],
        plane_offset=model.plane_offset[hp[:, 1]],
        plane_normals_T=model.plane_normal.T.copy(),
        plane_start_flat=table_start_row[hp[:, 0]] * len(model.plane_offset) + hp[:, 1],
        plane_end_flat=table_end_row[hp[:, 0]] * len(model.plane_offset) + hp[:, 1],
        mask_arm=(joints[None, :] <= arm_frames[:, None]).astype(float),
        mask_other=(joints[None, :] <= other_frames[:, None]).astype(float))


def clearances(model: CollisionModel, frames: Array, T_tcp: Array,
               within_m: float = math.inf, known_m: Array | None = None) -> Clearances:
    """The pairs of `model` at the pose given by `kinematics.joint_frames` (frames, T_tcp).

    With `within_m`, only pairs that may be closer than that are measured: a cheap lower
    bound of every pair's distance (see `_Layout`) culls the rest, and `beyond_m` is the
    smallest bound among those left out (a distance never overstated); `lower_m` then holds
    a lower bound of every pair at this pose (exact where measured). `known_m` (one per
    pair, m) are lower bounds known from elsewhere (`reach_weights`): a kind of pair whose
    every pair the cull keeps is known to be beyond `within_m` is not measured either. Its
    rows still take their places, as zeros, in the product that makes the rate rows, so the
    rows of the pairs measured are the very numbers a pass without `known_m` gives (the
    product's rounding may depend on how many rows it has and where). The control cycle
    measures exactly what the damper needs this way; probe and preflight measure every pair.
    """
    lay = _layout(model)
    frames_0, points = _point_table(lay, frames, T_tcp)
    # Half-spaces are as cheap as a bound: every point against every plane in one product.
    heights = np.dot(points, lay.plane_normals_T)
    dist3 = _plane_distances(lay, heights.take(lay.plane_start_flat),
                             heights.take(lay.plane_end_flat))
    n_cap, n_culled = lay.n_cap, len(lay.cull_a)
    skip_cap = skip_box = False
    bound = None
    if within_m < math.inf:
        mid = points[lay.mid]
        centres = np.concatenate((mid, lay.box_centres))
        axes = np.einsum("pij,pjk->pik", frames_0[lay.cull_frame_b, :3, :3], lay.cull_align_b)
        axes_T = np.concatenate((axes.transpose(0, 2, 1), lay.cull_box_axes_T))
        local = np.einsum("pij,pj->pi", axes_T, mid[lay.cull_a] - centres[lay.cull_centre_row])
        outside = np.maximum(np.abs(local) - lay.cull_half, 0.0)
        bound = np.concatenate((np.sqrt(np.einsum("ij,ij->i", outside, outside))
                                - lay.cull_reach, dist3))
        keep = bound < within_m
        if not keep.any():
            return Clearances.none_within(model.arm.n, float(bound.min(initial=math.inf)),
                                          bound)
        beyond = float(bound[~keep].min(initial=math.inf))
        kept = np.flatnonzero(keep)
        first_box, first_plane = np.searchsorted(kept, (n_cap, n_culled)).tolist()
        k1, k2, k3 = (kept[:first_box], kept[first_box:first_plane] - n_cap,
                      kept[first_plane:] - n_culled)
        if known_m is not None:
            far = known_m >= within_m + _MARGIN_M
            skip_cap = bool(len(k1)) and bool(far[k1].all())
            skip_box = bool(len(k2)) and bool(far[kept[first_box:first_plane]].all())
    else:
        beyond = math.inf
        k1, k2, k3 = np.arange(n_cap), np.arange(lay.n_box), np.arange(len(lay.plane_a))
    start, end = points[lay.start], points[lay.end]
    # Each kernel costs tens of numpy calls whatever its size: only the kinds with pairs.
    parts: list[tuple[NDArray[np.intp], Array, Array, Array, Array]] = []
    if len(k1):
        ca, cb = lay.cull_a[k1], lay.cull_b[k1]
        dist1, pa1, pb1, n1 = _zeros(len(k1)) if skip_cap else capsule_capsule(
            start[ca], end[ca], lay.cap_r_arm[k1], start[cb], end[cb], lay.cap_r_other[k1])
        parts.append((k1, dist1, pa1, pb1, n1))
    if len(k2):
        ba, r2 = lay.cull_a[n_cap + k2], lay.box_r[k2]
        gap2, seg2, box2, n2 = _zeros(len(k2)) if skip_box else segment_box(
            start[ba], end[ba], lay.box_pose[k2], lay.box_half[k2])
        parts.append((k2 + n_cap, gap2 - r2, seg2 - r2[:, None] * n2, box2, n2))
    if len(k3):
        ha, n3, r3 = lay.plane_a[k3], lay.plane_normal[k3], lay.plane_r[k3]
        gap3, end3, plane3 = segment_plane(start[ha], end[ha], n3, lay.plane_offset[k3])
        parts.append((k3 + n_culled, gap3 - r3, end3 - r3[:, None] * n3, plane3, n3))
    if not parts:  # a model without pairs
        return Clearances.none_within(model.arm.n, beyond)
    index, distances, points_arm, points_other, normals = (
        part[0] if len(parts) == 1 else np.concatenate(part) for part in zip(*parts))
    axes = _axes(frames)
    rows = _rate_rows(model.arm, axes, points_arm, normals) * lay.mask_arm[index]
    if len(k1) and not skip_cap:
        other = lay.mask_other[k1]
        rows[:len(k1)] -= _rate_rows(model.arm, axes, points_other[:len(k1)], n1) * other
    lower = None
    if bound is not None:
        lower = bound
        if skip_cap or skip_box:  # leave out the kinds not measured
            assert known_m is not None
            measured = np.concatenate((np.full(len(k1), not skip_cap),
                                       np.full(len(k2), not skip_box), np.ones(len(k3), bool)))
            beyond = min(beyond, float(known_m[index[~measured]].min()))
            index, distances, normals = index[measured], distances[measured], normals[measured]
            points_arm, points_other = points_arm[measured], points_other[measured]
            rows = rows[measured]
        lower[index] = distances
    names = model.pair_names
    return Clearances(pairs=tuple(names[i] for i in index.tolist()), distances=distances,
                      points_arm=points_arm, points_other=points_other, normals=normals,
                      rate_rows=rows, index=index, beyond_m=beyond, lower_m=lower)


def _point_table(lay: _Layout, frames: Array, T_tcp: Array) -> tuple[Array, Array]:
    """The joint frames with the base frame first (index 0, static parts), and the point
    table of the pose (see `_Layout`)."""
    frames_0 = np.concatenate((_EYE4, frames))
    placed = np.einsum("kij,kj->ki", frames_0[lay.frame_of_point, :3], lay.local_points)
    return frames_0, np.concatenate((placed, lay.static_points, T_tcp[None, :3, 3]))


def _plane_distances(lay: _Layout, start_heights: Array, end_heights: Array) -> Array:
    """Every plane pair's distance from its end points' heights above the planes."""
    return np.minimum(start_heights, end_heights) - lay.plane_offset - lay.plane_r


def distance_table(model: CollisionModel, qs: Array, block: int = 512) -> Array:
    """(N, P): every pair's distance (m, `pair_names` order) at each of N poses qs (N, n).

    Row k is, bit for bit, `clearances_at(model, qs[k]).distances`: each pose's points are
    placed as there, and the kernels, which treat every pair alone, take the pairs of
    `block` poses in one pass instead of one pose's. For a whole run's poses at once
    (the preflight's verdict), without witness points, normals or rate rows.
    """
    lay = _layout(model)
    qs = np.asarray(qs, dtype=float).reshape(-1, model.arm.n)
    table = np.empty((len(qs), len(model.pair_names)))
    for first in range(0, len(qs), block):
        table[first:first + block] = _distance_block(model, lay, qs[first:first + block])
    return table


def _distance_block(model: CollisionModel, lay: _Layout, qs: Array) -> Array:
    m = len(qs)
    points = np.empty((m, len(lay.frame_of_point) + len(lay.static_points) + 1, 3))
    heights = np.empty((m, points.shape[1] * lay.plane_normals_T.shape[1]))
    for k, q in enumerate(qs):
        frames, T_tcp = joint_frames(model.arm, q)
        points[k] = _point_table(lay, frames, T_tcp)[1]
        heights[k] = np.dot(points[k], lay.plane_normals_T).ravel()  # as in `clearances`
    start, end = points[:, lay.start], points[:, lay.end]
    ca, cb, ba = lay.cull_a[:lay.n_cap], lay.cull_b, lay.cull_a[lay.n_cap:]

    def flat(a: Array) -> Array:
        return a.reshape(-1, 3)

    dist1 = capsule_capsule(flat(start[:, ca]), flat(end[:, ca]), np.tile(lay.cap_r_arm, m),
                            flat(start[:, cb]), flat(end[:, cb]), np.tile(lay.cap_r_other, m)
                            )[0] if lay.n_cap else np.zeros(0)
    gap2 = segment_box(flat(start[:, ba]), flat(end[:, ba]), np.tile(lay.box_pose, (m, 1, 1)),
                       np.tile(lay.box_half, (m, 1)))[0] if lay.n_box else np.zeros(0)
    dist3 = _plane_distances(lay, heights[:, lay.plane_start_flat],
                             heights[:, lay.plane_end_flat])
    return np.concatenate((dist1.reshape(m, -1), (gap2 - np.tile(lay.box_r, m)).reshape(m, -1),
                           dist3), axis=1)


def _zeros(p: int) -> tuple[Array, Array, Array, Array]:
    """A kernel's outputs for p pairs not measured: zeros that only hold their places."""
    return np.zeros(p), np.zeros((p, 3)), np.zeros((p, 3)), np.zeros((p, 3))


_EYE4 = np.eye(4)[None]


def _axes(frames: Array) -> tuple[Array, Array]:
    """Every joint's axis z and its moment z × o (o: the joint's origin), base frame."""
    z = frames[:, :3, 2]
    return z, _cross(z, frames[:, :3, 3])


def _rate_rows(arm: Arm, axes: tuple[Array, Array], points: Array, normals: Array) -> Array:
    """n·J(p) for every point as if every joint moved it (the caller masks the rest)."""
    z, moment = axes
    rows = np.dot(_cross(points, normals), z.T) - np.dot(normals, moment.T)
    pri = arm.prismatic_index
    if len(pri):
        rows[:, pri] = np.dot(normals, z[pri].T)
    return np.asarray(rows, dtype=float)


@lru_cache(maxsize=32)
def reach_weights(model: CollisionModel) -> Array | None:
    """(P, n), m/rad: how fast each pair's distance can change with each joint, in any pose;
    None for arms with prismatic joints (their offsets change with q).

    A point carried by joint frame f moves, when revolute joint j ≤ f turns by dq, at most
    |dq| times its distance from joint j's origin, which no pose makes larger than the link
    offsets from joint j to frame f, summed, plus the point's own distance from frame f's
    origin. A pair's distance changes by no more than its two sides' points move relative to
    each other: for an object, by the arm side's motion; for two links, only joints between
    their frames move one against the other (those below carry both alike). So along a
    straight move from q₀ to q

        d(q) ≥ d(q₀) − Σ_j W[pair, j]·|q_j − q₀_j|

    for every pair, with d(q₀) its distance or any lower bound of it, wherever the right
    side is positive: the gap between two sets changes by no more than their relative
    motion, and a positive distance here is such a gap (for a cylinder, the gap to its
    enclosing capsule). Segment end points bound every point of a capsule (it is convex);
    radii do not move.
    """
    arm, caps, lay = model.arm, model.capsules, _layout(model)
    if not arm.is_revolute.all():
        return None
    n, s = arm.n, len(model.static_radius)
    offsets = np.array([0.0] + [float(np.linalg.norm(j.origin[:3, 3])) for j in arm.joints[1:]])
    carried = np.cumsum(offsets)  # carried[f] − carried[j]: offsets from joint j to frame f
    frame = np.concatenate((caps.frame, np.full(s, -1), [n - 1]))
    local = np.concatenate((np.maximum(np.linalg.norm(caps.start, axis=1),
                                       np.linalg.norm(caps.end, axis=1)),
                            np.zeros(s), [float(np.linalg.norm(arm.tip[:3, 3]))]))
    joints = np.arange(n)
    # reach[row, j]: farthest point of capsule-table row `row` from joint j's origin
    reach = np.where(joints[None, :] <= frame[:, None],
                     carried[np.maximum(frame, 0)][:, None] - carried[None, :] + local[:, None],
                     0.0)
    cp, bp, hp = model.capsule_pairs, model.box_pairs, model.plane_pairs
    rows_a = np.concatenate((cp[:, 0], bp[:, 0], hp[:, 0]))  # the TCP: the table's last row
    rows_b = np.concatenate((cp[:, 1], np.full(len(bp) + len(hp), -1)))
    frame_b = np.where(rows_b >= 0, frame[np.maximum(rows_b, 0)], -1)
    frame_a = frame[rows_a]
    moving = np.where(frame_b > frame_a, rows_b, rows_a)
    low, high = np.minimum(frame_a, frame_b), np.maximum(frame_a, frame_b)
    between = (joints[None, :] > low[:, None]) & (joints[None, :] <= high[:, None])
    assert len(rows_a) == len(lay.cull_a) + len(lay.plane_a)
    return np.asarray(np.where(between, reach[moving], 0.0), dtype=float)


def clearances_at(model: CollisionModel, q: Array) -> Clearances:
    """`clearances` at joint positions q (rad or m)."""
    frames, T = joint_frames(model.arm, np.asarray(q, dtype=float))
    return clearances(model, frames, T)


@lru_cache(maxsize=32)
def collision_model(arm: Arm, cell: Cell | None) -> CollisionModel:
    """The collision model of `arm` in `cell`, built once per pair."""
    return CollisionModel.build(arm, cell)


def cell_distances(arm: Arm, cell: Cell | None, q: Array) -> Clearances:
    """Every checked pair of `arm` in `cell` at q."""
    return clearances_at(collision_model(arm, cell), q)


__all__ = ["Clearances", "capsule_capsule", "cell_distances", "clearances", "clearances_at",
           "distance_table",
           "collision_model", "reach_weights", "segment_box", "segment_parameters",
           "segment_plane"]
