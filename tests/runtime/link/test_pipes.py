"""runtime/link/pipes.py on real OS pipes, both ends in this process: framing, the hello
exchange, order, malformed and oversized frames counted and dropped, the end of the link.

Nothing sleeps: a pipe delivers what was written before `poll` returns."""

from __future__ import annotations

import os
import struct
import time

import msgpack
import pytest

from runtime.arm.load import load_arm
from runtime.errors import ModelMismatch, TransportError
from runtime.link.pipes import PIPE_PEER, PipeClient, PipeServer, link_spec, parse_link_spec
from runtime.link.protocol import MAX_MESSAGE_BYTES, Hello, Rates, Refuse, State, encode, hello_for

N = 3


@pytest.fixture
def arm():
    return load_arm("planar3")


@pytest.fixture
def link(arm):
    """(client, server) joined by two pipes, as LockstepSim joins itself to its child."""
    to_server, to_client = os.pipe(), os.pipe()
    client = PipeClient(to_client[0], to_server[1],
                        hello=hello_for(arm, "runtime", stale_after_s=0.1))
    server = PipeServer(to_server[0], to_client[1], n_joints=N)
    yield client, server
    client.close()
    server.close()


def state(seq: int, applied: int = 0) -> State:
    return State(seq=seq, t_ns=seq, q=(0.1 * seq, 0.0, 0.0), qd=(0.0,) * N,
                 applied_seq=applied, echo_ns=0, status="tracking")


def test_link_spec_round_trips_and_rejects_other_text() -> None:
    assert parse_link_spec(link_spec(5, 9)) == (5, 9)
    for bad in ("tcp://127.0.0.1:1", "fd:5", "fd:a,b", "fd:-1,3"):
        with pytest.raises(TransportError, match="fd:READ,WRITE"):
            parse_link_spec(bad)


def test_messages_arrive_whole_and_in_order(link) -> None:
    client, server = link
    for seq in (1, 2, 3):
        assert client.send(Rates(seq, seq, (0.0, 0.1, 0.2)))
    assert server.poll(1.0)
    got = server.drain()
    assert [(peer, m.seq) for peer, m in got] == [(PIPE_PEER, 1), (PIPE_PEER, 2), (PIPE_PEER, 3)]
    for seq in (1, 2, 3):
        assert server.send(PIPE_PEER, state(seq, applied=seq)) == "sent"
    assert [m.applied_seq for m in client.messages(timeout_s=1.0)] == [1, 2, 3]


def test_a_frame_split_across_writes_waits_until_it_is_whole(link) -> None:
    client, server = link
    payload = encode(Rates(1, 1, (0.0, 0.0, 0.0)))
    data = struct.pack("<I", len(payload)) + payload
    os.write(client.write_fd, data[:7])
    assert not server.poll(0.01) and server.drain() == []
    os.write(client.write_fd, data[7:])
    assert server.poll(1.0) and [m.seq for _, m in server.drain()] == [1]


def test_malformed_and_oversized_frames_are_counted_and_dropped(link) -> None:
    client, server = link
    garbage = b"\xc1not msgpack"
    wrong_length = msgpack.packb({"v": 1, "kind": "rates", "seq": 1, "t_ns": 0,
                                  "qd": [0.0], "flags": 0})
    for payload in (garbage, wrong_length, b"\x00" * (MAX_MESSAGE_BYTES + 1)):
        client.send_frame(payload)
    client.send(Rates(2, 2, (0.0, 0.0, 0.0)))
    assert server.poll(1.0)
    good = [(p, m) for p, m in server.drain() if isinstance(m, Rates)]
    assert [m.seq for _, m in good] == [2]
    assert server.dropped == {"msgpack": 1, "length": 1, "oversize": 1}
    assert server.received == 4


def test_handshake_checks_the_arm_side_hello(link, arm) -> None:
    client, server = link
    server.send(PIPE_PEER, hello_for(arm, "sim", stale_after_s=0.1))
    server.send(PIPE_PEER, state(1))
    theirs, first = client.handshake(timeout_s=1.0)
    assert theirs.role == "sim" and first.seq == 1
    assert server.poll(1.0) and isinstance(server.drain()[0][1], Hello)   # ours went out


def test_handshake_with_another_arm_is_a_model_mismatch(link) -> None:
    client, server = link
    server.send(PIPE_PEER, hello_for(load_arm("elbow6"), "sim", stale_after_s=0.1))
    with pytest.raises(ModelMismatch):
        client.handshake(timeout_s=1.0)


def test_handshake_refused_for_another_reason_says_so(link) -> None:
    client, server = link
    server.send(PIPE_PEER, Refuse("busy", "another runtime is commanding this arm"))
    with pytest.raises(TransportError, match="busy"):
        client.handshake(timeout_s=1.0)


def test_the_end_of_the_link_is_reported_not_waited_out(link) -> None:
    client, server = link
    server.close()                                  # the child exited
    started = time.monotonic()
    assert client.poll(5.0) and client.ended
    assert time.monotonic() - started < 1.0
    assert client.messages() == [] and not client.send(Rates(1, 1, (0.0,) * N))
    assert client.send_dropped == 1
    with pytest.raises(TransportError, match="closed"):
        client.handshake(timeout_s=5.0)


def test_the_server_sees_the_runtime_go(link) -> None:
    client, server = link
    client.close()
    assert server.poll(5.0) and server.ended and server.drain() == []
    assert server.send(PIPE_PEER, state(1)) == "gone"
