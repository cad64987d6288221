"""The wire over a pair of pipes to a child process: the private link of a lockstep run.

    runtime  PipeClient  ──write fd──►  PipeServer  sim child (`sim.arm --link fd:R,W`)
                         ◄──read fd──

A lockstep run (preflight, closed-loop re-runs) is one rates message out and one state back
per control cycle, between this process and a child it started itself. Over ZeroMQ every
exchange wakes each side's I/O thread in both directions; over a pipe it is one write and
one read a side. The messages are the wire's own, the hello exchange included; the two a
cycle carries, `rates` and `state`, travel in a fixed layout instead of msgpack
(runtime.link.packed), the rest as `protocol.encode`/`decode` (docs/PROTOCOL.md, "Lockstep
over pipes").

The frames travel through a channel, one of two:
- `PipeChannel`: in the pipes themselves, each framed by its length as a 4-byte
  little-endian unsigned integer (`--link fd:R,W`);
- `RingChannel` (runtime.link.shared_rings): in two rings of shared memory, the pipes beside
  them ringing a bell per frame and telling the other process's end (`--link shm:R,W,M`).
  Cheaper a hand-over; the runtime takes it where `shared_rings.usable()` says it works.

The two classes offer what `ArmClient` and `ArmServer` offer the code that uses them
(`send`, `receive`/`drain`, `poll`, `handshake`, `dropped`), so the arm side's serving loop
and the lockstep runner do not know which link they have. A pipe is private to the two
processes: no address, no keys. Neither channel loses or reorders anything, so there are no
retries; the pipe's end (EOF, the other process gone) is reported, never waited out.
"""

from __future__ import annotations

import os
import select
import struct
import time
from collections import Counter

from ..errors import ProtocolError, TransportError
from .packed import MARK, decode_packed, encode_packed, packs
from .protocol import MAX_MESSAGE_BYTES, Hello, Message, State, encode
from .shared_rings import RingChannel, close_fds, create_memory
from .transport import Inbox, check_answer, decode_counted

PIPE_PEER = b"pipe"         # the one peer a PipeServer has (ArmServer's peers are identities)
# A lockstep peer answers within a cycle's work (a few hundred µs), so a reader polls the
# pipe without sleeping for the first SPIN_S of a wait, then sleeps in select. Waking a
# sleeping reader costs ~75–370 µs here (benchmarks/RESULTS.md); strictly in turn (state
# lag 0) both sides wait every cycle, and spinning doubles the speed. It costs a core that
# would be idle while the other process works.
SPIN_S = 0.002
_LENGTH = struct.Struct("<I")
_PACKED = bytes((MARK,))
_READ_BYTES = 1 << 16


def link_spec(read_fd: int, write_fd: int, memory_fd: int | None = None) -> str:
    """How the child is told its ends: "fd:R,W" (read fd, write fd, in the child), or
    "shm:R,W,M" when the frames go through shared rings in the memory M
    (runtime.link.shared_rings) and the pipes only ring their bells."""
    if memory_fd is None:
        return f"fd:{read_fd},{write_fd}"
    return f"shm:{read_fd},{write_fd},{memory_fd}"


def parse_link_spec(spec: str) -> tuple[int, ...]:
    """(read fd, write fd) from "fd:R,W", (read fd, write fd, memory fd) from
    "shm:R,W,M"; TransportError otherwise."""
    try:
        kind, text = spec.split(":", 1)
        fds = tuple(int(v) for v in text.split(","))
    except ValueError:
        kind, fds = "", ()
    if {"fd": 2, "shm": 3}.get(kind) != len(fds) or min(fds) < 0:
        raise TransportError(f"a lockstep link is given as fd:READ,WRITE or "
                             f"shm:READ,WRITE,MEMORY, got {spec!r}")
    return fds


def child_link(kind: str) -> tuple["PipeChannel | RingChannel", tuple[int, ...]]:
    """A new link to a child about to start: this process's channel ("pipe" or "shm"),
    and the descriptors to pass to the child (`link_spec(*fds)` describes them; close
    them here once the child has started: its exit then ends our reads)."""
    to_child, from_child = os.pipe(), os.pipe()
    child_ends: tuple[int, ...] = (to_child[0], from_child[1])
    if kind != "shm":
        return PipeChannel(from_child[0], to_child[1]), child_ends
    memory_fd = create_memory()
    channel = RingChannel(from_child[0], to_child[1], memory_fd, arm_side=False)
    return channel, child_ends + (memory_fd,)


def arm_side_channel(spec: str) -> "PipeChannel | RingChannel":
    """The child's end of the link its parent described in `spec` (see link_spec)."""
    fds = parse_link_spec(spec)
    if len(fds) == 3:
        read_fd, write_fd, memory_fd = fds
        channel = RingChannel(read_fd, write_fd, memory_fd, arm_side=True)
        os.close(memory_fd)                 # mapped now
        return channel
    return PipeChannel(*fds)


class PipeChannel:
    """Frames over the two pipes themselves, each payload after its length."""

    kind = "pipe"

    def __init__(self, read_fd: int, write_fd: int, *, spin_s: float = SPIN_S) -> None:
        self.read_fd, self.write_fd = read_fd, write_fd
        os.set_blocking(read_fd, False)     # reads take what has arrived; `poll` waits
        self.spin_s = spin_s
        self.buffer = bytearray()
        self.ended = False                 # the other end closed (or the pipe broke)
        self.dropped: Counter[str] = Counter()
        self.received = 0

    def send(self, payload: bytes) -> bool:
        """Write one frame, whole; False if the other end is gone. (A write waits only when
        the pipe's buffer, 64 KiB on Linux, is full: a lockstep peer reads every message.)"""
        data = memoryview(_LENGTH.pack(len(payload)) + payload)
        try:
            while data:
                data = data[os.write(self.write_fd, data):]
        except OSError:                     # BrokenPipeError: the reader closed its end
            self.ended = True
            return False
        return True

    def poll(self, timeout_s: float) -> bool:
        """Wait up to timeout_s for a whole frame (or the end of the link); True if there.
        The first `spin_s` of the wait polls without sleeping (see SPIN_S)."""
        now = time.monotonic()
        deadline, spin_until = now + max(timeout_s, 0.0), now + min(self.spin_s, timeout_s)
        while not self._has_frame() and not self.ended:
            if self._fill():
                continue
            now = time.monotonic()
            if now >= deadline:
                return False
            if now >= spin_until:
                select.select([self.read_fd], [], [], deadline - now)
        return True

    def take(self) -> list[bytes]:
        """Every whole frame that has arrived (without waiting); oversized ones are
        counted in `dropped` and skipped."""
        if not self.ended:
            self._fill()
        out = []
        while self._has_frame():
            (n,) = _LENGTH.unpack_from(self.buffer)
            payload = bytes(self.buffer[4:4 + n])
            del self.buffer[:4 + n]
            self.received += 1
            if n > MAX_MESSAGE_BYTES:
                self.dropped["oversize"] += 1
                continue
            out.append(payload)
        return out

    def _has_frame(self) -> bool:
        if len(self.buffer) < 4:
            return False
        return len(self.buffer) >= 4 + _LENGTH.unpack_from(self.buffer)[0]

    def _fill(self) -> bool:
        """Read what has arrived without waiting; True if anything came."""
        try:
            chunk = os.read(self.read_fd, _READ_BYTES)
        except BlockingIOError:
            return False
        except OSError:
            chunk = b""
        if not chunk:
            self.ended = True
            return False
        self.buffer += chunk
        return True

    def close(self) -> None:
        close_fds(self.read_fd, self.write_fd)
        self.read_fd = self.write_fd = -1
        self.ended = True


class PipeEnd:
    """One process's end of the link: the wire's messages through a channel (the pipes
    themselves, or shared rings beside them)."""

    def __init__(self, channel: PipeChannel | RingChannel, n_joints: int) -> None:
        self.channel = channel
        self.n_joints = n_joints
        self.dropped = channel.dropped      # the channel counts `oversize`, decoding the rest

    @property
    def ended(self) -> bool:
        return self.channel.ended

    @property
    def received(self) -> int:
        return self.channel.received

    def send_frame(self, payload: bytes) -> bool:
        return self.channel.send(payload)

    def poll(self, timeout_s: float) -> bool:
        return self.channel.poll(timeout_s)

    def frames(self) -> list[bytes]:
        return self.channel.take()

    def encode(self, msg: Message) -> bytes:
        return encode_packed(msg, self.n_joints) if packs(msg) else encode(msg)

    def decode(self, payload: bytes) -> Message | ProtocolError:
        """The message in a frame (packed or msgpack); a malformed one counted and returned."""
        if payload[:1] != _PACKED:
            return decode_counted(payload, self.n_joints, self.dropped)
        try:
            return decode_packed(payload, self.n_joints)
        except ProtocolError as exc:
            self.dropped[exc.reason] += 1
            return exc

    def close(self) -> None:
        self.channel.close()


class PipeServer(PipeEnd):
    """The arm side of a pipe link: the drop-in for `ArmServer` in `sim.endpoint`."""

    def __init__(self, channel: PipeChannel | RingChannel, *, n_joints: int,
                 endpoint: str = "") -> None:
        super().__init__(channel, n_joints)
        self.endpoint = endpoint or channel.kind   # the link spec, in the ready line

    def drain(self) -> list[tuple[bytes, Message | ProtocolError]]:
        """Everything waiting, decoded, from the one peer; malformed ones counted."""
        return [(PIPE_PEER, self.decode(p)) for p in self.frames()]

    def send(self, peer: bytes, msg: Message) -> str:
        """"sent", or "gone" when the runtime's end is closed."""
        return "sent" if self.send_frame(self.encode(msg)) else "gone"

    def __enter__(self) -> "PipeServer":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class PipeClient(PipeEnd):
    """The runtime's end of a pipe link to a child it started: the drop-in for `ArmClient`
    in a lockstep run."""

    def __init__(self, channel: PipeChannel | RingChannel, *, hello: Hello,
                 endpoint: str = "the arm side's pipe") -> None:
        super().__init__(channel, len(hello.joints))
        self.hello = hello
        self.endpoint = endpoint
        self.send_dropped = 0

    def send(self, msg: Message) -> bool:
        if self.send_frame(self.encode(msg)):
            return True
        self.send_dropped += 1
        return False

    def messages(self, timeout_s: float = 0.0) -> list[Message]:
        """Every valid message waiting, in order (after up to timeout_s for the first);
        malformed ones are counted in `dropped`. A lockstep runner needs each state, not
        only the newest."""
        if timeout_s > 0 and not self.poll(timeout_s):
            return []
        decoded = (self.decode(p) for p in self.frames())
        return [m for m in decoded if not isinstance(m, ProtocolError)]

    def receive(self, timeout_s: float = 0.0) -> Inbox:
        """Everything waiting (after up to timeout_s for the first message), sorted like
        `ArmClient.receive`: the newest state, hello and refusal."""
        inbox = Inbox()
        if timeout_s > 0 and not self.poll(timeout_s):
            return inbox
        for payload in self.frames():
            inbox.add(self.decode(payload), self.dropped)
        return inbox

    def handshake(self, timeout_s: float = 5.0) -> tuple[Hello, State]:
        """Say hello once (a pipe loses nothing) and wait for the arm side's hello and first
        state; the same checks and errors as `ArmClient.handshake`."""
        deadline = time.monotonic() + timeout_s
        if not self.send(self.hello):
            raise TransportError(f"{self.endpoint} is closed")
        theirs: Hello | None = None
        while (remaining := deadline - time.monotonic()) > 0 and not self.ended:
            inbox = self.receive(remaining)
            theirs = check_answer(inbox, self.hello, self.endpoint) or theirs
            if theirs is not None and inbox.state is not None:
                return theirs, inbox.state
        raise TransportError(f"no answer on {self.endpoint} within {timeout_s:g} s"
                             + (" (the other end closed)" if self.ended else ""))

    def __enter__(self) -> "PipeClient":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

