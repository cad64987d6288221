"""How the cycle's cost grows: time per cycle against joint count (and workcell size).

Synthetic invented chains of 3, 6, 7, 12 and 24 revolute joints (standard DH, twists
alternating ±90°, the reach shared out over the links, the limits and solver settings of
reach7), each jogged along a slow random twist at 500 Hz (q += q̇·dt, back to its home
pose every 0.5 s). Per cycle, round-robin over the arms so the machine's load falls on all
alike: FK + Jacobian (`pose_and_jacobian`) and the full solve (`solve`: DLS, null space,
every limit). The table gives medians, the cost per joint, and a least-squares fit
t = a + b·n with each arm's deviation from it: close to linear means the fit holds.
Then workcell size: reach7 in invented cells of 0, 5, 20 and 50 small boxes scattered
through its workspace (each clear of the arm at home), jogged the same way; per cycle the
full solve with the cell's clearance rows (`solve(..., clearance=…)`), round-robin over the
cells. Every figure is printed with the load average.

    python benchmarks/bench_growth.py [--cycles 5000] [--out growth.md]
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
from runtime.arm.kinematics import pose_and_jacobian  # noqa: E402
from runtime.arm.load import load_arm  # noqa: E402
from runtime.arm.model import Arm  # noqa: E402
from runtime.control.clearance import ClearanceLimit  # noqa: E402
from runtime.control.solver import solve  # noqa: E402
from runtime.errors import ConfigError  # noqa: E402

JOINT_COUNTS = (3, 6, 7, 12, 24)
CELL_SIZES = (0, 5, 20, 50)
DT_S = 0.002
REACH_M = 1.0


def chain_toml(n: int) -> str:
    """An invented n-joint arm: alternating ±90° twists, link offsets d and lengths a that
    share out REACH_M, joints within ±170°, home pose bent away from straight."""
    rows = []
    link = REACH_M / max(n - 1, 1)
    for i in range(n):
        alpha = 0 if i == n - 1 else (-90 if i % 2 == 0 else 90)
        d = 0.2 if i == 0 else (link * 0.6 if i % 2 == 0 else 0.0)
        a = 0.0 if i % 2 == 0 else link * 0.8
        rows.append(f"""
[[joints]]
name = "j{i + 1}"
type = "revolute"
d = {d:.4f}
a = {a:.4f}
alpha = {alpha}
lower = -170
upper = 170
max_speed = 90
max_accel = 250
rated_speed = 110
rated_accel = 350
effort = 100
""")
    home = ", ".join(str(25 if i % 2 else -15) for i in range(n))
    return f"""name = "chain{n}"
summary = "invented {n}R chain for the cost-growth benchmark"
convention = "dh"
angle_unit = "deg"
length_unit = "m"
task = ["vx", "vy", "vz", "wx", "wy", "wz"]
home = [{home}]

[tool]
xyz = [0.0, 0.0, 0.10]

[tcp_limits]
linear = 1.0
angular = 120.0

[solver]
damping_threshold = 0.04
damping_max = 0.08
nullspace_gain = 60.0
""" + "".join(rows)


def synthetic_arms(folder: Path) -> dict[int, Arm]:
    arms = {}
    for n in JOINT_COUNTS:
        path = folder / f"chain{n}.toml"
        path.write_text(chain_toml(n))
        arms[n] = load_arm(path)
    return arms


CELL_HEAD = """name = "scatter{n}"
summary = "{n} invented boxes around the arm, for the cost-growth benchmark"
length_unit = "m"
angle_unit = "deg"

[clearance]
safety_distance = 0.03
influence_distance = 0.15
gain = 5.0
"""


def box_toml(i: int, xyz: np.ndarray, size: np.ndarray) -> str:
    return (f'\n[[objects]]\nname = "box{i}"\nshape = "box"\n'
            f"xyz = [{xyz[0]:.3f}, {xyz[1]:.3f}, {xyz[2]:.3f}]\n"
            f"size = [{size[0]:.3f}, {size[1]:.3f}, {size[2]:.3f}]\n")


def scattered_cells(arm: Arm, folder: Path, seed: int = 9) -> dict[int, ClearanceLimit]:
    """Cells of CELL_SIZES boxes (5–10 cm) between 0.35 and 0.95 m from the base, each
    kept only if the arm at home is clear of it (the cell loader's own check)."""
    rng = np.random.default_rng(seed)
    boxes: list[str] = []
    while len(boxes) < max(CELL_SIZES):
        r, a, z = rng.uniform(0.35, 0.95), rng.uniform(-np.pi, np.pi), rng.uniform(0.05, 1.0)
        text = box_toml(len(boxes), np.array([r * np.cos(a), r * np.sin(a), z]),
                        rng.uniform(0.05, 0.10, 3))
        path = folder / "one.toml"
        path.write_text(CELL_HEAD.format(n=1) + text)
        try:
            load_cell(path, arm)
        except ConfigError:
            continue                                   # overlaps the arm at home
        boxes.append(text)
    limits = {}
    for n in CELL_SIZES:
        path = folder / f"scatter{n}.toml"
        path.write_text(CELL_HEAD.format(n=n) + "".join(boxes[:n]))
        limits[n] = ClearanceLimit.of(arm, load_cell(path, arm))
    return limits


def measure_cells(arm: Arm, limits: dict[int, ClearanceLimit], cycles: int, seed: int = 5
                  ) -> dict[int, dict[str, float]]:
    """Median µs of the full solve with each cell, round-robin per cycle, and the share of
    cycles with a pair inside the influence distance."""
    rng = np.random.default_rng(seed)
    state = {n: [arm.home(), np.zeros(arm.n)] for n in limits}
    times = {n: np.empty(cycles) for n in limits}
    near = {n: np.zeros(cycles, dtype=bool) for n in limits}
    clock = time.perf_counter
    hold = int(1.0 / DT_S)
    direction = np.zeros(6)
    for k in range(cycles + 200):
        if k % hold == 0:                                  # a new gesture from home
            direction = rng.normal(size=6)
            direction[:3] *= 0.2 / np.linalg.norm(direction[:3])
            direction[3:] *= 0.3 / np.linalg.norm(direction[3:])
            for n in limits:
                state[n] = [arm.home(), np.zeros(arm.n)]
        for n, limit in limits.items():
            q, prev = state[n]
            t0 = clock()
            sol = solve(arm, q, direction, prev_rates=prev, dt_s=DT_S, clearance=limit)
            t1 = clock()
            if k >= 200:
                times[n][k - 200] = t1 - t0
                report = sol.clearance
                near[n][k - 200] = report is not None and \
                    report.min_distance_m < limit.settings.influence_distance_m
            state[n] = [q + sol.rates * DT_S, sol.rates]
    return {n: {"solve": float(np.median(times[n])) * 1e6, "near": float(near[n].mean())}
            for n in limits}


def cell_table(result: dict[int, dict[str, float]], load: str) -> str:
    ns = sorted(result)
    lines = [f"Cost growth with workcell size, reach7 (medians, µs; load average {load})", "",
             "| objects | full solve with the cell | a pair inside d_i | added per object "
             "over the row above |", "|---|---|---|---|"]
    for i, n in enumerate(ns):
        step = "" if i == 0 else \
            f"{(result[n]['solve'] - result[ns[i - 1]]['solve']) / (n - ns[i - 1]):+.2f}"
        lines.append(f"| {n} | {result[n]['solve']:.1f} | {result[n]['near']:.0%} of cycles | "
                     f"{step} |")
    with_objects = [n for n in ns if n > 0]
    if len(with_objects) >= 2:
        a, b, dev = linear_fit(with_objects, [result[n]["solve"] for n in with_objects])
        lines += ["", f"With objects: full solve ≈ {a:.1f} + {b:.2f}·objects µs (largest "
                      f"deviation from the fit {max(map(abs, dev)):.0%}); the step from no "
                      f"object to the first is the distance pass's fixed cost."]
    return "\n".join(lines)


def load_average() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


def measure(arms: dict[int, Arm], cycles: int, seed: int = 5) -> dict[int, dict[str, float]]:
    """Median µs of FK + J and of the full solve per arm, round-robin per cycle."""
    rng = np.random.default_rng(seed)
    direction = rng.normal(size=6)
    state = {n: [arm.home(), np.zeros(arm.n)] for n, arm in arms.items()}
    times = {n: {"fk_j": np.empty(cycles), "solve": np.empty(cycles)} for n in arms}
    clock = time.perf_counter
    hold = int(0.5 / DT_S)
    for k in range(cycles + 200):
        if k % hold == 0:
            direction = rng.normal(size=6)
            direction *= 0.05 / np.linalg.norm(direction)   # 0.05 m/s + rad/s, slow
            for n, arm in arms.items():
                state[n] = [arm.home(), np.zeros(arm.n)]
        for n, arm in arms.items():
            q, prev = state[n]
            t0 = clock()
            pose_and_jacobian(arm, q)
            t1 = clock()
            sol = solve(arm, q, direction, prev_rates=prev, dt_s=DT_S)
            t2 = clock()
            if k >= 200:                                   # the first 200: warm-up
                times[n]["fk_j"][k - 200] = t1 - t0
                times[n]["solve"][k - 200] = t2 - t1
            state[n] = [q + sol.rates * DT_S, sol.rates]
    return {n: {name: float(np.median(t)) * 1e6 for name, t in parts.items()}
            for n, parts in times.items()}


def linear_fit(ns: list[int], ts: list[float]) -> tuple[float, float, list[float]]:
    """(a, b, relative deviation of each point) for t ≈ a + b·n, least squares."""
    b, a = np.polyfit(ns, ts, 1)
    return a, b, [(t - (a + b * n)) / t for n, t in zip(ns, ts)]


def table(result: dict[int, dict[str, float]], load: str) -> str:
    ns = sorted(result)
    lines = [f"Cost growth with joint count (medians, µs; load average {load})", "",
             "| joints | FK + J | per joint | vs fit | full solve | per joint | vs fit |",
             "|---|---|---|---|---|---|---|"]
    a_fk, b_fk, dev_fk = linear_fit(ns, [result[n]["fk_j"] for n in ns])
    a_s, b_s, dev_s = linear_fit(ns, [result[n]["solve"] for n in ns])
    for i, n in enumerate(ns):
        r = result[n]
        lines.append(f"| {n} | {r['fk_j']:.1f} | {r['fk_j'] / n:.2f} | {dev_fk[i]:+.0%} | "
                     f"{r['solve']:.1f} | {r['solve'] / n:.2f} | {dev_s[i]:+.0%} |")
    lines += ["",
              f"FK + J ≈ {a_fk:.1f} + {b_fk:.2f}·n µs (largest deviation from the fit "
              f"{max(map(abs, dev_fk)):.0%}); full solve ≈ {a_s:.1f} + {b_s:.2f}·n µs "
              f"(largest deviation {max(map(abs, dev_s)):.0%})."]
    return "\n".join(lines)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--cycles", type=int, default=5000, help="timed cycles per arm")
    p.add_argument("--out", metavar="FILE", help="also write the table (Markdown) here")
    args = p.parse_args()
    print(f"load average at start: {load_average()}")
    with tempfile.TemporaryDirectory() as tmp:
        arms = synthetic_arms(Path(tmp))
        cells = scattered_cells(load_arm("reach7"), Path(tmp))
    result = measure(arms, args.cycles)
    text = table(result, load_average())
    cell_result = measure_cells(load_arm("reach7"), cells, args.cycles)
    text += "\n\n" + cell_table(cell_result, load_average())
    print(text)
    if args.out:
        Path(args.out).write_text(text + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
