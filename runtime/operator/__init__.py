"""The operator's side: input devices (gamepad, keyboard, script, network), the status
window, the terminal (status line, summary, tables) and progress bars.

May import the control cycle (its intent types above all), the link and the arm; never
sessions or commands.
"""

__all__ = ["progress", "status_window", "terminal", "inputs"]
