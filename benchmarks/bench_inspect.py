"""`jogwire inspect` of a long session log: time and peak memory against the log's length.

Writes a synthetic session log of `--minutes` at 500 Hz (elbow6, blocks of 0.2 s as the
recorder writes them: smooth joint motion with measurement noise in the low bits, timing
jitter, an occasional limit episode), and one a tenth as long, then runs `jogwire inspect
LOG --json` on each in a fresh process and reports its wall time and peak resident memory.
The shorter log is the reference measured in the same run: memory flat in log length means
a ratio near 1. Goal: an hour (the default) in ≤ 5 s.

Run from the repository root:

    python benchmarks/bench_inspect.py [--minutes 60] [--repeat 3]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runtime.arm.load import load_arm  # noqa: E402
from runtime.sessions.log_blocks import (  # noqa: E402
    CycleBlock,
    KeyedFloats,
    Ragged,
    Strings,
    encode_block,
)
from runtime.sessions.log_schema import SessionEnd, make_header  # noqa: E402
from runtime.sessions.log_writer import encode_frame, encode_preamble  # noqa: E402

RATE_HZ = 500
BLOCK = 100                      # cycles per block: a 0.2 s flush at 500 Hz


def synthetic_block(k0: int, rng: np.random.Generator, n_joints: int) -> CycleBlock:
    """Cycles k0 … k0 + BLOCK − 1 of a session that keeps moving."""
    k = np.arange(k0, k0 + BLOCK)
    t = k / RATE_HZ + rng.normal(0, 2e-6, BLOCK)
    phase = t[:, None] * 0.3 + np.arange(n_joints)
    q = 0.8 * np.sin(phase) + rng.normal(0, 1e-9, (BLOCK, n_joints))
    rates = 0.24 * np.cos(phase) + rng.normal(0, 1e-9, (BLOCK, n_joints))
    twist = np.repeat([[0.05, 0.0, 0.0, 0.0, 0.0, 0.0]], BLOCK, axis=0)
    achieved = twist + rng.normal(0, 1e-7, twist.shape)
    binding = ((k // 2000) % 7 == 0) & (k % 2000 < 20)       # a short limit episode now and then

    def ragged(m: np.ndarray) -> Ragged:
        return Ragged(np.full(BLOCK, m.shape[1], dtype="<u4"), m.reshape(-1))
    cols = {
        "cycle": k.astype(np.int64), "t_s": t,
        "axes": ragged(np.round(rng.normal(0, 0.3, (BLOCK, 6)), 4)),
        "buttons": ragged(np.zeros((BLOCK, 12), dtype=bool)),
        "enabled": np.ones(BLOCK, dtype=bool),
        "enable_reason": Strings(np.zeros(BLOCK, dtype="<u4"), ("held",)),
        "twist": ragged(twist), "frame": Strings(np.zeros(BLOCK, dtype="<u4"), ("base",)),
        "q": ragged(q), "rates": ragged(rates), "damping": np.zeros(BLOCK),
        "sigma_min": 0.1 + 0.05 * np.sin(t * 0.1), "manipulability": 0.02 + 0.01 * np.cos(t),
        "achieved_twist": ragged(achieved), "tracking_error": np.abs(rng.normal(0, 1e-7, BLOCK)),
        "scales": KeyedFloats(np.zeros(BLOCK, dtype="<u4"), (("speed", "tcp", "acceleration"),),
                              np.where(np.repeat(binding, 3), 0.9, 1.0)),
        "binding_limit": Strings(binding.astype("<u4"), (None, "acceleration")),
        "period_s": 1.0 / RATE_HZ + rng.normal(0, 5e-6, BLOCK),
        "compute_s": 2e-4 + np.abs(rng.normal(0, 3e-5, BLOCK)),
        "overrun": np.zeros(BLOCK, dtype=bool), "reduced": np.zeros(BLOCK, dtype=bool),
        "input": [{"device": "pad 0", "present": True, "axes": [], "pressed": [4],
                   "command": None}] * BLOCK,
        "state_age_s": (np.ones(BLOCK, dtype=bool), 1e-3 + rng.normal(0, 1e-5, BLOCK)),
        "overrun_streak": np.zeros(BLOCK, dtype=np.int64),
        "safety_state": Strings(np.zeros(BLOCK, dtype="<u4"), ("moving",)),
        # a session without a workcell: no clearance measured
        "min_clearance_m": (np.zeros(BLOCK, dtype=bool), np.zeros(BLOCK)),
        "clearance_arm": Strings(np.zeros(BLOCK, dtype="<u4"), (None,)),
        "clearance_other": Strings(np.zeros(BLOCK, dtype="<u4"), (None,)),
    }
    return CycleBlock(BLOCK, cols)


def write_log(path: Path, minutes: float) -> int:
    arm = load_arm("elbow6")
    rng = np.random.default_rng(7)
    blocks = int(minutes * 60 * RATE_HZ / BLOCK)
    with open(path, "wb") as f:
        f.write(encode_preamble() + encode_frame(make_header(arm, {"rate_hz": RATE_HZ}).to_wire()))
        for b in range(blocks):
            f.write(encode_frame(encode_block(synthetic_block(b * BLOCK, rng, arm.n))))
        n = blocks * BLOCK
        f.write(encode_frame(SessionEnd("2031-01-01T00:00:00+00:00", n, n, 0, 0).to_wire()))
    return blocks * BLOCK


def inspect_once(path: Path) -> tuple[float, float, float, int]:
    """Wall time of the process and of the command itself (s, without Python's start and
    the imports), peak RSS (MB) of `jogwire inspect LOG --json`, and its cycles."""
    code = ("import resource, sys, json, time; from runtime.cli import main\n"
            "import io, contextlib\n"
            "buf = io.StringIO()\n"
            "t0 = time.perf_counter()\n"
            "with contextlib.redirect_stdout(buf):\n"
            "    main(['inspect', sys.argv[1], '--json'])\n"
            "print(json.dumps({'cycles': json.loads(buf.getvalue())['cycles'],\n"
            "  'seconds': time.perf_counter() - t0,\n"
            "  'rss_kb': resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}))")
    t0 = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", code, str(path)], cwd=ROOT, check=True,
                          capture_output=True, text=True,
                          env=dict(os.environ, PYTHONPATH=str(ROOT)))
    wall = time.perf_counter() - t0
    out = json.loads(done.stdout)
    return wall, out["seconds"], out["rss_kb"] / 1024, out["cycles"]


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--minutes", type=float, default=60.0)
    p.add_argument("--repeat", type=int, default=3)
    args = p.parse_args()
    print(f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f}; Python "
          f"{sys.version.split()[0]}, numpy {np.__version__}")
    with tempfile.TemporaryDirectory(prefix="jogwire-bench-inspect-") as tmp:
        results = {}
        for label, minutes in (("reference (a tenth)", args.minutes / 10),
                               (f"{args.minutes:g} min", args.minutes)):
            path = Path(tmp) / f"{minutes:g}.jwlog"
            t0 = time.perf_counter()
            n = write_log(path, minutes)
            size = path.stat().st_size
            print(f"{label}: {n} cycles, {size / 1e6:.1f} MB ({size / n:.0f} bytes a cycle), "
                  f"written in {time.perf_counter() - t0:.1f} s", flush=True)
            runs = [inspect_once(path) for _ in range(args.repeat)]
            assert all(c == n for *_, c in runs)
            wall = float(np.median([r[0] for r in runs]))
            own = float(np.median([r[1] for r in runs]))
            rss = float(np.median([r[2] for r in runs]))
            results[label] = (own, rss)
            print(f"  inspect --json: median {wall:.2f} s in all, {own:.2f} s after start-up "
                  f"({n / own / 1e6:.2f} M cycles/s); peak RSS {rss:.0f} MB; "
                  f"load average {os.getloadavg()[0]:.2f}", flush=True)
        (w_ref, m_ref), (w, m) = results.values()
        print(f"ratios to the reference: time {w / w_ref:.1f}x for 10x the cycles, "
              f"peak memory {m / m_ref:.2f}x")
    usage = resource.getrusage(resource.RUSAGE_SELF)
    print(f"load average at the end {os.getloadavg()[0]:.2f} (this process peak RSS "
          f"{usage.ru_maxrss / 1024:.0f} MB)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
