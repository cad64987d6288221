"""The control cycle: operator intent, response shaping, pad mappings, the mapper, the
safety gate, the solver, the limits, the run settings, the cycle and the fixed-rate loop.

Pure except the loop's clock, which is injected. May import ``runtime.arm`` (and the
shared ``errors``/``tomlsource``); never the link, sessions, operator or commands.
"""

__all__ = ["clearance", "cycle", "intent", "limits", "loop", "mapping", "pads", "safety",
           "settings", "shaping", "solver"]
