"""runtime/sessions/cell_check.py: the workcell part of a preflight verdict. A planar arm's
TCP swings toward a wall; its clearance is the closed-form distance of a point to a plane
(elementary geometry), so every number the verdict gives can be checked by hand."""

from __future__ import annotations

import io
import math

import numpy as np
import pytest

from runtime.arm.kinematics import tcp_pose
from runtime.arm.load import load_arm
from runtime.sessions.cell_check import (
    CLEARANCE_ALLOWANCE_M,
    contact_episodes,
    evaluate_cell,
    with_cell,
)
from runtime.sessions.log_schema import CycleRecord
from runtime.sessions.preflight import TraceBuilder, evaluate
from runtime.sessions.report import ReportContext, render_html, render_plots

RATE_HZ = 500.0
DT = 1.0 / RATE_HZ
WALL_X_M = 0.70          # a wall x = 0.70 m, solid beyond it (TCP at x 0.41 at home)
SAFETY_M, INFLUENCE_M = 0.01, 0.05
PAIRS = [("tool", "wall"), ("link_2", "post")]


@pytest.fixture(scope="module")
def arm():
    return load_arm("planar3")


def distances(arm, q):
    """(N, 2): the TCP's distance to the wall at each pose (point to plane), and a post
    always 0.5 m off."""
    x = np.array([tcp_pose(arm, qk)[0, 3] for qk in q])
    return np.stack((WALL_X_M - x, np.full(len(q), 0.5)), axis=1)


def joint1_run(arm, rate: float, seconds: float):
    """Joint 1 turning at `rate` rad/s: the TCP sweeps in x (toward the wall for rate < 0)."""
    q = arm.home()
    trace = TraceBuilder(arm, q, np.zeros(arm.n))
    rates = np.array([rate, 0.0, 0.0])
    for k in range(int(seconds * RATE_HZ)):
        rec = CycleRecord(cycle=k, t_s=k * DT, axes=(), buttons=(), enabled=True,
                          enable_reason="enable held", twist=(0.0,) * 6, frame="base",
                          q=tuple(q), rates=tuple(rates), damping=0.0, sigma_min=0.2,
                          manipulability=0.1, achieved_twist=(0.0,) * 6, tracking_error=0.0,
                          scales={}, binding_limit=None, period_s=DT, compute_s=0.0,
                          overrun=False)
        q = q + rates * DT
        trace.add(rec, q, rates)
    return trace.build()


def test_clearance_below_the_safety_distance_fails_naming_the_pair_and_time(arm):
    trace = joint1_run(arm, -0.6, 1.5)
    x = np.array([tcp_pose(arm, qk)[0, 3] for qk in trace.q])
    gap = WALL_X_M - x
    verdict, findings = evaluate_cell(trace.t, trace.q, cell="test", pairs=PAIRS,
                                      distances=distances(arm, trace.q), safety_m=SAFETY_M,
                                      influence_m=INFLUENCE_M, contacts=(),
                                      contacts_measured=True)
    k = int(np.argmin(gap))
    assert verdict.min_clearance_m == pytest.approx(gap[k], abs=1e-15)
    assert verdict.min_clearance_t_s == pytest.approx(trace.t[k])
    assert verdict.pair == ("tool", "wall") and verdict.closest_cycle == k
    below = np.flatnonzero(gap < SAFETY_M - CLEARANCE_ALLOWANCE_M)
    if gap.min() < SAFETY_M - CLEARANCE_ALLOWANCE_M:
        (f,) = findings
        assert f.code == "clearance" and f.t_s == pytest.approx(trace.t[below[0]])
        assert "tool–wall" in f.message and f"t = {trace.t[below[0]]:.2f} s" in f.message
    else:
        pytest.fail(f"the sweep never came near the wall (closest {gap.min():.3f} m)")
    assert verdict.plotted[0] == ("tool", "wall")
    assert verdict.as_dict()["clearance_pair"] == ["tool", "wall"]


def test_contacts_fail_the_run_one_finding_per_pair(arm):
    reported = [(0.50, "tool", "wall", 0.001), (0.502, "tool", "wall", 0.003),
                (0.504, "tool", "wall", 0.002), (0.60, "link_2", "link_3", 0.0005)]
    episodes = contact_episodes(reported)
    assert [(e.pair, e.t_s, e.depth_m, e.depth_t_s, e.cycles) for e in episodes] == \
        [("tool–wall", 0.50, 0.003, 0.502, 3), ("link_2–link_3", 0.60, 0.0005, 0.60, 1)]
    trace = joint1_run(arm, 0.1, 0.2)               # away from the wall: clearance is fine
    result = evaluate(arm, trace, rate_hz=RATE_HZ)
    verdict, findings = evaluate_cell(trace.t, trace.q, cell="test", pairs=PAIRS,
                                      distances=distances(arm, trace.q), safety_m=SAFETY_M,
                                      influence_m=INFLUENCE_M, contacts=reported,
                                      contacts_measured=True)
    assert [f.code for f in findings] == ["contact", "contact"]
    out = with_cell(result, verdict, findings)
    assert out.verdict == "fail"
    contact_reasons = [f.message for f in out.findings if f.code == "contact"]
    assert "contact tool–wall at t = 0.50 s: 3.0 mm deep" in contact_reasons[0]
    d = out.as_dict()
    assert d["min_clearance"] == verdict.min_clearance_m and len(d["contacts"]) == 2


def test_a_clear_run_passes_and_an_unconfirmed_workcell_does_not(arm):
    trace = joint1_run(arm, 0.1, 0.2)
    result = evaluate(arm, trace, rate_hz=RATE_HZ)
    args = dict(cell="test", pairs=PAIRS, distances=distances(arm, trace.q), safety_m=SAFETY_M,
                influence_m=INFLUENCE_M, contacts=())
    clear = with_cell(result, *evaluate_cell(trace.t, trace.q, contacts_measured=True, **args))
    assert not any(f.code.startswith(("contact", "clearance")) for f in clear.findings)
    assert any("nearest tool–wall" in n for n in clear.notes)
    blind = with_cell(result, *evaluate_cell(trace.t, trace.q, contacts_measured=False, **args))
    assert not blind.passed and blind.findings[-1].code == "contact_unchecked"
    assert evaluate(arm, trace, rate_hz=RATE_HZ).as_dict()["min_clearance"] is None


def test_the_report_plots_clearance_and_shows_the_closest_approach(arm):
    import matplotlib.image
    trace = joint1_run(arm, -0.6, 1.5)
    verdict, findings = evaluate_cell(trace.t, trace.q, cell="test", pairs=PAIRS,
                                      distances=distances(arm, trace.q), safety_m=SAFETY_M,
                                      influence_m=INFLUENCE_M,
                                      contacts=[(1.2, "tool", "wall", 0.002)],
                                      contacts_measured=True)
    result = with_cell(evaluate(arm, trace, rate_hz=RATE_HZ), verdict, findings)
    plots = render_plots(result, arm)
    pixels = matplotlib.image.imread(io.BytesIO(plots["clearance"]), format="png")
    assert (pixels[..., :3].max(axis=-1) - pixels[..., :3].min(axis=-1) > 0.3).mean() > 0.001
    picture = plots["speeds"]                       # any PNG stands in for the snapshot
    ctx = ReportContext(arm=arm, profile="sweep", profile_source="test", rate_hz=RATE_HZ,
                        step_hz=1000.0, started_at="2026-01-01T00:00:00+00:00", wall_s=0.5,
                        session_log="sweep.jwlog", closest_picture=picture)
    html = render_html(result, ctx, plots)
    assert "<h2>Workcell</h2>" in html and "closest approach" in html
    assert html.count("data:image/png;base64,") == len(plots) + 1
    assert f"t = {verdict.min_clearance_t_s:.2f} s" in html and not math.isnan(
        verdict.min_clearance_m)
