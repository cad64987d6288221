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
damped). Then the full solve split into its stages, each timed alone on the same poses,
round-robin with the full solve (FK + J; σ_min and damping; the DLS solve; the null-space
term; each limit; the clearance rows with a cell; what is left: checks, the result, calls).
Also times the candidate ways of getting σ_min (the choice made in
runtime/control/solver.py). Every figure is printed with the load average.

Clearance (--cell, default the demo cell `bench`): the same solve with and without the
velocity damper (runtime/control/clearance.py), interleaved at each pose of a jog that
drives into the cell's objects under the damper (3 s gestures at 0.3 m/s, mostly downward
and sideways, from home); the added time per cycle and the C calls it adds (numpy's
functions and methods as the profiler sees them, counted in an untimed replay), split by
kind of cycle (CYCLE_KINDS: nothing measured on the carried bounds, culled, measured with
nothing inside d_i, a pair inside d_i), each against the pin reference of the same run.
Run from the repository root:

    python benchmarks/bench_solver.py [--cycles N] [--arm reach7] [--cell bench]
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runtime.arm.cell import load_cell
from runtime.arm.kinematics import geometric_jacobian, pose_and_jacobian
from runtime.arm.load import load_arm
from runtime.arm.model import Arm
from runtime.control.clearance import ClearanceGuard, ClearanceLimit
from runtime.control.limits import (
    JointBounds,
    acceleration_step,
    apply_limits,
    braking_factor,
    clear_of_limits,
    speed_factor,
    start_pose,
    tcp_caps,
)
from runtime.control.solver import (
    _REFINE_BELOW,
    _constants,
    _eigen_pinv_gram,
    _eigvalsh,
    _identity,
    _resolve_at_limits,
    _solve,
    damping_squared,
    solve,
)
from sim.urdf import write_urdf

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
    inputs = []
    for k, v in enumerate(twists):
        if workload == "gestures" and k % gesture == 0:  # start at rest at the home pose
            q, prev = arm.home(), np.zeros(arm.n)
        inputs.append((q, v, prev))
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
            "binding": binding, "inputs": inputs, "load": load_average()}


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


STAGES = ("full solve", "FK + Jacobian", "σ_min and damping (JJᵀ, eigenvalues, λ)",
          "DLS solve of the task", "null-space term (centring, projected)",
          "start pose + clear-of-limits check", "joint-limit re-solve (near a limit)",
          "limit: joint speed", "limit: position brake (near a limit)",
          "limit: TCP caps (J·q̇, linear, angular, reduced)", "limit: acceleration",
          "clearance: distances and the damper's restriction",
          "clearance: settled after the other limits")


def stage_split(arm: Arm, inputs: list, limit: ClearanceLimit | None = None
                ) -> dict[str, np.ndarray]:
    """Each stage of `solve` timed alone on the cycle's inputs, right after the full solve
    on them (µs; NaN where a stage does not run that cycle). The stages call what `solve`
    calls, in its order (runtime/control/solver.py); the null-space term is timed as its
    own solve here, where `solve` folds it into the task solve when λ = 0. With `limit`
    (a cell), the full solve includes the clearance rows and so do the stages; the distances
    are then measured at a pose the full solve has just measured (its far-away shortcut
    applies as it would a cycle later, when the arm has hardly moved)."""
    consts = _constants(arm)
    b = consts.bounds
    out = {name: np.full(len(inputs), np.nan) for name in STAGES}
    clock = time.perf_counter
    for k, (q, v, prev) in enumerate(inputs):
        t0 = clock()
        solve(arm, q, v, prev_rates=prev, dt_s=DT_S, clearance=limit)
        t1 = clock()
        T, J = pose_and_jacobian(arm, q)
        t2 = clock()
        Jt, vt = (J, v) if consts.full_task else (J[arm.task_mask], v[arm.task_mask])
        G = np.dot(Jt, Jt.T)
        values = _eigvalsh(G).tolist()
        smallest, largest = max(values[0], 0.0), max(values[-1], 0.0)
        lam2 = damping_squared(math.sqrt(smallest), consts.threshold, consts.damping_max)
        t3 = clock()
        rates = np.dot(_solve(G + lam2 * _identity(len(G)), vt), Jt)
        t4 = clock()
        z = None
        if consts.nullspace and Jt.shape[0] < consts.n:
            z = (q - consts.mid) * consts.k_grad
            Jz = np.dot(Jt, z)
            regular = smallest > _REFINE_BELOW * largest
            rates = rates + z - np.dot(_solve(G, Jz) if regular else
                                       _eigen_pinv_gram(Jt, Jz, G), Jt)
        t5 = clock()
        q_start = start_pose(q, prev, DT_S, 1)
        clear = clear_of_limits(b, q_start, DT_S)
        t6 = clock()
        if not clear:
            rates = _resolve_at_limits(arm, q_start, Jt, vt, z, rates, 0.0, DT_S)[0]
        t7 = clock()
        speed_factor(b, rates)
        t8 = clock()
        if not clear:
            braking_factor(b, q_start, rates, DT_S)
        t9 = clock()
        tcp_caps(arm, np.dot(J, rates), False)
        t10 = clock()
        acceleration_step(b, q_start, prev, rates, DT_S, clear=clear)
        acceleration_s = clock() - t10
        t10 = clock()
        limited = apply_limits(arm, q_start, rates, J, prev_rates=prev, dt_s=DT_S, clear=clear)
        t11 = clock()
        if limit is not None:
            guard = ClearanceGuard(limit, q, Jt, math.sqrt(lam2), rates)
            t12 = clock()
            guard.settle(limited)
            t13 = clock()
        nan = math.nan
        row = (t1 - t0, t2 - t1, t3 - t2, t4 - t3, t5 - t4 if z is not None else nan,
               t6 - t5, nan if clear else t7 - t6, t8 - t7, nan if clear else t9 - t8,
               t10 - t9, acceleration_s, nan if limit is None else t12 - t11,
               nan if limit is None else t13 - t12)
        for name, value in zip(STAGES, row):
            out[name][k] = value
    return {name: t * 1e6 for name, t in out.items()}


def print_split(split: dict[str, np.ndarray], what: str) -> None:
    """The stages' medians, each over the cycles where it ran, and what they leave of the
    full solve's median."""
    full = float(np.nanmedian(split["full solve"]))
    print(f"The full solve in stages, each timed alone on the same cycles ({what}; median µs "
          f"over the cycles where the stage runs; load {load_average()}):")
    total = 0.0
    for name in STAGES:
        t = split[name]
        ran = ~np.isnan(t)
        if not ran.any():
            print(f"  {name:<52}      —   (not in this run)")
            continue
        median, share = float(np.median(t[ran])), float(ran.mean())
        if name != "full solve":
            total += median * share
        print(f"  {name:<52} {median:6.1f}" + (f"   in {share:.0%} of cycles" if share < 1 else ""))
    print(f"  {'rest: checks, the result, calls (full − stages)':<52} {full - total:6.1f}")


def load_average() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


CYCLE_KINDS = {
    "bound": "nothing measured: every pair's carried bound beyond d_i (no distances at all)",
    "culled": "distances placed, the cull found nothing within d_i",
    "measured": "pairs measured, none inside d_i",
    "inside": "a pair inside d_i (the damper's rows)",
}


def cycle_kind(sol, d_i: float) -> str:
    """Which of CYCLE_KINDS a solve with a cell was (from what its clearance report holds)."""
    found = sol.clearance.distances
    if sol.clearance.min_distance_m < d_i:
        return "inside"
    if len(found.pairs):
        return "measured"
    return "bound" if found.lower_m is None else "culled"


def c_calls(f, *args, **kwargs) -> int:
    """C-level calls while f runs, as the profiler sees them: numpy's functions and array
    methods, ufuncs called by name; arithmetic operators on arrays are not seen (so the
    count is a floor of the numpy operations)."""
    count = 0

    def hook(frame, event, arg):
        nonlocal count
        count += event == "c_call"

    sys.setprofile(hook)
    try:
        f(*args, **kwargs)
    finally:
        sys.setprofile(None)
    return count


def clearance_cost(arm: Arm, cell_name: str, cycles: int, seed: int = 5
                   ) -> dict[str, np.ndarray]:
    """Per cycle: solve time without and with the cell, its kind (CYCLE_KINDS), and the C
    calls it added (counted in a replay of the same inputs with a fresh limit, untimed)."""
    cell = load_cell(cell_name, arm)
    limit = ClearanceLimit.of(arm, cell)
    d_i = cell.clearance.influence_distance_m
    rng = np.random.default_rng(seed)
    hold = int(3.0 / DT_S)
    plain, guarded = np.empty(cycles), np.empty(cycles)
    inputs = []
    kinds = np.empty(cycles, dtype=object)
    q, prev = arm.home(), np.zeros(arm.n)
    warm_up = ClearanceLimit.of(arm, cell)  # the timed limit starts fresh, as its replay
    for v in jog_twists(200):
        solve(arm, q, v, prev_rates=prev, dt_s=DT_S)
        solve(arm, q, v, prev_rates=prev, dt_s=DT_S, clearance=warm_up)
    clock = time.perf_counter
    for k in range(cycles):
        if k % hold == 0:  # a new gesture from home: 0.3 m/s, mostly down and sideways
            q, prev = arm.home(), np.zeros(arm.n)
            d = rng.normal(size=3) * (1.0, 1.0, 0.5) - (0.0, 0.0, 1.0)
            v = np.concatenate((0.3 * d / np.linalg.norm(d), rng.normal(size=3) * 0.2))
        inputs.append((q, v, prev))
        t0 = clock()
        solve(arm, q, v, prev_rates=prev, dt_s=DT_S)
        t1 = clock()
        sol = solve(arm, q, v, prev_rates=prev, dt_s=DT_S, clearance=limit)
        t2 = clock()
        plain[k], guarded[k] = t1 - t0, t2 - t1
        kinds[k] = cycle_kind(sol, d_i)
        prev = sol.rates
        q = q + prev * DT_S
    load = load_average()
    replay = ClearanceLimit.of(arm, cell)
    calls = np.array([c_calls(solve, arm, q, v, prev_rates=prev, dt_s=DT_S, clearance=replay)
                      - c_calls(solve, arm, q, v, prev_rates=prev, dt_s=DT_S)
                      for q, v, prev in inputs])
    return {"plain": plain, "guarded": guarded, "kinds": kinds, "calls": calls,
            "inputs": inputs, "limit": limit, "load": load}


def print_clearance(cost: dict, cell_name: str, reference_us: float) -> None:
    """The clearance figures by kind of cycle, against the same run's reference."""
    us = 1e6
    plain, guarded, kinds = cost["plain"] * us, cost["guarded"] * us, cost["kinds"]
    print(f"Clearance in cell {cell_name} ({len(kinds)} cycles; load after it {cost['load']}); "
          f"ratio: the solve with the cell over the reference above (pin J + "
          f"numpy.linalg.solve DLS, gestures median {reference_us:.1f} µs):")
    groups = [("all cycles", np.ones(len(kinds), dtype=bool), "")] + \
        [(kind, kinds == kind, what) for kind, what in CYCLE_KINDS.items()]
    for name, chosen, what in groups:
        if not chosen.any():
            continue
        with_cell = float(np.median(guarded[chosen]))
        print(f"  {name:<10} {chosen.mean():4.0%}  solve {np.median(plain[chosen]):6.1f} µs, "
              f"with the cell {with_cell:6.1f} µs (p99 {np.percentile(guarded[chosen], 99):6.1f}), "
              f"added {np.median(guarded[chosen] - plain[chosen]):6.1f} µs, "
              f"C calls added {np.median(cost['calls'][chosen]):4.0f}, "
              f"ratio {with_cell / reference_us:4.1f}" + (f"   {what}" if what else ""))


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
        print(f"{workload}: {WORKLOADS[workload]} (load after it {result['load']})")
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
    print_split(stage_split(arm, results["wander"]["inputs"]),
                "workload wander, no cell")
    options = sigma_min_options(arm, 5000)
    print(f"σ_min options on 6×n Jacobians (median µs; load {load_average()}):")
    for name, t in options.items():
        print(f"  {name:<48} {t:6.1f}")
    cost = clearance_cost(arm, args.cell, args.cycles)
    print_clearance(cost, args.cell, float(np.median(results["gestures"]["theirs"])) * us)
    print_split(stage_split(arm, cost["inputs"], cost["limit"]),
                f"the jog into cell {args.cell}")
    print(f"load average at the end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
