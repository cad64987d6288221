"""`jogwire sim ARM [options]`: run the PyBullet simulated arm as the arm side of the wire.

The runtime never imports pybullet or `sim`, so this command replaces itself with
`python -m sim.arm ARM [options]` (same interpreter, this checkout first on PYTHONPATH).
Options are passed through unchanged; `jogwire sim ARM --help` prints them all.
"""

from __future__ import annotations

import argparse
import os

from ..link.arm_process import child_argv, child_env

OPTIONS_SUMMARY = """\
options (passed to the simulated arm; `jogwire sim ARM --help` explains each):
  --endpoint E        where to listen (default tcp://127.0.0.1:47810)
  --keys DIR          CURVE keys from `jogwire keys DIR` (needed off loopback)
  --gui               open the PyBullet window
  --step-hz HZ        physics steps per second (default 1000)
  --lockstep          one step per received rates message, no pacing
  --substeps N        with --lockstep: physics steps per rates message (default 1)
  --link fd:R,W       with --lockstep: serve on inherited pipe ends (a parent's own child)
  --q V…              the start pose (rad and m; degrees with --deg)
  --stale-after S     no fresh rates for S seconds → ramp to zero (default 0.1)
  --duration S        stop after S seconds
  --snapshot FILE.png render the arm (home pose or --q) to a PNG and exit; --size WxH
  --cell NAME|FILE    hold a workcell: its objects as static bodies, contacts reported
"""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.epilog = OPTIONS_SUMMARY
    parser.add_argument("arm", metavar="ARM",
                        help="a shipped arm name (e.g. reach7), an arm .toml or a .urdf file")
    parser.add_argument("options", nargs=argparse.REMAINDER, metavar="...",
                        help="options for the simulated arm (below)")


def run(args: argparse.Namespace) -> int:
    argv = child_argv("sim", args.arm, args.options)
    os.execve(argv[0], argv, child_env())
    return 0  # not reached
