"""The fault suite: each fault once, injected mid-motion into a real session — the simulated arm,
`jogwire relay` and `jogwire drive` in separate processes on 127.0.0.1 — and what the system
did, measured at the arm (docs/FAULTS.md; `benchmarks/fault_campaign.py` repeats each 20 times).

Checked for every fault: the arm stops when it must, within stale_after + braking time + one
cycle (T = max |q̇|/a_rated just before) plus ALLOWANCE_S; it does not move again while
enable stays held; nothing bad is acted on (no applied sequence number goes backwards at the
arm, every garbage frame that reached the arm side was counted there as malformed, the
runtime never used an older state than it had used before nor a q the arm never sent); no
record is missing from the session log before the fault.

These run in the default suite (about a minute and a half). The correctness checks are exact;
the stop-time check carries ALLOWANCE_S for a busy CI machine. The strict figures — worst of
20 against the bound itself — come from the campaign and stand in docs/FAULTS.md.

A run in which the runtime's own overrun guard stopped the motion (the machine was too busy,
not the fault) proves nothing about the fault: it is repeated, up to ATTEMPTS times.
"""

from __future__ import annotations

import re

import pytest
from faultkit import FAULTS, FLUSH_S, STALE_AFTER_S, Disturbed, FaultResult

pytestmark = [pytest.mark.faults, pytest.mark.e2e, pytest.mark.timeout(180)]

ATTEMPTS = 3
# Four processes share two cores here: the arm side's 1 kHz steps and every wake-up can start
# late, by tens of ms on a busy machine (common practice: a scheduling allowance in tests that
# run on shared machines). The campaign judges the raw figures against the bound alone.
ALLOWANCE_S = 0.050


def run(name: str, tmp_path, reached=lambda r: True) -> FaultResult:
    """The fault's first run that exercised it (`reached`: and showed it at the runtime as
    well, where that depends on chance), at most ATTEMPTS runs."""
    tried = []
    for attempt in range(1, ATTEMPTS + 1):
        try:
            r = FAULTS[name](tmp_path / f"run{attempt}", attempt)
        except Disturbed as exc:
            tried.append(str(exc))
            continue
        print(f"\n{r.fault}: stop {r.stop_s} s (from the {r.measured_from}), bound "
              f"{r.bound_s:.4f} s, restarted {r.restarted}, notes {r.notes}\n"
              f"  arm dropped {r.arm_dropped}\n  runtime dropped {r.runtime_dropped}\n"
              f"  relay {r.relay}")
        if r.exercised and (reached(r) or attempt == ATTEMPTS):
            return r
        tried.append("; ".join(r.notes) or ("the fault did not reach the runtime"
                                            if r.exercised else
                                            "the arm was not moving at the fault"))
    pytest.fail(f"{name}: no run exercised the fault in {ATTEMPTS} attempts: {tried}")


def nothing_bad_acted_on(r: FaultResult) -> None:
    assert r.applied_backwards == 0, "an older rates message was applied after a newer one"
    assert r.garbage_acted_on == 0, "garbage reached the arm side without being counted"
    assert r.runtime_used_older == 0, "the runtime used an older state after a newer one"
    assert r.runtime_used_unknown == 0, "the runtime used a q the arm never sent"
    assert r.records_lost_before_fault == 0, "records missing from the log before the fault"


def stops_in_bound(r: FaultResult) -> None:
    assert r.stop_s is not None, "the arm never came to a standstill"
    assert r.stop_s <= r.bound_s + ALLOWANCE_S, \
        f"stopped {r.stop_s * 1e3:.1f} ms after the {r.measured_from}, bound " \
        f"{r.bound_s * 1e3:.1f} ms"


def test_runtime_killed(tmp_path) -> None:
    r = run("runtime_killed", tmp_path)
    nothing_bad_acted_on(r)
    stops_in_bound(r)
    assert not r.restarted
    # The unflushed tail of the log: at most one flush interval and one write (bounded).
    assert r.tail_lost_s is not None and r.tail_lost_s <= FLUSH_S + 0.1


def test_sim_killed_the_runtime_shows_it_and_commands_zero(tmp_path) -> None:
    r = run("sim_killed", tmp_path)
    nothing_bad_acted_on(r)
    stops_in_bound(r)            # here: fault → the first cycle that sends zero
    assert not r.restarted       # no non-zero rates after that
    assert "runtime shows it: yes" in r.notes


@pytest.mark.parametrize("direction", ["state", "rates"])
def test_a_stalled_stream(direction, tmp_path) -> None:
    r = run(f"{direction}_stalled", tmp_path)
    nothing_bad_acted_on(r)
    stops_in_bound(r)
    assert not r.restarted, "moved again after the stall with enable still held"


@pytest.mark.parametrize("name", ["loss_20", "dup_reorder", "garbage"])
def test_a_bad_link_is_ridden_through_and_nothing_bad_is_acted_on(name, tmp_path) -> None:
    # Reordered states reach the runtime and are refused, alone in a read or after a newer
    # one (Inbox.overtaken): hundreds a run; a run that saw none is tried again.
    r = run(name, tmp_path, reached=lambda r: name != "dup_reorder" or
            r.runtime_dropped.get("refused (old or late)", 0) > 0)
    nothing_bad_acted_on(r)
    assert r.measured_from == "release", f"the arm stopped at the fault: {r.notes}"
    stops_in_bound(r)
    if name == "dup_reorder":
        assert r.arm_dropped.get("old_seq", 0) >= r.relay["rates"]["duplicated"]
        assert r.runtime_dropped["refused (old or late)"] > 0
    if name == "garbage":
        assert sum(r.runtime_dropped.values()) > 0


def test_garbage_in_a_foreign_protocol_version_stops_motion(tmp_path) -> None:
    r = run("garbage_version", tmp_path)
    nothing_bad_acted_on(r)
    assert r.measured_from == "fault"
    stops_in_bound(r)
    assert not r.restarted


def test_a_latency_jump_stops_the_arm(tmp_path) -> None:
    r = run("latency_200ms", tmp_path)
    nothing_bad_acted_on(r)
    assert r.measured_from == "fault"
    stops_in_bound(r)
    assert not r.restarted


def test_a_link_too_slow_to_stop_in_time_never_moves_the_arm(tmp_path) -> None:
    """200 ms each way from the start is invisible to both lateness filters (every message is
    equally late), but a release would reach the arm 200 ms later, beyond stale_after. The
    runtime measures the round trip (≈ 400 ms) and refuses motion, saying so."""
    r = run("latency_200ms_steady", tmp_path)
    nothing_bad_acted_on(r)
    assert r.peak_speed is not None and r.peak_speed <= 1e-3, "the arm moved"
    reasons = next(n for n in r.notes if n.startswith("runtime's reasons"))
    limit = f"over the {STALE_AFTER_S * 1e3:.0f} ms limit"
    shown = re.search(r"link round trip (\d+) ms, " + limit, reasons)
    assert shown and 400 <= int(shown.group(1)) <= 500, reasons   # 2 × 200 ms + cycles
    assert any(n.startswith("status line: link round trip") for n in r.notes), r.notes
    assert any(n.startswith("summary: round trip over the limit") for n in r.notes), r.notes


def test_pad_unplugged_while_moving(tmp_path) -> None:
    r = run("pad_unplugged", tmp_path)
    nothing_bad_acted_on(r)
    stops_in_bound(r)
    assert not r.restarted, "moved again when the pad came back with enable held"
    assert "moves again after a fresh enable: yes" in r.notes


def test_disk_full_while_recording(tmp_path) -> None:
    r = run("disk_full", tmp_path)
    nothing_bad_acted_on(r)
    assert r.figures["full_before_release"], "the disk did not fill while the arm moved"
    assert r.measured_from == "release"
    stops_in_bound(r)
    # Everything that fit is readable: what cannot be read at the end of the file is the one
    # block that was being written when the disk filled (blocks vary in length: the bound
    # is 1.5 × their mean length).
    assert r.figures["unreadable_bytes"] < 1.5 * r.figures["block_bytes"], r.notes
    assert "said while driving: yes" in r.notes
    assert any(n.startswith("summary: recording stopped: writing") for n in r.notes), r.notes
    # The loop kept its pace after the disk filled (as seen at the arm: rates applied / s).
    before, after = r.figures["applied_per_s_before"], r.figures["applied_per_s_after"]
    assert after >= 0.8 * before, (before, after)


def test_loop_starved_of_cpu(tmp_path) -> None:
    r = run("loop_starved", tmp_path)
    nothing_bad_acted_on(r)
    stops_in_bound(r)
    assert not r.restarted
    assert any("overran" in n for n in r.notes), r.notes
