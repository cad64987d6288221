"""The progress bar: drawn on a terminal only, throttled, cleared at the end."""

from __future__ import annotations

import io

from runtime.operator.progress import BAR_CELLS, Progress, format_bar


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_bar_text():
    line = format_bar("preflight", 0.5, "5.0/10.0 s")
    assert line == f"preflight [{'#' * (BAR_CELLS // 2)}{'.' * (BAR_CELLS // 2)}]  50 %  5.0/10.0 s"
    assert "100 %" in format_bar("x", 1.7) and "  0 %" in format_bar("x", -1.0)


def test_drawn_on_a_terminal_throttled_and_cleared():
    now = [0.0]
    out = Terminal()
    bar = Progress("run", 10.0, stream=out, clock=lambda: now[0], min_interval_s=0.1)
    bar.update(1.0)
    now[0] = 0.05
    bar.update(2.0)                       # within 0.1 s of the last draw: skipped
    now[0] = 1.0
    bar.update(5.0)                       # 4 s more done in 1 s of wall time
    text = out.getvalue()
    assert text.count("\r") == 2 and "1.0/10.0 s" in text and "2.0/10.0" not in text
    assert "4.0x real time" in text and "1 s left" in text
    bar.close()
    assert out.getvalue().endswith("\r")


def test_silent_when_not_a_terminal():
    out = io.StringIO()
    bar = Progress("run", 10.0, stream=out)
    bar.update(5.0, force=True)
    bar.close()
    assert out.getvalue() == ""
