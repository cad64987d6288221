"""runtime/link/relay.py: the perturbing link's schedule, with a seeded generator and made-up times
(no sockets, no clock). Each fault does what it says, the hello exchange passes untouched,
every garbage frame is one the wire protocol must refuse, and a seed replays a run exactly."""

from __future__ import annotations

import ast
import math
import random
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from runtime.errors import ConfigError, ProtocolError
from runtime.link.protocol import Hello, Rates, Refuse, State, Twist, decode, encode
from runtime.link.relay import (
    DIRECTIONS,
    GARBAGE_KINDS,
    Link,
    LinkFaults,
    Stall,
    faults_from_options,
    make_garbage,
    message_kind,
    parse_duration_s,
    parse_fraction,
    parse_stall,
)

N = 3
PERIOD_S = 0.002      # the runtime's default cycle (500 Hz)
HELLO = Hello("runtime", "planar3", ("j1", "j2", "j3"), "28105499f8a87889", "200a546da422322c",
              0.1)


def rates(seq: int) -> tuple[bytes]:
    return (encode(Rates(seq, 1_000_000 * seq, (0.1 * seq, -0.2, 0.0))),)


def seq_of(frames) -> int:
    return decode(frames[0], n_joints=N).seq


def play(link: Link, count: int, *, period_s: float = PERIOD_S, until_s: float | None = None,
         step_s: float = 0.0005) -> list:
    """Offer rates 1…count every period_s; call release every step_s until all is out."""
    out, k, t = [], 0, 0.0
    end = until_s if until_s is not None else count * period_s + 1.0
    while t <= end:
        while k < count and (k * period_s) <= t + 1e-12:
            k += 1
            link.offer(rates(k), "peer", k * period_s - period_s)
        out += link.release(t)
        t = round(t + step_s, 9)
    return out


def conserved(link: Link) -> bool:
    c = link.counters
    return c.received == c.forwarded + c.lost + c.stalled + c.overflow + \
        sum(1 for _, _, d in link._heap if d.what == "message")


# ----------------------------------------------------------------------------------------
# One fault at a time
# ----------------------------------------------------------------------------------------

def test_a_clean_link_forwards_every_message_at_once_in_order() -> None:
    link = Link(LinkFaults(), random.Random(0))
    out = play(link, 200, step_s=PERIOD_S)
    assert [seq_of(d.frames) for d in out] == list(range(1, 201))
    assert all(d.at_s == pytest.approx((seq_of(d.frames) - 1) * PERIOD_S) for d in out)
    assert link.counters.forwarded == 200 and conserved(link)


def test_delay_and_jitter_keep_the_order_and_stay_within_their_band() -> None:
    link = Link(LinkFaults(delay_s=0.040, jitter_s=0.010), random.Random(1))
    arrivals = {}
    for k in range(1, 2001):
        arrivals[k] = (k - 1) * PERIOD_S
        link.offer(rates(k), "peer", arrivals[k])
    out = link.release(10.0)
    seqs = [seq_of(d.frames) for d in out]
    assert seqs == sorted(seqs) == list(range(1, 2001))          # order kept
    delays = [d.at_s - arrivals[seq_of(d.frames)] for d in out]
    # Each delay is 40 ± 10 ms, or more where the message waited for the one before it.
    assert min(delays) >= 0.030 - 1e-12 and max(delays) <= 0.050 + 1e-12
    assert 0.039 < sum(delays) / len(delays) < 0.047   # order-keeping only adds delay


def test_loss_drops_the_stated_fraction() -> None:
    link = Link(LinkFaults(loss=0.2), random.Random(2))
    out = play(link, 10000, step_s=PERIOD_S)
    lost = link.counters.lost
    # Binomial(10000, 0.2): σ = sqrt(n p (1 − p)) = 40 (textbook); allow 4σ.
    assert abs(lost - 2000) <= 160
    assert len(out) == 10000 - lost == link.counters.forwarded and conserved(link)
    seqs = [seq_of(d.frames) for d in out]
    assert seqs == sorted(seqs)


def test_duplicates_follow_their_original_immediately() -> None:
    link = Link(LinkFaults(duplicate=0.3), random.Random(3))
    out = play(link, 2000, step_s=PERIOD_S)
    seqs = [seq_of(d.frames) for d in out]
    dups = [i for i, d in enumerate(out) if d.what == "duplicate"]
    assert dups and all(seqs[i] == seqs[i - 1] and out[i - 1].what == "message" for i in dups)
    assert len(dups) == link.counters.duplicated and abs(len(dups) - 600) <= 4 * math.sqrt(420)
    assert sorted(set(seqs)) == list(range(1, 2001))


def test_reordered_messages_are_overtaken_and_none_is_lost() -> None:
    link = Link(LinkFaults(reorder=0.1, reorder_hold_s=0.006), random.Random(4))
    out = play(link, 3000)
    seqs = [seq_of(d.frames) for d in out]
    assert sorted(seqs) == list(range(1, 3001))                  # each exactly once
    inversions = sum(1 for a, b in zip(seqs, seqs[1:]) if b < a)
    assert inversions > 100 and link.counters.reordered > 200
    # A held message arrives after the ones sent within the hold (6 ms / 2 ms = 3 later).
    for i, s in enumerate(seqs):
        later_before = [x for x in seqs[:i] if x > s]
        assert len(later_before) <= 3


def test_garbage_bursts_come_before_their_message() -> None:
    link = Link(LinkFaults(garbage=0.5, garbage_burst=4), random.Random(5))
    out = play(link, 400, step_s=PERIOD_S)
    kinds = [d.what for d in out]
    assert kinds.count("message") == 400
    assert link.counters.garbage == sum(k.startswith("garbage:") for k in kinds) > 600
    for i, d in enumerate(out):
        if d.what.startswith("garbage:"):
            following = next(x for x in out[i:] if x.what == "message")
            assert following.at_s == d.at_s


def test_the_hello_exchange_is_never_lost_duplicated_reordered_or_garbled() -> None:
    everything = LinkFaults(loss=1.0, duplicate=1.0, reorder=1.0, garbage=1.0)
    link = Link(everything, random.Random(6))
    hello = (encode(HELLO),)
    refuse = (encode(Refuse("no_hello", "say hello first")),)
    link.offer(hello, "peer", 0.0)
    link.offer(rates(1), "peer", 0.001)
    link.offer(refuse, "peer", 0.002)
    out = link.release(1.0)
    assert [d.frames for d in out] == [hello, refuse]
    assert link.counters.lost == 1 and link.counters.kinds == {"hello": 1, "rates": 1,
                                                               "refuse": 1}


def test_a_stall_drops_what_comes_due_during_it() -> None:
    link = Link(LinkFaults(stalls=(Stall(0.300, at_s=1.0),)), random.Random(7))
    out = play(link, 1000, step_s=0.001)
    sent = [d.at_s for d in out]
    assert not [t for t in sent if 1.0 <= t < 1.3]
    assert link.counters.stalled == 150 and link.counters.forwarded == 850
    assert conserved(link)


def test_a_held_stall_releases_everything_at_its_end_in_order() -> None:
    link = Link(LinkFaults(stalls=(Stall(0.300, at_s=1.0),), hold_in_stall=True),
                random.Random(8))
    out = []
    for k in range(1, 1001):
        t = (k - 1) * PERIOD_S
        link.offer(rates(k), "peer", t)
        out += [(t, d) for d in link.release(t)]
    burst = [(t, d) for t, d in out if d.held]
    assert len(burst) == link.counters.held == 150
    assert all(t == pytest.approx(1.3) for t, _ in burst)       # all at the stall's end
    assert [seq_of(d.frames) for _, d in out] == list(range(1, 1001))


def test_periodic_and_on_demand_stalls() -> None:
    every = Stall(0.1, at_s=0.5, every_s=1.0)
    assert [every.covers(t) for t in (0.45, 0.5, 0.59, 0.61, 1.5, 2.55, 2.65)] == \
        [False, True, True, False, True, True, False]
    link = Link(LinkFaults(stalls=(Stall(0.2),)), random.Random(9))
    assert not link.is_stalled(5.0)                                # on demand: not by itself
    link.stall_now(5.0, 0.2)
    assert link.stall_changed(5.0) is True and link.is_stalled(5.19)
    assert not link.is_stalled(5.2) and link.stall_changed(5.2) is False
    assert link.stall_changed(5.3) is None


def test_faults_can_wait_for_a_time_or_a_request() -> None:
    link = Link(LinkFaults(loss=1.0, from_s=1.0), random.Random(13))
    out = play(link, 1000, step_s=PERIOD_S)            # 2 s of messages
    assert [seq_of(d.frames) for d in out] == list(range(1, 501))  # before 1 s, untouched
    assert link.counters.lost == 500
    waiting = Link(LinkFaults(delay_s=0.2, from_s=math.inf), random.Random(14))
    waiting.offer(rates(1), "peer", 0.0)
    assert not waiting.is_active(5.0) and waiting.start(5.0) and not waiting.start(6.0)
    waiting.offer(rates(2), "peer", 5.0)
    assert [d.at_s for d in waiting.release(10.0)] == [0.0, 5.2]
    faults = faults_from_options({"from_s": ["rates=signal", "state=2s"]})
    assert math.isinf(faults["rates"].from_s) and faults["state"].from_s == 2.0


def test_the_queue_is_bounded() -> None:
    link = Link(LinkFaults(delay_s=10.0), random.Random(10), max_queued=50)
    for k in range(1, 101):
        link.offer(rates(k), "peer", k * 1e-3)
    assert link.queued() == 50 and link.counters.overflow == 50 and conserved(link)


def test_forgetting_a_peer_drops_its_queue_only() -> None:
    link = Link(LinkFaults(delay_s=1.0), random.Random(11))
    for k in range(1, 11):
        link.offer(rates(k), "a" if k % 2 else "b", 0.0)
    assert link.forget("a") == 5
    assert {d.route for d in link.release(2.0)} == {"b"}


# ----------------------------------------------------------------------------------------
# Determinism
# ----------------------------------------------------------------------------------------

def _run(seed: int) -> list:
    faults = LinkFaults(delay_s=0.02, jitter_s=0.01, loss=0.1, duplicate=0.1, reorder=0.1,
                        garbage=0.1)
    return [(d.at_s, d.frames, d.what) for d in play(Link(faults, random.Random(seed)), 500)]


def test_a_seed_replays_the_same_deliveries_and_another_does_not() -> None:
    assert _run(42) == _run(42)
    assert _run(42) != _run(43)


# ----------------------------------------------------------------------------------------
# Garbage is always refused by the wire protocol
# ----------------------------------------------------------------------------------------

def _messages() -> st.SearchStrategy:
    floats = st.floats(-10, 10, allow_nan=False)
    seq = st.integers(1, 2**40)
    vec = st.tuples(floats, floats, floats)
    return st.one_of(
        st.builds(Rates, seq, st.integers(0, 2**62), vec, st.sampled_from([0, 1])),
        st.builds(State, seq, st.integers(0, 2**62), vec, vec, st.integers(0, 2**40),
                  st.integers(0, 2**62), st.sampled_from(["waiting", "tracking", "stale"]),
                  st.booleans()),
        st.builds(Twist, seq, st.integers(0, 2**62), st.tuples(*[floats] * 6),
                  st.sampled_from(["base", "tool"]), st.booleans()))


@settings(max_examples=150, deadline=None)
@given(msg=_messages(), kind=st.sampled_from(GARBAGE_KINDS), seed=st.integers(0, 2**32))
def test_every_garbage_frame_is_refused_by_the_protocol(msg, kind, seed) -> None:
    frames = make_garbage((encode(msg),), kind, random.Random(seed))
    if kind == "framing":
        assert len(frames) == 2          # a receiver drops any multipart message (framing)
        return
    assert len(frames) == 1
    with pytest.raises(ProtocolError):
        decode(frames[0], n_joints=N)    # receivers know n from the hello


def test_garbage_of_every_kind_names_its_reason() -> None:
    """Each kind meets the reason it is named after (docs/PROTOCOL.md section 3)."""
    expected = {"truncated": "msgpack", "trailing": "msgpack", "not_msgpack": "msgpack",
                "nonfinite": "nonfinite", "version": "version", "schema": "schema",
                "type": "type", "kind": "kind", "length": "length", "oversize": "oversize"}
    frames = rates(7)
    for kind, reason in expected.items():
        for seed in range(20):
            garbage = make_garbage(frames, kind, random.Random(seed))[0]
            with pytest.raises(ProtocolError) as info:
                decode(garbage, n_joints=N)
            assert info.value.reason == reason, (kind, seed)


def test_message_kind() -> None:
    assert message_kind(rates(1)) == "rates"
    assert message_kind((encode(HELLO),)) == "hello"
    assert message_kind((b"\xc1",)) == "invalid"
    assert message_kind(rates(1) * 2) == "invalid"


# ----------------------------------------------------------------------------------------
# Command-line values
# ----------------------------------------------------------------------------------------

@pytest.mark.parametrize("text, seconds", [("40ms", 0.04), ("1.5s", 1.5), ("200us", 2e-4),
                                           ("0.25", 0.25), (" 10 ms ", 0.01), ("1e2ms", 0.1)])
def test_parse_duration(text, seconds) -> None:
    assert parse_duration_s(text, "delay") == pytest.approx(seconds)


@pytest.mark.parametrize("text", ["", "fast", "-5ms", "5 min", "ms"])
def test_bad_durations_name_the_option(text) -> None:
    with pytest.raises(ConfigError, match=r"\[delay\]"):
        parse_duration_s(text, "delay")


def test_parse_fraction_and_stall() -> None:
    assert parse_fraction("5%", "loss") == pytest.approx(0.05)
    assert parse_fraction("0.2", "loss") == pytest.approx(0.2)
    for bad in ("120%", "-1", "lots"):
        with pytest.raises(ConfigError, match=r"\[loss\]"):
            parse_fraction(bad, "loss")
    assert parse_stall("300ms") == Stall(0.3)
    assert parse_stall("300ms@2s") == Stall(0.3, at_s=2.0)
    assert parse_stall("300ms@2s/5s") == Stall(0.3, at_s=2.0, every_s=5.0)


def test_faults_per_direction() -> None:
    faults = faults_from_options({"loss": ["rates=20%"], "delay_s": ["40ms", "state=100ms"],
                                  "stall": ["state=300ms@1s", "50ms"],
                                  "garbage_burst": ["rates=5"]}, hold_in_stall=True)
    assert set(faults) == set(DIRECTIONS)
    r, s = faults["rates"], faults["state"]
    assert (r.loss, r.delay_s, r.garbage_burst) == (pytest.approx(0.2), 0.04, 5)
    assert (s.loss, s.delay_s, s.garbage_burst) == (0.0, 0.1, 3)
    assert r.stalls == (Stall(0.05),) and s.stalls == (Stall(0.3, at_s=1.0), Stall(0.05))
    assert r.hold_in_stall and s.hold_in_stall
    with pytest.raises(ConfigError, match="direction"):
        faults_from_options({"loss": ["arm=5%"]})
    with pytest.raises(ConfigError, match=r"\[stall\]"):
        faults_from_options({"stall": ["2s@0s/1s"]})            # longer than its period
    assert "loss 20 %" in r.describe() and LinkFaults().describe() == "clean"
    kinds = faults_from_options({"garbage_kinds": ["truncated, nonfinite"]})
    assert kinds["rates"].garbage_kinds == ("truncated", "nonfinite")
    with pytest.raises(ConfigError, match="unknown: sideways"):
        faults_from_options({"garbage_kinds": ["truncated,sideways"]})


def test_only_the_chosen_garbage_kinds_are_made() -> None:
    link = Link(LinkFaults(garbage=1.0, garbage_kinds=("nonfinite", "framing")),
                random.Random(12))
    out = play(link, 100, step_s=PERIOD_S)
    assert {d.what for d in out} == {"message", "garbage:nonfinite", "garbage:framing"}


def test_the_schedule_module_is_pure() -> None:
    """No clock, no sockets, no threads in the schedule (DEVELOPERS.md, "Layers")."""
    path = Path(__file__).resolve().parents[3] / "runtime" / "link" / "relay.py"
    roots = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            roots.update(a.name.split(".")[0] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            roots.add(node.module.split(".")[0])
    assert not roots & {"zmq", "time", "threading", "socket", "subprocess", "sim", "pygame"}
