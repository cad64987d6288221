"""runtime/sessions/lockstep.py `run_closed_loop` against an arm kept in this process: which pose
each cycle works on for each state lag, the order cycles come out in, and what reaches the arm.

The arm is an ideal integrator (q ← q + q̇·dt per cycle), so every pose is known exactly:
with lag 0 cycle k must see q0 + dt·Σ_{i<k} rates_i, with lag 1 the sum stops one cycle
earlier (k − 1 terms). The real simulated arm child is exercised in tests/e2e."""

from __future__ import annotations

import gc

import numpy as np
import pytest

from runtime.arm.load import load_arm
from runtime.control.cycle import ControlCycle
from runtime.control.intent import DirectCommand, InputFrame
from runtime.control.pads import load_pad
from runtime.control.settings import RunSettings
from runtime.errors import ConfigError
from runtime.sessions.lockstep import SimStep, run_closed_loop

RATE_HZ = 500.0
DT = 1.0 / RATE_HZ


class IntegratorArm:
    """The lockstep contract (first, send, wait) over q ← q + q̇·dt, with the order of
    what it was sent and what it was asked for."""

    def __init__(self, q0: np.ndarray) -> None:
        self.q = q0.copy()
        self.first = SimStep(q0.copy(), np.zeros_like(q0), False)
        self.queue: list[tuple[int, np.ndarray]] = []
        self.seq = 0
        self.log: list[str] = []

    def send(self, rates: np.ndarray, *, reduced: bool = False) -> int:
        self.seq += 1
        self.queue.append((self.seq, np.array(rates)))
        self.log.append(f"send {self.seq}")
        return self.seq

    def wait(self, seq: int) -> SimStep:
        self.log.append(f"wait {seq}")
        done, rates = self.queue.pop(0)
        assert done == seq, "waited for rates out of order"
        self.q = self.q + rates * DT
        return SimStep(self.q.copy(), rates, False)


def frame_at(k: int, t: float) -> InputFrame:
    """Enable released for the first cycles (hold-to-move starts released), then a steady
    base-frame twist."""
    moving = k >= 3
    return InputFrame("test", True, command=DirectCommand(
        twist=(0.05, -0.03, 0.02, 0.0, 0.1, 0.0) if moving else (0.0,) * 6, enable=moving))


def run(lag: int, n: int = 40):
    arm = load_arm("elbow6")
    cycle = ControlCycle(arm, load_pad("keyboard"), RunSettings(rate_hz=RATE_HZ))
    sim = IntegratorArm(arm.home())
    cycles = list(run_closed_loop(cycle, sim, frame_at, n, state_lag=lag))
    return arm, sim, cycles


@pytest.mark.parametrize("lag", [0, 1])
def test_each_cycle_works_on_the_pose_lag_cycles_behind(lag) -> None:
    arm, _, cycles = run(lag)
    rates = np.array([c.out.rates for c in cycles])
    assert np.abs(rates[10:]).max() > 1e-3, "the arm never moved: the check would be empty"
    for c in cycles:
        known = max(c.k - lag, 0)               # rates that have acted on the pose it sees
        expected = arm.home() + DT * rates[:known].sum(axis=0)
        np.testing.assert_allclose(c.q_used, expected, rtol=0, atol=1e-15)
        assert c.state_age_s == pytest.approx(min(c.k, lag) * DT)
        np.testing.assert_allclose(c.after.q, arm.home() + DT * rates[:c.k + 1].sum(axis=0),
                                   rtol=0, atol=1e-15)


def test_cycles_come_out_in_order_once_each() -> None:
    for lag in (0, 1):
        _, _, cycles = run(lag, n=12)
        assert [c.k for c in cycles] == list(range(12))


def test_with_lag_one_the_next_rates_go_out_before_the_last_state_is_awaited() -> None:
    _, sim, _ = run(1, n=4)
    assert sim.log == ["send 1", "send 2", "wait 1", "send 3", "wait 2", "send 4", "wait 3",
                       "wait 4"]
    _, sim, _ = run(0, n=3)
    assert sim.log == ["send 1", "wait 1", "send 2", "wait 2", "send 3", "wait 3"]


def test_prepare_runs_for_every_cycle_with_its_state_age() -> None:
    arm = load_arm("elbow6")
    cycle = ControlCycle(arm, load_pad("keyboard"), RunSettings(rate_hz=RATE_HZ))
    seen = []
    cycles = list(run_closed_loop(
        cycle, IntegratorArm(arm.home()), frame_at, 5, state_lag=1,
        prepare=lambda k, t, frame, out, q, compute, age: seen.append((k, age)) or k * 10))
    assert seen == [(0, 0.0), (1, DT), (2, DT), (3, DT), (4, DT)]
    assert [c.prepared for c in cycles] == [0, 10, 20, 30, 40]


def test_an_unsupported_lag_is_a_config_error() -> None:
    arm = load_arm("elbow6")
    cycle = ControlCycle(arm, load_pad("keyboard"), RunSettings(rate_hz=RATE_HZ))
    with pytest.raises(ConfigError, match="state lag"):
        list(run_closed_loop(cycle, IntegratorArm(arm.home()), frame_at, 3, state_lag=2))


def test_the_loop_keeps_what_came_before_it_out_of_full_collections() -> None:
    # gc.freeze for the loop's length: a full collection would otherwise walk every object
    # the process made before it (a stall of milliseconds); afterwards all is as it was.
    arm = load_arm("elbow6")
    cycle = ControlCycle(arm, load_pad("keyboard"), RunSettings(rate_hz=RATE_HZ))
    frozen_during = []
    for _ in run_closed_loop(cycle, IntegratorArm(arm.home()), frame_at, 3, state_lag=1):
        frozen_during.append(gc.get_freeze_count())
    assert min(frozen_during) > 0
    assert gc.get_freeze_count() == 0
    loop = run_closed_loop(cycle, IntegratorArm(arm.home()), frame_at, 3, state_lag=1)
    next(loop)
    loop.close()                              # a run stopped early unfreezes as well
    assert gc.get_freeze_count() == 0
