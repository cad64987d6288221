"""runtime/link/transport.py on real 127.0.0.1 sockets (random ports): latest-value receive,
malformed messages counted and dropped, the handshake, LINGER 0, CURVE, and the loopback-only rule.

Sockets are synchronised by polling with a timeout, never by sleeping."""

from __future__ import annotations

import threading
import time
from collections import Counter
from pathlib import Path

import msgpack
import pytest
import zmq

from runtime.arm.load import load_arm
from runtime.errors import ModelMismatch, ProtocolError, TransportError
from runtime.link import transport
from runtime.link.protocol import (
    MAX_MESSAGE_BYTES,
    Hello,
    Rates,
    Refuse,
    State,
    StateFreshness,
    Twist,
    encode,
    hello_for,
)
from runtime.link.transport import (
    ArmClient,
    ArmServer,
    Inbox,
    LatestSubscriber,
    Publisher,
    check_endpoint,
    is_local_endpoint,
    load_client_keys,
    load_server_keys,
    make_keys,
)

LOOPBACK = "tcp://127.0.0.1:*"
N = 3


@pytest.fixture
def hello() -> Hello:
    return hello_for(load_arm("planar3"), "runtime", stale_after_s=0.1)


@pytest.fixture
def server():
    s = ArmServer(LOOPBACK, n_joints=N)
    yield s
    s.close()


@pytest.fixture
def client(server, hello):
    c = ArmClient(server.endpoint, hello=hello)
    yield c
    c.close()


def rates(seq: int) -> Rates:
    return Rates(seq, time.monotonic_ns(), (0.01 * seq, 0.0, 0.0))


def send_until_received(send, server: ArmServer, timeout_s: float = 3.0) -> list:
    """Send (again) until the server gets something: the connection may still be forming."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        send()
        if server.poll(0.02):
            return server.drain()
    return []


# ----------------------------------------------------------------------------------------
# Loopback only, unless CURVE
# ----------------------------------------------------------------------------------------

@pytest.mark.parametrize("endpoint, local", [
    ("tcp://127.0.0.1:47810", True), ("tcp://127.3.2.1:5", True), ("tcp://localhost:5", True),
    ("tcp://[::1]:5", True), ("ipc:///tmp/jogwire.sock", True), ("inproc://x", True),
    ("tcp://0.0.0.0:47810", False), ("tcp://*:47810", False), ("tcp://192.168.1.20:5", False),
    ("tcp://armhost:5", False), ("tcp://eth0:5", False), ("tcp://127.0.0.1;10.0.0.1:5", False),
    ("tcp://10.0.0.1;127.0.0.1:5", False), ("pgm://eth0;239.1.1.1:5", False),
])
def test_is_local_endpoint(endpoint: str, local: bool) -> None:
    assert is_local_endpoint(endpoint) is local


@pytest.mark.parametrize("endpoint", ["tcp://0.0.0.0:47810", "tcp://*:0", "tcp://10.1.2.3:5",
                                      "tcp://armhost.lab:47810"])
def test_non_loopback_without_keys_is_refused_before_any_socket(endpoint, monkeypatch) -> None:
    # If a context (let alone a bind) were attempted, this would fail differently.
    def no_sockets(*a, **k):
        raise AssertionError("a ZeroMQ context was created before the refusal")
    monkeypatch.setattr(transport.zmq, "Context", no_sockets)
    with pytest.raises(TransportError, match="without CURVE keys"):
        ArmServer(endpoint, n_joints=N)
    with pytest.raises(TransportError, match="without CURVE keys"):
        LatestSubscriber(endpoint)
    with pytest.raises(TransportError, match="jogwire keys DIR"):
        ArmClient(endpoint, hello=hello_for(load_arm("planar3"), "runtime", stale_after_s=0.1))


def test_non_loopback_with_keys_passes_the_check(tmp_path: Path) -> None:
    make_keys(tmp_path)
    check_endpoint("tcp://0.0.0.0:47810", load_server_keys(tmp_path), action="bind")  # no bind
    check_endpoint("tcp://armhost:47810", load_client_keys(tmp_path), action="connect to")


def test_unsupported_endpoint_is_refused() -> None:
    with pytest.raises(TransportError, match="tcp://HOST:PORT"):
        ArmServer("udp://127.0.0.1:5", n_joints=N)


# ----------------------------------------------------------------------------------------
# Moving messages
# ----------------------------------------------------------------------------------------

def test_socket_options(server, client) -> None:
    for s in (server.socket, client.socket):
        assert s.getsockopt(zmq.LINGER) == 0
        assert s.getsockopt(zmq.MAXMSGSIZE) == MAX_MESSAGE_BYTES
        assert s.getsockopt(zmq.SNDHWM) == s.getsockopt(zmq.RCVHWM) == transport.QUEUE_MESSAGES
    assert client.socket.getsockopt(zmq.IMMEDIATE) == 1
    assert server.endpoint.startswith("tcp://127.0.0.1:")


def test_rates_and_replies_travel_both_ways(server, client) -> None:
    got = send_until_received(lambda: client.send(rates(1)), server)
    peer, msg = got[0]
    assert isinstance(msg, Rates) and msg.seq == 1
    assert peer == client.identity
    state = State(1, 5, (0.0,) * N, (0.0,) * N, 1, msg.t_ns, "tracking")
    assert server.send(peer, state) == "sent"
    inbox = client.receive(2.0)
    assert inbox.state == state


def test_drain_returns_everything_waiting_and_the_newest_last(server, client) -> None:
    send_until_received(lambda: client.send(rates(1)), server)   # connected
    sent = [seq for seq in range(2, 12) if client.send(rates(seq))]
    deadline = time.monotonic() + 3.0
    got: list = []
    while len(got) < len(sent) and time.monotonic() < deadline:
        if server.poll(0.05):
            got += [m.seq for _, m in server.drain()]
    assert got[-1] == sent[-1] and got == sorted(got)


def test_a_stalled_reader_catches_up_and_then_sees_only_new_messages(server, client) -> None:
    send_until_received(lambda: client.send(rates(1)), server)
    dropped_before = client.send_dropped
    sent = sum(client.send(rates(seq)) for seq in range(2, 20002))   # reader not reading
    assert client.send_dropped - dropped_before == 20000 - sent   # the sender dropped, counted
    stalled = []
    while server.poll(0.2):          # each drain reads at most DRAIN_LIMIT messages
        batch = server.drain()
        assert len(batch) <= transport.DRAIN_LIMIT
        stalled += batch
    assert len(stalled) == sent and [m.seq for _, m in stalled] == sorted(m.seq for _, m in stalled)
    assert client.send(rates(50000))
    assert server.poll(2.0)
    fresh = server.drain()
    assert [m.seq for _, m in fresh] == [50000]   # nothing old is left behind it


def test_malformed_messages_are_counted_and_dropped(server) -> None:
    raw = zmq.Context.instance().socket(zmq.DEALER)
    raw.linger = 0
    try:
        raw.connect(server.endpoint)
        good = encode(rates(7))
        bad = [b"\xc1", b"\x93\x01", msgpack.packb({"v": 99, "kind": "rates"}),
               msgpack.packb({"v": 1, "kind": "rates", "seq": 1, "t_ns": 0,
                              "qd": [float("nan")] * N, "flags": 0}),
               encode(Rates(1, 0, (0.0,) * (N + 1)))]
        items = send_until_received(lambda: raw.send(good), server)
        for payload in bad:
            raw.send(payload)
            raw.send(good)
        raw.send_multipart([b"two", b"frames"])
        deadline = time.monotonic() + 3.0
        while sum(server.dropped.values()) < 6 and time.monotonic() < deadline:
            if server.poll(0.05):
                items += server.drain()
    finally:
        raw.close()
    errors = [m for _, m in items if isinstance(m, ProtocolError)]
    assert sorted(e.reason for e in errors) == ["length", "msgpack", "msgpack", "nonfinite",
                                                "version"]
    assert server.dropped == {"msgpack": 2, "version": 1, "nonfinite": 1, "length": 1,
                              "framing": 1}
    assert all(isinstance(m, Rates) for _, m in items if not isinstance(m, ProtocolError))


def test_a_peer_sending_more_than_the_cap_is_cut_off(server) -> None:
    raw = zmq.Context.instance().socket(zmq.DEALER)
    raw.linger = 0
    try:
        raw.connect(server.endpoint)
        send_until_received(lambda: raw.send(encode(rates(1))), server)
        raw.send(b"\x00" * (MAX_MESSAGE_BYTES + 1))
        assert not server.poll(0.3)            # ZeroMQ disconnected it; nothing arrives
    finally:
        raw.close()


def test_close_returns_at_once_with_messages_pending(hello) -> None:
    # Nothing listens there: with LINGER 0 and IMMEDIATE, close never waits.
    c = ArmClient("tcp://127.0.0.1:9", hello=hello)
    assert not c.send(rates(1))
    t = time.monotonic()
    c.close()
    assert time.monotonic() - t < 1.0
    c.close()   # twice is fine


def test_twist_subscriber_keeps_only_the_newest() -> None:
    with LatestSubscriber(LOOPBACK) as sub, Publisher(sub.endpoint) as pub:
        deadline = time.monotonic() + 3.0
        while sub.receive(0.02) is None:       # slow joiner: publish until one gets through
            assert time.monotonic() < deadline
            pub.send(Twist(1, 0, (0.0,) * 6))
        for seq in range(2, 102):
            pub.send(Twist(seq, 0, (0.001 * seq,) + (0.0,) * 5, "tool", True))
        newest = None
        deadline = time.monotonic() + 2.0
        while (newest is None or newest.seq != 101) and time.monotonic() < deadline:
            newest = sub.receive(0.05) or newest
        assert newest.seq == 101 and newest.enable and newest.frame == "tool"
        assert sub.receive(0.05) is None       # nothing older queued behind it
        pub.socket.send(b"garbage")
        assert sub.receive(0.2) is None and sub.dropped["msgpack"] == 1


# ----------------------------------------------------------------------------------------
# Handshake
# ----------------------------------------------------------------------------------------

def answer_hellos(server: ArmServer, reply, stop: threading.Event) -> None:
    while not stop.is_set():
        if server.poll(0.02):
            for peer, msg in server.drain():
                if isinstance(msg, Hello):
                    for m in reply(msg):
                        server.send(peer, m)


@pytest.fixture
def responder(server):
    stop = threading.Event()
    threads = []

    def start(reply):
        t = threading.Thread(target=answer_hellos, args=(server, reply, stop), daemon=True)
        t.start()
        threads.append(t)
    yield start
    stop.set()
    for t in threads:
        t.join(2.0)


def arm_hello(arm: str = "planar3") -> Hello:
    return hello_for(load_arm(arm), "sim", stale_after_s=0.1)


def test_handshake_returns_their_hello_and_first_state(client, responder) -> None:
    state = State(1, 0, (0.0,) * N, (0.0,) * N, 0, 0, "waiting")
    responder(lambda theirs: [arm_hello(), state])
    theirs, first = client.handshake(5.0)
    assert theirs.role == "sim" and first == state


def test_handshake_with_another_arm_raises_model_mismatch(client, responder) -> None:
    responder(lambda theirs: [arm_hello("scara4")])
    with pytest.raises(ModelMismatch, match="joint count differs: ours 3, theirs 4"):
        client.handshake(5.0)


def test_handshake_refused_busy(client, responder) -> None:
    responder(lambda theirs: [arm_hello(), Refuse("busy", "another runtime is commanding")])
    with pytest.raises(TransportError, match="busy"):
        client.handshake(5.0)


def test_handshake_without_an_arm_side_times_out(hello) -> None:
    with ArmServer(LOOPBACK, n_joints=N) as silent, \
            ArmClient(silent.endpoint, hello=hello) as c:
        with pytest.raises(TransportError, match="no answer"):
            c.handshake(0.3)


def test_client_says_hello_again_when_told_no_hello(server, client) -> None:
    send_until_received(lambda: client.send(rates(1)), server)
    server.send(client.identity, Refuse("no_hello", "say hello first"))
    client.receive(2.0)
    assert server.poll(2.0)
    assert any(isinstance(m, Hello) for _, m in server.drain())


# ----------------------------------------------------------------------------------------
# CURVE
# ----------------------------------------------------------------------------------------

@pytest.fixture
def keys(tmp_path: Path) -> Path:
    make_keys(tmp_path / "keys")
    return tmp_path / "keys"


def test_keys_files_and_permissions(keys: Path) -> None:
    assert sorted(p.name for p in keys.iterdir()) == ["arm.key", "arm.key_secret", "authorized",
                                                      "runtime.key", "runtime.key_secret"]
    assert [p.name for p in (keys / "authorized").iterdir()] == ["runtime.key"]
    assert (keys / "arm.key_secret").stat().st_mode & 0o077 == 0
    with pytest.raises(TransportError, match="refusing to overwrite"):
        make_keys(keys)


def curve_case(keys: Path, client_keys, hello: Hello) -> list:
    """What a CURVE server on loopback receives from a client with `client_keys`."""
    with ArmServer(LOOPBACK, n_joints=N, keys=load_server_keys(keys)) as server, \
            ArmClient(server.endpoint, hello=hello, keys=client_keys) as c:
        return send_until_received(lambda: c.send(rates(1)), server, timeout_s=0.6)


def test_curve_client_with_the_right_keys_gets_through(keys: Path, hello: Hello) -> None:
    got = curve_case(keys, load_client_keys(keys), hello)
    assert got and isinstance(got[0][1], Rates)


def test_curve_client_without_keys_gets_nothing_through(keys: Path, hello: Hello) -> None:
    assert curve_case(keys, None, hello) == []


def test_curve_client_with_an_unlisted_key_gets_nothing_through(keys: Path, tmp_path: Path,
                                                                 hello: Hello) -> None:
    make_keys(tmp_path / "other")
    stranger = load_client_keys(tmp_path / "other")
    right_server = load_client_keys(keys).server_public
    forged = transport.ClientKeys(stranger.public, stranger.secret, right_server)
    assert curve_case(keys, forged, hello) == []


def test_curve_client_trusting_another_server_key_gets_nothing_through(
        keys: Path, tmp_path: Path, hello: Hello) -> None:
    make_keys(tmp_path / "other")
    ours = load_client_keys(keys)
    wrong = transport.ClientKeys(ours.public, ours.secret,
                                 load_client_keys(tmp_path / "other").server_public)
    assert curve_case(keys, wrong, hello) == []


def test_jogwire_keys_command(tmp_path: Path, capsys) -> None:
    from runtime.cli import main
    assert main(["keys", str(tmp_path / "k"), "--name", "operator-2"]) == 0
    out = capsys.readouterr().out
    assert "arm.key_secret" in out and "operator-2.key" in out
    assert sorted(p.name for p in (tmp_path / "k" / "authorized").iterdir()) == \
        ["operator-2.key", "runtime.key"]
    assert main(["keys", str(tmp_path / "k")]) == 2            # no silent overwrite
    assert "refusing to overwrite" in capsys.readouterr().err
    assert main(["keys", str(tmp_path / "k"), "--force"]) == 0


def test_missing_keys_say_how_to_make_them(tmp_path: Path) -> None:
    with pytest.raises(TransportError, match="jogwire keys"):
        load_server_keys(tmp_path)


def test_a_state_that_comes_after_a_newer_one_in_a_read_is_counted_and_refused() -> None:
    # The arm side numbers its states in order, so one that arrives after a higher number
    # was overtaken on the way: old. A repeat of the newest is a duplicate, not old.
    inbox = Inbox()
    dropped: Counter[str] = Counter()
    for seq in (5, 7, 6, 7, 3, 8):
        inbox.add(State(seq, seq, (0.0,) * N, (0.0,) * N, 0, 0, "tracking"), dropped)
    assert (inbox.state.seq, inbox.overtaken) == (8, 2)
    freshness = StateFreshness(0.1)
    assert freshness.offer(inbox.state, 8)
    freshness.refuse_overtaken(inbox.overtaken)
    assert freshness.refused == 2 and freshness.latest is inbox.state
