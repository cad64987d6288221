"""The preflight report: plots are real, non-blank PNGs; the HTML carries the verdict, the
reasons and every plot; long series are thinned without losing their peaks."""

from __future__ import annotations

import io
import math
import subprocess
import sys

import numpy as np
import pytest

from runtime.arm.kinematics import geometric_jacobian
from runtime.arm.load import load_arm
from runtime.sessions.log_schema import CycleRecord
from runtime.sessions.preflight import TraceBuilder, evaluate
from runtime.sessions.report import (
    PLOT_NAMES,
    ReportContext,
    reduce_series,
    render_html,
    render_plots,
)

RATE_HZ = 500.0
DT = 1.0 / RATE_HZ


@pytest.fixture(scope="module")
def failed_run():
    """planar3 with joint 1 rated 50 deg/s, turned at up to 60 deg/s (ramps of 300 deg/s²)
    with a reduced-speed stretch and the acceleration limit binding on the ramps."""
    arm = load_arm("planar3")
    j1 = arm.joints[0]
    arm = arm.with_changes(joints=(j1.__class__(**{**vars(j1), "rated_speed":
                                                   math.radians(50.0)}),) + arm.joints[1:])
    v, a = math.radians(60.0), math.radians(300.0)
    q = arm.home()
    trace = TraceBuilder(arm, q, np.zeros(arm.n))
    for k in range(600):
        t = k * DT
        rate = max(0.0, min(v, a * (t - 0.1), a * (1.1 - t)))
        rates = np.array([rate, 0.0, 0.0])
        twist = geometric_jacobian(arm, q) @ rates
        ramping = 0.0 < rate < v
        rec = CycleRecord(cycle=k, t_s=t, axes=(), buttons=(), enabled=t < 1.15,
                          enable_reason="enable held", twist=tuple(twist), frame="base",
                          q=tuple(q), rates=tuple(rates), damping=0.0, sigma_min=0.2,
                          manipulability=0.1, achieved_twist=tuple(twist),
                          tracking_error=0.0, scales={},
                          binding_limit="acceleration" if ramping else None, period_s=DT,
                          compute_s=0.0, overrun=False, reduced=0.5 < t < 0.6)
        q = q + rates * DT
        trace.add(rec, q, rates * 1.001, commanded_twist=twist)
    return arm, evaluate(arm, trace.build(), rate_hz=RATE_HZ)


@pytest.fixture(scope="module")
def plots(failed_run):
    arm, result = failed_run
    return render_plots(result, arm)


def test_every_plot_is_a_non_blank_png(plots):
    import matplotlib.image
    assert list(plots) == [n for n in PLOT_NAMES if n != "clearance"]   # no workcell here
    for name, png in plots.items():
        assert png.startswith(b"\x89PNG\r\n\x1a\n"), name       # PNG signature (RFC 2083)
        pixels = matplotlib.image.imread(io.BytesIO(png), format="png")
        assert pixels.shape[0] >= 250 and pixels.shape[1] >= 800, name
        # Not blank: axes, text and lines darken a few per cent of a white canvas, and
        # the curves bring colour (a channel spread) beyond the grey of axes and text.
        rgb = pixels[..., :3]
        assert 0.02 < (rgb < 0.9).any(axis=-1).mean() < 0.6, name
        assert (rgb.max(axis=-1) - rgb.min(axis=-1) > 0.3).mean() > 0.001, name


def test_the_html_carries_verdict_reasons_and_plots(failed_run, plots):
    arm, result = failed_run
    ctx = ReportContext(arm=arm, profile="ramp", profile_source="test", rate_hz=RATE_HZ,
                        step_hz=1000.0, started_at="2026-01-01T00:00:00+00:00", wall_s=0.5,
                        session_log="ramp.jwlog")
    html = render_html(result, ctx, plots)
    assert result.verdict == "fail"
    assert ">FAIL<" in html and "Why it fails" in html
    assert "j1: commanded speed 60.00 deg/s exceeds its rated 50.00 deg/s" in html
    assert html.count("data:image/png;base64,") == len(plots)
    assert "not safety functions" in html


def test_long_series_keep_their_peaks():
    t = np.arange(100_000) * 0.002
    y = np.zeros(100_000)
    y[54_321] = 7.0                      # a one-cycle spike
    tb, yb = reduce_series(t, y, points=1000)
    assert len(tb) == 1000 and yb.max() == 7.0
    tb, yb = reduce_series(t, -y, points=1000, how=np.fmin)
    assert yb.min() == -7.0
    short_t, short_y = reduce_series(t[:10], y[:10])
    assert np.array_equal(short_t, t[:10]) and np.array_equal(short_y, y[:10])
    gaps = np.where(np.arange(100_000) < 50_000, np.nan, 1.0)   # NaN where nothing happened
    _, gb = reduce_series(t, gaps, points=100)
    assert np.isnan(gb[:50]).all() and (gb[50:] == 1.0).all()


def test_importing_the_report_does_not_import_matplotlib():
    """matplotlib is loaded only when a report is drawn (STYLE.md: heavy dependencies at
    the edge, imported lazily)."""
    code = ("import sys, runtime.sessions.report, runtime.commands.preflight; "
            "print('matplotlib' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.strip()
    assert out == "False"
