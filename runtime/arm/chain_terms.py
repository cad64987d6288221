"""The constant part of the forward kinematics, worked out once per arm (pure numpy).

`runtime.arm.kinematics` multiplies, instead of 4×4 transforms, 7×7 matrices that also
carry the Plücker moment of each frame's z axis:

        [ R    p   0 ]
    X = [ 0    1   0 ]      p̂ = skew(p), so column 2 of X is (z, 0, p × z),
        [ p̂R   *   R ]      and column 6 is (0, 0, z)

The top-left 4×4 is the frame itself. The lower blocks are those of the rigid-body adjoint
Ad(T) = [R 0; p̂R R] in (ω, v) order (Murray, Li & Sastry 1994, ch. 2, from memory, in
(v, ω) order), so the product of two such matrices is again one (R₁R₂, R₁p₂ + p₁, and the
adjoint of the product). The entry * gathers a term that never reaches the other blocks
and is never read. With the moments in the frames, a revolute joint's Jacobian column
z × (p_tcp − o) = o × z − p_tcp × z is one linear map of column 2 away, for all joints at
once; a prismatic joint's column (z, 0) is one of column 6.

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
from dataclasses import dataclass, field
from typing import Any

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
    steps: for every group after the first, its rows and the rows of the frame before it,
    which the chain multiplies its local products by (the first group's are final).
    axis_rows: the row of each joint's Jacobian column (row 2 or 6 of its Xᵀ);
    tcp_row: row 3 of the TCP's Xᵀ, (p_tcp, 1, *).
    spare_buffers: working arrays for `kinematics.pose_and_jacobian` not in use now (one
    set per caller running at the same time).
    """

    angles: NDArray[np.float64]
    phases: NDArray[np.float64]
    with_q: bool
    matrix: NDArray[np.float64]
    steps: tuple[tuple[slice, slice], ...]
    axis_rows: slice | NDArray[np.intp]
    tcp_row: int
    spare_buffers: list[Any] = field(default_factory=list, repr=False)

    def __getstate__(self) -> dict[str, object]:
        # The working arrays (runtime.arm.kinematics) stay in their process.
        return {**self.__dict__, "spare_buffers": []}


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


def _frequencies(k: int) -> list[tuple[int, ...]]:
    """One of each ±f for f in {−1, 0, 1}^k, f ≠ 0: the angles f·q whose cos and sin, with
    1, span every trigonometric polynomial of degree one in each of k angles (3^k terms)."""
    return [f for f in itertools.product((-1, 0, 1), repeat=k)
            if any(f) and next(x for x in f if x) > 0]


def build_chain_terms(origins: NDArray[np.float64], revolute: list[bool], base: Mat4,
                      tip: Mat4) -> ChainTerms:
    """The terms for the chain base · Π origin_i·Motion_i(q_i) · tip."""
    n = len(revolute)
    groups = _groups(revolute)

    # The sine arguments: row 0 gives 1, then cos and sin of f·q for every revolute group.
    angles, phases = [np.zeros(n)], [np.pi / 2]
    columns: list[list[int] | None] = []            # the entries of s each group uses
    for joints in groups:
        if not revolute[joints[0]]:
            columns.append(None)                    # 1 and q_i: known once s is complete
            continue
        entries = [0]
        columns.append(entries)
        for f in _frequencies(len(joints)):
            for phase in (np.pi / 2, 0.0):          # cos, sin
                row = np.zeros(n)
                row[joints] = f
                entries.append(len(angles))
                angles.append(row)
                phases.append(phase)
    A, phi = np.array(angles), np.array(phases)
    with_q = not all(revolute)

    # Each group's local products in the span of its entries of s, fitted on a grid where
    # that basis is square and well conditioned: {0, 2π/3, 4π/3} per angle, {0, 1} for q.
    frames = [len(j) + (g == len(groups) - 1) for g, j in enumerate(groups)]  # the TCP last
    matrix = np.zeros((SIZE * SIZE * (n + 1), len(A) + (n if with_q else 0)))
    top = 0
    for g, (joints, cols) in enumerate(zip(groups, columns)):
        if cols is None:
            cols = [0, len(A) + joints[0]]
            grid = np.array([[0.0], [1.0]])
            basis = np.hstack([np.ones((2, 1)), grid])
        else:
            grid = np.array(list(itertools.product(
                [0.0, 2 * np.pi / 3, 4 * np.pi / 3], repeat=len(joints))))
            basis = np.sin(grid @ A[cols][:, joints].T + phi[cols])
        values = [_local_products(origins, revolute, joints, qg,
                                  base if g == 0 else None,
                                  tip if g == len(groups) - 1 else None) for qg in grid]
        height = SIZE * SIZE * frames[g]
        matrix[top:top + height, cols] = np.linalg.solve(basis, np.array(values)).T
        top += height

    ends = np.cumsum(frames) * SIZE
    axis = [SIZE * i + (2 if rev else 6) for i, rev in enumerate(revolute)]
    return ChainTerms(
        angles=A, phases=phi, with_q=with_q,
        matrix=np.asfortranarray(matrix),          # column-major: a quicker product here
        steps=tuple((slice(int(a), int(b)), slice(int(a) - SIZE, int(a)))
                    for a, b in zip(ends[:-1], ends[1:])),
        axis_rows=np.array(axis) if with_q else slice(2, SIZE * n, SIZE),
        tcp_row=SIZE * n + 3)


def _local_products(origins: NDArray[np.float64], revolute: list[bool], joints: list[int],
                    q: NDArray[np.float64], base: Mat4 | None, tip: Mat4 | None
                    ) -> NDArray[np.float64]:
    """A group's products base·L_a, base·L_a·L_b, … (·tip after the last joint), each as
    its augmented matrix transposed, stacked and flattened: one column of the fit."""
    T = np.eye(4) if base is None else base
    out = []
    for i, qi in zip(joints, q):
        T = T @ origins[i] @ _motion(revolute[i], qi)
        out.append(augmented(T).T)
    if tip is not None:
        out.append(augmented(T @ tip).T)
    return np.concatenate(out).ravel()
