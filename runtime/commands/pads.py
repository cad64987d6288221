"""`jogwire pads`: the gamepads connected, a live check of one against a pad file, and
teaching jogwire a new pad.

    jogwire pads                     list the pads SDL sees, with the shipped file that fits
    jogwire pads --pad FILE          live: which raw axis and button is which, and the intent
                                     each gives under FILE (a window; --headless: text lines)
    jogwire pads --learn OUT.toml    move each stick and press each button when asked; writes
                                     a pad file for `jogwire drive --pad OUT.toml`

Nothing here talks to an arm. The logic lives in runtime/operator/pad_check.py and
pad_learn.py.
"""

from __future__ import annotations

import argparse
import os
import time

from ..arm.model import load_arm
from ..control.mapping import Mapper, load_pad
from ..errors import ConfigError


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.description = (
        "List the gamepads connected; with --pad, show live what each axis and button does "
        "under a pad file; with --learn, teach jogwire a pad and write its pad file.")
    what = parser.add_mutually_exclusive_group()
    what.add_argument("--pad", metavar="PAD",
                      help="check a pad file live: shipped name (twinstick, twinstick_sdl) "
                           "or a .toml")
    what.add_argument("--learn", metavar="OUT.toml",
                      help="walk through every stick and button and write a pad file")
    parser.add_argument("--arm", default="elbow6",
                        help="with --pad: the arm whose speed caps turn the intent into m/s "
                             "and °/s (default elbow6)")
    parser.add_argument("--headless", action="store_true",
                        help="with --pad: text lines instead of the window")
    parser.add_argument("--duration", type=float, metavar="S",
                        help="with --pad: end after S seconds (default: until closed / Ctrl-C)")
    parser.add_argument("--step-timeout", type=float, default=30.0, metavar="S",
                        help="with --learn: give up a required step (leave out an optional "
                             "one) after S seconds without input (default 30)")
    parser.add_argument("--force", action="store_true",
                        help="with --learn: replace an existing OUT.toml")


def _say(text: str) -> None:
    print(text, flush=True)


def run(args: argparse.Namespace) -> int:
    if args.duration is not None and not args.duration > 0:
        raise ConfigError("--duration must be positive", field="duration")
    if not args.step_timeout > 0:
        raise ConfigError("--step-timeout must be positive", field="step-timeout")
    window = args.pad is not None and not args.headless and _display()
    if not window:
        os.environ.setdefault("SDL_VIDEODRIVER", "dummy")
        if args.pad is not None and not args.headless:
            _say("jogwire pads: no display for the window: text lines instead")
    if args.learn is not None:
        return _learn(args)
    if args.pad is not None:
        return _check(args, window)
    from ..operator.pad_check import connected_pads, format_pad_list
    _say(format_pad_list(connected_pads()))
    return 0


def _check(args: argparse.Namespace, window: bool) -> int:
    from ..operator import pad_check
    from ..operator.inputs.gamepad import GamepadSource
    pad = load_pad(args.pad)
    if pad.device != "gamepad":
        raise ConfigError(f"{pad.source} is a {pad.device} mapping; `jogwire pads` checks "
                          "gamepads", field="pad")
    mapper = Mapper(pad, load_arm(args.arm))
    source = GamepadSource()
    view = None
    try:
        _say(pad_check.format_roles(pad, pad_check.pad_roles(pad)))
        if window:
            view = pad_check.PadCheckWindow(f"jogwire pads · {pad.name}", pad.name)
            view.open()
        else:
            _say("live (Ctrl-C ends):")
        pad_check.run_check(source, mapper, _say, window=view, duration_s=args.duration,
                            clock=time.monotonic, sleep=time.sleep)
    finally:
        if view is not None:
            view.close()
        source.close()
    return 0


def _learn(args: argparse.Namespace) -> int:
    from ..operator.inputs.gamepad import GamepadSource
    from ..operator.pad_learn import learn_pad, write_pad_file
    if os.path.exists(args.learn) and not args.force:      # before the user does the work
        raise ConfigError(f"{args.learn} exists; choose another name or add --force",
                          field="learn")
    source = GamepadSource()
    try:
        learned = learn_pad(source, _say, clock=time.monotonic, sleep=time.sleep,
                            step_timeout_s=args.step_timeout)
    finally:
        source.close()
    path = write_pad_file(learned, args.learn, force=args.force)
    _say(f"wrote {path} (dead zone {learned.deadzone:.2f}); check it with `jogwire pads "
         f"--pad {path}`, drive with `jogwire drive --pad {path}`")
    return 0


def _display() -> bool:
    from ..operator.inputs.pygame_init import display_available
    return display_available()
