"""The operator's side: input devices (gamepad, keyboard, script, network), checking and
teaching a pad, the status window, the terminal (status line, summaries, tables) and
progress bars.

May import the control cycle (its intent types above all), the link and the arm; never
sessions or commands.
"""

__all__ = ["cell_outlines", "pad_check", "pad_learn", "progress", "status_window", "terminal",
           "inputs"]
