"""Soak of the limit layer: the random-arm proof of tests/runtime/control/test_bounds_property.py,
run for as many cycles as asked instead of the suite's few hundred examples.

Every cycle of every random arm is checked for joint speed, acceleration, the sampled
braking curve (against a simulated stop), the soft position limits, the TCP caps, reduced
speed and locked axes, exactly as in the test. It prints the cycles and examples run, the
wall time, and how often each limit bound and each named conflict appeared. Run from the
repository root:

    python benchmarks/soak_bounds.py [--cycles 300000] [--seed 1]

A failure raises with hypothesis's shrunk counter-example, like the test.
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import sys
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from hypothesis import HealthCheck, given, seed, settings  # noqa: E402


def load_property_module():
    path = ROOT / "tests" / "runtime" / "control" / "test_bounds_property.py"
    spec = importlib.util.spec_from_file_location("bounds_property", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cycles", type=int, default=300_000)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    prop = load_property_module()
    totals: Counter[str] = Counter()

    def check(run) -> None:
        totals["cycles"] += prop.run_and_check(run)
        totals["examples"] += 1
        totals[f"joints {run[0].n}"] += 1

    started = time.perf_counter()
    chunk = 0
    while totals["cycles"] < args.cycles:   # chunks of 200 examples, each with its own seed
        seed(args.seed * 100_003 + chunk)(
            settings(max_examples=200, deadline=None, database=None,
                     suppress_health_check=list(HealthCheck))(
                given(run=prop.runs())(check)))()
        chunk += 1
    wall = time.perf_counter() - started
    load = os.getloadavg()[0]
    print(f"soak of the limit layer: {totals['cycles']} cycles on {totals['examples']} random "
          f"arms and inputs, every bound checked every cycle: no violation")
    print(f"wall {wall:.1f} s ({totals['cycles'] / wall:.0f} checked cycles/s), "
          f"load average {load:.2f}, seed {args.seed}")
    print("arms by joint count: " + ", ".join(
        f"{k.split()[1]}: {v}" for k, v in sorted(totals.items()) if k.startswith("joints")))
    return 0


if __name__ == "__main__":
    sys.exit(main())
