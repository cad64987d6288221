"""Network twist source over real loopback sockets (random port, LINGER 0, closed after)."""

from __future__ import annotations

import time

import numpy as np
import pytest

from runtime.arm.load import load_arm
from runtime.control.mapping import Mapper
from runtime.control.pads import load_pad
from runtime.control.safety import BLOCKED, MOVING, READY, REARM, SafetyGate
from runtime.link.protocol import Twist
from runtime.link.transport import Publisher
from runtime.operator.inputs.network import NetworkSource

DEADLINE_S = 5.0


@pytest.fixture
def link():
    source = NetworkSource("tcp://127.0.0.1:*", stale_after_s=0.1)
    pub = Publisher(source.endpoint)
    yield source, pub
    pub.close()
    source.close()


def t_ns() -> int:
    return time.monotonic_ns()


def deliver(source: NetworkSource, pub: Publisher, msg: Twist):
    """Send until the subscriber has it (PUB drops messages before the connection is up)."""
    end = time.monotonic() + DEADLINE_S
    while time.monotonic() < end:
        pub.send(msg)
        source.wait(0.01)
        frame = source.read(time.monotonic())
        if frame.present and source.latest is not None and source.latest.seq == msg.seq:
            return frame
    raise AssertionError("the twist never arrived")


def test_a_twist_reaches_the_intent(link):
    source, pub = link
    frame = deliver(source, pub, Twist(seq=1, t_ns=t_ns(), twist=(0.02, 0, 0, 0, 0, 0.1),
                                       frame="tool", enable=True))
    intent = Mapper(load_pad("twinstick"), load_arm("elbow6")).update(frame)
    np.testing.assert_allclose(intent.twist, [0.02, 0, 0, 0, 0, 0.1])
    assert intent.frame == "tool" and intent.enable and intent.direct
    assert source.accepted >= 1


def test_silence_is_device_loss_and_needs_a_fresh_enable(link):
    source, pub = link
    gate = SafetyGate()
    frame = deliver(source, pub, Twist(seq=1, t_ns=t_ns(), twist=(0.0,) * 6, enable=False))
    now = time.monotonic()
    assert gate.update(now, enable=False, state_stamp_s=now).state == READY
    frame = deliver(source, pub, Twist(seq=2, t_ns=t_ns(), twist=(0.01, 0, 0, 0, 0, 0),
                                       enable=True))
    now = time.monotonic()
    assert gate.update(now, enable=frame.command.enable, state_stamp_s=now).state == MOVING
    later = now + 0.2                                      # the sender went quiet
    lost = source.read(later)
    assert not lost.present
    assert gate.update(later, enable=False, present=False, state_stamp_s=later).state == BLOCKED
    # it starts over (sequence 1 again) with enable still held: not a fresh press
    frame = deliver(source, pub, Twist(seq=1, t_ns=t_ns(), twist=(0.01, 0, 0, 0, 0, 0),
                                       enable=True))
    now = time.monotonic()
    assert gate.update(now, enable=frame.command.enable, state_stamp_s=now).state == REARM


def test_older_sequence_numbers_are_refused(link):
    source, pub = link
    deliver(source, pub, Twist(seq=5, t_ns=t_ns(), twist=(0.01, 0, 0, 0, 0, 0), enable=True))
    end = time.monotonic() + DEADLINE_S
    while not source.refused["order"] and time.monotonic() < end:
        pub.send(Twist(seq=3, t_ns=t_ns(), twist=(0.5, 0, 0, 0, 0, 0), enable=True))
        source.wait(0.01)
        frame = source.read(time.monotonic())
    assert source.refused["order"] >= 1
    assert frame.command.twist[0] == 0.01                  # still the newest accepted one


def test_malformed_messages_are_counted_and_dropped(link):
    source, pub = link
    deliver(source, pub, Twist(seq=1, t_ns=t_ns(), twist=(0.01, 0, 0, 0, 0, 0), enable=True))
    end = time.monotonic() + DEADLINE_S
    while not source.dropped and time.monotonic() < end:
        pub.socket.send(b"\xc1 not msgpack")
        source.wait(0.01)
        frame = source.read(time.monotonic())
    assert sum(source.dropped.values()) >= 1
    assert frame.present and frame.command.twist[0] == 0.01


def test_nothing_received_means_no_device(link):
    source, _ = link
    assert not source.read(time.monotonic()).present
