"""Runs and their records: a drive session (its loop body, main thread and statistics), the
session log (schema, writer, reader, blocks, archive, catalog, export, summary), re-runs,
replays, lockstep runs, preflight (the run, its judgement and its report) and the one
statistics engine.

May import the control cycle, the link, the arm and the operator's side; never commands.
"""
