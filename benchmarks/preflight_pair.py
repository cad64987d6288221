"""Two versions of the code, the same preflight, taken in turns: how much faster is one?

On a shared virtual machine the speed of a core drifts by half or more from one minute to
the next, so one run of `bench_preflight.py` per version compares the machine's moods, not
the code. This runs the lag-1 preflight of `bench_preflight.py` (reach7, a long `gentle`
profile, 500 Hz, 1 ms physics) with each SIDE in turn, ROUNDS times, the order reversed
every round, each in its own process with its own code (a SIDE is a checkout folder, e.g. an
export of the earlier code: `git archive COMMIT | tar -x -C ../before`). It prints per side
the median loop time per cycle and real-time factor, and the median of the per-round ratios
to the first side: the same minute's machine on both sides of each ratio.

    python benchmarks/preflight_pair.py ../before . [--seconds 60] [--rounds 6] [--link shm]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
from pathlib import Path

ONE_RUN = r"""
import sys, tempfile
from pathlib import Path
sys.path[:0] = [sys.argv[1] + "/benchmarks", sys.argv[1]]
import bench_preflight
with tempfile.TemporaryDirectory() as folder:
    _, run = bench_preflight.bench_preflight(Path(folder), float(sys.argv[2]), 1, False,
                                             link=sys.argv[3])
print(1e6 * run["loop_s"] / run["cycles"], run["motion_s"] / run["run_s"])
"""


def one_run(side: str, seconds: float, link: str) -> tuple[float, float]:
    """(the loop's µs per cycle, the run's real-time factor) of one preflight with `side`."""
    folder = str(Path(side).resolve())
    done = subprocess.run([sys.executable, "-c", ONE_RUN, folder, str(seconds), link],
                          capture_output=True, text=True, cwd=folder)
    if done.returncode:
        raise SystemExit(f"the run with {side} failed:\n{done.stderr}")
    loop, factor = done.stdout.split()[-2:]
    return float(loop), float(factor)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("sides", nargs="+", metavar="SIDE", help="a checkout folder")
    p.add_argument("--seconds", type=float, default=60.0, help="motion per run (s)")
    p.add_argument("--rounds", type=int, default=6)
    p.add_argument("--link", default="shm", choices=("shm", "pipe"))
    args = p.parse_args()
    if len(args.sides) < 2:
        p.error("give at least two sides to compare")
    print(f"load average at start: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    runs: dict[str, list[tuple[float, float]]] = {side: [] for side in args.sides}
    for i in range(args.rounds):
        for side in args.sides if i % 2 == 0 else args.sides[::-1]:
            runs[side].append(one_run(side, args.seconds, args.link))
    first = runs[args.sides[0]]
    for side, results in runs.items():
        ratios = [loop / base for (loop, _), (base, _) in zip(results, first)]
        gains = [f / base for (_, f), (_, base) in zip(results, first)]
        factors = [f for _, f in results]
        print(f"{side}: loop {statistics.median(r[0] for r in results):.1f} µs a cycle, "
              f"{statistics.median(factors):.2f}x real time (best {max(factors):.2f}x); "
              f"against the first side in the same round: loop time "
              f"{statistics.median(ratios):.3f}x ({', '.join(f'{r:.2f}' for r in ratios)}), "
              f"real-time factor {statistics.median(gains):.3f}x (the child's start included)")
    print(f"load average at end: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
