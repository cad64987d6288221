"""ZeroMQ sockets for the wire: latest-value semantics, loopback by default, CURVE off-host.

The arm link (docs/PROTOCOL.md, "Sockets"):

    runtime  ArmClient  DEALER ──connect──►  ROUTER  ArmServer  arm side (sim or bridge)
             sends hello, rates                       sends hello, state, refuse

The ROUTER knows which peer sent what, so the arm side answers the runtime that spoke
(hello replies, refusals) and takes commands from one controller only. Both ends drain
their socket every cycle and act on the newest message; ZeroMQ's queues are capped at a few
messages (`QUEUE_MESSAGES`), so a reader that keeps up never builds a backlog and an old
command is never followed after a newer one. The DEALER only queues to a completed
connection (ZMQ_IMMEDIATE), so nothing sent while the arm side is away is delivered later.
The kernel's TCP buffers are left at their defaults: a reader that stalls for seconds finds
up to a few thousand messages, reads through them (`DRAIN_LIMIT` per call) and the timing
rules in `protocol` drop them as late. Buffers of 4 KiB bounded that to ~175 messages but
made round trips 3–4 times slower here.

For an input program (network twist source) there is `LatestSubscriber` (SUB with
ZMQ_CONFLATE: one slot, the newest message) and `Publisher` (PUB).

Every socket: LINGER 0 (closing never blocks on unsent messages), MAXMSGSIZE = the
protocol's byte cap (a peer that sends more is disconnected by ZeroMQ itself). Receive
calls decode, count malformed messages by reason in `dropped`, and never raise for them.

Security: an endpoint that is neither loopback (tcp://127.x.x.x, tcp://[::1],
tcp://localhost) nor ipc:// needs CURVE keys (`jogwire keys DIR`); the check runs before any
socket exists. The side holding `ServerKeys` authenticates clients against a folder of allowed
public keys through a ZAP handler (pyzmq's ThreadAuthenticator) on its own ZeroMQ context.
"""

from __future__ import annotations

import ipaddress
import os
import re
import shutil
import stat
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Union, cast

import zmq

if TYPE_CHECKING:
    from zmq.auth.thread import ThreadAuthenticator

from ..errors import ModelMismatch, ProtocolError, TransportError
from .protocol import (
    MAX_MESSAGE_BYTES,
    CellHello,
    Contact,
    Hello,
    Message,
    Refuse,
    State,
    check_hello,
    decode,
    encode,
)

DEFAULT_ARM_ENDPOINT = "tcp://127.0.0.1:47810"     # arm side binds, runtime connects
DEFAULT_TWIST_ENDPOINT = "tcp://127.0.0.1:47811"   # runtime binds, input programs connect
QUEUE_MESSAGES = 16      # send/receive high-water marks (messages per peer)
DRAIN_LIMIT = 1024       # most messages one drain reads: bounds the work of one cycle
HEARTBEAT_MS = 1000      # ZMTP heartbeats: a silent TCP peer is dropped after 3 intervals
SERVER_KEY_NAME = "arm"
CLIENT_KEY_NAME = "runtime"
AUTHORIZED_DIR = "authorized"


# ----------------------------------------------------------------------------------------
# Endpoints and keys
# ----------------------------------------------------------------------------------------

def is_local_endpoint(endpoint: str) -> bool:
    """True for tcp:// on a loopback address, ipc:// and inproc://; False for anything else.

    Host names other than `localhost` count as remote: they are not resolved here.
    """
    m = re.fullmatch(r"(tcp|ipc|inproc)://(.+)", endpoint)
    if m is None:
        return False
    scheme, rest = m.groups()
    if scheme != "tcp":
        return True
    return all(_is_loopback_host(part.rsplit(":", 1)[0]) for part in rest.split(";"))


def _is_loopback_host(host: str) -> bool:
    host = host.strip("[]")
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False  # "*", interface names, host names


@dataclass(frozen=True)
class ServerKeys:
    """The CURVE server's key pair and the folder of client public keys it lets in."""

    public: bytes
    secret: bytes
    authorized_dir: Path


@dataclass(frozen=True)
class ClientKeys:
    """A CURVE client's key pair and the public key of the server it trusts."""

    public: bytes
    secret: bytes
    server_public: bytes


Keys = Union[ServerKeys, ClientKeys]


def make_keys(directory: str | Path, *, names: tuple[str, ...] = (SERVER_KEY_NAME,
                                                                   CLIENT_KEY_NAME),
              force: bool = False) -> list[Path]:
    """Create a CURVE key pair per name in `directory` and authorize every non-server name.

    Writes NAME.key (public) and NAME.key_secret (secret, mode 0600) per name, and copies the
    public keys of all names but the server's into DIR/authorized/. Returns the files written.
    """
    directory = Path(directory)
    existing = [directory / f"{n}.key_secret" for n in names
                if (directory / f"{n}.key_secret").exists()]
    if existing and not force:
        raise TransportError(f"{existing[0]} exists; refusing to overwrite keys "
                             "(pass --force to replace them)")
    authorized = directory / AUTHORIZED_DIR
    authorized.mkdir(parents=True, exist_ok=True)
    os.chmod(directory, stat.S_IRWXU)
    written = []
    for name in names:
        public, secret = (Path(p) for p in _zmq_auth().create_certificates(directory, name))
        os.chmod(secret, stat.S_IRUSR | stat.S_IWUSR)
        written += [public, secret]
        if name != SERVER_KEY_NAME:
            written.append(Path(shutil.copy(public, authorized / public.name)))
    return written


def _zmq_auth() -> Any:
    """pyzmq's key tools, imported on first use: with its authenticator thread they take
    some 40 ms to import, which a process that never uses keys should not pay (the simulated
    arm's lockstep child, whose start counts in a preflight's time)."""
    import zmq.auth
    return zmq.auth


def _load_pair(path: Path) -> tuple[bytes, bytes]:
    if not path.exists():
        raise TransportError(f"no secret key {path}; make keys with `jogwire keys "
                             f"{path.parent}`")
    try:
        public, secret = _zmq_auth().load_certificate(path)
    except (OSError, ValueError) as exc:
        raise TransportError(f"cannot read key {path}: {exc}") from None
    if secret is None:
        raise TransportError(f"{path} holds no secret key")
    return public, secret


def load_server_keys(directory: str | Path, name: str = SERVER_KEY_NAME) -> ServerKeys:
    """DIR/NAME.key_secret and the allowed client keys in DIR/authorized/."""
    directory = Path(directory)
    public, secret = _load_pair(directory / f"{name}.key_secret")
    authorized = directory / AUTHORIZED_DIR
    if not authorized.is_dir() or not any(authorized.glob("*.key")):
        raise TransportError(f"no client public keys in {authorized}/: nobody could connect")
    return ServerKeys(public, secret, authorized)


def load_client_keys(directory: str | Path, name: str = CLIENT_KEY_NAME,
                     server: str = SERVER_KEY_NAME) -> ClientKeys:
    """DIR/NAME.key_secret and the server's public key DIR/SERVER.key."""
    directory = Path(directory)
    public, secret = _load_pair(directory / f"{name}.key_secret")
    server_path = directory / f"{server}.key"
    if not server_path.exists():
        raise TransportError(f"no server public key {server_path}")
    try:
        server_public, _ = _zmq_auth().load_certificate(server_path)
    except (OSError, ValueError) as exc:
        raise TransportError(f"cannot read key {server_path}: {exc}") from None
    return ClientKeys(public, secret, server_public)


def check_endpoint(endpoint: str, keys: Keys | None, *, action: str) -> None:
    """Refuse (TransportError) a non-local endpoint without CURVE keys; before any socket."""
    if not re.fullmatch(r"(tcp|ipc|inproc)://.+", endpoint):
        raise TransportError(f"cannot {action} {endpoint!r}: use tcp://HOST:PORT or ipc://PATH")
    if keys is None and not is_local_endpoint(endpoint):
        raise TransportError(
            f"refusing to {action} {endpoint} without CURVE keys: anyone who can reach a "
            "non-loopback address could move the arm. Make keys with `jogwire keys DIR` and "
            "pass --keys DIR on both sides, or use tcp://127.0.0.1:PORT.")


def decode_counted(data: bytes, n_joints: int | None,
                   dropped: Counter[str]) -> Message | ProtocolError:
    """`protocol.decode`, with a malformed message counted in `dropped` by its reason and
    returned (never raised), so a receiver can answer it but never act on it."""
    try:
        return decode(data, n_joints=n_joints)
    except ProtocolError as exc:
        dropped[exc.reason] += 1
        return exc


# ----------------------------------------------------------------------------------------
# Sockets
# ----------------------------------------------------------------------------------------

class _Socket:
    """One ZeroMQ socket on its own context, with the options every wire socket shares."""

    ended = False   # a socket outlives its peers (they reconnect); a pipe link can end

    def __init__(self, kind: int, endpoint: str, *, bind: bool, keys: Keys | None) -> None:
        check_endpoint(endpoint, keys, action="bind" if bind else "connect to")
        self.context = zmq.Context()
        self.auth: ThreadAuthenticator | None = None
        self.dropped: Counter[str] = Counter()   # receive drops by reason
        self.received = 0
        try:
            self.socket = self.context.socket(kind)
            s = self.socket
            s.linger = 0
            s.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
            s.sndhwm = s.rcvhwm = QUEUE_MESSAGES
            s.setsockopt(zmq.HEARTBEAT_IVL, HEARTBEAT_MS)
            s.setsockopt(zmq.HEARTBEAT_TIMEOUT, 3 * HEARTBEAT_MS)
            if "[" in endpoint:
                s.ipv6 = True
            self._configure(s)
            if isinstance(keys, ServerKeys):
                from zmq.auth.thread import ThreadAuthenticator
                self.auth = ThreadAuthenticator(self.context)
                self.auth.start()
                self.auth.configure_curve(domain="*", location=str(keys.authorized_dir))
                s.curve_secretkey, s.curve_publickey = keys.secret, keys.public
                s.curve_server = True
            elif isinstance(keys, ClientKeys):
                s.curve_secretkey, s.curve_publickey = keys.secret, keys.public
                s.curve_serverkey = keys.server_public
            if bind:
                s.bind(endpoint)
                self.endpoint = s.getsockopt_string(zmq.LAST_ENDPOINT)
            else:
                s.connect(endpoint)
                self.endpoint = endpoint
        except zmq.ZMQError as exc:
            self.close()
            raise TransportError(f"cannot {'bind' if bind else 'connect to'} {endpoint}: "
                                 f"{exc.strerror}") from None

    def _configure(self, s: zmq.Socket) -> None:
        """Options of the particular socket type (before bind/connect)."""

    def poll(self, timeout_s: float) -> bool:
        """Wait up to timeout_s for a message; True if one is waiting."""
        return bool(self.socket.poll(max(0, int(timeout_s * 1000)), zmq.POLLIN))

    def _recv_frames(self) -> list[bytes] | None:
        # Asking ZMQ_EVENTS first is cheaper than the zmq.Again that ends every drain.
        if not cast(int, self.socket.getsockopt(zmq.EVENTS)) & zmq.POLLIN:
            return None
        try:
            return self.socket.recv_multipart(zmq.NOBLOCK, copy=True)
        except zmq.Again:
            return None

    def _decode(self, data: bytes, n_joints: int | None) -> Message | ProtocolError:
        self.received += 1
        return decode_counted(data, n_joints, self.dropped)

    def close(self) -> None:
        """Close the socket (LINGER 0), stop the authenticator, end the context."""
        sock = getattr(self, "socket", None)
        if sock is not None and not sock.closed:
            sock.close(linger=0)
        if self.auth is not None:
            self.auth.stop()
            self.auth = None
        if not self.context.closed:
            self.context.term()

    def __enter__(self):
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class ArmServer(_Socket):
    """The arm side's socket (ROUTER, binds): receives from any peer, answers one by one."""

    def __init__(self, endpoint: str, *, n_joints: int, keys: ServerKeys | None = None) -> None:
        self.n_joints = n_joints
        super().__init__(zmq.ROUTER, endpoint, bind=True, keys=keys)

    def _configure(self, s: zmq.Socket) -> None:
        s.setsockopt(zmq.ROUTER_MANDATORY, 1)   # sending to a vanished peer tells us
        s.setsockopt(zmq.ROUTER_HANDOVER, 1)    # a reconnecting client keeps its identity

    def drain(self) -> list[tuple[bytes, Message | ProtocolError]]:
        """Everything waiting, in arrival order, decoded; malformed ones counted in `dropped`.

        Errors are returned with their peer so the caller can answer (e.g. a wrong version);
        they must never be acted on.
        """
        out: list[tuple[bytes, Message | ProtocolError]] = []
        for _ in range(DRAIN_LIMIT):
            frames = self._recv_frames()
            if frames is None:
                break
            if len(frames) != 2:   # identity + one payload frame; a multipart message
                self.received += 1
                self.dropped["framing"] += 1
                continue
            out.append((frames[0], self._decode(frames[1], self.n_joints)))
        return out

    def send(self, peer: bytes, msg: Message) -> str:
        """Send to one peer without blocking: "sent", "full" (dropped) or "gone"."""
        try:
            self.socket.send_multipart([peer, encode(msg)], zmq.NOBLOCK)
            return "sent"
        except zmq.Again:
            return "full"
        except zmq.ZMQError as exc:
            if exc.errno == zmq.EHOSTUNREACH:
                return "gone"
            raise


@dataclass
class Inbox:
    """What one `ArmClient.receive` found: the newest state and the newest other messages,
    and every contact report (each belongs to one arm-side step)."""

    state: State | None = None
    hello: Hello | None = None
    refuse: Refuse | None = None
    cell: CellHello | None = None
    contacts: list[Contact] = field(default_factory=list)
    count: int = 0
    overtaken: int = 0      # states that came after a newer one (reordered on the way)

    def add(self, msg: Message | ProtocolError, dropped: Counter[str]) -> None:
        """Sort one decoded message in (malformed ones were counted when decoded); a
        message the runtime never expects is counted in `dropped` as "unexpected"."""
        if isinstance(msg, State):
            if self.state is None or msg.seq > self.state.seq:
                self.state = msg
            elif msg.seq < self.state.seq:  # the arm side sends in order: this one is old
                self.overtaken += 1
        elif isinstance(msg, Hello):
            self.hello = msg
        elif isinstance(msg, Refuse):
            self.refuse = msg
        elif isinstance(msg, Contact):
            self.contacts.append(msg)
        elif isinstance(msg, CellHello):
            self.cell = msg
        elif not isinstance(msg, ProtocolError):
            dropped["unexpected"] += 1


def check_answer(inbox: Inbox, mine: Hello, endpoint: str) -> Hello | None:
    """The arm side's hello in `inbox` (None if none came), checked against ours.

    Raises ModelMismatch if the arms differ (either side's verdict), TransportError on a
    refusal for another reason than "no_hello" (which only asks for our hello again).
    """
    if inbox.hello is not None:
        check_hello(mine, inbox.hello)
    if inbox.refuse is not None and inbox.refuse.code != "no_hello":
        if inbox.refuse.code == "mismatch":
            raise ModelMismatch(f"the arm side refused us: {inbox.refuse.reason}")
        raise TransportError(f"the arm side at {endpoint} refused us "
                             f"({inbox.refuse.code}): {inbox.refuse.reason}")
    return inbox.hello


class _Sender(_Socket):
    """A socket that sends to one peer (or all): never blocks, counts what could not go."""

    send_dropped = 0

    def send(self, msg: Message) -> bool:
        """Send without blocking; False (and counted in send_dropped) if it could not go."""
        try:
            self.socket.send(encode(msg), zmq.NOBLOCK)
            return True
        except zmq.Again:
            self.send_dropped += 1
            return False


class ArmClient(_Sender):
    """The runtime's socket to the arm side (DEALER, connects). Say `handshake` first.

    Each client has a random identity, so the arm side knows it across TCP reconnects. If the
    arm side answers "no_hello" (it restarted, or never heard us), `receive` says hello again,
    at most once per `rehello_s`.
    """

    def __init__(self, endpoint: str = DEFAULT_ARM_ENDPOINT, *, hello: Hello,
                 keys: ClientKeys | None = None, rehello_s: float = 0.1,
                 clock=time.monotonic) -> None:
        self.hello = hello
        self.n_joints = len(hello.joints)
        self.identity = os.urandom(16)
        self.rehello_s = rehello_s
        self.clock = clock
        self._last_hello = -float("inf")
        self._hello_sent = False
        super().__init__(zmq.DEALER, endpoint, bind=False, keys=keys)

    def _configure(self, s: zmq.Socket) -> None:
        s.setsockopt(zmq.IMMEDIATE, 1)    # queue only to a live connection
        s.setsockopt(zmq.ROUTING_ID, self.identity)

    def say_hello(self) -> bool:
        """Send our hello; False if there is no connection yet (nothing was queued)."""
        self._last_hello = self.clock()
        self._hello_sent = self.send(self.hello)
        return self._hello_sent

    def receive(self, timeout_s: float = 0.0) -> Inbox:
        """Drain everything waiting (after up to timeout_s for the first message)."""
        inbox = Inbox()
        if timeout_s > 0 and not self.poll(timeout_s):
            return inbox
        for _ in range(DRAIN_LIMIT):
            frames = self._recv_frames()
            if frames is None:
                break
            inbox.count += 1
            if len(frames) != 1:
                self.received += 1
                self.dropped["framing"] += 1
                continue
            inbox.add(self._decode(frames[0], self.n_joints), self.dropped)
        if inbox.refuse is not None and inbox.refuse.code == "no_hello" and \
                self.clock() - self._last_hello >= self.rehello_s:
            self.say_hello()
        return inbox

    def handshake(self, timeout_s: float = 5.0) -> tuple[Hello, State]:
        """Say hello until the arm side answers with its hello and a first state.

        Raises ModelMismatch if the arms differ (either side's verdict), TransportError on a
        refusal for another reason or when nothing answers within timeout_s.
        """
        deadline = self.clock() + timeout_s
        theirs: Hello | None = None
        while (remaining := deadline - self.clock()) > 0:
            # Until the connection is up a send finds no peer: retry soon. After that, the
            # arm side may not be listening yet (or the hello was lost): retry now and then.
            if self.clock() - self._last_hello >= (0.1 if self._hello_sent else 0.005):
                self.say_hello()
            inbox = self.receive(min(remaining, 0.005 if not self._hello_sent else 0.05))
            theirs = check_answer(inbox, self.hello, self.endpoint) or theirs
            if theirs is not None and inbox.state is not None:
                return theirs, inbox.state
        raise TransportError(f"no answer from an arm side at {self.endpoint} within "
                             f"{timeout_s:g} s (is `jogwire sim` or `jogwire bridge` running?)")


class LatestSubscriber(_Socket):
    """SUB with ZMQ_CONFLATE: only the newest message waits; binds by default."""

    def __init__(self, endpoint: str = DEFAULT_TWIST_ENDPOINT, *, bind: bool = True,
                 keys: Keys | None = None, n_joints: int | None = None) -> None:
        self.n_joints = n_joints
        super().__init__(zmq.SUB, endpoint, bind=bind, keys=keys)

    def _configure(self, s: zmq.Socket) -> None:
        s.setsockopt(zmq.CONFLATE, 1)        # before bind/connect (ZeroMQ reads it there)
        s.setsockopt(zmq.SUBSCRIBE, b"")

    def receive(self, timeout_s: float = 0.0) -> Message | None:
        """The newest valid message, or None (after up to timeout_s); bad ones are counted."""
        newest = None
        if timeout_s > 0 and not self.poll(timeout_s):
            return None
        for _ in range(DRAIN_LIMIT):
            frames = self._recv_frames()
            if frames is None:
                break
            if len(frames) != 1:
                self.received += 1
                self.dropped["framing"] += 1
                continue
            msg = self._decode(frames[0], self.n_joints)
            if not isinstance(msg, ProtocolError):
                newest = msg
        return newest


class Publisher(_Sender):
    """PUB with ZMQ_CONFLATE: a slow subscriber gets the newest message, not a backlog."""

    def __init__(self, endpoint: str = DEFAULT_TWIST_ENDPOINT, *, bind: bool = False,
                 keys: Keys | None = None) -> None:
        super().__init__(zmq.PUB, endpoint, bind=bind, keys=keys)

    def _configure(self, s: zmq.Socket) -> None:
        s.setsockopt(zmq.CONFLATE, 1)
