"""The control cycle: operator intent, the safety gate, the solver, the limits, the cycle
and the fixed-rate loop.

Pure except the loop's clock, which is injected. May import ``runtime.arm`` (and the
shared ``errors``/``tomlsource``); never the link, sessions, operator or commands.
"""
