"""Forward kinematics + geometric Jacobian: jogwire (numpy) against pin (compiled C++).

For each arm the same random poses go through both, call by call and interleaved, so the
machine's load hits both alike:

  jogwire  pose_and_jacobian(arm, q)  (what the solver calls)     → T_tcp and J (6×n)
  pin      forwardKinematics + updateFramePlacement + computeFrameJacobian(LOCAL_WORLD_ALIGNED)
           on the URDF that sim.urdf writes for the same arm       → T_tcp and J (6×n)

Prints median and p99 per call (µs), the ratio of medians, the load average, and checks that
both give the same Jacobian. Each numpy call costs about a microsecond whatever the array
size, so it also prints how many numpy operations one call makes (calls, indexing and
arithmetic executed in runtime/arm/kinematics.py, counted by tracing its bytecode). Run
from the repository root:

    python benchmarks/bench_kinematics.py [--repeat N] [--arms elbow6,reach7]
"""

from __future__ import annotations

import argparse
import dis
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runtime.arm import kinematics  # noqa: E402
from runtime.arm.kinematics import pose_and_jacobian  # noqa: E402
from runtime.arm.model import Arm, load_arm  # noqa: E402
from sim.urdf import write_urdf  # noqa: E402


def random_poses(arm: Arm, count: int, seed: int = 7) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lo = np.maximum(arm.lower, -np.pi)
    hi = np.minimum(arm.upper, np.pi)
    return rng.uniform(lo, hi, size=(count, arm.n))


COUNTED = {"CALL", "BINARY_SUBSCR", "STORE_SUBSCR", "BINARY_OP"}


def count_operations(arm: Arm, q: np.ndarray) -> int:
    """The numpy operations one `pose_and_jacobian` call makes: every call, subscript and
    arithmetic operator executed in kinematics.py (all of them there work on arrays)."""
    source = kinematics.__file__
    names: dict = {}
    count = 0

    def trace(frame, event, arg):
        nonlocal count
        code = frame.f_code
        if code.co_filename != source:
            return None
        frame.f_trace_opcodes = True
        if event == "opcode":
            if code not in names:
                names[code] = {i.offset: i.opname for i in dis.get_instructions(code)}
            count += names[code].get(frame.f_lasti) in COUNTED
        return trace

    sys.settrace(trace)
    try:
        pose_and_jacobian(arm, q)
    finally:
        sys.settrace(None)
    return count


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
            pose_and_jacobian(arm, q)
            pin.forwardKinematics(model, data, q)
            pin.computeFrameJacobian(model, data, q, fid, frame)
    for k, q in enumerate(poses):
        t0 = clock()
        T, J = pose_and_jacobian(arm, q)
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
    load_before = os.getloadavg()[0]
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.arms.split(","):
            arm = load_arm(name)
            urdf = write_urdf(arm, Path(tmp) / f"{name}.urdf")
            ours, theirs, worst = time_both(arm, urdf, args.repeat)
            rows.append((name, arm.n, count_operations(arm, arm.home()),
                         np.median(ours) * us, np.percentile(ours, 99) * us,
                         np.median(theirs) * us, np.percentile(theirs, 99) * us,
                         np.median(ours) / np.median(theirs), worst))
    print(f"FK + Jacobian per call, {args.repeat} random poses per arm "
          f"(numpy {np.__version__}, Python {sys.version.split()[0]}; load average "
          f"{load_before:.2f} before, {os.getloadavg()[0]:.2f} after)")
    print(f"{'arm':<8} {'n':>2} {'ops':>4}  {'jogwire med':>11} {'p99':>7}  {'pin med':>8} "
          f"{'p99':>7}  {'ratio':>5}  {'max |ΔJ|, |ΔT|':>14}")
    for name, n, ops, om, op, pm, pp, ratio, worst in rows:
        print(f"{name:<8} {n:>2} {ops:>4}  {om:>9.2f}µs {op:>6.1f}  {pm:>6.2f}µs {pp:>6.1f}  "
              f"{ratio:>5.1f}  {worst:>14.1e}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
