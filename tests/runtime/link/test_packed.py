"""The lockstep link's fixed-layout rates and state frames (runtime/link/packed.py).

Checked against the msgpack path (`protocol.encode`/`decode`, the wire's schema), against
frames built by hand from the layout docs/PROTOCOL.md gives ("Lockstep over pipes"), and
against the msgpack specification's byte table ("Formats": 0xc1 is "never used")."""

from __future__ import annotations

import math
import struct

import msgpack
import pytest
from hypothesis import given
from hypothesis import strategies as st

from runtime.errors import ProtocolError
from runtime.link.packed import MARK, decode_packed, encode_packed, packs
from runtime.link.protocol import (
    FLAG_REDUCED_SPEED,
    MAX_SEQ,
    STATUSES,
    Hello,
    Rates,
    State,
    decode,
    encode,
)

N = 3
finite = st.floats(allow_nan=False, allow_infinity=False)
seqs = st.integers(0, MAX_SEQ)
times = st.integers(-2**63, 2**63 - 1)
vectors = st.tuples(*[finite] * N)


def bits(values) -> list[bytes]:
    return [struct.pack("<d", v) for v in values]


@given(st.integers(1, MAX_SEQ), times, vectors, st.sampled_from([0, FLAG_REDUCED_SPEED]))
def test_rates_round_trip_as_the_msgpack_path_does(seq, t_ns, qd, flags) -> None:
    msg = Rates(seq, t_ns, qd, flags)
    back = decode_packed(encode_packed(msg, N), N)
    assert back == msg == decode(encode(msg), n_joints=N)
    assert bits(back.qd) == bits(qd)           # −0.0 and every last bit kept


@given(seqs, times, vectors, vectors, seqs, times, st.sampled_from(STATUSES), st.booleans())
def test_state_round_trips_as_the_msgpack_path_does(seq, t_ns, q, qd, applied, echo,
                                                     status, limited) -> None:
    msg = State(seq, t_ns, q, qd, applied, echo, status, limited)
    back = decode_packed(encode_packed(msg, N), N)
    assert back == msg == decode(encode(msg), n_joints=N)
    assert bits(back.q + back.qd) == bits(q + qd)


def test_the_layout_is_the_documented_one() -> None:
    # docs/PROTOCOL.md: state = C1 02 status limited seq:u64 t_ns:i64 applied_seq:u64
    # echo_ns:i64 q:n×f64 qd:n×f64, little-endian; rates = C1 01 flags 00 seq t_ns qd.
    state = State(7, -5, (0.5, -0.0, 2.0), (1.0, 2.0, 3.0), 6, 9, "stale", True)
    by_hand = (bytes([0xC1, 2, STATUSES.index("stale"), 1]) + struct.pack("<QqQq", 7, -5, 6, 9)
               + struct.pack("<6d", 0.5, -0.0, 2.0, 1.0, 2.0, 3.0))
    assert encode_packed(state, N) == by_hand and len(by_hand) == 4 + 32 + 16 * N
    rates = Rates(3, 4, (0.1, 0.2, 0.3), FLAG_REDUCED_SPEED)
    assert encode_packed(rates, N) == (bytes([0xC1, 1, 1, 0]) + struct.pack("<Qq", 3, 4)
                                       + struct.pack("<3d", 0.1, 0.2, 0.3))


def test_no_msgpack_frame_starts_with_the_mark() -> None:
    # msgpack specification, "Formats": 0xc1 is "never used"; msgpack refuses it alone.
    assert MARK == 0xC1
    with pytest.raises(Exception):
        msgpack.unpackb(bytes([MARK]))
    hello = Hello("runtime", "a", ("j1",), "d", "", 1.0)
    assert encode(hello)[0] != MARK and not packs(hello)


def test_finite_values_whose_sum_overflows_are_kept() -> None:
    msg = Rates(1, 0, (1e308, 1e308, -0.0))
    assert decode_packed(encode_packed(msg, N), N) == msg


def _state_frame(**change) -> bytearray:
    frame = bytearray(encode_packed(State(1, 0, (0.0,) * N, (0.0,) * N, 0, 0, "tracking"), N))
    for offset, value in change.values():
        frame[offset:offset + len(value)] = value
    return frame


@pytest.mark.parametrize("frame, reason", [
    (_state_frame()[:-1], "length"),                                   # cut short
    (_state_frame() + b"\x00", "length"),                              # one byte too many
    (bytes([MARK]), "length"),
    (_state_frame(kind=(1, b"\x03")), "kind"),
    (_state_frame(status=(2, bytes([len(STATUSES)]))), "range"),
    (_state_frame(limited=(3, b"\x02")), "range"),
    (_state_frame(q=(36, struct.pack("<d", math.nan))), "nonfinite"),
    (_state_frame(qd=(36 + 8 * N, struct.pack("<d", -math.inf))), "nonfinite"),
])
def test_a_malformed_state_frame_is_refused_with_its_reason(frame, reason) -> None:
    with pytest.raises(ProtocolError) as caught:
        decode_packed(bytes(frame), N)
    assert caught.value.reason == reason


@pytest.mark.parametrize("head, reason", [
    (bytes([MARK, 1, 2, 0]), "range"),     # a flag bit nobody knows
    (bytes([MARK, 1, 0, 1]), "range"),     # the stray byte is not zero
])
def test_a_malformed_rates_frame_is_refused_with_its_reason(head, reason) -> None:
    frame = head + encode_packed(Rates(1, 0, (0.0,) * N), N)[4:]
    with pytest.raises(ProtocolError) as caught:
        decode_packed(frame, N)
    assert caught.value.reason == reason


def test_rates_number_zero_is_refused_both_ways() -> None:
    frame = bytearray(encode_packed(Rates(1, 0, (0.0,) * N), N))
    frame[4:12] = struct.pack("<Q", 0)
    with pytest.raises(ProtocolError, match="seq 0"):
        decode_packed(bytes(frame), N)
    with pytest.raises(ProtocolError):
        encode_packed(Rates(0, 0, (0.0,) * N), N)


@pytest.mark.parametrize("msg, reason", [
    (Rates(1, 0, (0.0,) * (N + 1)), "length"),
    (Rates(1, 0, (0.0, math.inf, 0.0)), "nonfinite"),
    (Rates(1, 0, (0.0,) * N, flags=4), "range"),
    (State(1, 0, (0.0,) * N, (0.0,) * N, 0, 0, "lost"), "range"),
    (State(1, 2**63, (0.0,) * N, (0.0,) * N, 0, 0, "tracking"), "range"),   # t_ns past i64
    (State(-1, 0, (0.0,) * N, (0.0,) * N, 0, 0, "tracking"), "range"),
])
def test_a_message_the_schema_refuses_is_never_encoded(msg, reason) -> None:
    with pytest.raises(ProtocolError) as caught:
        encode_packed(msg, N)
    assert caught.value.reason == reason
    with pytest.raises(ProtocolError):   # the msgpack path refuses it too
        encode(msg) if reason != "length" else decode(encode(msg), n_joints=N)
