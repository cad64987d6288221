"""runtime/link/protocol.py: round trips, strict decoding (fuzzed), hello checks, timing rules, and
agreement with docs/PROTOCOL.md (field tables and worked hex examples)."""

from __future__ import annotations

import math
import re
from pathlib import Path

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from runtime.arm.load import load_arm
from runtime.errors import ModelMismatch, ProtocolError
from runtime.link.protocol import (
    FIELDS,
    KINDS,
    MAX_CONTACTS,
    MAX_JOINTS,
    MAX_MESSAGE_BYTES,
    PROTOCOL_VERSION,
    REASONS,
    CellHello,
    Contact,
    Hello,
    LatenessFilter,
    Rates,
    Refuse,
    RoundTripMeter,
    SequenceGate,
    State,
    StateFreshness,
    Twist,
    check_hello,
    decode,
    encode,
    geometry_digest,
    hello_for,
    to_map,
)

DOC = Path(__file__).resolve().parents[3] / "docs" / "PROTOCOL.md"
FUZZ = settings(max_examples=200, deadline=None,
                suppress_health_check=[HealthCheck.too_slow])
FUZZ_NESTED = settings(max_examples=60, deadline=None,   # nested values are slow to generate
                       suppress_health_check=[HealthCheck.too_slow])


def planar_hello(role: str = "runtime") -> Hello:
    return hello_for(load_arm("planar3"), role, stale_after_s=0.1)


def examples() -> list:
    """The worked examples of docs/PROTOCOL.md section 10 (planar3)."""
    return [planar_hello(),
            Rates(42, 1234567890123, (0.1, -0.25, 0.0), 0),
            State(1042, 1234567990000, (0.5, 1.0, -0.5), (0.1, -0.25, 0.0), 42, 1234567890123,
                  "tracking", False),
            Refuse("busy", "another runtime is commanding this arm"),
            Twist(7, 1234567000000, (0.05, 0, 0, 0, 0, 0.1), "tool", True),
            CellHello("bench", "5d0c2c3f8a7e9b14"),
            Contact(1042, 1234567990000, ("tool", "link_3"), ("fixture", "bench"),
                    (0.0021, 0.0004), 2)]


def valid_map(kind: str) -> dict:
    msg = {to_map(m)["kind"]: m for m in examples()}[kind]
    return msgpack.unpackb(encode(msg))


def reason_of(data, **kw) -> str:
    with pytest.raises(ProtocolError) as info:
        decode(data, **kw)
    assert info.value.reason in REASONS
    return info.value.reason


# ----------------------------------------------------------------------------------------
# Round trips
# ----------------------------------------------------------------------------------------

@pytest.mark.parametrize("msg", examples(), ids=lambda m: type(m).__name__)
def test_round_trip(msg) -> None:
    n = 3 if isinstance(msg, (Rates, State)) else None
    assert decode(encode(msg), n_joints=n) == msg


def test_numpy_arrays_are_taken_and_come_back_as_floats() -> None:
    rates = Rates(5, -17, np.array([1, 2.5, -3]), flags=1)
    back = decode(encode(rates), n_joints=3)
    assert back.qd == (1.0, 2.5, -3.0) and all(type(x) is float for x in back.qd)
    assert back.reduced_speed and back.t_ns == -17


def test_float32_and_integer_values_are_accepted_in_float_fields() -> None:
    # A C++ sender may pack float32 or an integer 0; both are numbers (PROTOCOL.md §3).
    data = valid_map("rates")
    data["qd"] = [0, 1, -2]
    packed = msgpack.packb(data, use_single_float=True)
    assert decode(packed, n_joints=3).qd == (0.0, 1.0, -2.0)


# ----------------------------------------------------------------------------------------
# Strict decoding: one test per reason
# ----------------------------------------------------------------------------------------

def mutated(message_kind: str, **changes) -> bytes:
    data = valid_map(message_kind)
    for key, value in changes.items():
        if value is KeyError:
            del data[key]
        else:
            data[key] = value
    return msgpack.packb(data)


@pytest.mark.parametrize("data, reason", [
    ("text, not bytes", "type"),
    (b"\xc1", "msgpack"),                                  # reserved byte: not msgpack
    (encode(Rates(1, 2, (0.0,) * 3))[:-3], "msgpack"),     # truncated
    (encode(Rates(1, 2, (0.0,) * 3)) + b"\x00", "msgpack"),  # trailing bytes
    (msgpack.packb({1: 2}), "msgpack"),                    # non-string key
    (msgpack.packb([1, 2, 3]), "type"),                    # not a map
    (b"\x00" * (MAX_MESSAGE_BYTES + 1), "oversize"),       # byte cap, before unpacking
    (msgpack.packb({"v": 1, "kind": "rates", "qd": [0.0] * (MAX_JOINTS + 1)}), "oversize"),
    (msgpack.packb({"kind": "rates"}), "schema"),          # no version
    (mutated("rates", v=PROTOCOL_VERSION + 1), "version"),  # future version
    (mutated("rates", v="1"), "type"),
    (mutated("rates", kind="jog"), "kind"),
    (mutated("rates", flags=KeyError), "schema"),          # missing field
    (mutated("rates", extra=1), "schema"),                 # unknown field
    (mutated("rates", seq="42"), "type"),
    (mutated("rates", seq=0), "range"),                    # sequences start at 1
    (mutated("rates", seq=-1), "range"),
    (mutated("rates", flags=2), "range"),                  # unknown flag bit
    (mutated("rates", qd=[0.0, float("nan"), 0.0]), "nonfinite"),
    (mutated("rates", qd=[float("inf"), 0.0, 0.0]), "nonfinite"),
    (mutated("rates", qd=[0.0, True, 0.0]), "type"),       # bool is not a number
    (mutated("rates", qd="fast"), "type"),
    (mutated("rates", qd=[]), "length"),
    (mutated("rates", qd=[b"\x00"]), "type"),
    (mutated("state", status="moving"), "range"),
    (mutated("state", qd=[0.0, 0.0]), "length"),           # q and qd disagree
    (mutated("state", limited=0), "type"),
    (mutated("hello", joints=["a", "a"]), "range"),
    (mutated("hello", role="admin"), "range"),
    (mutated("hello", stale_after_s=0.0), "range"),
    (mutated("twist", twist=[0.0] * 5), "length"),
    (mutated("twist", frame="world"), "range"),
    (mutated("contact", depth_m=[0.001]), "length"),      # a, b, depth_m differ in length
    (mutated("contact", depth_m=[0.001, -0.001]), "range"),
    (mutated("contact", total=1), "range"),                # fewer in all than listed
    (mutated("contact", a=[], b=[], depth_m=[]), "length"),
    (mutated("contact", a=["tool"] * (MAX_CONTACTS + 1), b=["bench"] * (MAX_CONTACTS + 1),
             depth_m=[0.0] * (MAX_CONTACTS + 1), total=99), "length"),
    (mutated("contact", b=["bench", ""]), "range"),        # names are not empty
    (mutated("cell", digest=7), "type"),
    (msgpack.packb(msgpack.ExtType(1, b"")), "type"),       # no ext values
    (msgpack.packb(msgpack.ExtType(1, b"abc")), "type"),
])
def test_decode_rejects_with_reason(data, reason) -> None:
    assert reason_of(data) == reason


def test_wrong_joint_count_for_the_arm() -> None:
    data = encode(Rates(1, 2, (0.1,) * 6))
    assert reason_of(data, n_joints=7) == "length"
    assert decode(data, n_joints=6).qd == (0.1,) * 6


def test_encode_refuses_what_a_peer_must_refuse() -> None:
    # We never put NaN, an unknown status or an empty array on the wire.
    with pytest.raises(ProtocolError):
        encode(Rates(1, 2, (math.nan, 0.0)))
    with pytest.raises(ProtocolError):
        encode(State(1, 2, (0.0,), (0.0,), 0, 0, "moving"))
    with pytest.raises(ProtocolError):
        encode(Rates(1, 2, ()))


# ----------------------------------------------------------------------------------------
# Fuzz: whatever arrives, decode returns a message or raises ProtocolError, nothing else
# ----------------------------------------------------------------------------------------

def decode_outcome(data: bytes, n_joints: int | None = 3) -> object:
    try:
        msg = decode(data, n_joints=n_joints)
    except ProtocolError as exc:
        assert exc.reason in REASONS
        return exc
    assert isinstance(msg, tuple(KINDS.values()))
    return msg


msgpack_values = st.recursive(
    st.none() | st.booleans() | st.integers(-2**63, 2**64 - 1) | st.floats()
    | st.text(max_size=20) | st.binary(max_size=20),
    lambda children: st.lists(children, max_size=8)
    | st.dictionaries(st.text(max_size=8), children, max_size=8),
    max_leaves=8)


@FUZZ
@given(st.binary(max_size=400))
def test_fuzz_random_bytes(data: bytes) -> None:
    decode_outcome(data)


@FUZZ
@given(st.sampled_from(list(FIELDS)), st.data())
def test_fuzz_truncated_messages_never_decode(kind: str, data) -> None:
    full = msgpack.packb(valid_map(kind))
    cut = data.draw(st.integers(0, len(full) - 1))
    assert isinstance(decode_outcome(full[:cut]), ProtocolError)


@FUZZ_NESTED
@given(st.sampled_from(list(FIELDS)), st.data(), msgpack_values)
def test_fuzz_one_field_replaced_by_anything(kind: str, data, value) -> None:
    msg = valid_map(kind)
    key = data.draw(st.sampled_from(sorted(msg)))
    msg[key] = value
    decode_outcome(msgpack.packb(msg, use_bin_type=True))


@FUZZ
@given(st.sampled_from(["rates", "state", "twist"]), st.data(),
       st.sampled_from([math.nan, math.inf, -math.inf]))
def test_fuzz_nonfinite_anywhere_in_an_array(kind: str, data, bad: float) -> None:
    msg = valid_map(kind)
    key = {"rates": "qd", "state": data.draw(st.sampled_from(["q", "qd"])), "twist": "twist"}[kind]
    i = data.draw(st.integers(0, len(msg[key]) - 1))
    msg[key][i] = bad
    assert decode_outcome(msgpack.packb(msg)).reason == "nonfinite"


@FUZZ
@given(st.integers(0, 5000), st.sampled_from(["qd", "q"]))
def test_fuzz_array_lengths(length: int, key: str) -> None:
    kind = "rates" if key == "qd" else "state"
    msg = valid_map(kind)
    msg[key] = [0.0] * length
    if kind == "state":
        msg["qd"] = [0.0] * length
    outcome = decode_outcome(msgpack.packb(msg), n_joints=3)
    if length != 3:
        assert outcome.reason in ("length", "oversize")


@FUZZ
@given(st.integers(-2**63, 2**64 - 1).filter(lambda v: v != PROTOCOL_VERSION),
       st.sampled_from(list(FIELDS)))
def test_fuzz_other_versions(version: int, kind: str) -> None:
    msg = valid_map(kind)
    msg["v"] = version
    assert decode_outcome(msgpack.packb(msg)).reason == "version"


@FUZZ_NESTED
@given(st.sampled_from(list(FIELDS)),
       st.dictionaries(st.sampled_from(sorted({k for f in FIELDS.values() for k, _ in f}
                                              | {"x"})), msgpack_values, max_size=10))
def test_fuzz_random_maps_of_a_known_kind(kind: str, data: dict) -> None:
    data = {**data, "v": PROTOCOL_VERSION, "kind": kind}
    decode_outcome(msgpack.packb(data, use_bin_type=True))


# ----------------------------------------------------------------------------------------
# The spec and the code agree
# ----------------------------------------------------------------------------------------

def documented_fields() -> dict[str, list[str]]:
    """Field names per message kind from the tables under '### `kind`' in PROTOCOL.md."""
    tables: dict[str, list[str]] = {}
    kind = None
    for line in DOC.read_text(encoding="utf-8").splitlines():
        heading = re.fullmatch(r"### `(\w+)`", line.strip())
        if heading:
            kind = heading.group(1)
            tables[kind] = []
        elif line.startswith("## "):
            kind = None
        elif kind and (row := re.match(r"\| `(\w+)` \|", line)):
            tables[kind].append(row.group(1))
    return tables


def test_docs_list_exactly_the_fields_on_the_wire() -> None:
    documented = documented_fields()
    assert sorted(documented) == sorted(KINDS)
    for msg in examples():
        plain = msgpack.unpackb(encode(msg))   # a plain msgpack decoder, no project code
        kind = plain["kind"]
        assert sorted(plain) == sorted(documented[kind]), kind
        assert plain["v"] == PROTOCOL_VERSION


def test_docs_hex_examples_are_what_the_encoder_writes() -> None:
    text = DOC.read_text(encoding="utf-8")
    section = text[text.index("## 10. Worked examples"):]
    blocks = re.findall(r"```\n(.*?)```", section, flags=re.S)
    found = []
    for block in blocks:
        lines = [line.split("#", 1)[0] for line in block.splitlines()]
        found.append(bytes.fromhex("".join(" ".join(lines).split())))
    assert found == [encode(m) for m in examples()]


# ----------------------------------------------------------------------------------------
# Hello
# ----------------------------------------------------------------------------------------

def test_check_hello_accepts_the_same_arm_under_another_name() -> None:
    ours = hello_for(load_arm("reach7"), "runtime", stale_after_s=0.1)
    theirs = Hello("bridge", "cell-3 arm", ours.joints, ours.digest, "", 0.2)
    check_hello(ours, theirs)   # name and undeclared geometry are not compared


@pytest.mark.parametrize("change, words", [
    (dict(joints=("j1", "j2", "j3", "j4", "j5", "j6")), "joint count differs: ours 7, theirs 6"),
    (dict(joints=("j1", "j2", "j3", "jx", "j5", "j6", "j7")), "joint 4 is named 'j4' here, 'jx'"),
    (dict(digest="0123456789abcdef"), "limits digest differs"),
    (dict(geometry="0123456789abcdef"), "geometry digest differs"),
])
def test_check_hello_names_the_field_that_differs(change: dict, words: str) -> None:
    ours = hello_for(load_arm("reach7"), "runtime", stale_after_s=0.1)
    theirs = Hello(**{**ours.__dict__, "role": "sim", **change})
    with pytest.raises(ModelMismatch, match=re.escape(words)):
        check_hello(ours, theirs)


def test_hello_of_another_arm_or_other_limits_is_refused() -> None:
    reach7 = load_arm("reach7")
    slower = reach7.with_changes(joints=(reach7.joints[0].__class__(
        **{**reach7.joints[0].__dict__, "max_speed": 0.5}),) + reach7.joints[1:])
    ours = hello_for(reach7, "runtime", stale_after_s=0.1)
    with pytest.raises(ModelMismatch, match="joint count"):
        check_hello(ours, hello_for(load_arm("elbow6"), "sim", stale_after_s=0.1))
    with pytest.raises(ModelMismatch, match="limits digest"):
        check_hello(ours, hello_for(slower, "sim", stale_after_s=0.1))


def test_geometry_digest_ignores_how_the_chain_was_written(tmp_path: Path) -> None:
    # The same chain loaded from its TOML (DH table) and from its URDF export splits its
    # fixed transforms differently; the digest is computed on the frames, so it agrees.
    from sim.urdf import write_urdf
    for name in ("reach7", "scara4"):
        arm = load_arm(name)
        again = load_arm(str(write_urdf(arm, tmp_path / f"{name}.urdf")))
        assert geometry_digest(again) == geometry_digest(arm)
    assert geometry_digest(load_arm("reach7")) != geometry_digest(load_arm("elbow6"))


# ----------------------------------------------------------------------------------------
# Timing rules
# ----------------------------------------------------------------------------------------

def test_sequence_gate_newest_wins() -> None:
    gate = SequenceGate()
    assert [gate.accept(s) for s in (1, 2, 2, 1, 5, 3, 6)] == \
        [True, True, False, False, True, False, True]
    gate.reset()
    assert gate.accept(1)


def test_lateness_filter_takes_constant_delay_and_drops_a_late_burst() -> None:
    f = LatenessFilter(0.1)
    offset = 5_000_000_000           # unknown clock offset between the two ends
    t = 0
    for _ in range(100):             # 40 ms of constant delay: not late
        t += 2_000_000
        assert f.accept(t, t + offset + 40_000_000)
    # A stall: the next messages arrive 150 ms later than usual → dropped.
    assert not f.accept(t + 2_000_000, t + 2_000_000 + offset + 190_000_000)
    # Back to normal delay → accepted again.
    assert f.accept(t + 4_000_000, t + 4_000_000 + offset + 40_000_000)


def test_lateness_filter_absorbs_clock_drift() -> None:
    # The sender's clock runs 200 ppm slow: the apparent delay grows 0.2 ms per second.
    # Over 20 minutes that is 240 ms (more than stale_after); nothing must be dropped.
    f = LatenessFilter(0.1, drift=1e-3)
    for k in range(1200 * 10):
        recv = k * 100_000_000                    # every 100 ms
        sent = int(recv * (1 - 200e-6))
        assert f.accept(sent, recv)


def test_state_freshness_commands_zero_without_fresh_state() -> None:
    fresh = StateFreshness(0.1)
    qd = np.array([0.2, -0.1])
    assert not fresh.is_fresh(0) and np.all(fresh.command(qd, 0) == 0)
    state = State(1, 1000, (0.0, 0.0), (0.0, 0.0), 0, 0, "tracking")
    assert fresh.offer(state, 10_000_000)
    assert np.all(fresh.command(qd, 60_000_000) == qd)          # 50 ms old
    assert np.all(fresh.command(qd, 110_000_001) == 0)          # 100 ms + 1 ns old
    assert math.isclose(fresh.age_s(110_000_000), 0.1)
    assert not fresh.offer(state, 120_000_000)                  # same seq again: refused
    assert fresh.refused == 1


def test_round_trip_meter_is_the_median_of_the_last_window() -> None:
    meter = RoundTripMeter(window_s=0.5)
    assert meter.level_s is None                                # nothing measured yet
    t = 0.0
    for k in range(100):                                        # 400 ms of a 20 ms link
        t += 0.004
        meter.add(0.020, t)
    meter.add(0.900, t + 0.004)                                 # one late state: not the link
    assert meter.level_s == 0.020
    for k in range(60):                                         # the link stays slow
        t += 0.004
        meter.add(0.300, t)
    # In the last 0.5 s: 65 quick samples, 61 slow ones: the median is still quick…
    assert meter.level_s == 0.020
    for k in range(5):                                          # …until most of them are slow
        t += 0.004
        meter.add(0.300, t)
    assert meter.level_s == 0.300
    meter.reset()
    assert meter.level_s is None


def test_round_trip_meter_keeps_the_newest_sample_after_a_silence() -> None:
    meter = RoundTripMeter(window_s=0.5)
    meter.add(0.010, 0.0)
    meter.add(0.010, 0.001)
    meter.add(0.250, 10.0)          # the first sample after 10 s: the window holds it alone
    assert meter.level_s == 0.250


def test_round_trip_meter_holds_at_most_max_samples() -> None:
    meter = RoundTripMeter(window_s=10.0, max_samples=3)
    for k, rtt in enumerate([0.5, 0.5, 0.5, 0.01, 0.01]):
        meter.add(rtt, k * 0.001)
    assert meter.level_s == 0.01    # (0.5, 0.01, 0.01): the oldest two are gone


def test_cell_digest_names_the_same_objects_and_changes_with_any_of_them(tmp_path) -> None:
    from runtime.arm.cell import load_cell
    from runtime.arm.model import configs_dir
    from runtime.link.protocol import cell_digest, cell_hello_for
    arm = load_arm("elbow6")
    shipped = configs_dir() / "cells" / "bench.toml"
    copy = tmp_path / "bench.toml"
    copy.write_text(shipped.read_text())
    assert cell_digest(load_cell("bench", arm)) == cell_digest(load_cell(copy, arm))
    moved = tmp_path / "moved.toml"
    moved.write_text(shipped.read_text().replace("xyz = [0.55, 0.30, 0.075]",
                                                 "xyz = [0.551, 0.30, 0.075]"))
    assert cell_digest(load_cell(moved, arm)) != cell_digest(load_cell(copy, arm))
    assert cell_hello_for(None) == CellHello("", "")
    assert decode(encode(cell_hello_for(load_cell("bench", arm)))).name == "bench"
