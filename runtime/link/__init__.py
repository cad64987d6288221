"""The wire between the runtime and an arm: the protocol (pure), ZeroMQ sockets, the pipe
link of lockstep runs, the perturbing relay and starting the arm process.

May import ``runtime.arm``; never the control cycle, sessions, operator or commands.
"""
