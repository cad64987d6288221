"""One full solve per control cycle: jogwire against a plain reference cycle, same run.

  jogwire    runtime.control.solver.solve(arm, q, twist, prev_rates=…, dt_s=…): FK + Jacobian,
             adaptive-damping DLS (σ_min from the eigenvalues of JJᵀ), null-space centring,
             joint-limit check, and every limit (speed, position brake, acceleration,
             TCP caps)
  reference  pin forwardKinematics + updateFramePlacement + computeFrameJacobian
             (LOCAL_WORLD_ALIGNED) on the URDF that sim.urdf writes for the same arm, then
             q̇ = Jᵀ·numpy.linalg.solve(JJᵀ + λ²I, v) with a fixed λ and one uniform
             joint-speed scaling: the least a DLS jog cycle can do

Both run call by call, interleaved (with jogwire's FK + Jacobian alone as a third column),
on the poses of a simulated jog (q += q̇·dt at 500 Hz; WORKLOADS below), so the machine's
load hits all alike and the jogwire path sees damping and limits as they come in use;
medians are also given per path (clear of limits and singularities, near a position limit,
damped). Also times the candidate ways of getting σ_min (the choice made
in runtime/control/solver.py).

Clearance (--cell, default the demo cell `bench`): the same solve with and without the
velocity damper (runtime/control/clearance.py), interleaved at each pose of a jog that
drives into the cell's objects under the damper (3 s gestures at 0.3 m/s, mostly downward
and sideways, from home); the added time per cycle, in all cycles and in those with a pair
inside the influence distance. Run from the repository root:

    python benchmarks/bench_solver.py [--cycles N] [--arm reach7] [--cell bench]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runtime.arm.cell import load_cell  # noqa: E402
from runtime.arm.kinematics import geometric_jacobian, pose_and_jacobian  # noqa: E402
from runtime.control.clearance import ClearanceLimit  # noqa: E402
from runtime.control.limits import JointBounds, clear_of_limits  # noqa: E402
from runtime.arm.model import Arm, load_arm  # noqa: E402
from runtime.control.solver import _eigvalsh, _solve, solve  # noqa: E402
from sim.urdf import write_urdf  # noqa: E402

DT_S = 0.002
REFERENCE_DAMPING = 0.05


WORKLOADS = {
    "gestures": "gestures from the home pose: 0.5 s along a random twist, 0.5 s back",
    "wander": "the same gestures chained without returning home: the arm drifts into "
              "singular and near-limit poses",
}


def jog_twists(cycles: int, seed: int = 11) -> np.ndarray:
    """A twist per cycle: gestures of 0.2 m/s and 0.5 rad/s along a random direction for
    0.5 s, then back the opposite way for 0.5 s."""
    rng = np.random.default_rng(seed)
    hold = int(0.5 / DT_S)
    out = np.empty((cycles, 6))
    for start in range(0, cycles, 2 * hold):
        d = rng.normal(size=6)
        d[:3] *= 0.2 / np.linalg.norm(d[:3])
        d[3:] *= 0.5 / np.linalg.norm(d[3:])
        out[start:start + hold] = d
        out[start + hold:start + 2 * hold] = -d
    return out


def run(arm: Arm, urdf: Path, cycles: int, workload: str) -> dict[str, np.ndarray | float]:
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
    kinematics = np.empty(cycles)
    paths = np.empty(cycles, dtype=object)
    binding: dict[str, int] = {}
    bounds = JointBounds.of(arm)
    q = arm.home()
    prev = np.zeros(arm.n)
    for _ in range(2):  # warm-up of both paths
        for v in twists[:200]:
            solve(arm, q, v, prev_rates=prev, dt_s=DT_S)
            reference(q, v)
    clock = time.perf_counter
    gesture = int(1.0 / DT_S)
    for k, v in enumerate(twists):
        if workload == "gestures" and k % gesture == 0:  # start at rest at the home pose
            q, prev = arm.home(), np.zeros(arm.n)
        t0 = clock()
        sol = solve(arm, q, v, prev_rates=prev, dt_s=DT_S)
        t1 = clock()
        reference(q, v)
        t2 = clock()
        pose_and_jacobian(arm, q)
        t3 = clock()
        ours[k], theirs[k], kinematics[k] = t1 - t0, t2 - t1, t3 - t2
        binding[str(sol.binding_limit)] = binding.get(str(sol.binding_limit), 0) + 1
        paths[k] = ("damped" if sol.damping > 0 else
                    "near a position limit" if not clear_of_limits(bounds, q, DT_S) else
                    "clear, undamped")
        prev = sol.rates
        q = q + prev * DT_S
    return {"ours": ours, "theirs": theirs, "kinematics": kinematics, "paths": paths,
            "binding": binding}


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
        "eigh(JJᵀ)": lambda J: np.linalg.eigh(J @ J.T),
        "chosen: eigvalsh(JJᵀ) + solve, numpy's gufuncs": lambda J: (_eigvalsh(G := J @ J.T),
                                                                   _solve(G, v)),
    }
    times = {name: np.empty(repeat) for name in options}
    clock = time.perf_counter
    for k in range(repeat):  # round-robin, so the machine's load falls on all alike
        J = Js[k % 64]
        for name, f in options.items():
            t0 = clock()
            f(J)
            times[name][k] = clock() - t0
    return {name: float(np.median(t)) * 1e6 for name, t in times.items()}


def clearance_cost(arm: Arm, cell_name: str, cycles: int, seed: int = 5
                   ) -> dict[str, np.ndarray]:
    """Per cycle: solve time without and with the cell, and whether a pair was inside d_i."""
    cell = load_cell(cell_name, arm)
    limit = ClearanceLimit.of(arm, cell)
    rng = np.random.default_rng(seed)
    hold = int(3.0 / DT_S)
    plain, guarded = np.empty(cycles), np.empty(cycles)
    near = np.zeros(cycles, dtype=bool)
    q, prev = arm.home(), np.zeros(arm.n)
    for v in jog_twists(200):  # warm-up
        solve(arm, q, v, prev_rates=prev, dt_s=DT_S)
        solve(arm, q, v, prev_rates=prev, dt_s=DT_S, clearance=limit)
    clock = time.perf_counter
    for k in range(cycles):
        if k % hold == 0:  # a new gesture from home: 0.3 m/s, mostly down and sideways
            q, prev = arm.home(), np.zeros(arm.n)
            d = rng.normal(size=3) * (1.0, 1.0, 0.5) - (0.0, 0.0, 1.0)
            v = np.concatenate((0.3 * d / np.linalg.norm(d), rng.normal(size=3) * 0.2))
        t0 = clock()
        solve(arm, q, v, prev_rates=prev, dt_s=DT_S)
        t1 = clock()
        sol = solve(arm, q, v, prev_rates=prev, dt_s=DT_S, clearance=limit)
        t2 = clock()
        plain[k], guarded[k] = t1 - t0, t2 - t1
        near[k] = sol.clearance.min_distance_m < cell.clearance.influence_distance_m
        prev = sol.rates
        q = q + prev * DT_S
    return {"plain": plain, "guarded": guarded, "near": near}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--cycles", type=int, default=20000, help="timed cycles")
    parser.add_argument("--arm", default="reach7", help="shipped arm name")
    parser.add_argument("--cell", default="bench", help="shipped cell name for the clearance "
                                                         "figures")
    args = parser.parse_args(argv)
    arm = load_arm(args.arm)
    print(f"load average at the start {os.getloadavg()[0]:.2f} (figures under load ≥ 1 are "
          f"not results)")
    with tempfile.TemporaryDirectory() as tmp:
        urdf = write_urdf(arm, Path(tmp) / f"{arm.name}.urdf")
        results = {w: run(arm, urdf, args.cycles, w) for w in WORKLOADS}
    us = 1e6
    print(f"Full solve per cycle, {arm.name} ({arm.n} joints), {args.cycles} cycles per workload "
          f"at {1 / DT_S:.0f} Hz (numpy {np.__version__}, Python {sys.version.split()[0]})")
    for workload, result in results.items():
        ours, theirs = result["ours"] * us, result["theirs"] * us
        print(f"{workload}: {WORKLOADS[workload]}")
        rows = [("jogwire solve", ours), ("reference: pin J + numpy.linalg.solve DLS", theirs),
                ("  (jogwire FK + Jacobian alone)", result["kinematics"] * us)]
        for name, t in rows:
            print(f"  {name:<44} median {np.median(t):6.1f} µs   "
                  f"p99 {np.percentile(t, 99):6.1f} µs")
        print(f"  ratio of medians, solve / reference: {np.median(ours) / np.median(theirs):.2f}")
        for path in ("clear, undamped", "near a position limit", "damped"):
            chosen = result["paths"] == path
            if chosen.any():
                print(f"  path {path:<22} {chosen.mean():4.0%} of cycles   median "
                      f"{np.median(ours[chosen]):6.1f} µs   ratio "
                      f"{np.median(ours[chosen]) / np.median(theirs[chosen]):.2f}")
        share = ", ".join(f"{k} {v / args.cycles:.0%}" for k, v in
                          sorted(result["binding"].items(), key=lambda kv: -kv[1]))
        print(f"  binding limit: {share}")
    print("σ_min options on 6×n Jacobians (median µs):")
    for name, t in sigma_min_options(arm, 5000).items():
        print(f"  {name:<48} {t:6.1f}")
    cost = clearance_cost(arm, args.cell, args.cycles)
    plain, guarded, near = cost["plain"] * us, cost["guarded"] * us, cost["near"]
    print(f"Clearance in cell {args.cell} ({args.cycles} cycles; a pair inside d_i in "
          f"{near.mean():.0%} of them):")
    for name, chosen in (("all cycles", np.ones_like(near)), ("a pair inside d_i", near),
                         ("nothing inside d_i", ~near)):
        if chosen.any():
            print(f"  {name:<20} solve median {np.median(plain[chosen]):6.1f} µs, with the "
                  f"cell {np.median(guarded[chosen]):6.1f} µs, added (median of per-cycle "
                  f"differences) {np.median(guarded[chosen] - plain[chosen]):6.1f} µs")
    print(f"load average at the end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
