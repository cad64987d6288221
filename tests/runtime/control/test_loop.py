"""Fixed-rate loop: timing statistics and overrun handling, on a fake clock."""

from __future__ import annotations

import numpy as np
import pytest

from runtime.control.loop import FixedRateLoop, Tick


def make(fake_clock, rate_hz=1000.0, **clock_kw):
    clock = fake_clock(**clock_kw)
    return FixedRateLoop(rate_hz, clock=clock, sleep=clock.sleep, spin_s=3e-4), clock


def test_steady_cycles_keep_the_period_and_report_compute_time(fake_clock):
    loop, clock = make(fake_clock)
    ticks: list[Tick] = []

    def body(t: Tick):
        ticks.append(t)
        clock.work(0.2e-3)

    s = loop.run(body, duration_s=0.5)
    assert s.cycles == 500 and len(ticks) == 500
    assert s.overruns == 0 and s.missed_deadlines == 0 and s.overrun_fraction == 0.0
    assert s.period_p50_s == pytest.approx(1e-3, abs=2e-6)
    assert s.period_max_s == pytest.approx(1e-3, abs=2e-6)
    assert s.compute_p50_s == pytest.approx(0.2e-3, abs=2e-6)
    assert s.late_max_s < 5e-6        # the spin lands on the deadline (a few clock reads)
    # deadlines sit on a fixed grid: no drift accumulates
    d = np.array([t.deadline_s for t in ticks])
    np.testing.assert_allclose(np.diff(d), 1e-3, atol=1e-9)
    assert ticks[-1].deadline_s - ticks[0].deadline_s == pytest.approx(0.499, abs=1e-9)


def test_sleep_then_spin_absorbs_sleep_overshoot(fake_clock):
    # time.sleep overshoots by about 70 µs median on these machines (REFERENCES §10)
    spin, clock = make(fake_clock, sleep_overshoot_s=70e-6)
    spun = spin.run(lambda t: None, max_cycles=200)
    clock2 = fake_clock(sleep_overshoot_s=70e-6)
    plain = FixedRateLoop(1000.0, clock=clock2, sleep=clock2.sleep, spin_s=0.0)
    slept = plain.run(lambda t: None, max_cycles=200)
    assert spun.late_p50_s < 5e-6
    assert slept.late_p50_s == pytest.approx(70e-6, abs=3e-6)


def test_an_overrun_is_counted_and_skipped_without_a_burst(fake_clock):
    loop, clock = make(fake_clock)
    starts: list[float] = []

    def body(t: Tick):
        starts.append(t.start_s)
        clock.work(2.5e-3 if t.index == 10 else 0.1e-3)

    s = loop.run(body, max_cycles=20)
    assert s.overruns == 1
    assert s.missed_deadlines == 2                   # slots 11 and 12 were skipped
    gaps = np.diff(starts)
    assert gaps[10] == pytest.approx(3e-3, abs=5e-6)  # resynchronised on slot 13, not sooner
    assert np.all(np.abs(np.delete(gaps, 10) - 1e-3) < 5e-6)  # no catch-up cycles after it
    assert s.overrun_streak == 0 and s.max_overrun_streak == 1


def test_overrun_streak_is_reported_to_the_body_and_resets(fake_clock):
    loop, clock = make(fake_clock)
    seen: list[int] = []

    def body(t: Tick):
        seen.append(t.overrun_streak)
        clock.work(1.5e-3 if 3 <= t.index <= 5 else 0.1e-3)

    s = loop.run(body, max_cycles=9)
    assert seen == [0, 0, 0, 0, 1, 2, 3, 0, 0]
    assert s.overruns == 3 and s.max_overrun_streak == 3 and s.overrun_streak == 0
    assert s.overrun_fraction == pytest.approx(3 / 9)


def test_percentiles_match_numpy_over_the_window(fake_clock):
    loop, clock = make(fake_clock)
    work = np.random.default_rng(7).uniform(0.05e-3, 0.8e-3, size=400)

    def body(t: Tick):
        clock.work(work[t.index])

    s = loop.run(body, max_cycles=len(work))
    measured = work + clock.read_cost_s  # the clock reading that ends a cycle costs 1 µs
    p50, p99 = np.percentile(measured, (50, 99))
    assert s.compute_p50_s == pytest.approx(p50, rel=1e-6)
    assert s.compute_p99_s == pytest.approx(p99, rel=1e-6)
    assert s.compute_max_s == pytest.approx(measured.max(), rel=1e-6)


def test_the_window_is_bounded_and_keeps_the_recent_cycles(fake_clock):
    clock = fake_clock()
    loop = FixedRateLoop(1000.0, clock=clock, sleep=clock.sleep, window_s=0.05)

    def body(t: Tick):
        clock.work(0.9e-3 if t.index < 100 else 0.1e-3)

    s = loop.run(body, max_cycles=200)
    assert s.window == 50 and s.cycles == 200
    assert s.compute_max_s == pytest.approx(0.1e-3, abs=2e-6)  # the slow ones have left


def test_the_loop_ends_on_body_false_on_stop_and_on_duration(fake_clock):
    loop, clock = make(fake_clock, rate_hz=500.0)
    assert loop.run(lambda t: t.index < 9).cycles == 10
    loop, clock = make(fake_clock, rate_hz=500.0)
    assert loop.run(lambda t: loop.stop() if t.index == 4 else None).cycles == 5
    loop, clock = make(fake_clock, rate_hz=500.0)
    assert loop.run(lambda t: None, duration_s=0.1).cycles == 50
    assert loop.stats().cycles == 50


def test_stats_line_is_readable(fake_clock):
    loop, clock = make(fake_clock)
    line = loop.run(lambda t: clock.work(1e-4), max_cycles=10).line()
    assert "1000 Hz" in line and "overruns 0 (0.00 %)" in line


@pytest.mark.parametrize("kw", [dict(rate_hz=0.0), dict(rate_hz=float("nan")),
                                dict(rate_hz=500.0, spin_s=-1.0),
                                dict(rate_hz=500.0, window_s=0.0)])
def test_bad_settings_are_refused(kw):
    with pytest.raises(ValueError):
        FixedRateLoop(**kw)


def test_a_loop_in_its_own_thread_hands_back_its_error(fake_clock):
    clock = fake_clock()
    loop = FixedRateLoop(1000.0, clock=clock, sleep=clock.sleep)

    def body(t: Tick):
        if t.index == 3:
            raise RuntimeError("solver exploded")

    loop.start(body, max_cycles=10)
    with pytest.raises(RuntimeError, match="exploded"):
        loop.join(5.0)
    assert loop.stats().cycles == 3
    ok = FixedRateLoop(1000.0, clock=clock, sleep=clock.sleep)
    ok.start(lambda t: None, max_cycles=5)
    assert ok.join(5.0).cycles == 5
