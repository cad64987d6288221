"""The main thread of a drive session: the status window or the terminal's status line,
the stop signals, the screenshot, and which input and window a run gets.

The control loop runs in its own thread (`runtime.sessions.drive`); the main thread owns
pygame (SDL wants its window and event queue there). The screenshot is captured at its time
(the window's pixels, or the snapshot without a window) and written after the loop has
ended: encoding a PNG holds the GIL for tens of milliseconds, which the loop must not wait
for.
"""

from __future__ import annotations

import dataclasses
import math
import os
import signal
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

import numpy as np

from ..control.loop import FixedRateLoop, TimingStats
from ..errors import ConfigError, TransportError
from ..link.arm_process import ArmProcess
from ..operator.inputs import EventInput, InputSource, PumpedInput, parse_input_spec
from ..operator.terminal import say, status_line, terminal_width

if TYPE_CHECKING:
    from ..operator.status_window import StatusWindow
    from .drive import DriveSession

__all__ = ["DEMO_SCRIPT", "DriveUI", "InputPlan", "MainThread", "StopSignals", "plan_input",
           "probe_display_and_pads"]

DEMO_SCRIPT = "square"            # configs/profiles/square.toml: a 10 cm square at 5 cm/s
STATS_REFRESH_S = 0.25            # how often the main thread recomputes timing percentiles
# The window redraws at up to WINDOW_MAX_HZ, fewer where a frame is slow to draw and show
# (a software X server takes ~11 ms per frame here), so that it takes about WINDOW_CPU_SHARE
# of a core: on two cores the control loop and the simulated arm need the rest.
WINDOW_MAX_HZ, WINDOW_MIN_HZ, WINDOW_CPU_SHARE = 30.0, 5.0, 0.15


@dataclass(frozen=True)
class DriveUI:
    """What the operator sees: the status window (else a status line on `out`), and a
    screenshot of it saved once (path, after this many seconds of the session)."""

    window: bool
    out: TextIO
    screenshot: tuple[Path, float] | None = None


@dataclass(frozen=True)
class InputPlan:
    """Which input to open, whether a window shows, and what to tell the user about it."""

    spec: str
    window: bool
    note: str = ""


def plan_input(requested: str | None, *, headless: bool, display: bool, pads: int
               ) -> InputPlan:
    """The input and window for this run (pure: the caller probes the display and pads)."""
    window = display and not headless
    if requested is not None:
        kind, _ = parse_input_spec(requested)
        if kind == "keyboard" and not window:
            raise ConfigError("the keyboard input needs the status window, and "
                              + ("--headless was given" if headless else
                                 "no window can open here (no display)")
                              + "; use a gamepad or --input script:FILE", field="input")
        return InputPlan(requested, window)
    if pads:
        return InputPlan("gamepad", window, "taking the first gamepad")
    if window:
        return InputPlan("keyboard", True, "no gamepad found: keyboard in the status window "
                                           "(hold space and use W/S A/D R/F to move)")
    why = "--headless and no gamepad" if headless else "no display and no gamepad"
    return InputPlan(f"script:{DEMO_SCRIPT}", False,
                     f"{why}: playing the demo script {DEMO_SCRIPT!r} headless against the "
                     "arm (choose with --input)")


def probe_display_and_pads(headless: bool, need_pads: bool) -> tuple[bool, int]:
    """(a window can open, pads plugged in). Without a display SDL gets its dummy video
    driver, so pygame can still read pads; a display that fails to open counts as none."""
    from ..operator.inputs.pygame_init import display_available
    display = display_available() and not headless
    if not display:
        os.environ.setdefault("SDL_VIDEODRIVER", "dummy")
    if not need_pads:
        return display, 0
    from ..operator.inputs.pygame_init import pads_present, pygame
    try:
        return display, pads_present()
    except pygame.error:
        if not display:
            return False, 0
    # the display is announced but cannot be opened: go on without it
    pygame.display.quit()
    os.environ["SDL_VIDEODRIVER"] = "dummy"
    try:
        return False, pads_present()
    except pygame.error:
        return False, 0



class MainThread:
    """What the main thread does while the loop runs: timing statistics for the snapshot,
    the screenshot, watching the simulated arm, and the window or the status line."""

    def __init__(self, drive: "DriveSession", loop: FixedRateLoop, child: ArmProcess | None,
                 screenshot: tuple[Path, float] | None) -> None:
        self.drive = drive
        self.loop = loop
        self.child = child
        self.screenshot = screenshot
        self.thread: threading.Thread | None = None
        self.window: StatusWindow | None = None
        self.frame_hz = WINDOW_MAX_HZ
        self.child_exit: int | None = None
        self._told_recording = False
        self._shot: Any = None            # a pygame Surface or a StatusSnapshot
        self._timing: TimingStats | None = None
        self._timing_at = -math.inf

    def timing(self) -> TimingStats:
        now = time.perf_counter()
        if self._timing is None or now - self._timing_at >= STATS_REFRESH_S:
            self._timing, self._timing_at = self.loop.stats(), now
        return self._timing

    def snapshot(self):
        """The newest snapshot with the loop's timing and, where the solve did not name
        the nearest pair (nothing within d_i, or no solve), that pair measured here."""
        snap = self.drive.latest
        if snap is None:
            return None
        from ..arm.distance import cell_distances
        from ..operator.status_window import clearance_fields
        more: dict[str, Any] = {"timing": self.timing()}
        drive = self.drive
        if drive.cell is not None and snap.q is not None and snap.clearance_points is None:
            more.update(clearance_fields(cell_distances(drive.arm, drive.cell, snap.q)))
        return dataclasses.replace(snap, **more)

    def watch(self) -> bool:
        """Checks shared by both modes; True while the loop runs."""
        recorder = self.drive.recorder
        if recorder is not None and recorder.failed and not self._told_recording:
            self._told_recording = True
            print(f"\njogwire drive: RECORDING STOPPED: {recorder.failed}; driving goes on "
                  "without a log", file=sys.stderr, flush=True)
        if self.child is not None and self.child_exit is None and \
                (status := self.child.proc.poll()) is not None:
            self.child_exit = status
            self.drive.request_end(f"the simulated arm exited (status {status})")
        if self.screenshot is not None and self._shot is None:
            snap = self.drive.latest
            if snap is not None and snap.elapsed_s >= self.screenshot[1]:
                if self.window is not None and self.window.frames_drawn:
                    from ..operator.inputs.pygame_init import pygame
                    self._shot = pygame.display.get_surface().copy()
                elif self.window is None:
                    self._shot = self.snapshot()
        return self.thread is not None and self.thread.is_alive()

    def save_screenshot(self) -> Path | None:
        if self._shot is None or self.screenshot is None:
            return None
        from ..operator.inputs.pygame_init import pygame
        from ..operator.status_window import StatusSnapshot, render_png
        path = self.screenshot[0]
        if isinstance(self._shot, StatusSnapshot):
            return render_png(self._shot, path)
        path.parent.mkdir(parents=True, exist_ok=True)
        pygame.image.save(self._shot, str(path))
        return path

    def open_window(self, title: str, q0: np.ndarray) -> None:
        """Open the window and draw a first frame before the loop starts: the first frame
        builds the fonts and the static background, which takes a while."""
        from ..operator.inputs.pygame_init import pygame
        from ..operator.status_window import StatusSnapshot, StatusWindow
        window = StatusWindow(title=title)
        try:
            window.open()
        except pygame.error as exc:
            raise TransportError(f"the status window could not open ({exc}); "
                                 "use --headless") from None
        first = StatusSnapshot(arm=self.drive.arm, q=q0, gate_state="blocked",
                               gate_reason="starting", target=self.drive.target)
        window.draw(first)                       # fonts, background
        t0 = time.perf_counter()
        for _ in range(3):
            window.draw(first)
        frame_s = (time.perf_counter() - t0) / 3
        self.frame_hz = min(WINDOW_MAX_HZ, max(WINDOW_MIN_HZ, WINDOW_CPU_SHARE / frame_s))
        self.window = window
        if self.frame_hz < WINDOW_MAX_HZ:
            say(sys.stdout, f"jogwire drive: this display takes {frame_s * 1e3:.0f} ms per "
                f"frame: the status window redraws at {self.frame_hz:.0f} Hz to leave the CPU "
                "to the control loop")

    def run_window(self, source: InputSource) -> None:
        handle = source.handle_event if isinstance(source, EventInput) else None
        window = self.window
        assert window is not None, "open_window first"
        try:
            result = window.run(self.snapshot, on_event=handle, frame_hz=self.frame_hz,
                                     should_stop=lambda: not self.watch())
            if result == "closed":
                self.drive.request_end("the window was closed")
                while self.watch():      # the loop settles the arm; nothing left to draw
                    time.sleep(0.01)
        finally:
            window.close()

    def run_headless(self, source: InputSource, out: TextIO) -> None:
        pump = source.pump if isinstance(source, PumpedInput) else None
        tty = out.isatty()
        every_s = 0.2 if tty else 2.0
        next_line = time.perf_counter() + (0.2 if tty else 1.0)
        last_state = None
        while self.watch():
            if pump is not None:
                pump()
            now = time.perf_counter()
            snap = self.drive.latest
            if snap is not None and (now >= next_line or (not tty and
                                                          snap.gate_state != last_state)):
                snap = self.snapshot()
                line = status_line(snap, snap.timing)
                if tty:
                    say(out, "\r" + line[:terminal_width() - 1] + "\x1b[K", end="")
                else:
                    say(out, line)
                last_state = snap.gate_state
                next_line = now + every_s
            time.sleep(0.004 if pump is not None else 0.05)
        if tty:
            say(out, "\r\x1b[K", end="")



class StopSignals:
    """SIGINT and SIGTERM: while the loop runs they ask it to end (twice: at once); before,
    they unwind the start-up like Ctrl-C does, so the simulated arm is stopped either way
    (it runs in its own session and would not see a terminal's Ctrl-C)."""

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __init__(self) -> None:
        self.drive: "DriveSession | None" = None
        self._previous: dict = {}

    def _handle(self, signum: int, _frame: Any) -> None:
        why = "stopped by " + signal.Signals(signum).name
        if self.drive is None:
            raise KeyboardInterrupt(why)
        self.drive.request_end(why)

    def __enter__(self) -> "StopSignals":
        self._previous = {s: signal.signal(s, self._handle) for s in self.SIGNALS}
        return self

    def __exit__(self, *exc: object) -> None:
        for s, h in self._previous.items():
            signal.signal(s, h)


