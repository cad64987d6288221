"""Runs and their records: the session log, re-runs, lockstep runs, preflight and its
report.

May import the control cycle, the link, the arm and the operator's side; never commands.
"""
