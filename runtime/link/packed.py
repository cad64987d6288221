"""Fixed-layout frames for the two messages a lockstep link carries every cycle (pure).

A lockstep link (runtime.link.pipes) joins a runtime to the simulated-arm child it started
from the same code, and carries one `rates` message out and one `state` back per control
cycle. As msgpack maps, checked field by field (`protocol.decode`), those two cost each side
several times what copying them does. On that link they travel instead as little-endian
records of fixed layout for the link's joint count n (docs/PROTOCOL.md, "Lockstep over
pipes"); every other kind, and everything before the hello exchange, stays msgpack.

    rates  C1 01 flags:u8 00 seq:u64 t_ns:i64 qd:n×f64
    state  C1 02 status:u8 limited:u8 seq:u64 t_ns:i64 applied_seq:u64 echo_ns:i64
           q:n×f64 qd:n×f64

The first byte tells the two apart: 0xC1 is the one byte the msgpack format never uses
(msgpack specification, "Formats": "never used"), so no msgpack frame starts with it. status
is an index into `protocol.STATUSES`. Decoding checks what `protocol.decode` checks and
drops a frame with the same reasons (REASONS): a length that is not the layout's for n
(`length`), an unknown kind byte (`kind`), a status, flag, limited byte or rates seq out of
range (`range`), a float that is NaN or infinite (`nonfinite`). The integers' ranges are the
layout's own (u64, i64), as in the schema. A frame decoded here equals the message sent,
bit for bit (f64 carries every float exactly, −0.0 included).
"""

from __future__ import annotations

import math
import struct
from functools import lru_cache
from typing import TypeGuard

from ..errors import ProtocolError
from .protocol import KNOWN_FLAGS, STATUSES, Message, Rates, State

MARK = 0xC1
RATES, STATE = 1, 2             # the kind byte
_HEAD = struct.Struct("<BBBB")  # mark, kind, and two bytes of the kind's own


@lru_cache(maxsize=None)
def _layout(kind: int, n: int) -> struct.Struct:
    if kind == RATES:
        return struct.Struct(f"<BBBBQq{n}d")
    return struct.Struct(f"<BBBBQqQq{2 * n}d")


def packs(msg: Message) -> TypeGuard[Rates | State]:
    """Whether `msg` travels packed on a lockstep link."""
    return type(msg) is Rates or type(msg) is State


def _finite(values: tuple[float, ...], what: str) -> None:
    # A sum is finite when every term is (and one that overflows is looked at term by term).
    if not math.isfinite(sum(values)) and not all(map(math.isfinite, values)):
        raise ProtocolError(f"field {what!r}: contains NaN or infinity", reason="nonfinite")


def _length(values: tuple[float, ...], n: int, what: str) -> None:
    if len(values) != n:
        raise ProtocolError(f"field {what!r}: expected {n} values, got {len(values)}",
                            reason="length")


def encode_packed(msg: Rates | State, n: int) -> bytes:
    """The packed frame of `msg` for a link of n joints. Raises ProtocolError for a message
    the schema refuses (never sent)."""
    try:
        return _pack_rates(msg, n) if isinstance(msg, Rates) else _pack_state(msg, n)
    except struct.error as exc:  # an integer outside its field's range, a wrong type
        raise ProtocolError(f"{type(msg).__name__.lower()}: {exc}", reason="range") from None


def _pack_rates(msg: Rates, n: int) -> bytes:
    _length(msg.qd, n, "qd")
    _finite(msg.qd, "qd")
    if msg.seq < 1 or msg.flags & ~KNOWN_FLAGS:
        raise ProtocolError("rates: seq 0 or unknown flag bits", reason="range")
    return _layout(RATES, n).pack(MARK, RATES, msg.flags, 0, msg.seq, msg.t_ns, *msg.qd)


def _pack_state(msg: State, n: int) -> bytes:
    _length(msg.q, n, "q")
    _length(msg.qd, n, "qd")
    _finite(msg.q + msg.qd, "q, qd")
    if msg.status not in STATUSES:
        raise ProtocolError(f"field 'status': {msg.status[:40]!r} is not one of "
                            f"{', '.join(STATUSES)}", reason="range")
    return _layout(STATE, n).pack(MARK, STATE, STATUSES.index(msg.status), bool(msg.limited),
                                  msg.seq, msg.t_ns, msg.applied_seq, msg.echo_ns,
                                  *msg.q, *msg.qd)


def decode_packed(data: bytes | bytearray | memoryview, n: int) -> Rates | State:
    """The message in a packed frame (its first byte MARK) for a link of n joints; raises
    ProtocolError(reason=…) for anything the schema refuses."""
    if len(data) < _HEAD.size:
        raise ProtocolError(f"a packed frame of {len(data)} bytes", reason="length")
    _, kind, a, b = _HEAD.unpack_from(data)
    if kind != RATES and kind != STATE:
        raise ProtocolError(f"unknown packed kind {kind}", reason="kind")
    layout = _layout(kind, n)
    if len(data) != layout.size:
        raise ProtocolError(f"a packed {'rates' if kind == RATES else 'state'} frame of "
                            f"{len(data)} bytes; {n} joints take {layout.size}",
                            reason="length")
    values = layout.unpack(data)
    floats = values[6:] if kind == RATES else values[8:]
    _finite(floats, "qd" if kind == RATES else "q, qd")
    if kind == RATES:
        if a & ~KNOWN_FLAGS or b or values[4] < 1:
            raise ProtocolError("rates: seq 0, unknown flag bits or a stray byte",
                                reason="range")
        return Rates(values[4], values[5], floats, a)
    if a >= len(STATUSES) or b > 1:
        raise ProtocolError(f"state: status {a} or limited {b} out of range", reason="range")
    return State(values[4], values[5], floats[:n], floats[n:], values[6], values[7],
                 STATUSES[a], b == 1)


__all__ = ["MARK", "decode_packed", "encode_packed", "packs"]
