"""The `jogwire` command: parses argv and hands each subcommand to its module.

Each subcommand lives in `runtime/commands/<name>.py` with two functions:
`add_arguments(parser)` and `run(args) -> int` (the exit status). Only this module and the
command modules read argv, the environment and the terminal.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from .errors import JogwireError

# name → (module, one-line help). Add a command by adding its module here.
COMMANDS: dict[str, tuple[str, str]] = {
    "drive": ("runtime.commands.drive", "drive an arm's tool by hand (the simulated demo arm by default)"),
    "probe": ("runtime.commands.probe", "kinematics at a pose: TCP pose, Jacobian, singular values"),
    "inspect": ("runtime.commands.inspect", "summarise a session log, or list a folder of them"),
    "preflight": ("runtime.commands.preflight", "prove a motion against the arm's ratings on the simulated arm: report and verdict"),
    "replay": ("runtime.commands.replay", "send a recorded session to a target, or re-run it through today's pipeline"),
    "sim": ("runtime.commands.sim", "run the PyBullet simulated arm (the arm side of the wire)"),
    "bridge": ("runtime.commands.bridge", "run the hardware bridge stub around a Driver"),
    "pads": ("runtime.commands.pads", "the gamepads connected; check one against a pad file live, or teach jogwire a new one"),
    "keys": ("runtime.commands.keys", "make CURVE key pairs for a link off this machine"),
    "relay": ("runtime.commands.relay", "a perturbing relay on the arm link: delay, loss, garbage, stalls"),
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="jogwire",
        description="Jog a robot arm's tool by hand: twist in, limited joint rates out.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name, (module, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        importlib.import_module(module).add_arguments(p)
        p.set_defaults(_module=module)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(importlib.import_module(args._module).run(args) or 0)
    except JogwireError as exc:
        print(f"jogwire {args.command}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
