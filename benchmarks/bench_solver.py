"""One full solve per control cycle: jogwire against a plain reference cycle, same run.

  jogwire    runtime.solver.solve(arm, q, twist, prev_rates=…, dt_s=…): FK + Jacobian,
             adaptive-damping DLS (σ_min from one eigh of JJᵀ), null-space centring,
             joint-limit check, and every limit (speed, position brake, acceleration,
             TCP caps)
  reference  pin forwardKinematics + updateFramePlacement + computeFrameJacobian
             (LOCAL_WORLD_ALIGNED) on the URDF that sim.urdf writes for the same arm, then
             q̇ = Jᵀ·numpy.linalg.solve(JJᵀ + λ²I, v) with a fixed λ and one uniform
             joint-speed scaling: the least a DLS jog cycle can do

Both run call by call, interleaved, on the poses of a simulated jog (q += q̇·dt at 500 Hz,
the twist changing direction every 0.5 s), so the machine's load hits both alike and the
jogwire path sees the limits bind as they would in use. Also times the candidate ways of
getting σ_min (the choice made in runtime/solver.py). Run from the repository root:

    python benchmarks/bench_solver.py [--cycles N] [--arm reach7]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runtime.kinematics import geometric_jacobian  # noqa: E402
from runtime.model import Arm, load_arm  # noqa: E402
from runtime.solver import solve  # noqa: E402
from sim.urdf import write_urdf  # noqa: E402

DT_S = 0.002
REFERENCE_DAMPING = 0.05


def jog_twists(cycles: int, seed: int = 11) -> np.ndarray:
    """A twist per cycle: 0.2 m/s and 0.5 rad/s along a direction redrawn every 0.5 s."""
    rng = np.random.default_rng(seed)
    hold = int(0.5 / DT_S)
    out = np.empty((cycles, 6))
    for start in range(0, cycles, hold):
        d = rng.normal(size=6)
        d[:3] *= 0.2 / np.linalg.norm(d[:3])
        d[3:] *= 0.5 / np.linalg.norm(d[3:])
        out[start:start + hold] = d
    return out


def run(arm: Arm, urdf: Path, cycles: int) -> dict[str, np.ndarray | float]:
    import pinocchio as pin

    model = pin.buildModelFromUrdf(str(urdf))
    data = model.createData()
    fid = model.getFrameId("tcp")
    frame = pin.ReferenceFrame.LOCAL_WORLD_ALIGNED
    eye = REFERENCE_DAMPING ** 2 * np.eye(6)
    speed = arm.max_speed

    def reference(q: np.ndarray, v: np.ndarray) -> np.ndarray:
        pin.forwardKinematics(model, data, q)
        pin.updateFramePlacement(model, data, fid)
        J = pin.computeFrameJacobian(model, data, q, fid, frame)
        rates = J.T @ np.linalg.solve(J @ J.T + eye, v)
        worst = float((np.abs(rates) / speed).max())
        return rates / worst if worst > 1.0 else rates

    twists = jog_twists(cycles)
    ours = np.empty(cycles)
    theirs = np.empty(cycles)
    binding: dict[str, int] = {}
    q = arm.home()
    prev = np.zeros(arm.n)
    for _ in range(2):  # warm-up of both paths
        for v in twists[:200]:
            solve(arm, q, v, prev_rates=prev, dt_s=DT_S)
            reference(q, v)
    clock = time.perf_counter
    for k, v in enumerate(twists):
        t0 = clock()
        sol = solve(arm, q, v, prev_rates=prev, dt_s=DT_S)
        t1 = clock()
        reference(q, v)
        t2 = clock()
        ours[k], theirs[k] = t1 - t0, t2 - t1
        binding[str(sol.binding_limit)] = binding.get(str(sol.binding_limit), 0) + 1
        prev = sol.rates
        q = q + prev * DT_S
    return {"ours": ours, "theirs": theirs, "binding": binding, "q_end": q}


def sigma_min_options(arm: Arm, repeat: int) -> dict[str, float]:
    """Median µs of each way to get σ_min (and what else it gives) on the arm's 6×n J."""
    rng = np.random.default_rng(3)
    Js = [geometric_jacobian(arm, rng.uniform(np.maximum(arm.lower, -3), np.minimum(arm.upper, 3)))
          for _ in range(64)]
    v = np.ones(6)
    options = {
        "svd(J), values only": lambda J: np.linalg.svd(J, compute_uv=False),
        "svd(J), full": lambda J: np.linalg.svd(J, full_matrices=False),
        "eigvalsh(JJᵀ)": lambda J: np.linalg.eigvalsh(J @ J.T),
        "eigvalsh(JJᵀ) + solve": lambda J: (np.linalg.eigvalsh(G := J @ J.T),
                                           np.linalg.solve(G, v)),
        "eigh(JJᵀ) (chosen: σ², solve, projector)": lambda J: np.linalg.eigh(J @ J.T),
    }
    out = {}
    clock = time.perf_counter
    for name, f in options.items():
        times = np.empty(repeat)
        for k in range(repeat):
            J = Js[k % 64]
            t0 = clock()
            f(J)
            times[k] = clock() - t0
        out[name] = float(np.median(times)) * 1e6
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--cycles", type=int, default=20000, help="timed cycles")
    parser.add_argument("--arm", default="reach7", help="shipped arm name")
    args = parser.parse_args(argv)
    arm = load_arm(args.arm)
    with tempfile.TemporaryDirectory() as tmp:
        urdf = write_urdf(arm, Path(tmp) / f"{arm.name}.urdf")
        result = run(arm, urdf, args.cycles)
    us = 1e6
    ours, theirs = result["ours"] * us, result["theirs"] * us
    print(f"Full solve per cycle, {arm.name} ({arm.n} joints), {args.cycles} cycles of a "
          f"simulated jog at {1 / DT_S:.0f} Hz (numpy {np.__version__}, "
          f"Python {sys.version.split()[0]})")
    print(f"  jogwire solve      median {np.median(ours):6.1f} µs   p99 {np.percentile(ours, 99):6.1f} µs")
    print(f"  reference (pin J + numpy.linalg.solve DLS + speed scaling)"
          f"  median {np.median(theirs):6.1f} µs   p99 {np.percentile(theirs, 99):6.1f} µs")
    print(f"  ratio of medians   {np.median(ours) / np.median(theirs):.2f}")
    share = ", ".join(f"{k} {v / args.cycles:.0%}" for k, v in
                      sorted(result["binding"].items(), key=lambda kv: -kv[1]))
    print(f"  binding limit over the run: {share}")
    print("σ_min options on 6×n Jacobians (median µs):")
    for name, t in sigma_min_options(arm, 5000).items():
        print(f"  {name:<44} {t:6.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
