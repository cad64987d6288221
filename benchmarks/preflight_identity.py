"""Preflight gives the same verdicts and the same logs from two versions of the code.

Runs `jogwire preflight` on every shipped profile that runs (elbow6 and reach7 with gentle,
square, wrist_turn, elbow_stretch, reduced_line; elbow6 with wrist_limit) once per SIDE and
compares each side with the first:

- the JSON summary, all but its timing fields (started_at, wall_s, real_time_factor) and
  file names (files, profile_source);
- the session log's cycle records, all but `compute_s` (the wall time of the control
  cycle), byte for byte as msgpack (NaN equals NaN, 0.0 differs from -0.0).

A SIDE is a checkout folder, optionally followed by "+" and preflight options, e.g.

    python benchmarks/preflight_identity.py ../before .+--lockstep-link=pipe .+--lockstep-link=shm

where ../before is an export of the earlier code (`git archive COMMIT | tar -x -C ../before`).
Each side runs with its own code (PYTHONPATH = the folder). Exit status 0: all the same.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import msgpack

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runtime.sessions.log_reader import read_session  # noqa: E402

RUNS = [(arm, profile) for arm in ("elbow6", "reach7")
        for profile in ("gentle", "square", "wrist_turn", "elbow_stretch", "reduced_line")] \
    + [("elbow6", "wrist_limit")]
TIMING_FIELDS = ("started_at", "wall_s", "real_time_factor", "files", "profile_source")


def run_side(side: str, arm: str, profile: str, out: Path) -> tuple[dict, list[bytes]]:
    """(summary without timing fields, each cycle record's msgpack without compute_s)."""
    folder, _, options = side.partition("+")
    env = dict(os.environ, PYTHONPATH=str(Path(folder).resolve()))
    cmd = [sys.executable, "-m", "runtime.cli", "preflight", arm, profile, "--out", str(out),
           "--no-report", "--json", *options.split()]
    done = subprocess.run(cmd, env=env, capture_output=True, text=True,
                          cwd=Path(folder).resolve())
    if done.returncode not in (0, 1):
        raise SystemExit(f"{' '.join(cmd)} (in {folder}) failed:\n{done.stderr}")
    summary = json.loads(done.stdout)
    log = Path(folder).resolve() / summary["files"]["session_log"]
    records = []
    for r in read_session(log).records:
        wire = r.to_wire()
        wire.pop("compute_s")
        records.append(msgpack.packb(wire))
    return {k: v for k, v in summary.items() if k not in TIMING_FIELDS}, records


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("sides", nargs="+", metavar="SIDE",
                   help='a checkout folder, optionally +"preflight options"')
    args = p.parse_args()
    if len(args.sides) < 2:
        p.error("give at least two sides to compare")
    same = True
    with tempfile.TemporaryDirectory() as tmp:
        for arm, profile in RUNS:
            results = [run_side(side, arm, profile, Path(tmp) / f"side{i}")
                       for i, side in enumerate(args.sides)]
            (summary0, records0) = results[0]
            line = [f"{arm:<7} {profile:<14} verdict {summary0['verdict']:<5} "
                    f"{len(records0)} cycles:"]
            for side, (summary, records) in zip(args.sides[1:], results[1:]):
                differing = [k for k in summary0.keys() | summary.keys()
                             if summary0.get(k) != summary.get(k)]
                first = next((i for i, (a, b) in enumerate(zip(records0, records)) if a != b),
                             None if len(records) == len(records0) else
                             min(len(records), len(records0)))
                ok = not differing and first is None
                same &= ok
                line.append("same" if ok else
                            f"DIFFERS ({side}: summary {sorted(differing)}, first differing "
                            f"record {first})")
            print(" ".join(line), flush=True)
    print("all the same" if same else "differences found")
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
