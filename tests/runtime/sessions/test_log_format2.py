"""Session format 2: cycle blocks stored column by column.

Checks: every field of every cycle round-trips bit for bit (floats compared as their IEEE
754 bit patterns, so NaN payloads and -0.0 count); a damaged block costs that block only;
the reader survives random truncation, bit flips and garbage blocks without a traceback or
an endless loop and keeps every block the damage did not touch; formats 1 and 2 of the same
session summarise and re-run identically. The damage checks rely on zlib's CRC-32 (the
ISO-HDLC polynomial, standard library) to tell good frames from bad ones.
"""

from __future__ import annotations

import dataclasses
import json
import math
import struct
import zlib
from datetime import datetime, timezone
from pathlib import Path

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from runtime.arm.load import load_arm
from runtime.cli import main
from runtime.control.cycle import ControlCycle
from runtime.control.pads import load_pad
from runtime.control.settings import RunSettings
from runtime.operator.inputs.script import ScriptSource, load_script
from runtime.sessions.log_blocks import BLOCK_KIND, COLUMNS, CycleBlock, encode_block, pack_eight
from runtime.sessions.log_blocks_decode import (
    Part,
    decode_block,
    decode_blocks,
    eight_values,
    parse_block,
)
from runtime.sessions.log_reader import (
    BAD_RECORD,
    CORRUPT,
    GAP,
    TORN_TAIL,
    SessionReader,
    read_session,
)
from runtime.sessions.log_schema import CycleRecord, cycle_record
from runtime.sessions.log_writer import CALLER_BLOCK_RECORDS, SessionRecorder, encode_frame
from runtime.sessions.summary import summarise

PREAMBLE_BYTES = 10
FRAME_HEAD_BYTES = 10
RATE_HZ = 500.0
DT = 1.0 / RATE_HZ


@pytest.fixture(scope="module")
def arm():
    return load_arm("elbow6")


# ----------------------------------------------------------------------------------------
# Bit-exact round trip (hypothesis)
# ----------------------------------------------------------------------------------------

any_float = st.floats(allow_nan=True, allow_infinity=True, allow_subnormal=True) | \
    st.integers(0, 2**64 - 1).map(lambda b: struct.unpack("<d", struct.pack("<Q", b))[0])
text = st.text(max_size=12)
floats = st.lists(any_float, max_size=8).map(tuple)


def wire_input():
    command = st.none() | st.fixed_dictionaries({
        "twist": st.lists(any_float, min_size=6, max_size=6), "frame": text,
        "enable": st.booleans(), "reduced": st.booleans(),
        "joint": st.none() | st.integers(0, 6), "joint_rate": any_float,
        "stop": st.booleans(), "reset": st.booleans()})
    return st.none() | st.fixed_dictionaries({
        "device": text, "present": st.booleans(), "axes": st.lists(any_float, max_size=6),
        "pressed": st.lists(st.integers(0, 31) | text, max_size=4), "command": command})


records = st.builds(
    CycleRecord, cycle=st.integers(-2**63, 2**63 - 1), t_s=any_float, axes=floats,
    buttons=st.lists(st.booleans(), max_size=16).map(tuple), enabled=st.booleans(),
    enable_reason=text, twist=floats, frame=text, q=floats, rates=floats, damping=any_float,
    sigma_min=any_float, manipulability=any_float, achieved_twist=floats,
    tracking_error=any_float, scales=st.dictionaries(text, any_float, max_size=4),
    binding_limit=st.none() | text, period_s=any_float, compute_s=any_float,
    overrun=st.booleans(), reduced=st.booleans(), input=wire_input(),
    state_age_s=st.none() | any_float, overrun_streak=st.integers(0, 2**62),
    safety_state=text, min_clearance_m=st.none() | any_float,
    clearance_arm=st.none() | text, clearance_other=st.none() | text)


def exact(value):
    """A value with every float replaced by its bit pattern, for bit-exact comparison."""
    if isinstance(value, float):
        return ("f64", struct.pack("<d", value))
    if isinstance(value, dict):
        return ("map", tuple((k, exact(v)) for k, v in value.items()))
    if isinstance(value, (list, tuple)):
        return (type(value).__name__, tuple(exact(v) for v in value))
    return (type(value).__name__, value)


def record_bits(rec: CycleRecord):
    return tuple((f.name, exact(getattr(rec, f.name))) for f in dataclasses.fields(rec))


def through_a_block(recs: list[CycleRecord]) -> list[CycleRecord]:
    """Records → block → msgpack frame payload → block → records."""
    payload = msgpack.packb(encode_block(CycleBlock.from_records(recs)), use_bin_type=True)
    return decode_block(msgpack.unpackb(payload, raw=False)).records()


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(records, min_size=1, max_size=12))
def test_every_field_of_every_cycle_round_trips_bit_exact(recs: list[CycleRecord]) -> None:
    back = through_a_block(recs)
    assert [record_bits(r) for r in back] == [record_bits(r) for r in recs]


@settings(max_examples=100, deadline=None)
@given(st.lists(st.integers(0, 2**64 - 1), min_size=0, max_size=60), st.integers(1, 7),
       st.sampled_from(["xor", "delta2"]))
def test_eight_byte_deltas_invert_exactly(bits: list[int], stride: int, delta: str) -> None:
    values = np.array(bits[:len(bits) // stride * stride], dtype="<u8").view("<f8")
    data = pack_eight(values, stride, delta)
    assert len(data) == 8 * len(values)
    part = Part(len(values), {"delta": delta}, b"", data, stride)
    back = eight_values([part], np.float64)
    assert back.view("<u8").tolist() == values.view("<u8").tolist()


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(records, min_size=1, max_size=30), st.lists(st.integers(0, 30), max_size=5))
def test_blocks_decoded_together_equal_the_records(recs: list[CycleRecord],
                                                   cuts: list[int]) -> None:
    """A run of blocks decodes in one go (deltas undone across the run, corrected at each
    block's start) to exactly the records they hold."""
    bounds = sorted({0, len(recs), *(c % (len(recs) + 1) for c in cuts)})
    parsed = [parse_block(msgpack.unpackb(msgpack.packb(
        encode_block(CycleBlock.from_records(recs[a:b])), use_bin_type=True), raw=False))
        for a, b in zip(bounds, bounds[1:])]
    back = decode_blocks(parsed).records()
    assert [record_bits(r) for r in back] == [record_bits(r) for r in recs]


def test_byte_planes_are_as_documented() -> None:
    """docs/SESSION_FORMAT.md, "Eight-byte columns": the value 1.0 (bits 0x3FF0...0) after
    a row of zeros, XOR delta, is stored as plane 0 (least significant bytes) first."""
    values = np.array([0.0, 1.0])
    data = pack_eight(values, 1, "xor")
    planes = [data[2 * p:2 * p + 2] for p in range(8)]
    assert planes[:6] == [b"\x00\x00"] * 6
    assert planes[6] == b"\x00\xf0" and planes[7] == b"\x00\x3f"
    # second difference of (1, 2, 4) as uint64: 1, 2 - 2·1 = 0, 4 - 2·2 + 1 = 1
    ints = np.array([1, 2, 4], dtype="<i8")
    assert np.frombuffer(pack_eight(ints, 1, "delta2"), np.uint8).reshape(8, 3)[0].tolist() \
        == [1, 0, 1]


def test_a_block_written_before_the_clearance_columns_reads_them_as_nil(monkeypatch) -> None:
    # Columns added within version 2 (docs/SESSION_FORMAT.md, "Versions"): an older
    # writer's block lacks them and must still decode, with nil there.
    import runtime.sessions.log_blocks as blocks
    rec = CycleRecord(cycle=1, t_s=0.002, axes=(), buttons=(), enabled=True,
                      enable_reason="enable held", twist=(0.0,) * 6, frame="base",
                      q=(0.1, 0.2), rates=(0.0, 0.0), damping=0.0, sigma_min=0.3,
                      manipulability=0.1, achieved_twist=(0.0,) * 6, tracking_error=0.0,
                      scales={}, binding_limit=None, period_s=DT, compute_s=1e-4,
                      overrun=False, min_clearance_m=0.05, clearance_arm="gripper",
                      clearance_other="bench")
    older = tuple((n, k) for n, k in COLUMNS if n not in blocks.ADDED_COLUMNS)
    monkeypatch.setattr(blocks, "COLUMNS", older)
    data = encode_block(CycleBlock.from_records([rec]))
    monkeypatch.undo()
    (back,) = decode_block(msgpack.unpackb(msgpack.packb(data), raw=False)).records()
    assert (back.min_clearance_m, back.clearance_arm, back.clearance_pair) == (None, None, None)
    assert back.q == rec.q and back.safety_state == rec.safety_state
    (full,) = through_a_block([rec])
    assert full.clearance_pair == ("gripper", "bench") and full.min_clearance_m == 0.05


def test_columns_cover_every_record_field() -> None:
    assert [name for name, _ in COLUMNS] == [f.name for f in dataclasses.fields(CycleRecord)]


# ----------------------------------------------------------------------------------------
# Files with several blocks
# ----------------------------------------------------------------------------------------

def drive_like_records(arm, n: int) -> list[CycleRecord]:
    """`n` cycles of the shipped square profile through today's control cycle, with an
    ideal arm (q += q̇·dt): records as `jogwire drive` writes them."""
    cycle = ControlCycle(arm, load_pad("keyboard"), RunSettings(rate_hz=RATE_HZ))
    source = ScriptSource(load_script("square", arm))
    q = arm.home()
    out_records = []
    for k in range(n):
        t = k * DT
        frame = source.read(t)
        out = cycle.step(frame, t, q, t)
        out_records.append(cycle_record(k, t, frame, out, q, state_age_s=0.0,
                                        overrun_streak=0, period_s=DT, compute_s=1e-4,
                                        overrun=False))
        q = q + out.rates * DT
    return out_records


STARTED = datetime(2031, 5, 6, 7, 8, 9, tzinfo=timezone.utc)
SETTINGS = {"command": "drive", "pad": "keyboard", "rate_hz": RATE_HZ,
            "reduced_locked": False, "stale_after_s": 0.05, "overrun_limit": 5}


def write_log(path: Path, arm, recs: list[CycleRecord], version: int = 2) -> Path:
    """Blocks of CALLER_BLOCK_RECORDS (encoded by the caller: the same cut every run)."""
    with SessionRecorder.start(path, arm, SETTINGS, encode_in_caller=True,
                               format_version=version, started_at=STARTED,
                               started_monotonic_ns=1) as rec:
        for r in recs:
            assert rec.record(r)
    return path


def frames(data: bytes) -> list[tuple[int, int]]:
    """(start, end) of each complete frame after the preamble, read with struct alone."""
    out, pos = [], PREAMBLE_BYTES
    while pos + FRAME_HEAD_BYTES <= len(data):
        _, length, _ = struct.unpack_from("<2sII", data, pos)
        if pos + FRAME_HEAD_BYTES + length > len(data):
            break
        out.append((pos, pos + FRAME_HEAD_BYTES + length))
        pos += FRAME_HEAD_BYTES + length
    return out


@pytest.fixture(scope="module")
def session(arm, tmp_path_factory) -> tuple[Path, list[CycleRecord]]:
    recs = drive_like_records(arm, 4 * CALLER_BLOCK_RECORDS + 100)      # five blocks
    return write_log(tmp_path_factory.mktemp("v2") / "square.jwlog", arm, recs), recs


def test_a_drive_session_round_trips_through_the_file(session) -> None:
    path, recs = session
    s = read_session(path)
    assert s.problems == () and s.closed_cleanly and s.header.format_version == 2
    assert [record_bits(r) for r in s.records] == [record_bits(r) for r in recs]
    data = path.read_bytes()
    kinds = [msgpack.unpackb(data[a + FRAME_HEAD_BYTES:b], raw=False)["kind"]
             for a, b in frames(data)]
    assert kinds == ["header"] + [BLOCK_KIND] * 5 + ["end"]


def test_a_corrupted_block_in_the_middle_costs_that_block_only(session, tmp_path) -> None:
    path, recs = session
    data = bytearray(path.read_bytes())
    start, end = frames(bytes(data))[3]          # the third block: cycles 512…767
    data[(start + end) // 2] ^= 0x10
    bad = tmp_path / "bad.jwlog"
    bad.write_bytes(bytes(data))
    s = read_session(bad)
    lost = range(2 * CALLER_BLOCK_RECORDS, 3 * CALLER_BLOCK_RECORDS)
    assert [r.cycle for r in s.records] == [r.cycle for r in recs if r.cycle not in lost]
    assert [(p.kind, p.offset) for p in s.problems] == [(CORRUPT, start), (GAP, end)]
    assert "cycles 512..767 are missing" in s.problems[1].message
    assert s.closed_cleanly


def test_a_torn_last_block_keeps_the_blocks_before(session, tmp_path) -> None:
    path, recs = session
    data = path.read_bytes()
    start, end = frames(data)[5]                 # the last block
    torn = tmp_path / "torn.jwlog"
    torn.write_bytes(data[:end - 7])
    s = read_session(torn)
    assert len(s.records) == 4 * CALLER_BLOCK_RECORDS
    assert [p.kind for p in s.problems] == [TORN_TAIL, "unclosed"]
    assert s.problems[0].offset == start


def test_a_well_framed_block_with_bad_content_is_skipped_and_reported(arm, tmp_path) -> None:
    recs = drive_like_records(arm, 30)
    good = encode_block(CycleBlock.from_records(recs[:10]))
    wrong_joints = encode_block(CycleBlock.from_records(
        [dataclasses.replace(r, q=r.q[:3]) if r.cycle == 12 else r for r in recs[10:20]]))
    data = write_log(tmp_path / "a.jwlog", arm, []).read_bytes()
    body = data[:frames(data)[-1][0]]            # without the end record
    body += encode_frame(good) + encode_frame({**good, "body": b"not zlib"})
    body += encode_frame(wrong_joints)
    path = tmp_path / "b.jwlog"
    path.write_bytes(body)
    s = read_session(path)
    assert [r.cycle for r in s.records] == list(range(10)) + [10, 11] + list(range(13, 20))
    assert [p.kind for p in s.problems] == [BAD_RECORD, BAD_RECORD, GAP, "unclosed"]
    assert "cannot be read" in s.problems[0].message
    assert "1 of 10 cycles in this block are malformed" in s.problems[1].message
    assert "cycles 12..12 are missing" in s.problems[2].message


# ----------------------------------------------------------------------------------------
# Fuzzing the reader
# ----------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def small_log(arm, tmp_path_factory) -> tuple[bytes, list[tuple[int, int]], list[list[int]]]:
    """A file of six blocks of 40 cycles, its frames and each block's cycle numbers."""
    recs = drive_like_records(arm, 240)
    path = tmp_path_factory.mktemp("fuzz") / "f.jwlog"
    SessionRecorder.start(path, arm, SETTINGS, flush_interval_s=60).close()   # header, end
    data = path.read_bytes()
    head = data[:frames(data)[0][1]]              # preamble and header
    blocks = [encode_frame(encode_block(CycleBlock.from_records(recs[i:i + 40])))
              for i in range(0, 240, 40)]
    data = head + b"".join(blocks) + data[frames(data)[-1][0]:]
    return data, frames(data), [list(range(i, i + 40)) for i in range(0, 240, 40)]


garbage_frame = st.one_of(
    st.binary(max_size=64).map(lambda b: encode_frame_raw(b)),
    st.fixed_dictionaries({"kind": st.just(BLOCK_KIND),
                           "count": st.integers(-2, 2**40), "codec": st.just("zlib"),
                           "body": st.binary(max_size=64).map(zlib.compress)}
                          ).map(encode_frame),
    st.binary(min_size=1, max_size=200))       # not a frame at all


def encode_frame_raw(payload: bytes) -> bytes:
    length = struct.pack("<I", len(payload))
    return b"\xc1J" + length + struct.pack("<I", zlib.crc32(payload, zlib.crc32(length))) \
        + payload


@settings(max_examples=200, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(cut=st.integers(0, 10**6), flips=st.lists(st.integers(0, 10**9), max_size=4),
       inserts=st.lists(st.tuples(st.integers(1, 6), garbage_frame), max_size=3))
def test_fuzzed_files_never_raise_and_keep_every_untouched_block(
        small_log, tmp_path_factory, cut: int, flips: list[int],
        inserts: list[tuple[int, bytes]]) -> None:
    data, spans, cycles = small_log
    body_start = spans[0][1]                      # damage after the header
    cut = body_start + cut % (len(data) - body_start + 1)
    blocks = [(a, b, c) for (a, b), c in zip(spans[1:7], cycles)]
    # Build the damaged file piece by piece, remembering where each original block lands.
    pieces, where, pos = [data[:body_start]], {}, body_start
    for k, (a, b, _) in enumerate(blocks):
        for at, junk in inserts:
            if at == k:
                pieces.append(junk)
                pos += len(junk)
        where[k] = (pos, pos + b - a)
        pieces.append(data[a:b])
        pos += b - a
    pieces.append(data[spans[-1][0]:])
    damaged = bytearray(b"".join(pieces))[:cut + sum(len(j) for _, j in inserts)]
    touched = set()
    for flip in flips:
        i = body_start + flip % max(1, len(damaged) - body_start)
        if i < len(damaged):
            damaged[i] ^= 1 << (flip % 8)
            touched.add(i)
    path = tmp_path_factory.mktemp("fuzzed") / "f.jwlog"
    path.write_bytes(bytes(damaged))

    with SessionReader(path) as reader:
        got = [r.cycle for r in reader]
    intact = [k for k, (a, b) in where.items()
              if b <= len(damaged) and not any(a <= i < b for i in touched)]
    for k in intact:                                  # every untouched block is kept, whole
        assert set(cycles[k]) <= set(got), (k, reader.problems)
    assert len(got) <= 240 + 4 * 40                   # and nothing is invented beyond junk


# ----------------------------------------------------------------------------------------
# Formats 1 and 2 of the same session
# ----------------------------------------------------------------------------------------

def test_formats_1_and_2_summarise_and_rerun_identically(arm, tmp_path, capsys) -> None:
    recs = drive_like_records(arm, 2 * CALLER_BLOCK_RECORDS + 50)
    v1 = write_log(tmp_path / "v1.jwlog", arm, recs, version=1)
    v2 = write_log(tmp_path / "v2.jwlog", arm, recs, version=2)
    assert v2.stat().st_size < v1.stat().st_size / 4

    def same(summary: dict) -> dict:
        return {k: v for k, v in summary.items() if k not in ("file", "format_version")}
    one, two = same(summarise(v1)), same(summarise(v2))
    assert json.dumps(one, sort_keys=True) == json.dumps(two, sort_keys=True)

    reruns = []
    for path in (v1, v2):
        assert main(["replay", str(path), "--rerun", "--json"]) == 0
        result = json.loads(capsys.readouterr().out)
        result.pop("log", None)
        result.pop("file", None)
        reruns.append(result)
    assert reruns[0] == reruns[1]
    assert reruns[0]["cycles"] == len(recs) and reruns[0]["largest_difference"] == 0.0
    assert [record_bits(r) for r in read_session(v1).records] == \
        [record_bits(r) for r in read_session(v2).records]


def test_nan_sigma_of_unsolved_cycles_survives(arm, tmp_path) -> None:
    recs = drive_like_records(arm, 20)
    assert any(math.isnan(r.sigma_min) for r in recs)       # cycles before enabling
    back = read_session(write_log(tmp_path / "n.jwlog", arm, recs)).records
    assert [record_bits(r) for r in back] == [record_bits(r) for r in recs]


@pytest.mark.sim
def test_preflight_plays_formats_1_and_2_of_a_session_alike(arm, tmp_path, capsys) -> None:
    """`jogwire preflight ARM LOG`: a recorded session as the profile, whichever format."""
    recs = drive_like_records(arm, 300)
    results = []
    for version in (1, 2):
        log = write_log(tmp_path / f"v{version}.jwlog", arm, recs, version=version)
        code = main(["preflight", "elbow6", str(log), "--out", str(tmp_path / f"out{version}"),
                     "--no-report", "--json"])
        out = json.loads(capsys.readouterr().out)
        assert code in (0, 1), out
        results.append(out)
    one, two = results
    assert one["verdict"] == two["verdict"] and one["cycles"] == two["cycles"] > 0
    assert one["tcp_peak_speed"] == two["tcp_peak_speed"]
    assert [j["peak_speed"] for j in one["joints"]] == [j["peak_speed"] for j in two["joints"]]
