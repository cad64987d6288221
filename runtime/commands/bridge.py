"""`jogwire bridge ARM [options]`: run the hardware bridge stub (the arm side around a Driver).

Like `jogwire sim`, this replaces itself with `python -m sim.bridge ARM [options]`, since
the runtime never imports `sim`. `jogwire bridge ARM --help` prints every option.
"""

from __future__ import annotations

import argparse
import os

from ..link.arm_process import child_argv, child_env

OPTIONS_SUMMARY = """\
options (passed to the bridge; `jogwire bridge ARM --help` explains each):
  --endpoint E          where to listen (default tcp://127.0.0.1:47810)
  --keys DIR            CURVE keys from `jogwire keys DIR` (needed off loopback)
  --rate HZ             bridge periods per second (default 500)
  --stale-after S       no fresh rates for S seconds → ramp to zero (default 0.1)
  --driver MODULE:CLASS your sim.bridge.Driver subclass (default: the VirtualDriver)
  --dry-run-csv FILE    VirtualDriver: write every command it would send to FILE
  --duration S          stop after S seconds
"""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.epilog = OPTIONS_SUMMARY
    parser.add_argument("arm", metavar="ARM",
                        help="a shipped arm name (e.g. reach7), an arm .toml or a .urdf file")
    parser.add_argument("options", nargs=argparse.REMAINDER, metavar="...",
                        help="options for the bridge (below)")


def run(args: argparse.Namespace) -> int:
    argv = child_argv("bridge", args.arm, args.options)
    os.execve(argv[0], argv, child_env())
    return 0  # not reached
