"""Hold-to-move gate: a table of every transition, then whole operator stories.

The behaviour follows the enabling-device rules summarised in REFERENCES §4 (motion only
while enable is held; releasing stops; coming back to "enabled" from a fault or from a
full press must not restart motion without a fresh press).
"""

from __future__ import annotations

import pytest

from runtime.control.safety import (
    BLOCKED,
    MOVING,
    READY,
    REARM,
    STATES,
    STOPPED,
    SafetyGate,
    SafetySettings,
)

SETTINGS = SafetySettings(stale_after_s=0.05, overrun_limit=5)
DT = 0.002

# One cycle's inputs. Defaults: device present, fresh arm state, no overruns, a link without
# delay (round trip rtt 0 s; the limit is stale_after, 50 ms here), nothing held.
OK = dict(enable=False, stop=False, reset=False, present=True, age=0.0, overruns=0, rtt=0.0,
          hold=None)


def inputs(**changes):
    unknown = set(changes) - set(OK)
    assert not unknown, unknown
    return {**OK, **changes}


def step(gate: SafetyGate, t: float, c: dict):
    stamp = None if c["age"] is None else t - c["age"]
    return gate.update(t, enable=c["enable"], stop=c["stop"], reset=c["reset"],
                       present=c["present"], state_stamp_s=stamp,
                       overrun_streak=c["overruns"], round_trip_s=c["rtt"], hold=c["hold"])


# How to reach each state from a fresh gate (sequences of cycle inputs).
REACH = {
    READY: [inputs()],
    MOVING: [inputs(), inputs(enable=True)],
    REARM: [inputs(enable=True)],                              # held at start
    BLOCKED: [inputs(), inputs(age=None)],                     # no arm state
    STOPPED: [inputs(), inputs(stop=True), inputs()],
}

HELD = inputs(enable=True)

# (from, inputs of the next cycle, expected state, expected allowed, reason contains)
TABLE = [
    # from ready
    (READY, inputs(), READY, False, "hold enable"),
    (READY, HELD, MOVING, True, "enable held"),
    (READY, inputs(present=False), BLOCKED, False, "input device lost"),
    (READY, inputs(age=0.2), BLOCKED, False, "stale: 200 ms"),
    (READY, inputs(age=None), BLOCKED, False, "no arm state"),
    (READY, inputs(overruns=5), BLOCKED, False, "overran 5 cycles"),
    (READY, inputs(hold="target not ready"), BLOCKED, False, "target not ready"),
    (READY, inputs(rtt=0.2), BLOCKED, False, "round trip 200 ms, over the 50 ms limit"),
    (READY, inputs(rtt=None), BLOCKED, False, "round trip not measured yet"),
    (READY, inputs(stop=True), STOPPED, False, "stop held"),
    (READY, inputs(reset=True), READY, False, "hold enable"),
    # from moving
    (MOVING, HELD, MOVING, True, "enable held"),
    (MOVING, inputs(), READY, False, "hold enable"),                    # release → zero at once
    (MOVING, inputs(enable=True, present=False), BLOCKED, False, "device lost"),  # hot-unplug
    (MOVING, inputs(enable=True, age=0.051), BLOCKED, False, "stale"),
    (MOVING, inputs(enable=True, age=0.05), MOVING, True, "enable held"),  # at the limit: fresh
    (MOVING, inputs(enable=True, overruns=4), MOVING, True, "enable held"),
    (MOVING, inputs(enable=True, overruns=5), BLOCKED, False, "overran"),
    (MOVING, inputs(enable=True, hold="target busy"), BLOCKED, False, "target busy"),
    (MOVING, inputs(enable=True, rtt=0.051), BLOCKED, False, "round trip 51 ms"),
    (MOVING, inputs(enable=True, rtt=0.05), MOVING, True, "enable held"),  # at the limit
    (MOVING, inputs(enable=True, rtt=float("nan")), BLOCKED, False, "round trip nan ms"),
    (MOVING, inputs(enable=True, stop=True), STOPPED, False, "stop held"),
    (MOVING, inputs(enable=True, reset=True), MOVING, True, "enable held"),  # reset: no effect
    # from rearm (enable held, not freshly pressed)
    (REARM, HELD, REARM, False, "held at start"),
    (REARM, inputs(), READY, False, "hold enable"),
    (REARM, inputs(enable=True, age=1.0), BLOCKED, False, "stale"),
    (REARM, inputs(enable=True, present=False), BLOCKED, False, "device lost"),
    (REARM, inputs(enable=True, rtt=0.4), BLOCKED, False, "round trip 400 ms"),
    (REARM, inputs(enable=True, stop=True), STOPPED, False, "stop held"),
    # from blocked
    (BLOCKED, inputs(), READY, False, "hold enable"),                   # cleared, released
    (BLOCKED, HELD, REARM, False, "release enable"),                    # cleared, still held
    (BLOCKED, inputs(age=None), BLOCKED, False, "no arm state"),
    (BLOCKED, inputs(rtt=None), BLOCKED, False, "round trip not measured yet"),
    (BLOCKED, inputs(age=None, stop=True), STOPPED, False, "stop held"),
    # from stopped (latched)
    (STOPPED, inputs(), STOPPED, False, "press reset"),                 # latch holds
    (STOPPED, HELD, STOPPED, False, "release enable, then press reset"),
    (STOPPED, inputs(reset=True), READY, False, "hold enable"),         # reset, enable released
    (STOPPED, inputs(reset=True, enable=True), STOPPED, False, "release enable"),
    (STOPPED, inputs(reset=True, stop=True), STOPPED, False, "stop held"),
    (STOPPED, inputs(reset=True, age=None), BLOCKED, False, "no arm state"),
    (STOPPED, inputs(present=False), STOPPED, False, "press reset"),
]


@pytest.mark.parametrize("start, cycle, state, allowed, reason", TABLE,
                         ids=[f"{a}->{c}-{i}" for i, (a, _, c, _, _) in enumerate(TABLE)])
def test_transition_table(start, cycle, state, allowed, reason):
    gate = SafetyGate(SETTINGS)
    t = 0.0
    for c in REACH[start]:
        v = step(gate, t, c)
        t += DT
    assert v.state == start, f"setup reached {v.state}, not {start}"
    v = step(gate, t, cycle)
    assert (v.state, v.allowed) == (state, allowed)
    assert reason in v.reason
    assert v.allowed == (v.state == MOVING)


def test_table_covers_every_state_pair_that_can_happen():
    pairs = {(a, c) for a, _, c, _, _ in TABLE}
    every = {(a, c) for a in STATES for c in STATES}
    # moving and ready are reached from rearm/blocked/stopped only by way of a release or a
    # fresh press, never directly: those pairs are impossible by design.
    impossible = {(REARM, MOVING), (BLOCKED, MOVING), (STOPPED, MOVING), (STOPPED, REARM),
                  (READY, REARM), (MOVING, REARM)}
    assert every - impossible == pairs
    # and they really are: try every cycle input from those states
    for a, c in impossible:
        for cycle in [cy for _, cy, _, _, _ in TABLE]:
            gate = SafetyGate(SETTINGS)
            t = 0.0
            for x in REACH[a]:
                step(gate, t, x)
                t += DT
            assert step(gate, t, cycle).state != c


@pytest.mark.parametrize("first, state, reason", [
    (inputs(), READY, "hold enable"),
    (HELD, REARM, "held at start"),                          # held when the program starts
    (inputs(enable=True, present=False), BLOCKED, "no input device"),
    (inputs(enable=True, age=None), BLOCKED, "no arm state"),
    (inputs(stop=True), STOPPED, "stop held"),
    (inputs(reset=True), READY, "hold enable"),
])
def test_first_cycle(first, state, reason):
    v = step(SafetyGate(SETTINGS), 0.0, first)
    assert v.state == state and not v.allowed and reason in v.reason


def run(gate: SafetyGate, cycles, t0=0.0):
    out, t = [], t0
    for c in cycles:
        out.append(step(gate, t, c))
        t += DT
    return out


def test_enable_held_at_start_needs_release_and_press():
    gate = SafetyGate(SETTINGS)
    v = run(gate, [HELD] * 10 + [inputs()] + [HELD])
    assert all(x.state == REARM and not x.allowed for x in v[:10])
    assert "held at start" in v[0].reason
    assert (v[10].state, v[11].state) == (READY, MOVING)


def test_held_through_missing_arm_state_at_start_still_needs_a_fresh_press():
    gate = SafetyGate(SETTINGS)
    v = run(gate, [inputs(enable=True, age=None)] * 5 + [HELD] * 3 + [inputs(), HELD])
    assert [x.state for x in v] == [BLOCKED] * 5 + [REARM] * 3 + [READY, MOVING]


def test_a_press_during_a_fault_does_not_count_after_it_clears():
    gate = SafetyGate(SETTINGS)
    v = run(gate, [inputs(), HELD, inputs(enable=True, age=0.3), inputs(age=0.3),
                   inputs(enable=True, age=0.3), HELD])
    assert [x.state for x in v] == [READY, MOVING, BLOCKED, BLOCKED, BLOCKED, REARM]


def test_hot_unplug_and_replug_with_enable_held():
    gate = SafetyGate(SETTINGS)
    v = run(gate, [inputs(), HELD, HELD,
                   inputs(present=False), inputs(present=False),  # pulled out mid-motion
                   HELD, HELD,                                     # back, enable still held
                   inputs(), HELD])                                # release, fresh press
    assert [x.state for x in v] == [READY, MOVING, MOVING, BLOCKED, BLOCKED, REARM, REARM,
                                    READY, MOVING]
    assert "input device lost" in v[3].reason
    assert "device appeared" in v[5].reason


def test_pad_plugged_in_after_start_with_enable_held():
    gate = SafetyGate(SETTINGS)
    v = run(gate, [inputs(present=False)] * 3 + [HELD, inputs(), HELD])
    assert "no input device" in v[0].reason
    assert [x.state for x in v] == [BLOCKED] * 3 + [REARM, READY, MOVING]


def test_overrun_streak_drops_enable_until_a_fresh_press():
    gate = SafetyGate(SETTINGS)
    cycles = [inputs(), HELD] + [inputs(enable=True, overruns=k) for k in range(1, 7)] + \
        [HELD] * 11 + [inputs(), HELD]
    v = run(gate, cycles)
    # After the streak its 6 late cycles are still a third of the last 50 ms (stale_after)
    # up to cycle 17: blocked until enough on-time cycles dilute them.
    assert [x.state for x in v] == [READY] + [MOVING] * 5 + [BLOCKED] * 12 + \
        [REARM, READY, MOVING]
    assert "overran 5 cycles in a row" in v[6].reason
    assert "overran 6 of its last 10 cycles (in 50 ms)" in v[9].reason


def test_a_loop_alternating_late_and_on_time_cycles_is_stopped_too():
    # A starved loop skips to the next grid slot after a late cycle, so that one is on time
    # and the streak never grows; half of the recent cycles overrunning stops it all the same.
    gate = SafetyGate(SETTINGS)
    late = inputs(enable=True, overruns=1)
    v = run(gate, [inputs(), HELD] + [late, HELD] * 4 + [late])
    assert [x.state for x in v] == [READY] + [MOVING] * 9 + [BLOCKED]
    assert "overran 5 of its last 11 cycles" in v[-1].reason
    # One cycle in four overrunning (a loaded machine) never does.
    gate = SafetyGate(SETTINGS)
    v = run(gate, [inputs()] + [late, HELD, HELD, HELD] * 20)
    assert all(x.state == MOVING for x in v[2:])


def test_a_burst_of_overruns_in_an_on_time_loop_does_not_stop_it():
    """What a desktop at normal priority does when motion starts (seen in `jogwire drive`:
    6 of 10 cycles late, then on time): not a starved loop."""
    gate = SafetyGate(SETTINGS)
    late = inputs(enable=True, overruns=1)
    burst = [late, late, HELD, late, late, HELD, late, late, HELD, HELD]
    v = run(gate, [inputs()] + [HELD] * 30 + burst + [HELD] * 30)
    assert all(x.state == MOVING for x in v[1:])


def test_a_slow_link_refuses_motion_until_it_is_quick_again_and_enable_is_pressed_afresh():
    # The round trip bounds the one-way delay to the arm, so above stale_after a release
    # could reach the arm later than its own watchdog allows; like any fault, the refusal
    # latches until a fresh press (REFERENCES §4: no restart on return from a fault).
    gate = SafetyGate(SETTINGS)
    slow, quick = inputs(enable=True, rtt=0.4), inputs(enable=True, rtt=0.03)
    v = run(gate, [inputs(rtt=None), inputs(enable=True, rtt=None),   # nothing measured yet
                   inputs(), HELD, slow, slow, quick, quick, inputs(), HELD])
    assert [x.state for x in v] == [BLOCKED, BLOCKED, READY, MOVING, BLOCKED, BLOCKED, REARM,
                                    REARM, READY, MOVING]
    assert "link round trip 400 ms, over the 50 ms limit" in v[4].reason
    assert "enable held through: link round trip 400 ms" in v[6].reason


def test_the_round_trip_limit_is_stale_after_unless_set():
    assert SafetySettings(stale_after_s=0.1).round_trip_limit_s == 0.1
    settings = SafetySettings(stale_after_s=0.1, max_round_trip_s=0.25)
    assert settings.round_trip_limit_s == 0.25
    gate = SafetyGate(settings)
    v = run(gate, [inputs(rtt=0.2), inputs(enable=True, rtt=0.2),
                   inputs(enable=True, rtt=0.26)])
    assert [x.state for x in v] == [READY, MOVING, BLOCKED]
    assert "round trip 260 ms, over the 250 ms limit" in v[2].reason


def test_stop_latches_until_reset_with_enable_released():
    gate = SafetyGate(SETTINGS)
    v = run(gate, [inputs(), HELD, inputs(enable=True, stop=True), HELD,
                   inputs(enable=True, reset=True),   # reset with enable held: refused
                   inputs(),                          # released, reset still up
                   inputs(reset=True),                # pressed: cleared
                   HELD])
    assert [x.state for x in v] == [READY, MOVING, STOPPED, STOPPED, STOPPED, STOPPED, READY,
                                    MOVING]


def test_reset_held_since_before_the_stop_does_not_clear_it():
    gate = SafetyGate(SETTINGS)
    v = run(gate, [inputs(reset=True), inputs(reset=True, stop=True), inputs(reset=True),
                   inputs(reset=True), inputs(), inputs(reset=True)])
    assert [x.state for x in v] == [READY, STOPPED, STOPPED, STOPPED, STOPPED, READY]


def test_since_marks_the_state_entry_time():
    gate = SafetyGate(SETTINGS)
    run(gate, [inputs(), inputs(), HELD, HELD])
    assert gate.state == MOVING and gate.since_s == pytest.approx(2 * DT)


def test_settings_are_validated():
    with pytest.raises(ValueError):
        SafetySettings(stale_after_s=0.0)
    with pytest.raises(ValueError):
        SafetySettings(overrun_limit=0)
    for bad in (0.0, -0.1, float("nan"), float("inf")):
        with pytest.raises(ValueError):
            SafetySettings(max_round_trip_s=bad)
    with pytest.raises(ValueError):
        SafetySettings(stale_after_s=float("nan"))
