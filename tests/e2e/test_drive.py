"""`jogwire drive` end to end: the command in its own process, the simulated arm as its child,
real 127.0.0.1 sockets, no display (SDL dummy driver). Every run is bounded in time and the
tests check that nothing is left running afterwards."""

from __future__ import annotations

import json
import re
import selectors
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from runtime.link.arm_process import child_env
from runtime.arm.kinematics import tcp_pose
from runtime.sessions.log_reader import read_session

pytestmark = pytest.mark.e2e

RATE_HZ = 250.0          # a 4 ms period: a loaded test machine rarely trips the overrun watch
LEAD_IN_S, MOVE_S, REST_S = 0.5, 1.5, 1.0
V_X_M_S = 0.05
SCRIPT = f"""
name = "line_x"
summary = "{MOVE_S} s at {V_X_M_S} m/s along base +x, then enable released"
lead_in_s = {LEAD_IN_S}
[[segment]]
duration_s = {MOVE_S}
twist = [{V_X_M_S}, 0, 0, 0, 0, 0]
[[segment]]
duration_s = {REST_S}
enable = false
"""


def headless_env() -> dict[str, str]:
    env = child_env()
    env.pop("DISPLAY", None)
    env.pop("WAYLAND_DISPLAY", None)
    env.update(SDL_VIDEODRIVER="dummy", SDL_AUDIODRIVER="dummy")
    return env


def drive_argv(*args: str) -> list[str]:
    return [sys.executable, "-m", "runtime.cli", "drive", *args]


def child_pid(stdout: str) -> int:
    m = re.search(r"child pid (\d+)", stdout)
    assert m, stdout
    return int(m.group(1))


def is_running(pid: int) -> bool:
    """Whether `ps` still lists the process (a zombie counts: nobody reaped it)."""
    return subprocess.run(["ps", "-p", str(pid)], capture_output=True).returncode == 0


def run_script(tmp: Path, *extra: str):
    """A headless scripted drive against the simulated elbow6; (process, summary, session)."""
    (tmp / "line_x.toml").write_text(SCRIPT, encoding="utf-8")
    done = subprocess.run(
        drive_argv("--headless", "--input", f"script:{tmp / 'line_x.toml'}", "--rate",
                   f"{RATE_HZ:g}", "--sessions", str(tmp / "sessions"), "--summary-json",
                   str(tmp / "summary.json"), *extra),
        cwd=tmp, env=headless_env(), capture_output=True, text=True, timeout=90)
    assert done.returncode == 0, done.stdout + done.stderr
    summary = json.loads((tmp / "summary.json").read_text(encoding="utf-8"))
    return done, summary, read_session(summary["session"]["path"])


@pytest.fixture(scope="module")
def paced_run(tmp_path_factory):
    """The simulated arm in real time (the default), with a screenshot at 1.2 s."""
    tmp = tmp_path_factory.mktemp("paced")
    return (*run_script(tmp, "--screenshot", str(tmp / "status.png"),
                        "--screenshot-after", "1.2"), tmp)


@pytest.fixture(scope="module")
def lockstep_run(tmp_path_factory):
    """The simulated arm stepped once per cycle: its time is exactly the loop's cycles."""
    return run_script(tmp_path_factory.mktemp("lockstep"), "--lockstep")


@pytest.mark.parametrize("run", ["paced_run", "lockstep_run"])
def test_scripted_run_ends_by_itself_and_cleans_up(request, run):
    done, summary, session = request.getfixturevalue(run)[:3]
    assert summary["end_reason"] == "the script finished"
    assert "zero rates applied; arm measured at rest" in summary["stop"], summary["stop"]
    assert session.closed_cleanly and not session.problems
    assert len(session.records) == summary["cycles"]
    assert "Traceback" not in done.stdout + done.stderr
    assert not is_running(child_pid(done.stdout))


def test_measured_tcp_displacement_matches_twist_times_time(lockstep_run):
    """Resolved-motion rate control (Whitney 1969): the TCP moves by ∫ twist dt. The arm is
    the PyBullet simulation in another process, stepped 1/rate per cycle; positions come
    from the measured q it sent back (as recorded), through forward kinematics."""
    _, _, session = lockstep_run
    arm = session.header.arm
    recs = session.records
    t = np.array([r.t_s for r in recs])
    p = np.array([tcp_pose(arm, np.array(r.q))[:3, 3] for r in recs])
    moving = np.array([r.enabled for r in recs])
    # Each cycle's rates move the arm for one step of 1/rate. The gate allows motion only
    # while enable is held and the loop is healthy: a heavily loaded machine may stop the
    # motion early (an overrun streak), so the travel is v × the time motion was allowed.
    t_enabled = moving.sum() / RATE_HZ
    assert t_enabled >= 0.3 * MOVE_S, "the gate allowed motion for too little of the segment"
    assert t_enabled <= MOVE_S + 1 / RATE_HZ                       # never more than scripted
    before = p[np.searchsorted(t, LEAD_IN_S - 0.1)]
    after = p[-1]
    # Tolerance 2 mm (2.7 % of 75 mm): the acceleration-limited start costs about 0.5 mm
    # (our estimate from the limits), and a command the arm side drops because a newer one
    # came before its step (counted as "superseded") skips one step, 0.2 mm.
    np.testing.assert_allclose(after - before, [V_X_M_S * t_enabled, 0.0, 0.0], atol=2e-3)


@pytest.mark.parametrize("run", ["paced_run", "lockstep_run"])
def test_arm_stops_when_the_script_releases_enable(request, run):
    session = request.getfixturevalue(run)[2]
    recs = [r for r in session.records if r.t_s > LEAD_IN_S + MOVE_S + 0.1]
    assert recs and not any(r.enabled for r in recs)
    assert all(max(map(abs, r.rates)) == 0.0 for r in recs)      # hold-to-move: zero at once
    # Measured speeds over 50 ms steps (finite differences of the measured q): the joints
    # hold still to within the velocity motors' creep under gravity (about 1e-3 rad/s), and
    # the TCP to within 1 mm/s, against 50 mm/s before the release.
    arm = session.header.arm
    step = max(1, round(0.05 * RATE_HZ))
    t = np.array([r.t_s for r in recs])[::step]
    q = np.array([r.q for r in recs])[::step]
    p = np.array([tcp_pose(arm, qi)[:3, 3] for qi in q])
    dt = np.diff(t)[:, None]
    assert np.max(np.abs(np.diff(q, axis=0)) / dt) < 5e-3          # rad/s
    assert np.max(np.linalg.norm(np.diff(p, axis=0), axis=1) / dt[:, 0]) < 1e-3   # m/s


def test_inspect_of_a_driven_session_finds_no_acceleration_and_lists_the_stop(paced_run,
                                                                          capsys):
    """The release at the end steps the rates to zero in one cycle: a stop, listed on its
    own, never a commanded acceleration beyond max or rated (runtime.sessions.stats)."""
    from runtime.cli import main
    _, summary, _ = paced_run[:3]
    assert main(["inspect", summary["session"]["path"], "--json"]) == 0
    inspected = json.loads(capsys.readouterr().out)
    for j in inspected["joints"]:
        assert not j["over_max_accel"] and not j["over_rated_accel"], j["name"]
        assert j["peak_accel"] <= j["max_accel"] * (1 + 1e-9)
    assert len(inspected["stops"]) == 1 and inspected["stops"][0]["tcp_speed"] > 0.04


def test_status_window_renders_a_real_drive_snapshot(paced_run):
    """The PNG of the status window, drawn from the live snapshot taken at 1.2 s."""
    from runtime.operator.inputs.pygame_init import pygame
    from runtime.operator.status_window import GROUND, SIZE, STATE_COLOURS
    _, summary, _, tmp = paced_run
    assert summary["screenshot"] == str(tmp / "status.png")
    img = pygame.surfarray.array3d(pygame.image.load(str(tmp / "status.png")))
    assert img.shape[:2] == SIZE
    assert len(np.unique(img.reshape(-1, 3), axis=0)) > 50        # text, bars, arm: not flat
    assert 0.2 < np.any(img != np.array(GROUND), axis=2).mean() < 0.95
    assert tuple(img[30, 30]) in STATE_COLOURS.values()           # the gate's state box


def test_plain_drive_without_display_or_pad_runs_the_demo(tmp_path):
    done = subprocess.run(drive_argv("--duration", "3"), cwd=tmp_path, env=headless_env(),
                          capture_output=True, text=True, timeout=90)
    out = done.stdout
    assert done.returncode == 0, out + done.stderr
    assert "Traceback" not in out + done.stderr
    if "taking the first gamepad" not in out:      # a pad plugged into this machine wins
        assert "no display and no gamepad: playing the demo script 'square'" in out
    assert "--duration 3 s reached" in out
    for heading in ("loop ", "link ", "joints ", "TCP ", "limits ", "stop ", "session "):
        assert f"\n  {heading}" in out, heading
    logs = list((tmp_path / "sessions").glob("*.jwlog"))
    assert len(logs) == 1 and str(logs[0].name) in out
    assert not is_running(child_pid(out))


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_stop_signal_mid_motion_ends_cleanly(tmp_path, signum):
    proc = subprocess.Popen(drive_argv("--headless", "--input", "script:square", "--sessions",
                                       str(tmp_path)),
                            cwd=tmp_path, env=headless_env(), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    lines = []
    try:
        deadline = time.monotonic() + 60
        with selectors.DefaultSelector() as sel:
            sel.register(proc.stdout, selectors.EVENT_READ)
            while time.monotonic() < deadline and not any("MOVING" in ln for ln in lines):
                if sel.select(deadline - time.monotonic()):
                    line = proc.stdout.readline()
                    if not line:
                        break
                    lines.append(line)
        assert any("MOVING" in ln for ln in lines), "".join(lines)
        proc.send_signal(signum)
        out, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    out = "".join(lines) + out
    assert proc.returncode == 0, out + err
    assert f"stopped by {signal.Signals(signum).name}" in out
    assert "zero rates applied; arm measured at rest" in out
    assert "Traceback" not in out + err
    assert not is_running(child_pid(out))
    session = read_session(next(tmp_path.glob("*.jwlog")))
    assert session.closed_cleanly
    # The last cycles hold motion (the gate names the ending, or a more urgent reason such
    # as an overrun streak on a loaded machine) and send zero.
    last = session.records[-1]
    assert last.safety_state == "blocked" and max(map(abs, last.rates)) == 0.0
