"""The constant part of the forward kinematics, worked out once per arm (pure numpy).

`runtime.arm.kinematics` multiplies, instead of 4×4 transforms, 7×7 matrices that also
carry the Plücker moment of each frame's z axis:

        [ R    p   0 ]
    X = [ 0    1   0 ]      p̂ = skew(p), so column 2 of X is (z, 0, p × z),
        [ p̂R   *   R ]      and column 6 is (0, 0, z)

The top-left 4×4 is the frame itself. The lower blocks are those of the rigid-body adjoint
Ad(T) = [R 0; p̂R R] (Murray, Li & Sastry 1994, §2.4), so the product of two such matrices
is again one (R₁R₂, R₁p₂ + p₁, and the adjoint of the product). The entry * gathers a term
that never reaches the other blocks and is never read. With the moments in the frames, a
revolute joint's Jacobian column z × (p_tcp − o) = p_tcp̂ᵀz + o × z is one linear map of
column 2 away, for all joints at once; a prismatic joint's column (z, 0) comes from column 6.

The chain product is sequential; each product costs about one interpreter round trip
whatever its size. So consecutive revolute joints are taken in pairs: the product of two
link matrices, origin_a·Rz(q_a)·origin_b·Rz(q_b), is a trigonometric polynomial of degree one
in each angle, i.e. a fixed combination of the nine values

    1, cos/sin q_b, cos/sin q_a, cos/sin (q_a + q_b), cos/sin (q_a − q_b)

and so is the first link of the pair alone. All of them, for every pair, come from one
`np.sin` of an affine map of q (cos x = sin(x + π/2), 1 = sin(π/2)); one matrix product then
gives every pair's two local products (the first and last pairs with the base and the tool
folded in), and the chain takes one product per pair. The combination coefficients are
found once by solving for them on the grid of angles {0, 2π/3, 4π/3} per joint, where the
nine functions are orthogonal (the discrete Fourier transform), so they are exact to
rounding. A prismatic joint stands alone: its link matrix is affine in q itself.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .transforms import Mat4

SIZE = 7        # the augmented matrix is SIZE × SIZE
PAIR = 2        # revolute joints per group


@dataclass(frozen=True, eq=False)
class ChainTerms:
    """What `kinematics` needs to build every frame of one arm from q.

    s = sin(angles·q + phases), then q appended when `with_q` (prismatic joints);
    matrix·s, as rows of 7, is the stack of each group's local products, transposed
    (Xᵀ: the chain is multiplied from the left), in joint order, the TCP last;
    groups: the row range of every group after the first, which the chain multiplies by
    the last frame before it; first_rows: where the first group ends.
    axis_rows: the row of each joint's Jacobian column (row 2 or 6 of its Xᵀ);
    tcp_row: row 3 of the TCP's Xᵀ, (p_tcp, 1, *).
    """

    angles: NDArray[np.float64]
    phases: NDArray[np.float64]
    with_q: bool
    matrix: NDArray[np.float64]
    first_rows: int
    groups: tuple[tuple[int, int], ...]
    axis_rows: slice | NDArray[np.intp]
    tcp_row: int


def augmented(T: Mat4) -> NDArray[np.float64]:
    """The 7×7 matrix of a rigid transform (the module docstring), its * entry 0."""
    R, p = T[:3, :3], T[:3, 3]
    skew = np.array([[0.0, -p[2], p[1]], [p[2], 0.0, -p[0]], [-p[1], p[0], 0.0]])
    X = np.zeros((SIZE, SIZE))
    X[:3, :3] = X[4:, 4:] = R
    X[:3, 3] = p
    X[3, 3] = 1.0
    X[4:, :3] = skew @ R
    return X


def _motion(revolute: bool, q: float) -> Mat4:
    M = np.eye(4)
    if revolute:
        c, s = np.cos(q), np.sin(q)
        M[:2, :2] = [[c, -s], [s, c]]
    else:
        M[2, 3] = q
    return M


def _groups(revolute: list[bool]) -> list[list[int]]:
    """Consecutive revolute joints in pairs; a prismatic joint alone."""
    out: list[list[int]] = []
    for i, rev in enumerate(revolute):
        if rev and out and len(out[-1]) < PAIR and revolute[out[-1][0]]:
            out[-1].append(i)
        else:
            out.append([i])
    return out


def build_chain_terms(origins: NDArray[np.float64], revolute: list[bool], base: Mat4,
                tip: Mat4) -> ChainTerms:
    """The terms for the chain base · Π origin_i·Motion_i(q_i) · tip."""
    n = len(revolute)
    groups = _groups(revolute)
    angles: list[NDArray[np.float64]] = [np.zeros((1, n))]   # argument 0: sin(π/2) = 1
    phases: list[float] = [np.pi / 2]
    blocks: list[tuple[int | None, list[int], NDArray[np.float64]]] = []  # first sine, joints
    args = 1
    for g, joints in enumerate(groups):
        def local(qg, joints=joints, g=g) -> NDArray[np.float64]:
            """This group's local products at the joint values qg, as stacked rows of Xᵀ."""
            T = base.copy() if g == 0 else np.eye(4)
            out = []
            for i, qi in zip(joints, qg):
                T = T @ origins[i] @ _motion(revolute[i], qi)
                out.append(augmented(T).T)
            if g == len(groups) - 1:
                out.append(augmented(T @ tip).T)
            return np.concatenate(out).ravel()

        if not revolute[joints[0]]:                   # affine in q: constant + q·slope
            at0 = local([0.0])
            blocks.append((None, joints, np.stack([at0, local([1.0]) - at0])))
            continue
        k = len(joints)
        freqs = [f for f in itertools.product((-1, 0, 1), repeat=k)
                 if any(f) and next(x for x in f if x) > 0]        # one of each ±f
        A = np.zeros((2 * len(freqs), n))
        for j, f in enumerate(freqs):
            A[2 * j: 2 * j + 2, joints] = f
        phase = np.tile([np.pi / 2, 0.0], len(freqs))             # cos, sin of f·q
        grid = np.array(list(itertools.product(*[[0.0, 2 * np.pi / 3, 4 * np.pi / 3]] * k)))
        basis = np.hstack([np.ones((len(grid), 1)), np.sin(grid @ A[:, joints].T + phase)])
        coef = np.linalg.solve(basis, np.array([local(qg) for qg in grid]))
        blocks.append((args, joints, coef))
        angles.append(A)
        phases.extend(phase)
        args += len(A)

    A = np.vstack(angles)
    k = len(A)
    with_q = not all(revolute)
    rows = [len(j) + (g == len(groups) - 1) for g, j in enumerate(groups)]   # frames per group
    matrix = np.zeros((SIZE * SIZE * (n + 1), k + (n if with_q else 0)))
    r = 0
    for (col, joints, coef), frames in zip(blocks, rows):
        height = SIZE * SIZE * frames
        matrix[r:r + height, 0] = coef[0]             # the constant term
        if col is None:                               # prismatic: the slope times q
            matrix[r:r + height, k + joints[0]] = coef[1]
        else:                                         # this group's sines
            matrix[r:r + height, col:col + len(coef) - 1] = coef[1:].T
        r += height
    ends = np.cumsum(rows) * SIZE
    axis = [SIZE * i + (2 if rev else 6) for i, rev in enumerate(revolute)]
    return ChainTerms(
        angles=A, phases=np.array(phases), with_q=with_q, matrix=matrix,
        first_rows=int(ends[0]),
        groups=tuple((int(a), int(b)) for a, b in zip(ends[:-1], ends[1:])),
        axis_rows=slice(2, SIZE * n, SIZE) if not with_q else np.array(axis),
        tcp_row=SIZE * n + 3)
