"""runtime/link/pipes.py on real OS pipes, both ends in this process, with the frames in the
pipes and in shared rings beside them (runtime/link/shared_rings.py): framing, the hello
exchange, order, malformed and oversized frames counted and dropped, the end of the link.

Nothing sleeps: a pipe or a ring delivers what was written before `poll` returns."""

from __future__ import annotations

import os
import struct
import time

import msgpack
import pytest

from runtime.arm.load import load_arm
from runtime.errors import ModelMismatch, TransportError
from runtime.link import shared_rings
from runtime.link.pipes import (
    PIPE_PEER,
    PipeClient,
    PipeServer,
    arm_side_channel,
    child_link,
    link_spec,
    parse_link_spec,
)
from runtime.link.protocol import MAX_MESSAGE_BYTES, Hello, Rates, Refuse, State, encode, hello_for

N = 3


@pytest.fixture
def arm():
    return load_arm("planar3")


def channels(kind: str):
    """(runtime's channel, arm side's channel) joined as LockstepSim joins itself to its
    child: two pipes, and with "shm" the shared memory of the rings."""
    ours, child_ends = child_link(kind)
    return ours, arm_side_channel(link_spec(*child_ends))


@pytest.fixture(params=["pipe", "shm"])
def link(request, arm):
    """(client, server) over either channel."""
    ours, theirs = channels(request.param)
    client = PipeClient(ours, hello=hello_for(arm, "runtime", stale_after_s=0.1))
    server = PipeServer(theirs, n_joints=N)
    yield client, server
    client.close()
    server.close()


def state(seq: int, applied: int = 0) -> State:
    return State(seq=seq, t_ns=seq, q=(0.1 * seq, 0.0, 0.0), qd=(0.0,) * N,
                 applied_seq=applied, echo_ns=0, status="tracking")


def test_link_spec_round_trips_and_rejects_other_text() -> None:
    assert parse_link_spec(link_spec(5, 9)) == (5, 9)
    assert parse_link_spec(link_spec(5, 9, 11)) == (5, 9, 11)
    for bad in ("tcp://127.0.0.1:1", "fd:5", "fd:a,b", "fd:-1,3", "fd:1,2,3", "shm:1,2"):
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


def test_a_frame_split_across_writes_waits_until_it_is_whole(arm) -> None:
    ours, theirs = channels("pipe")
    server = PipeServer(theirs, n_joints=N)
    payload = encode(Rates(1, 1, (0.0, 0.0, 0.0)))
    data = struct.pack("<I", len(payload)) + payload
    os.write(ours.write_fd, data[:7])
    assert not server.poll(0.01) and server.drain() == []
    os.write(ours.write_fd, data[7:])
    assert server.poll(1.0) and [m.seq for _, m in server.drain()] == [1]
    ours.close()
    server.close()


def test_malformed_and_oversized_frames_are_counted_and_dropped(link) -> None:
    client, server = link
    garbage = b"\x91"                        # a msgpack array cut short
    wrong_length = msgpack.packb({"v": 1, "kind": "rates", "seq": 1, "t_ns": 0,
                                  "qd": [0.0], "flags": 0})
    packed_garbage = b"\xc1not a kind"       # the packed mark, then no known kind
    for payload in (garbage, wrong_length, packed_garbage, b"\x00" * (MAX_MESSAGE_BYTES + 1)):
        client.send_frame(payload)
    client.send(Rates(2, 2, (0.0, 0.0, 0.0)))
    assert server.poll(1.0)
    good = [(p, m) for p, m in server.drain() if isinstance(m, Rates)]
    assert [m.seq for _, m in good] == [2]
    assert server.dropped == {"msgpack": 1, "length": 1, "kind": 1, "oversize": 1}
    assert server.received == 5


def test_each_cycles_messages_travel_packed_and_the_rest_as_msgpack(link, arm) -> None:
    client, server = link
    client.send(hello_for(arm, "runtime", stale_after_s=0.1))
    client.send(Rates(1, 1, (0.5, -0.0, 0.0)))
    server.send(PIPE_PEER, state(1))
    assert server.poll(1.0) and client.poll(1.0)
    hello, rates = server.channel.take()
    assert hello[:1] != b"\xc1" and rates[:1] == b"\xc1"   # runtime/link/packed.py
    (back,) = client.channel.take()
    assert back[:1] == b"\xc1" and client.decode(back) == state(1)
    assert server.decode(rates) == Rates(1, 1, (0.5, -0.0, 0.0))


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


def test_a_full_ring_waits_for_its_reader_and_loses_nothing(link) -> None:
    """More frames than a ring holds, none taken meanwhile: the writer waits for room (here
    the reader takes them from another thread), and every frame arrives once, in order."""
    import threading
    client, server = link
    n = 5 * shared_rings.SLOTS
    got: list[int] = []

    def read() -> None:
        while len(got) < n and server.poll(5.0):
            got.extend(m.seq for _, m in server.drain())

    reader = threading.Thread(target=read)
    for seq in range(1, shared_rings.SLOTS + 1):   # fills a ring exactly
        assert client.send(Rates(seq, seq, (0.0, 0.1, 0.2)))
    reader.start()
    for seq in range(shared_rings.SLOTS + 1, n + 1):
        assert client.send(Rates(seq, seq, (0.0, 0.1, 0.2)))
    reader.join(10.0)
    assert got == list(range(1, n + 1))


def test_a_full_ring_whose_reader_is_gone_fails_the_send_at_once(arm) -> None:
    ours, theirs = channels("shm")
    for _ in range(shared_rings.SLOTS):
        assert ours.send(b"x")
    theirs.close()
    started = time.monotonic()
    assert not ours.send(b"x") and ours.ended
    assert time.monotonic() - started < 1.0
    ours.close()


def test_shared_rings_are_refused_where_they_do_not_work(monkeypatch) -> None:
    from runtime.errors import ConfigError
    from runtime.sessions.lockstep import link_kind
    monkeypatch.setattr(shared_rings.platform, "machine", lambda: "aarch64")
    assert "x86-64" in shared_rings.usable()
    assert link_kind("auto") == "pipe" and link_kind("pipe") == "pipe"
    with pytest.raises(ConfigError, match="x86-64"):
        link_kind("shm")
    monkeypatch.setattr(shared_rings.platform, "machine", lambda: "x86_64")
    monkeypatch.setattr(shared_rings.os, "sched_getaffinity", lambda _pid: {0})
    assert "one core" in shared_rings.usable() and link_kind("auto") == "pipe"


def test_the_bell_rings_only_for_a_reader_that_sleeps(arm, monkeypatch) -> None:
    """A reader that is not waiting gets its frame without a byte on the pipe; one that
    sleeps (past its spin, flag up) is woken by the byte and lowers its flag. (Its own
    look every NAP_S is put off here, so only the byte can wake it in time.)"""
    import threading
    monkeypatch.setattr(shared_rings, "NAP_S", 60.0)
    ours, theirs = channels("shm")
    try:
        assert ours.send(b"first")
        with pytest.raises(BlockingIOError):
            os.read(theirs.read_fd, 16)                  # no bell: nobody slept
        assert theirs.take() == [b"first"]
        woke: list[bool] = []
        reader = threading.Thread(target=lambda: woke.append(theirs.poll(10.0)))
        reader.start()
        deadline = time.monotonic() + 5.0
        while not theirs.words[theirs.in_asleep] and time.monotonic() < deadline:
            time.sleep(0.01)
        assert theirs.words[theirs.in_asleep] == 1       # asleep, flag up
        started = time.monotonic()
        assert ours.send(b"second")
        reader.join(5.0)
        assert woke == [True] and time.monotonic() - started < 5.0
        assert theirs.words[theirs.in_asleep] == 0 and theirs.take() == [b"second"]
    finally:
        ours.close()
        theirs.close()
