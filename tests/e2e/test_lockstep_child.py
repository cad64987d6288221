"""The lockstep simulated arm child (`sim.arm --lockstep --link fd:R,W` or `shm:R,W,M`) and
its link, the frames in the pipes or in shared rings: a deterministic run, the same poses
over either, and what either side does when the other one goes."""

from __future__ import annotations

import os
import signal
import time

import numpy as np
import pytest

from runtime.arm.load import load_arm
from runtime.errors import TransportError
from runtime.sessions.lockstep import LockstepSim

pytestmark = [pytest.mark.e2e, pytest.mark.sim]


@pytest.fixture
def arm():
    return load_arm("elbow6")


@pytest.fixture(params=["pipe", "shm"])
def link(request):
    return request.param


def drive(sim: LockstepSim, n: int, ahead: bool) -> np.ndarray:
    """n cycles of a slow sweep; `ahead`: the next rates go out before the last state is
    collected (as a lag-1 run does). Returns the poses after each cycle."""
    qs = []
    pending = None
    for k in range(n):
        rates = 0.2 * np.sin(0.05 * k + np.arange(sim.arm.n))
        seq = sim.send(rates)
        if ahead and pending is not None:
            qs.append(sim.wait(pending).q)
        elif not ahead:
            qs.append(sim.wait(seq).q)
        pending = seq
    if ahead:
        qs.append(sim.wait(pending).q)
    return np.array(qs)


def test_the_same_rates_give_the_same_poses_sent_ahead_or_not(arm) -> None:
    """Physics steps once per message, in order, whether or not the runtime waited, and
    whichever channel carries the frames."""
    with LockstepSim("elbow6", arm, rate_hz=500.0, step_hz=1000.0, link="pipe") as a:
        assert a.link == "pipe"
        waited = drive(a, 200, ahead=False)
    with LockstepSim("elbow6", arm, rate_hz=500.0, step_hz=1000.0, link="shm") as b:
        assert b.link == "shm"
        ahead = drive(b, 200, ahead=True)
    assert np.abs(waited[-1] - arm.home()).max() > 0.01     # it moved
    np.testing.assert_array_equal(waited, ahead)            # bit for bit


def test_the_child_ends_when_the_runtime_closes_the_link(arm, link) -> None:
    sim = LockstepSim("elbow6", arm, rate_hz=500.0, step_hz=1000.0, link=link)
    try:
        sim.step(np.zeros(arm.n))
        sim.client.close()            # as if this process died: the pipe's ends close
        sim.client = None
        deadline = time.monotonic() + 10.0
        while sim.child.proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.02)
        assert sim.child.proc.poll() == 0, "the child did not end by itself"
    finally:
        sim.close()


def test_a_child_killed_mid_run_is_an_error_at_once_with_its_status(arm, link) -> None:
    with LockstepSim("elbow6", arm, rate_hz=500.0, step_hz=1000.0, link=link) as sim:
        sim.step(np.zeros(arm.n))
        os.kill(sim.child.pid, signal.SIGKILL)
        started = time.monotonic()
        with pytest.raises(TransportError, match="exited with status -9"):
            for _ in range(1000):
                sim.step(np.zeros(arm.n))
        assert time.monotonic() - started < 5.0
