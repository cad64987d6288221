"""Runs and their log: a drive session (its loop body, main thread and statistics), preflight
(the run, its judgement and its report), replays and re-runs, lockstep with the simulated
arm, and the session recorder.

May import the control cycle, the link, the arm and the operator's side; never commands.
"""

__all__ = ["drive", "drive_stats", "drive_ui", "lockstep", "preflight", "preflight_run", "recorder",
           "replay", "report", "rerun"]
