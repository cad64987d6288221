"""Forward kinematics + geometric Jacobian: jogwire (numpy) against pin (compiled C++).

For each arm the same random poses go through both, call by call and interleaved, so the
machine's load hits both alike:

  jogwire  joint_frames(arm, q) + jacobian_from_frames(...)      → T_tcp and J (6×n)
  pin      forwardKinematics + updateFramePlacement + computeFrameJacobian(LOCAL_WORLD_ALIGNED)
           on the URDF that sim.urdf writes for the same arm       → T_tcp and J (6×n)

Prints median and p99 per call (µs) and the ratio of medians, and checks that both give the
same Jacobian. Run from the repository root:

    python benchmarks/bench_kinematics.py [--repeat N] [--arms elbow6,reach7]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runtime.arm.kinematics import jacobian_from_frames, joint_frames  # noqa: E402
from runtime.arm.load import load_arm  # noqa: E402
from runtime.arm.model import Arm  # noqa: E402
from sim.urdf import write_urdf  # noqa: E402


def random_poses(arm: Arm, count: int, seed: int = 7) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lo = np.maximum(arm.lower, -np.pi)
    hi = np.minimum(arm.upper, np.pi)
    return rng.uniform(lo, hi, size=(count, arm.n))


def time_both(arm: Arm, urdf: Path, repeat: int) -> tuple[np.ndarray, np.ndarray, float]:
    """Per-call times (s) of jogwire and pin over `repeat` poses, and their largest J difference."""
    import pinocchio as pin

    model = pin.buildModelFromUrdf(str(urdf))
    data = model.createData()
    fid = model.getFrameId("tcp")
    frame = pin.ReferenceFrame.LOCAL_WORLD_ALIGNED
    poses = random_poses(arm, repeat)
    ours = np.empty(repeat)
    theirs = np.empty(repeat)
    worst = 0.0
    clock = time.perf_counter
    for _ in range(2):  # warm up both paths (caches, lazily built arrays)
        for q in poses[:200]:
            jacobian_from_frames(arm, *joint_frames(arm, q))
            pin.forwardKinematics(model, data, q)
            pin.computeFrameJacobian(model, data, q, fid, frame)
    for k, q in enumerate(poses):
        t0 = clock()
        frames, T = joint_frames(arm, q)
        J = jacobian_from_frames(arm, frames, T)
        t1 = clock()
        pin.forwardKinematics(model, data, q)
        pin.updateFramePlacement(model, data, fid)
        Jp = pin.computeFrameJacobian(model, data, q, fid, frame)
        t2 = clock()
        ours[k], theirs[k] = t1 - t0, t2 - t1
        if k % 64 == 0:
            worst = max(worst, float(np.abs(J - Jp).max()),
                        float(np.abs(T - data.oMf[fid].homogeneous).max()))
    return ours, theirs, worst


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeat", type=int, default=20000, help="timed calls per arm")
    parser.add_argument("--arms", default="elbow6,reach7", help="comma-separated arm names")
    args = parser.parse_args(argv)
    us = 1e6
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.arms.split(","):
            arm = load_arm(name)
            urdf = write_urdf(arm, Path(tmp) / f"{name}.urdf")
            ours, theirs, worst = time_both(arm, urdf, args.repeat)
            rows.append((name, arm.n, np.median(ours) * us, np.percentile(ours, 99) * us,
                         np.median(theirs) * us, np.percentile(theirs, 99) * us,
                         np.median(ours) / np.median(theirs), worst))
    print(f"FK + Jacobian per call, {args.repeat} random poses per arm "
          f"(numpy {np.__version__}, Python {sys.version.split()[0]})")
    print(f"{'arm':<8} {'n':>2}  {'jogwire med':>11} {'p99':>7}  {'pin med':>8} {'p99':>7}  "
          f"{'ratio':>5}  {'max |ΔJ|, |ΔT|':>14}")
    for name, n, om, op, pm, pp, ratio, worst in rows:
        print(f"{name:<8} {n:>2}  {om:>9.2f}µs {op:>6.1f}  {pm:>6.2f}µs {pp:>6.1f}  "
              f"{ratio:>5.1f}  {worst:>14.1e}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
