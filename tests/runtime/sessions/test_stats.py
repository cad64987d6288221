"""The one analysis of commanded motion (runtime.sessions.stats): accelerations per nominal
cycle, stops apart, the same whether a run is fed in chunks or one cycle at a time."""

from __future__ import annotations

import numpy as np
import pytest

from runtime.sessions.stats import MotionStats, above

NAMES = ("a", "b")
MAX_ACCEL = np.array([2.0, 4.0])
RATE_HZ = 100.0


def _run() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, list[str], np.ndarray]:
    """Eight cycles at 100 Hz: a ramp up, a gap (cycle 5 missing), enable released at 7."""
    cycle = np.array([0, 1, 2, 3, 4, 6, 7, 8])
    t = cycle / RATE_HZ
    rates = np.array([[0.00, 0.0], [0.02, 0.0], [0.04, 0.01], [0.06, 0.02], [0.06, 0.03],
                      [0.50, 0.03], [0.00, 0.00], [0.00, 0.00]])
    allowed = np.array([True] * 6 + [False, False])
    reasons = ["moving"] * 6 + ["enable released"] * 2
    tcp = np.full(len(t), 0.05)
    return cycle, t, rates, allowed, reasons, tcp


def test_accelerations_are_steps_over_the_nominal_period_and_stops_stand_apart():
    # Hand arithmetic: |Δq̇|·rate_hz. Joint a steps 0.02 rad/s a cycle → 2.0 rad/s²; the jump
    # to 0.50 follows a gap (cycle 5 missing) and pairs with nothing; the step to zero at
    # cycle 7 is a stop: 0.50·100 = 50 rad/s² asked of joint a, not an acceleration.
    m = MotionStats(NAMES, MAX_ACCEL, RATE_HZ)
    accel = m.add(*_run())
    assert np.isnan(accel[5]).all() and np.isnan(accel[6]).all()
    assert m.peak_accel == pytest.approx([2.0, 1.0])
    assert m.peak_accel_t == pytest.approx([0.01, 0.02])
    assert m.peak_speed == pytest.approx([0.5, 0.03])
    assert len(m.stops) == 1
    stop = m.stops[0]
    assert (stop.t_s, stop.joint, stop.reason) == (0.07, "a", "enable released")
    assert stop.asked_decel == pytest.approx(50.0)
    assert not above(float(m.peak_accel[0]), MAX_ACCEL[0])       # exactly at max_accel
    assert above(2.0 * (1 + 1e-6), 2.0) and not above(None, 2.0)


@pytest.mark.parametrize("chunk", [1, 3, 8])
def test_one_cycle_at_a_time_gives_what_chunks_give(chunk):
    cycle, t, rates, allowed, reasons, tcp = _run()
    whole = MotionStats(NAMES, MAX_ACCEL, RATE_HZ)
    for i in range(0, len(t), chunk):
        part = slice(i, i + chunk)
        whole.add(cycle[part], t[part], rates[part], allowed[part], reasons[part], tcp[part])
    single = MotionStats(NAMES, MAX_ACCEL, RATE_HZ)
    single.PENDING_MAX = 3       # several flushes within the run
    for k in range(len(t)):
        single.add_cycle(int(cycle[k]), float(t[k]), rates[k], bool(allowed[k]), reasons[k],
                         float(tcp[k]))
    single.flush()
    for name in ("peak_speed", "peak_speed_t", "peak_accel", "peak_accel_t"):
        assert getattr(single, name) == pytest.approx(getattr(whole, name), nan_ok=True), name
    assert single.stops == whole.stops


def test_a_cycle_that_came_early_is_judged_over_the_real_spacing():
    # Hand arithmetic: at 100 Hz a change of 0.01 rad/s is 1.0 rad/s² over the 10 ms
    # period; cycle 2 came 4 ms after cycle 1 (catching up after a late one), so its change
    # of 0.01 is 0.01 / 0.004 = 2.5 rad/s² as an arm applying it on arrival sees it. Cycle 1
    # came late (16 ms): still judged over the period, 1.0 rad/s².
    m = MotionStats(NAMES, MAX_ACCEL, RATE_HZ)
    t = np.array([0.0, 0.016, 0.020, 0.030])
    rates = np.array([[0.0, 0.0], [0.01, 0.0], [0.02, 0.0], [0.03, 0.0]])
    accel = m.add(np.arange(4), t, rates, np.ones(4, dtype=bool), ["moving"] * 4,
                  np.zeros(4))
    assert accel[1:, 0] == pytest.approx([1.0, 2.5, 1.0])
    assert m.peak_accel[0] == pytest.approx(2.5) and m.peak_accel_t[0] == pytest.approx(0.020)
