"""`jogwire inspect LOG | DIR`: what happened in a recorded session, or which session it was.

LOG: the summary (duration, cycles, time enabled, per joint the peak speed and acceleration
against the commanded (max) and the hardware's rated limits and the closest approach to a
position limit, the TCP's peak speed against its cap, the lowest σ_min, how often each limit
bound, loop overruns, and what the reader found wrong with the file). `--csv` and
`--parquet` export the cycle table; `--json` prints the summary as one object (SI units,
null where a value does not exist).

DIR: one line per session log in the folder (start, arm, length, time moving, TCP peak,
lowest σ_min, clearance where recorded, limit episodes, clean close), with filters.

Logs are streamed block by block, so an hour-long session is read in bounded memory.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from ..errors import ConfigError
from ..operator.terminal import format_catalog, format_summary, json_safe
from ..sessions.catalog import CatalogFilter, catalog, parse_when
from ..sessions.export import write_csv, write_parquet
from ..sessions.summary import session_stats

FOLDER_ONLY = ("arm", "since", "until", "limit_events")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("log", metavar="LOG|DIR",
                        help="a session log (.jwlog), or a folder of them to list")
    out = parser.add_argument_group("one log")
    out.add_argument("--csv", metavar="FILE",
                     help="also write the cycle table as CSV (one column per scalar, per-joint "
                          "columns named after the joints; '-' for standard output)")
    out.add_argument("--parquet", metavar="FILE",
                     help="also write the cycle table as Parquet (needs pyarrow: the "
                          "'analysis' extra)")
    out.add_argument("--deg", action="store_true",
                     help="revolute joint values in the table in degrees")
    parser.add_argument("--json", action="store_true",
                        help="print the summary (or the folder's table) as JSON (SI units)")
    folder = parser.add_argument_group("a folder")
    folder.add_argument("--arm", metavar="NAME", help="only sessions with this arm")
    folder.add_argument("--since", metavar="DATE",
                        help="only sessions started on or after DATE (YYYY-MM-DD[THH:MM], "
                             "local time unless an offset is given)")
    folder.add_argument("--until", metavar="DATE",
                        help="only sessions started before DATE (a bare date: up to the end "
                             "of that day)")
    folder.add_argument("--limit-events", action="store_true",
                        help="only sessions in which some limit bound")


def run(args: argparse.Namespace) -> int:
    if Path(args.log).is_dir():
        return _run_folder(args)
    given = [name for name in FOLDER_ONLY if getattr(args, name)]
    if given:
        raise ConfigError("filters apply to a folder of sessions, not to one log",
                          field="--" + given[0].replace("_", "-"))
    if args.csv == "-" and args.json:
        raise ConfigError("--csv - and --json both want standard output; give --csv a file",
                          field="--csv")
    summary, stats = session_stats(args.log)
    log = Path(args.log)
    if args.parquet:
        summary["parquet"] = {"path": args.parquet,
                              "rows": write_parquet(log, args.parquet, stats)}
    if args.csv:
        summary["csv"] = {"path": args.csv, "rows": write_csv(log, args.csv, stats)}
        if args.csv == "-":
            return 0
    if args.json:
        print(json.dumps(json_safe(summary), indent=2, allow_nan=False))
    else:
        print(format_summary(summary, degrees=args.deg))
    return 0


def _run_folder(args: argparse.Namespace) -> int:
    if args.csv or args.parquet:
        raise ConfigError("exports take one session log, not a folder",
                          field="--csv" if args.csv else "--parquet")
    filt = CatalogFilter(
        arm=args.arm,
        since=None if args.since is None else parse_when(args.since, end_of_day=False,
                                                         field="--since"),
        until=None if args.until is None else parse_when(args.until, end_of_day=True,
                                                         field="--until"),
        limit_events=args.limit_events)
    rows = catalog(args.log, filt)
    if args.json:
        print(json.dumps(json_safe(rows), indent=2, allow_nan=False))
    else:
        print(format_catalog(rows, filtered=filt != CatalogFilter()))
    return 0
