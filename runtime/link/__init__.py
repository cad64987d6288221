"""The wire between the runtime and an arm: the protocol (pure), ZeroMQ sockets, the pipe
link of lockstep runs (its frames in the pipes or in shared-memory rings beside them), the
perturbing relay (its schedule, pure; its sockets) and starting
the arm process.

May import ``runtime.arm``; never the control cycle, sessions, operator or commands.
"""

__all__ = ["arm_process", "packed", "pipes", "protocol", "relay", "relay_runner",
           "shared_rings", "transport"]
