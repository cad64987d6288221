"""Runs and their records: a drive session (its loop body, main thread and statistics), the
session log (schema, writer, reader, blocks, a lockstep run's cycles as columns, archive,
catalog, export, summary), re-runs, replays, lockstep runs, preflight (the run, its
judgement and its report) and the one statistics engine.

May import the control cycle, the link, the arm and the operator's side; never commands.
"""

__all__ = ["archive", "catalog", "cell_check", "cycle_columns", "drive", "drive_stats",
           "drive_ui", "export", "lockstep", "log_blocks", "log_blocks_decode", "log_reader",
           "log_schema", "log_writer", "preflight", "preflight_run", "replay", "report",
           "rerun", "stats", "summary"]
