"""The operator's side: input devices (gamepad, keyboard, script, network), the status
window and terminal progress.

May import the control cycle's intent types, the link and the arm; never sessions or
commands.
"""
