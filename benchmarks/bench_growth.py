"""How the cycle's cost grows: time per cycle against joint count (and workcell size).

Synthetic invented chains of 3, 6, 7, 12 and 24 revolute joints (standard DH, twists
alternating ±90°, the reach shared out over the links, the limits and solver settings of
reach7), each jogged along a slow random twist at 500 Hz (q += q̇·dt, back to its home
pose every 0.5 s). Per cycle, round-robin over the arms so the machine's load falls on all
alike: FK + Jacobian (`pose_and_jacobian`) and the full solve (`solve`: DLS, null space,
every limit). The table gives medians, the cost per joint, and a least-squares fit
t = a + b·n with each arm's deviation from it: close to linear means the fit holds.
Every figure is printed with the load average.

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

from runtime.arm.kinematics import pose_and_jacobian  # noqa: E402
from runtime.arm.load import load_arm  # noqa: E402
from runtime.arm.model import Arm  # noqa: E402
from runtime.control.solver import solve  # noqa: E402

JOINT_COUNTS = (3, 6, 7, 12, 24)
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
              f"(largest deviation {max(map(abs, dev_s)):.0%}).",
              "Workcell size (0, 5, 20, 50 objects): not measured, this tree has no "
              "workcell (runtime/control/clearance.py)."]
    return "\n".join(lines)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--cycles", type=int, default=5000, help="timed cycles per arm")
    p.add_argument("--out", metavar="FILE", help="also write the table (Markdown) here")
    args = p.parse_args()
    print(f"load average at start: {load_average()}")
    with tempfile.TemporaryDirectory() as tmp:
        arms = synthetic_arms(Path(tmp))
    result = measure(arms, args.cycles)
    text = table(result, load_average())
    print(text)
    if args.out:
        Path(args.out).write_text(text + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
