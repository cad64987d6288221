"""A lockstep run's log blocks gathered from the loop's rows (`cycle_columns`) are the blocks
its records would make.

The reference is the project's own record path, itself checked bit for bit against the file
format (test_log_format2.py): each cycle's `cycle_record`, gathered by
`CycleBlock.from_records` and packed by `pack_records`. The comparison is of packed bytes,
so every float counts by its IEEE 754 bit pattern (NaN payloads, -0.0). The cycles come
from the real control cycle in a workcell, with every kind of input the loop meets.
"""

from __future__ import annotations

import math
import struct
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest

from runtime.arm.cell import load_cell
from runtime.arm.load import load_arm
from runtime.control.cycle import ControlCycle
from runtime.control.intent import DirectCommand, InputFrame
from runtime.control.pads import load_pad
from runtime.control.settings import RunSettings
from runtime.sessions.cycle_columns import CycleColumns
from runtime.sessions.log_blocks import pack_block, pack_records
from runtime.sessions.log_reader import read_session
from runtime.sessions.log_schema import cycle_record, frame_to_wire
from runtime.sessions.log_writer import SessionRecorder
from runtime.sessions.preflight import TraceBuilder
from runtime.sessions.preflight_run import _commanded_twist, _hand_over

RATE_HZ = 500.0
DT = 1.0 / RATE_HZ
# An elbow6 pose whose TCP lies within the bench cell's influence distance (found by a
# seeded random search here): the solve measures and reports the nearest pair.
NEAR_THE_BENCH = (0.056, 1.51, -1.59, 2.255, -0.657, -0.578)
STARTED = datetime(2031, 5, 6, 7, 8, 9, tzinfo=timezone.utc)


@pytest.fixture(scope="module")
def arm():
    return load_arm("elbow6")


def frame_for(k: int, rng: np.random.Generator) -> InputFrame:
    """Keys, pad buttons, raw axes, a lost device, direct twists beyond the caps, joint jogs
    and a stop, 40 cycles each in turn; each stretch starts with enable released and reset
    pressed (the safety gate wants a fresh press of enable)."""
    kind, at = k // 40 % 6, k % 40
    if at < 3:
        return InputFrame(device="keyboard", present=True, pressed=frozenset({"backspace"}),
                          command=DirectCommand(enable=False, reset=True) if kind % 2 else None)
    if kind == 0:      # keys: hold to move, translate and rotate, the frame and mode toggles
        keys = {"space", str(rng.choice(["w", "a", "r", "i", "j", "u"]))}
        keys |= {"t"} if at == 20 else set()
        keys |= {"v"} if at == 30 else set()
        return InputFrame(device="keyboard", present=True, pressed=frozenset(keys))
    if kind == 1:      # pad-style buttons and axes the keyboard pad does not map
        return InputFrame(device="pad", present=True, axes=tuple(rng.uniform(-1, 1, 4)),
                          pressed=frozenset({0, 3, "space", "d"} if k % 2 else {5, "space"}))
    if kind == 2:      # the device gone
        return InputFrame(device="keyboard", present=at < 20)
    if kind == 3:      # a direct twist beyond the caps, base or tool axes, reduced speed
        return InputFrame(device="script", present=True, command=DirectCommand(
            twist=tuple(rng.uniform(-2.0, 2.0, 6)), frame="tool" if at > 20 else "base",
            reduced=at > 30))
    if kind == 4:      # a joint jog
        return InputFrame(device="script", present=True, command=DirectCommand(
            joint=int(k % 6), joint_rate=float(rng.uniform(-3.0, 3.0))))
    return InputFrame(device="script", present=True,               # a stop, held a while
                      command=DirectCommand(twist=(0.1, 0, 0, 0, 0, 0), stop=20 <= at < 25))


def loop_cycles(arm, n: int, seed: int = 3) -> list[tuple]:
    """`n` cycles of the real control cycle in the shipped bench workcell (clearance in the
    solve), an ideal arm (q += q̇·dt): each as `cycle_record`'s arguments."""
    rng = np.random.default_rng(seed)
    cycle = ControlCycle(arm, load_pad("keyboard"), RunSettings(rate_hz=RATE_HZ),
                         cell=load_cell("bench", arm))
    q = np.array(NEAR_THE_BENCH)
    out = []
    for k in range(n):
        t = k * DT
        frame = frame_for(k, rng)
        q_used = None if k == 0 else q
        step = cycle.step(frame, t, q_used, None if k == 0 else t)
        out.append(((k, t, frame, step, q_used),
                    dict(state_age_s=None if k == 0 else 0.002 * (k % 3),
                         overrun_streak=k % 4, period_s=DT + 1e-6 * (k % 11),
                         compute_s=1e-4 + 1e-7 * k, overrun=k % 13 == 0)))
        q = q + step.rates * DT
    return out


def columns_of(cycles) -> CycleColumns:
    columns = CycleColumns()
    for args, kwargs in cycles:
        columns.add(*args, **kwargs)
    return columns


def records_of(cycles):
    return [cycle_record(*args, **kwargs) for args, kwargs in cycles]


@pytest.fixture(scope="module")
def all_cycles(arm):
    return loop_cycles(arm, 6 * 40 * 2)


@pytest.fixture(scope="module")
def cycles(all_cycles):
    """The cycles with a measured pose (a log or a trace holds no other)."""
    return all_cycles[1:]


def test_the_cycles_cover_what_the_loop_meets(all_cycles) -> None:
    # A check of the check: every kind of cycle the comparison should see is there.
    cycles = all_cycles
    outs = [args[3] for args, _ in cycles]
    sols = [o.solution for o in outs if o.solution is not None]
    assert any(o.solution is None for o in outs)
    assert {o.intent.mode for o in outs} == {"cartesian", "joint"}
    assert {o.intent.frame for o in outs} == {"base", "tool"}
    assert any(o.intent.reduced for o in outs)
    assert any(s.binding_limit is not None for s in sols)
    assert any(s.clearance is not None and s.clearance.nearest_pair is not None
               for s in sols)
    assert any(any(args[2].button_flags(16)) for args, _ in cycles)
    assert any(args[2].axes for args, _ in cycles)
    assert any(args[4] is None for args, _ in cycles)


def test_a_block_of_rows_packs_to_the_bytes_of_its_records(all_cycles) -> None:
    cycles = all_cycles
    for lo in range(0, len(cycles), 128):
        part = cycles[lo:lo + 128]
        block = columns_of(part).block()
        assert block.n == len(part)
        assert pack_block(block) == pack_records(records_of(part))


def test_rows_made_records_are_the_cycles_records(all_cycles) -> None:
    cycles = all_cycles
    made = columns_of(cycles).records()
    expected = records_of(cycles)
    assert [pack_records([r]) for r in made] == [pack_records([r]) for r in expected]
    assert [type(v) for v in vars(made[5]).values()] == \
        [type(v) for v in vars(expected[5]).values()]


def test_an_empty_collection_is_an_empty_block() -> None:
    block = CycleColumns().block()
    assert block.n == 0
    assert pack_block(block) == pack_records([])


def write(path: Path, arm, hand_over) -> Path:
    with SessionRecorder.start(path, arm, {"rate_hz": RATE_HZ}, encode_in_caller=True,
                               started_at=STARTED, started_monotonic_ns=1) as recorder:
        hand_over(recorder)
    return path


def test_a_log_written_in_blocks_is_the_log_written_record_by_record(arm, cycles,
                                                                     tmp_path) -> None:
    records = records_of(cycles)

    def by_record(recorder):
        for rec in records:
            assert recorder.record(rec)

    def by_block(recorder):
        for lo in range(0, len(cycles), 256):
            assert recorder.record_block(columns_of(cycles[lo:lo + 256]).block())

    one = write(tmp_path / "records.jwlog", arm, by_record).read_bytes()
    other = write(tmp_path / "blocks.jwlog", arm, by_block).read_bytes()
    # Everything up to the end record (which says when the session ended) byte for byte
    assert one[:end_record_at(one)] == other[:end_record_at(other)]
    assert read_session(tmp_path / "blocks.jwlog").problems == ()


def end_record_at(data: bytes) -> int:
    """Where the last frame (the end record) starts: frames are marker, length, CRC,
    payload (docs/SESSION_FORMAT.md)."""
    pos, last = 10, 10
    while pos + 10 <= len(data):
        last = pos
        pos += 10 + struct.unpack_from("<2sII", data, pos)[1]
    return last


def test_a_block_that_cannot_be_packed_goes_record_by_record(arm, cycles, tmp_path) -> None:
    # A value the log cannot hold (an object in the input column) costs that record only.
    block = columns_of(cycles[:50]).block()
    block.columns["input"][7] = {"device": object()}
    path = tmp_path / "bad.jwlog"
    with SessionRecorder.start(path, arm, {"rate_hz": RATE_HZ}, encode_in_caller=True) as rec:
        assert rec.record_block(block)             # taken; the bad record found on packing
    stats = rec.stats()
    assert (stats.written, stats.unencodable) == (49, 1)
    kept = read_session(path).records
    assert [r.cycle for r in kept] == [c for c in range(1, 51) if c != 8]


def trace_arrays(trace: TraceBuilder) -> dict:
    built = trace.build()
    return {name: getattr(built, name) for name in built.__dataclass_fields__}


def same(a, b) -> bool:
    if isinstance(a, np.ndarray):
        return a.dtype == b.dtype and a.shape == b.shape and \
            bool(np.all((a == b) | (np.isnan(a) & np.isnan(b)) if a.dtype.kind == "f"
                        else a == b))
    return a == b


def test_a_trace_fed_in_blocks_is_the_trace_fed_record_by_record(arm, cycles) -> None:
    q0 = arm.home()
    one, other = TraceBuilder(arm, q0, np.zeros(arm.n), capacity=16), \
        TraceBuilder(arm, q0, np.zeros(arm.n), capacity=16)
    twists = [_commanded_twist(args[3]) for args, _ in cycles]
    for (args, _), rec, twist in zip(cycles, records_of(cycles), twists):
        one.add_cycle(rec, commanded_twist=twist)
    for lo in range(0, len(cycles), 100):          # growing past its capacity on the way
        other.add_cycles(columns_of(cycles[lo:lo + 100]).block(),
                         np.array(twists[lo:lo + 100]))
    for k, (args, _) in enumerate(cycles):
        q_after = args[3].rates * DT + k
        for trace in (one, other):
            trace.add_state(q_after, args[3].rates, k % 2 == 0, cycle=k)
    a, b = trace_arrays(one), trace_arrays(other)
    assert a.keys() == b.keys()
    assert all(same(a[name], b[name]) for name in a), [n for n in a if not same(a[n], b[n])]
    assert any(math.isnan(x) for x in a["twist_cmd"][:, 0])      # joint jogs: NaN rows


def test_a_state_may_come_before_its_block_of_cycles(arm, cycles) -> None:
    trace = TraceBuilder(arm, arm.home(), np.zeros(arm.n), capacity=16)
    for k in range(40):                            # beyond the capacity: it grows
        trace.add_state(np.full(arm.n, float(k)), np.zeros(arm.n), cycle=k)
    trace.add_cycles(columns_of(cycles[:40]).block(),
                     np.array([_commanded_twist(args[3]) for args, _ in cycles[:40]]))
    built = trace.build()
    assert built.n_cycles == 40
    assert np.array_equal(built.q[:, 0], np.arange(40.0))
    with pytest.raises(IndexError):
        trace.add_state(np.zeros(arm.n), np.zeros(arm.n), cycle=-1)


def test_the_run_falls_back_to_records_when_a_block_will_not_gather(arm, cycles,
                                                                   tmp_path) -> None:
    # A cycle whose values fit no column (a name that is not text): the log skips that
    # record and keeps the others; the verdict's trace still gets every cycle.
    columns = columns_of(cycles[:30])
    row = list(columns.rows[4])
    row[16] = 42                                   # binding_limit
    columns.rows[4] = tuple(row)
    commanded = [_commanded_twist(args[3]) for args, _ in cycles[:30]]
    trace = TraceBuilder(arm, arm.home(), np.zeros(arm.n))
    path = tmp_path / "fallback.jwlog"
    with SessionRecorder.start(path, arm, {"rate_hz": RATE_HZ}, encode_in_caller=True) as rec:
        _hand_over(columns, commanded, rec, trace)
    assert len(columns) == 0 and not commanded
    assert trace.build().n_cycles == 30
    assert (rec.stats().written, rec.stats().unencodable) == (29, 1)
    assert [r.cycle for r in read_session(path).records] == [c for c in range(1, 31) if c != 5]


def test_gathering_needs_no_record_objects(cycles, monkeypatch) -> None:
    # The point of the rows: a block is gathered without a CycleRecord per cycle.
    import runtime.sessions.log_schema as log_schema
    columns = columns_of(cycles[:64])

    def no_records(*args, **kwargs):
        raise AssertionError("a record was built")
    monkeypatch.setattr(log_schema, "CycleRecord", no_records)
    assert columns.block().n == 64


def test_each_field_of_a_record_comes_from_its_own_part_of_the_cycle(all_cycles) -> None:
    # The row is positional; every field named here is read back by name from the cycle.
    seen_solved = seen_unsolved = seen_pair = False
    for args, kwargs in all_cycles:
        k, t, frame, out, q = args
        rec = cycle_record(*args, **kwargs)
        sol, verdict, intent = out.solution, out.verdict, out.intent
        assert (rec.cycle, rec.t_s, rec.axes) == (k, t, tuple(frame.axes))
        assert rec.buttons == frame.button_flags(16)
        assert (rec.enabled, rec.enable_reason, rec.safety_state) == \
            (verdict.allowed, verdict.reason, verdict.state)
        assert (rec.twist, rec.frame, rec.reduced) == \
            (tuple(intent.twist.tolist()), intent.frame, intent.reduced)
        assert rec.q == (() if q is None else tuple(q.tolist()))
        assert rec.rates == tuple(out.rates.tolist())
        assert (rec.period_s, rec.compute_s, rec.overrun, rec.overrun_streak,
                rec.state_age_s) == (kwargs["period_s"], kwargs["compute_s"],
                                     kwargs["overrun"], kwargs["overrun_streak"],
                                     kwargs["state_age_s"])
        assert rec.input == frame_to_wire(frame)
        if sol is None:
            seen_unsolved = True
            assert (rec.damping, rec.tracking_error, rec.scales, rec.binding_limit) == \
                (0.0, 0.0, {}, None)
            assert math.isnan(rec.sigma_min) and math.isnan(rec.manipulability)
            assert rec.achieved_twist == (0.0,) * 6 and rec.min_clearance_m is None
        else:
            seen_solved = True
            assert (rec.damping, rec.sigma_min, rec.manipulability, rec.tracking_error) == \
                (sol.damping, sol.sigma_min, sol.manipulability, sol.tracking_error)
            assert rec.achieved_twist == tuple(sol.achieved_twist.tolist())
            assert rec.scales == sol.scales and rec.scales is not sol.scales
            assert rec.binding_limit == sol.binding_limit
            near = sol.clearance                   # None in a joint jog
            assert rec.min_clearance_m == (None if near is None else near.min_distance_m)
            assert rec.clearance_pair == (None if near is None else near.nearest_pair)
            seen_pair |= rec.clearance_pair is not None
    assert seen_solved and seen_unsolved and seen_pair
