"""sim/arm_side.py without sockets or PyBullet: the guard, the watchdog ramp, and the session
(hello, one controller, sequence and lateness rules, status)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from runtime.arm.load import load_arm
from runtime.errors import ProtocolError
from runtime.link.protocol import (
    MAX_CONTACTS,
    CellHello,
    Hello,
    Rates,
    Refuse,
    Twist,
    decode,
    encode,
    hello_for,
)
from sim.arm_side import MAX_IN_ORDER, ArmSession, Reading, guard_rates, ramp_to_zero, stop_time_s

MS = 1_000_000  # ns


@pytest.fixture
def arm():
    return load_arm("reach7")


# ----------------------------------------------------------------------------------------
# guard_rates
# ----------------------------------------------------------------------------------------

def test_guard_passes_rates_inside_the_limits(arm) -> None:
    qd = 0.5 * arm.max_speed * np.array([1, -1, 1, -1, 1, -1, 1])
    out, limited = guard_rates(arm, arm.home(), qd, 1e-3)
    assert not limited and np.array_equal(out, qd)


def test_guard_scales_speed_uniformly_keeping_the_direction(arm) -> None:
    qd = np.zeros(arm.n)
    qd[1], qd[3] = 3.0 * arm.max_speed[1], 0.5 * arm.max_speed[3]
    out, limited = guard_rates(arm, arm.home(), qd, 1e-3)
    assert limited
    assert math.isclose(out[1], arm.max_speed[1])              # the binding joint at its max
    assert np.allclose(out / 3.0 * 3.0, qd / 3.0)              # same ratio for every joint


def test_guard_brakes_toward_a_position_limit(arm) -> None:
    # v² = 2ad (constant deceleration): 0.01 rad before the limit at a = rated accel.
    q = arm.home()
    q[0] = arm.upper[0] - 0.01
    qd = np.zeros(arm.n)
    qd[0] = arm.max_speed[0]
    out, limited = guard_rates(arm, q, qd, 1e-3)
    assert limited
    assert math.isclose(out[0], math.sqrt(2 * arm.rated_accel[0] * 0.01))
    away, limited = guard_rates(arm, q, -qd, 1e-3)            # moving away is free
    assert not limited and np.array_equal(away, -qd)


def test_guard_stops_everything_when_a_joint_is_pushed_past_its_limit(arm) -> None:
    q = arm.home()
    q[2] = arm.lower[2] - 1e-4
    qd = 0.1 * arm.max_speed
    qd[2] = -0.1
    out, limited = guard_rates(arm, q, qd, 1e-3)
    assert limited and np.all(out == 0.0)


def test_guard_one_step_never_crosses_the_limit(arm) -> None:
    q = arm.home()
    q[4] = arm.upper[4] - 1e-5          # sqrt(2ad) would still allow ~0.1 rad/s
    qd = np.zeros(arm.n)
    qd[4] = 1.0
    out, _ = guard_rates(arm, q, qd, 1e-3)
    assert out[4] * 1e-3 <= 1e-5 * (1 + 1e-9)     # (upper − q) itself carries round-off


# ----------------------------------------------------------------------------------------
# ramp_to_zero
# ----------------------------------------------------------------------------------------

def test_ramp_stops_all_joints_together_at_rated_deceleration(arm) -> None:
    dt = 1e-3
    qd = np.array([1.0, -0.5, 0.2, 0.0, 0.3, -1.0, 2.0])
    decel = arm.rated_accel
    T = stop_time_s(qd, decel)
    binding = int(np.argmax(np.abs(qd) / decel))
    steps, v = 0, qd.copy()
    while np.any(v != 0.0):
        new = ramp_to_zero(v, decel, dt)
        assert np.all(np.abs(new - v) <= decel * dt * (1 + 1e-12))    # never above rated
        if np.any(new != 0):
            assert np.allclose(new / np.abs(new).max(), qd / np.abs(qd).max())  # direction
        v, steps = new, steps + 1
        assert steps < 10_000
    assert steps == math.ceil(T / dt - 1e-9)
    assert math.isclose(abs(qd[binding]) - abs(ramp_to_zero(qd, decel, dt)[binding]),
                        decel[binding] * dt)


def test_ramp_of_zero_is_zero(arm) -> None:
    assert np.all(ramp_to_zero(np.zeros(arm.n), arm.rated_accel, 1e-3) == 0)


# ----------------------------------------------------------------------------------------
# ArmSession
# ----------------------------------------------------------------------------------------

RUNTIME, OTHER, WATCHER = b"runtime-1", b"runtime-2", b"observer"


@pytest.fixture
def session(arm) -> ArmSession:
    return ArmSession(hello_for(arm, "sim", stale_after_s=0.1), stale_after_s=0.1)


def runtime_hello(arm, role="runtime") -> Hello:
    return hello_for(arm, role, stale_after_s=0.1)


def rates(seq: int, t_ns: int, n: int = 7, v: float = 0.1) -> Rates:
    return Rates(seq, t_ns, (v,) * n)


def kinds(replies) -> list[str]:
    return [type(m).__name__ for _, m in replies]


def test_hello_is_answered_and_the_runtime_takes_control(session, arm) -> None:
    replies = session.on_message(RUNTIME, runtime_hello(arm), 0)
    assert kinds(replies) == ["Hello"] and replies[0][1].role == "sim"
    assert session.controller == RUNTIME and session.greet == {RUNTIME}
    assert session.decide(0).status == "waiting"


def test_mismatched_hello_is_refused_and_nothing_is_followed(session) -> None:
    other = runtime_hello(load_arm("elbow6"))
    replies = session.on_message(RUNTIME, other, 0)
    assert kinds(replies) == ["Hello", "Refuse"]
    refuse = replies[1][1]
    assert refuse.code == "mismatch" and "joint count differs: ours 7, theirs 6" in refuse.reason
    assert session.events and "refused runtime hello" in session.events[0]
    assert session.on_message(RUNTIME, rates(1, 0, n=7), 1 * MS) == []   # one refusal / 100 ms
    replies = session.on_message(RUNTIME, rates(2, 0, n=7), 101 * MS)
    assert kinds(replies) == ["Refuse"] and replies[0][1].code == "no_hello"
    assert session.decide(102 * MS).qd is None and session.controller is None


def test_rates_before_hello_are_refused_at_a_limited_rate(session) -> None:
    replies = [session.on_message(RUNTIME, rates(s, 0), s * MS) for s in range(1, 300)]
    refusals = sum(len(r) for r in replies)
    assert refusals == 3                      # t = 1, 101, 201 ms: one per 100 ms
    assert session.dropped["no_hello"] == 299


def test_a_second_runtime_is_busy_until_the_first_goes_quiet(session, arm) -> None:
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    session.on_message(RUNTIME, rates(1, 0), 50 * MS)
    replies = session.on_message(OTHER, runtime_hello(arm), 100 * MS)
    assert kinds(replies) == ["Hello", "Refuse"] and replies[1][1].code == "busy"
    replies = session.on_message(OTHER, runtime_hello(arm), 151 * MS)   # first silent 101 ms
    assert kinds(replies) == ["Hello"] and session.controller == OTHER
    assert session.decide(152 * MS).status == "waiting"     # the new controller starts clean
    replies = session.on_message(RUNTIME, rates(2, 0), 160 * MS)
    assert replies[0][1].code == "no_hello"


def test_newest_fresh_rates_are_followed_old_and_late_ones_dropped(session, arm) -> None:
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    offset = 7 * 10**9   # the runtime's clock is elsewhere
    session.on_message(RUNTIME, rates(1, 0 * MS - offset, v=0.1), 1 * MS)
    session.on_message(RUNTIME, rates(3, 2 * MS - offset, v=0.3), 3 * MS)
    session.on_message(RUNTIME, rates(2, 1 * MS - offset, v=0.2), 3 * MS)   # reordered
    session.on_message(RUNTIME, rates(3, 2 * MS - offset, v=0.3), 3 * MS)   # duplicate
    decision = session.decide(4 * MS)
    assert decision.status == "tracking" and np.allclose(decision.qd, 0.3)
    assert session.dropped["old_seq"] == 2 and session.dropped["superseded"] == 1
    # Sent at 4 ms but arriving 150 ms later than usual: late, dropped, not followed.
    session.on_message(RUNTIME, rates(4, 4 * MS - offset, v=0.4), 155 * MS)
    assert session.dropped["late"] == 1
    assert session.decide(155 * MS).status == "stale"     # 0.3 arrived at 3 ms: too old
    assert session.applied.seq == 3


def test_in_order_session_follows_every_rates_message_once_in_order(arm) -> None:
    """Lockstep: the runtime may send the next rates before the state after the last came
    back; each accepted message is stepped once, in order, and none is superseded."""
    session = ArmSession(hello_for(arm, "sim", stale_after_s=0.1), stale_after_s=0.1,
                         in_order=True)
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    for seq in (1, 2, 3):
        session.on_message(RUNTIME, rates(seq, seq * MS, v=0.1 * seq), seq * MS)
    session.on_message(RUNTIME, rates(2, 2 * MS), 4 * MS)          # a repeat: still dropped
    taken = [session.take_pending(5 * MS) for _ in range(4)]
    assert [r.seq for r in taken[:3]] == [1, 2, 3] and taken[3] is None
    assert session.applied.seq == 3 and session.dropped == {"old_seq": 1}


def test_in_order_queue_is_bounded(arm) -> None:
    session = ArmSession(hello_for(arm, "sim", stale_after_s=0.1), stale_after_s=0.1,
                         in_order=True)
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    n = MAX_IN_ORDER + 5
    for seq in range(1, n + 1):
        session.on_message(RUNTIME, rates(seq, seq), seq)
    assert len(session.waiting) == MAX_IN_ORDER
    assert session.dropped["superseded"] == 5
    assert session.take_pending(n + 1).seq == 6             # the oldest ones went first


def test_stale_then_fresh_again(session, arm) -> None:
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    session.on_message(RUNTIME, rates(1, 0), 0)
    assert session.decide(100 * MS).status == "tracking"       # exactly stale_after: fresh
    stale = session.decide(100 * MS + 1)
    assert stale.status == "stale" and stale.qd is None
    session.on_message(RUNTIME, rates(2, 150 * MS), 150 * MS)
    # A 1 ms step starting 99.5 ms after arrival would end past stale_after: not followed.
    assert session.decide(249 * MS, step_ns=1 * MS).status == "tracking"
    assert session.decide(int(249.5 * MS), step_ns=1 * MS).status == "stale"
    assert any("ramping to zero" in e for e in session.events)
    session.on_message(RUNTIME, rates(3, 300 * MS), 300 * MS)
    assert session.decide(300 * MS).status == "tracking"


def test_a_vanished_controller_is_ramped_down_at_once(session, arm) -> None:
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    session.on_message(RUNTIME, rates(1, 0), 0)
    assert session.decide(10 * MS).status == "tracking"
    session.forget(RUNTIME)                   # its socket is gone (EHOSTUNREACH)
    assert session.decide(11 * MS) == session.decide(11 * MS)
    assert session.decide(11 * MS).qd is None and session.status == "stale"
    assert any("connection is gone" in e for e in session.events)


def test_observers_get_state_but_cannot_command(session, arm) -> None:
    assert kinds(session.on_message(WATCHER, runtime_hello(arm, "observer"), 0)) == ["Hello"]
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    replies = session.on_message(WATCHER, rates(1, 0), 1 * MS)
    assert replies[0][1].code == "not_controller"
    assert sorted(session.recipients()) == sorted([WATCHER, RUNTIME])
    session.forget(WATCHER)
    assert session.recipients() == [RUNTIME]


def test_an_arm_side_cannot_connect_to_an_arm_side(session, arm) -> None:
    replies = session.on_message(OTHER, hello_for(arm, "bridge", stale_after_s=0.1), 0)
    assert kinds(replies) == ["Hello", "Refuse"] and session.controller is None


def test_wrong_version_is_answered_other_errors_are_not(session) -> None:
    err = ProtocolError("protocol version 2; this side speaks 1", reason="version")
    assert kinds(session.on_message(OTHER, err, 0)) == ["Refuse"]
    assert session.on_message(OTHER, ProtocolError("x", reason="msgpack"), 0) == []
    assert session.on_message(OTHER, Twist(1, 0, (0.0,) * 6), 0) == []
    assert session.dropped["unexpected"] == 1


def test_state_reports_what_is_followed(session, arm) -> None:
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    session.on_message(RUNTIME, rates(9, 12345), 0)
    session.decide(0)
    q = arm.home()
    state = session.state(Reading(0.001, q, np.zeros(7), np.zeros(7), True), 777)
    assert (state.seq, state.t_ns, state.applied_seq, state.echo_ns, state.status,
            state.limited) == (1, 777, 9, 12345, "tracking", True)
    assert np.allclose(state.q, q)
    assert isinstance(Refuse("busy", "x"), Refuse)


# ----------------------------------------------------------------------------------------
# Workcell exchange and contact reports (docs/PROTOCOL.md §5a)
# ----------------------------------------------------------------------------------------

OURS = CellHello("bench", "0123456789abcdef")
TOUCHING = (("tool", "bench", 0.002), ("link_3", "post", 0.0005))


def test_cell_is_answered_and_its_sender_gets_contact_reports(arm) -> None:
    session = ArmSession(hello_for(arm, "sim", stale_after_s=0.1), stale_after_s=0.1,
                         cell=OURS)
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    session.on_message(WATCHER, runtime_hello(arm, "observer"), 0)
    assert session.on_message(RUNTIME, CellHello("bench", OURS.digest), 0) == [(RUNTIME, OURS)]
    reading = Reading(0.001, arm.home(), np.zeros(7), np.zeros(7), contacts=TOUCHING)
    state = session.state(reading, 777)
    contact = session.contact(reading, state)
    assert (contact.seq, contact.t_ns, contact.total) == (state.seq, 777, 2)
    assert contact.pairs == list(TOUCHING)
    assert session.contact_readers == {RUNTIME}          # the observer did not ask
    assert not any("workcell" in e for e in session.events)   # same digest: nothing to say
    session.forget(RUNTIME)
    assert session.contact(reading, session.state(reading, 778)) is None


@pytest.fixture
def reading_contacts(arm) -> ArmSession:
    """A session whose controller asked for contact reports."""
    session = ArmSession(hello_for(arm, "sim", stale_after_s=0.1), stale_after_s=0.1,
                         cell=OURS)
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    session.on_message(RUNTIME, OURS, 0)
    return session


def test_a_step_without_contact_sends_no_report(reading_contacts, arm) -> None:
    session = reading_contacts
    reading = Reading(0.001, arm.home(), np.zeros(7), np.zeros(7))
    assert session.contact(reading, session.state(reading, 1)) is None


def test_contact_report_lists_the_deepest_and_counts_all(reading_contacts, arm) -> None:
    session = reading_contacts
    many = tuple((f"link_{i}", "wall", 0.01 - 1e-4 * i) for i in range(MAX_CONTACTS + 5))
    reading = Reading(0.0, arm.home(), np.zeros(7), np.zeros(7), contacts=many)
    contact = session.contact(reading, session.state(reading, 1))
    assert contact.total == MAX_CONTACTS + 5 and len(contact.a) == MAX_CONTACTS
    assert decode(encode(contact)) == contact


def test_another_workcell_is_noted_and_cell_from_a_stranger_is_dropped(arm) -> None:
    session = ArmSession(hello_for(arm, "sim", stale_after_s=0.1), stale_after_s=0.1,
                         cell=OURS)
    assert session.on_message(OTHER, OURS, 0) == []       # never said hello
    assert session.dropped["no_hello"] == 1
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    assert session.on_message(RUNTIME, CellHello("other", "ffffffffffffffff"), 0) == \
        [(RUNTIME, OURS)]
    assert any("contacts name this side's objects" in e for e in session.events)


def test_a_side_without_contact_measurement_does_not_answer_cell(session, arm) -> None:
    # What a runtime sees from an arm side that knows nothing of workcells: no answer, and
    # motion goes on as before (PROTOCOL.md §11).
    session.on_message(RUNTIME, runtime_hello(arm), 0)
    assert session.on_message(RUNTIME, OURS, 0) == []
    assert session.dropped["unexpected"] == 1
    session.on_message(RUNTIME, rates(1, 0), 0)
    assert session.decide(0).status == "tracking"
