"""One module per `jogwire` subcommand: `add_arguments(parser)` and `run(args) -> int`.

Each parses its options into settings, calls a runner in ``runtime.sessions`` (or the
link, the arm) and turns the outcome into an exit status. Commands may import any layer
but never each other; errors are mapped to exit statuses in ``runtime.cli`` alone.
"""

__all__ = ["bridge", "drive", "inspect", "keys", "pads", "preflight", "probe", "relay", "replay",
           "sim"]
