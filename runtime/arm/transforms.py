"""Small homogeneous-transform helpers (pure numpy; metres and radians).

Conventions: a transform is a 4×4 float64 array; `rpy` is fixed-axis roll, pitch, yaw,
R = Rz(yaw)·Ry(pitch)·Rx(roll), as in the URDF specification.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from numpy.typing import NDArray

Mat4 = NDArray[np.float64]
Mat3 = NDArray[np.float64]


def rotx(angle_rad: float) -> Mat3:
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    return np.array([[1.0, 0.0, 0.0], [0.0, c, -s], [0.0, s, c]])


def roty(angle_rad: float) -> Mat3:
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    return np.array([[c, 0.0, s], [0.0, 1.0, 0.0], [-s, 0.0, c]])


def rotz(angle_rad: float) -> Mat3:
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def rpy_to_matrix(rpy_rad: Sequence[float] | NDArray[np.float64]) -> Mat3:
    """R = Rz(y)·Ry(p)·Rx(r). Example: rpy (0, 0, π/2) maps x to y."""
    r, p, y = (float(v) for v in rpy_rad)
    return rotz(y) @ roty(p) @ rotx(r)


def matrix_to_rpy(R: Mat3) -> NDArray[np.float64]:
    """Inverse of `rpy_to_matrix` (pitch in [−π/2, π/2]; roll = 0 at gimbal lock)."""
    pitch = np.arcsin(np.clip(-R[2, 0], -1.0, 1.0))
    if abs(R[2, 0]) < 1.0 - 1e-12:
        roll = np.arctan2(R[2, 1], R[2, 2])
        yaw = np.arctan2(R[1, 0], R[0, 0])
    else:  # gimbal lock: only roll ± yaw is defined; put it all in yaw
        roll = 0.0
        yaw = np.arctan2(-R[0, 1], R[1, 1])
    return np.array([roll, pitch, yaw])


def make_transform(xyz_m: Sequence[float] | NDArray[np.float64] = (0.0, 0.0, 0.0),
                   rpy_rad: Sequence[float] | NDArray[np.float64] = (0.0, 0.0, 0.0)) -> Mat4:
    T = np.eye(4)
    T[:3, :3] = rpy_to_matrix(rpy_rad)
    T[:3, 3] = np.asarray(xyz_m, dtype=float)
    return T


def trans(x: float = 0.0, y: float = 0.0, z: float = 0.0) -> Mat4:
    T = np.eye(4)
    T[:3, 3] = (x, y, z)
    return T


def rot4(R: Mat3) -> Mat4:
    T = np.eye(4)
    T[:3, :3] = R
    return T


def rotation_aligning_z(axis: Sequence[float] | NDArray[np.float64]) -> Mat3:
    """A rotation R with R·ẑ = axis (any length but zero, rescaled to unit). Used to give
    every joint a local z axis. A zero axis is a ValueError."""
    a = np.asarray(axis, dtype=float)
    size = float(np.linalg.norm(a))
    if not size > 1e-150:       # squares underflow: rescale by the largest component first
        largest = float(np.abs(a).max())
        if largest == 0.0:
            raise ValueError("a zero vector has no direction to align z with")
        a = a / largest
        size = float(np.linalg.norm(a))
    a = a / size
    z = np.array([0.0, 0.0, 1.0])
    c = float(z @ a)
    if c > 1.0 - 1e-15:
        return np.eye(3)
    if c < -1.0 + 1e-15:
        return rotx(np.pi)
    k = np.cross(z, a)
    s = np.linalg.norm(k)
    k /= s
    K = np.array([[0.0, -k[2], k[1]], [k[2], 0.0, -k[0]], [-k[1], k[0], 0.0]])
    R: Mat3 = np.eye(3) + s * K + (1.0 - c) * (K @ K)  # Rodrigues
    return R
