"""A run's cycles kept as rows and gathered into a log block, with no record per cycle.

The usual way to log a cycle is its record (`log_schema.cycle_record`), whose fields the
log writer later gathers into a block's columns (`log_blocks`). A lockstep run (preflight)
is bound by this process's work per cycle, and a record of 28 fields built and gathered
again cost it about a quarter of its cycle. So it keeps each cycle's values as the loop has
them (`log_schema.cycle_row`: a plain tuple, arrays not yet converted) and gathers a block
from those rows (`CycleBlock.from_rows`, one numpy conversion per column): the same block,
bit for bit, that the cycles' records make (tests/runtime/sessions/test_cycle_columns.py).

A row keeps the cycle's arrays by reference until its block is taken: the loop must not
change them afterwards (the control cycle returns new ones every cycle).
"""

from __future__ import annotations

from typing import Any

from ..control.cycle import CycleOutput
from ..control.intent import InputFrame
from .log_blocks import CycleBlock
from .log_schema import CycleRecord, CycleRow, cycle_row, record_of_row


class CycleColumns:
    """Cycles collected as the loop produced them; `block()` gathers them as columns."""

    def __init__(self) -> None:
        self.rows: list[CycleRow] = []

    def add(self, cycle: int, t_s: float, frame: InputFrame, out: CycleOutput, q: Any, *,
            state_age_s: float | None, overrun_streak: int, period_s: float,
            compute_s: float, overrun: bool) -> None:
        """One cycle, with `cycle_record`'s arguments."""
        self.rows.append(cycle_row(cycle, t_s, frame, out, q, state_age_s=state_age_s,
                                   overrun_streak=overrun_streak, period_s=period_s,
                                   compute_s=compute_s, overrun=overrun))

    def __len__(self) -> int:
        return len(self.rows)

    def block(self) -> CycleBlock:
        """The cycles collected so far as one block. Raises TypeError, ValueError or
        LogError where `CycleBlock.from_records` would."""
        return CycleBlock.from_rows(self.rows)

    def records(self) -> list[CycleRecord]:
        """The cycles collected so far as records (the slow way: for cycles that do not
        gather into a block)."""
        return [record_of_row(row) for row in self.rows]

    def clear(self) -> None:
        self.rows = []
