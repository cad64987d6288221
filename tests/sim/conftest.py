"""Shared by the simulated arm's tests: an arm side served in lockstep on a loopback port."""

from __future__ import annotations

import contextlib
import threading
from typing import Callable, Iterator

import pytest

from runtime.link.transport import ArmServer
from sim.arm_side import ArmSession
from sim.endpoint import ArmEndpoint


@contextlib.contextmanager
def _serving_lockstep(target, session: ArmSession) -> Iterator[ArmEndpoint]:
    """`target` served in lockstep by a thread on tcp://127.0.0.1 (a free port) until the
    block ends; the endpoint's `server.endpoint` is where to connect."""
    stop = threading.Event()
    with ArmServer("tcp://127.0.0.1:*", n_joints=target.arm.n) as server:
        endpoint = ArmEndpoint(server, target, session)
        worker = threading.Thread(target=endpoint.serve_lockstep, args=(stop.is_set,),
                                  kwargs={"poll_s": 0.01}, daemon=True)
        worker.start()
        try:
            yield endpoint
        finally:
            stop.set()
            worker.join(5.0)


@pytest.fixture
def serving_lockstep() -> Callable:
    """`serving_lockstep(target, session)`: a context manager, see `_serving_lockstep`."""
    return _serving_lockstep
