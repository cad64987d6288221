"""`jogwire preflight` end to end: the control cycle in lockstep with the simulated arm in a
child process (PyBullet DIRECT, over a pair of pipes), the verdict, the JSON, the HTML report
and the session log of the run. Profiles are a few seconds long.
"""

from __future__ import annotations

import base64
import json
import math
import re
from pathlib import Path

import numpy as np
import pytest

from runtime.cli import main
from runtime.control.limits import REDUCED_SPEED_M_S

pytestmark = [pytest.mark.e2e, pytest.mark.sim]

# A planar 3R arm (invented, the link lengths of the shipped planar3) at q = (0°, 90°, 0°):
# link 1 along base x (0.45 m), links 2 and 3 along base y (0.35 + 0.15 m). Joint 1's rated
# speed (30 deg/s) is set below the software max speed jogwire obeys (60 deg/s): a wrongly
# set software limit that preflight must catch.
FLAT3 = """
name = "flat3"
convention = "dh"
angle_unit = "deg"
length_unit = "m"
task = ["vx", "vy", "wz"]
home = [0, 90, 0]
[tcp_limits]
linear = 1.0
angular = 180.0
[solver]
damping_threshold = 0.03
damping_max = 0.06
nullspace_gain = 0.0
[[joints]]
name = "j1"
type = "revolute"
a = 0.45
lower = -170
upper = 170
max_speed = 60
max_accel = 400
rated_speed = 30
rated_accel = 500
[[joints]]
name = "j2"
type = "revolute"
a = 0.35
lower = -160
upper = 160
max_speed = 150
max_accel = 500
[[joints]]
name = "j3"
type = "revolute"
a = 0.15
lower = -160
upper = 160
max_speed = 200
max_accel = 700
"""

# Hand computation (rigid-body kinematics, e.g. Lynch & Park, Modern Robotics, ch. 3: a
# body turning about a fixed axis has a constant body twist). Turning the whole arm about
# joint 1's axis at ω moves the TCP, r = √(0.45² + (0.35 + 0.15)²) m from that axis, at
# v = ω·r. At q = (0, 90°, 0) the tool x axis points along base +y, so the TCP twist in
# tool axes is (0.45·ω, 0.50·ω, 0, 0, 0, ω), the same at every point of the turn: a
# constant tool-frame command whose exact solution is q̇ = (ω, 0, 0).
R_TCP_M = math.hypot(0.45, 0.50)
DEMAND_M_S = 0.40                          # above the reduced-speed cap
OMEGA_RAD_S = DEMAND_M_S / R_TCP_M         # 0.5946 rad/s = 34.07 deg/s > 30 rated


def turn_profile(omega: float) -> str:
    twist = [0.45 * omega, 0.50 * omega, 0.0, 0.0, 0.0, omega]
    return f"""
name = "turn"
angle_unit = "rad"
lead_in_s = 0.3
[[segment]]
duration_s = 1.5
twist = [{", ".join(repr(v) for v in twist)}]
frame = "tool"
[[segment]]
duration_s = 0.3
[[segment]]
duration_s = 0.2
enable = false
"""


def preflight(capsys, *argv: str) -> tuple[int, dict]:
    code = main(["preflight", *argv, "--json"])
    out, err = capsys.readouterr()
    assert code in (0, 1), f"preflight ended with status {code}: {err}"
    return code, json.loads(out)


@pytest.fixture(scope="module")
def gentle(tmp_path_factory):
    """One run of the shipped gentle profile on reach7, shared by the checks below."""
    out_dir = tmp_path_factory.mktemp("gentle")
    code = main(["preflight", "reach7", "gentle", "--out", str(out_dir)])
    (summary_file,) = out_dir.glob("*.json")      # the summary `--json` would print
    return code, json.loads(summary_file.read_text()), out_dir


def test_gentle_profile_passes(gentle):
    code, summary, _ = gentle
    assert code == 0
    assert summary["verdict"] == "pass" and summary["reasons"] == []
    for key in ("verdict", "reasons", "joints", "tcp_peak_speed", "tcp_cap", "min_sigma"):
        assert key in summary
    assert [j["name"] for j in summary["joints"]] == ["j1", "j2", "j3", "j4", "j5", "j6", "j7"]
    for j in summary["joints"]:
        for key in ("name", "peak_speed", "rated_speed", "peak_accel", "rated_accel",
                    "min_limit_distance"):
            assert key in j
        assert 0.0 <= j["peak_speed"] <= j["rated_speed"]
        assert j["min_limit_distance"] > j["limit_margin"]
    # The profile asks 5 cm/s along x and z and 7.07 cm/s on the diagonal back.
    assert summary["tcp_peak_speed"] == pytest.approx(math.hypot(0.05, 0.05), rel=1e-6)
    assert summary["tcp_peak_speed_measured"] == pytest.approx(math.hypot(0.05, 0.05),
                                                               rel=0.02)
    assert summary["tcp_cap"] == 1.0
    assert summary["min_sigma"] > 0.04


def test_gentle_run_writes_report_json_and_session_log(gentle):
    _, summary, out_dir = gentle
    files = summary["files"]
    html = Path(files["report"]).read_text(encoding="utf-8")
    assert Path(files["report"]).parent == out_dir
    assert "PASS" in html
    images = re.findall(r"src='data:image/png;base64,([^']+)'", html)
    assert len(images) == 7
    for data in images:
        png = base64.b64decode(data)
        assert png.startswith(b"\x89PNG\r\n\x1a\n") and len(png) > 5000
    assert json.loads(Path(files["summary"]).read_text())["verdict"] == "pass"
    assert Path(files["session_log"]).stat().st_size > 100_000


def test_rerun_of_the_preflight_log_reproduces_its_rates(gentle, capsys):
    """The session log of a preflight run, fed back open loop through the same control cycle
    (recorded inputs, recorded measured poses), gives the recorded rates to ≤ 1e-12."""
    _, summary, _ = gentle
    code = main(["replay", summary["files"]["session_log"], "--rerun", "--json"])
    result = json.loads(capsys.readouterr().out)
    assert code == 0
    assert result["identical"] and result["largest_difference"] <= 1e-12
    assert result["cycles"] == summary["cycles"]


def test_inspect_and_preflight_of_the_same_log_agree_on_every_peak(gentle, capsys):
    """One analysis of commanded motion (runtime.sessions.stats) behind both."""
    _, summary, _ = gentle
    assert main(["inspect", summary["files"]["session_log"], "--json"]) == 0
    inspected = json.loads(capsys.readouterr().out)
    for mine, theirs in zip(summary["joints"], inspected["joints"]):
        assert mine["name"] == theirs["name"]
        for key in ("peak_speed", "peak_speed_t_s", "peak_accel", "peak_accel_t_s"):
            assert mine[key] == theirs[key], (mine["name"], key)
    assert summary["stops"] == inspected["stops"]
    assert summary["tcp_peak_speed"] == inspected["tcp_peak_speed"]


def test_limit_profile_fails_naming_the_joint(tmp_path, capsys):
    code, summary = preflight(capsys, "elbow6", "wrist_limit", "--out", str(tmp_path),
                              "--no-report")
    assert code == 1
    assert summary["verdict"] == "fail"
    codes = {(f["code"], f["joint"]) for f in summary["findings"]}
    assert ("position_limit", "wrist_pitch") in codes
    assert any("wrist_pitch" in r and "lower position limit" in r for r in summary["reasons"])
    wrist = next(j for j in summary["joints"] if j["name"] == "wrist_pitch")
    # Braked onto its soft limit: 1° margin from the hard limit, never past it.
    assert wrist["min_limit_distance"] == pytest.approx(math.radians(1.0), abs=math.radians(0.05))
    # ... decelerating at no more than its software max_accel on every cycle, and jogwire
    # kept to its own limits (no software_* finding): the position limit is the only one.
    assert wrist["peak_accel"] <= wrist["max_accel"] * (1 + 1e-9)
    assert codes == {("position_limit", "wrist_pitch")}


# An invented two-joint URDF arm, a turntable and a slide, whose ratings equal its limits
# (a URDF has no separate ratings: runtime/arm/urdf.py), so jogwire has no headroom to hide
# an overshoot of its own limits in.
TABLE_SLIDE_URDF = """<?xml version="1.0"?>
<robot name="table_slide">
  <link name="base"/>
  <link name="table"><inertial><mass value="1"/><inertia ixx="0.01" iyy="0.01" izz="0.01"
    ixy="0" ixz="0" iyz="0"/></inertial></link>
  <link name="carriage"><inertial><mass value="0.5"/><inertia ixx="0.01" iyy="0.01"
    izz="0.01" ixy="0" ixz="0" iyz="0"/></inertial></link>
  <link name="tool"/>
  <joint name="turn" type="revolute"><parent link="base"/><child link="table"/>
    <origin xyz="0 0 0.2"/><axis xyz="0 0 1"/>
    <limit lower="-1.0" upper="1.0" velocity="1.2" effort="50"/></joint>
  <joint name="slide" type="prismatic"><parent link="table"/><child link="carriage"/>
    <origin xyz="0.1 0 0.05"/><axis xyz="1 0 0"/>
    <limit lower="0.0" upper="0.3" velocity="0.25" effort="200"/></joint>
  <joint name="flange" type="fixed"><parent link="carriage"/><child link="tool"/>
    <origin xyz="0.05 0 0"/></joint>
</robot>
"""


@pytest.mark.parametrize("joint, rate", [("turn", 0.9), ("slide", 0.2)])
def test_a_jog_into_a_limit_with_no_headroom_finds_only_the_position_limit(
        joint, rate, tmp_path, capsys):
    # The jog asks for 2 s at `rate`: more travel than the joint has from mid-range.
    urdf = tmp_path / "table_slide.urdf"
    urdf.write_text(TABLE_SLIDE_URDF)
    profile = tmp_path / "jog.toml"
    profile.write_text(f"""name = "jog"
angle_unit = "rad"
lead_in_s = 0.2
[[segment]]
duration_s = 2.0
joint = "{joint}"
joint_rate = {rate}
[[segment]]
duration_s = 0.3
""")
    code, summary = preflight(capsys, str(urdf), str(profile), "--out", str(tmp_path),
                              "--no-report")
    assert code == 1
    assert {(f["code"], f["joint"]) for f in summary["findings"]} == {("position_limit", joint)}


@pytest.fixture(scope="module")
def case(tmp_path_factory) -> tuple[Path, Path]:
    """The flat3 arm file and the constant tool-frame turn asking 0.40 m/s."""
    folder = tmp_path_factory.mktemp("turn")
    arm = folder / "flat3.toml"
    arm.write_text(FLAT3)
    profile = folder / "turn.toml"
    profile.write_text(turn_profile(OMEGA_RAD_S))
    return arm, profile


@pytest.fixture(scope="module")
def reduced_run(case, tmp_path_factory) -> dict:
    """The turn in reduced speed, run once for the checks below."""
    arm, profile = case
    out = tmp_path_factory.mktemp("reduced")
    assert main(["preflight", str(arm), str(profile), "--reduced", "--out", str(out),
                 "--no-report"]) == 0
    (summary_file,) = out.glob("*.json")
    return json.loads(summary_file.read_text())


def test_reduced_speed_caps_a_fast_demand_at_iso_limit(reduced_run):
    """0.40 m/s asked in reduced speed: the TCP is held to 0.25 m/s (ISO 10218-1:2011 5.6,
    REFERENCES §4), so joint 1 turns at 0.25/r = 21.3 deg/s, under its 30 deg/s rating."""
    summary = reduced_run
    assert summary["verdict"] == "pass", summary["reasons"]
    assert summary["tcp_cap"] == REDUCED_SPEED_M_S
    assert summary["tcp_peak_speed"] <= REDUCED_SPEED_M_S * (1 + 1e-12)   # rounding only
    assert summary["tcp_peak_speed"] == pytest.approx(REDUCED_SPEED_M_S, rel=1e-9)
    # Joint 1 at 0.25/r. The pose is the simulated arm's measured one, which strays from
    # (0, 90°, 0) by its motors' small velocity error (≈1e-4 rad here): r, and with it the
    # rate, are exact to about 1e-3, the other joints only correct that drift.
    j1, j2, j3 = summary["joints"]
    assert j1["peak_speed"] == pytest.approx(REDUCED_SPEED_M_S / R_TCP_M, rel=1e-3)
    assert j1["peak_speed_measured"] == pytest.approx(REDUCED_SPEED_M_S / R_TCP_M, rel=1e-2)
    assert j2["peak_speed"] < 1e-3 and j3["peak_speed"] < 1e-3


def test_same_demand_without_reduced_speed_fails_on_the_rated_speed(case, tmp_path, capsys):
    """Without reduced speed jogwire commands the full 0.40 m/s: joint 1 at
    0.40/r = 34.07 deg/s, within its software max (60) but above its rating (30)."""
    arm, profile = case
    code, summary = preflight(capsys, str(arm), str(profile), "--out", str(tmp_path / "out"),
                              "--no-report")
    assert code == 1 and summary["verdict"] == "fail"
    j1 = summary["joints"][0]
    assert j1["peak_speed"] == pytest.approx(OMEGA_RAD_S, rel=1e-3)      # see above
    assert math.degrees(j1["peak_speed"]) == pytest.approx(34.07, abs=0.05)
    assert summary["tcp_peak_speed"] == pytest.approx(DEMAND_M_S, rel=1e-6)
    rated = [f for f in summary["findings"] if f["code"] == "rated_speed"]
    assert [f["joint"] for f in rated] == ["j1"]
    assert rated[0]["source"] == "commanded"
    assert "j1" in rated[0]["message"] and "rated" in rated[0]["message"]


def test_closed_loop_rerun_of_a_lockstep_log_reproduces_it(case, reduced_run, capsys):
    """A preflight log comes from the lockstep simulated arm, which is deterministic: a
    closed-loop re-run in lockstep with a fresh simulated arm gives the same rates."""
    arm, _ = case
    code = main(["replay", reduced_run["files"]["session_log"], "--rerun", "--closed-loop",
                 "--arm", str(arm), "--json"])
    result = json.loads(capsys.readouterr().out)
    assert code == 0, result
    assert result["largest_difference"] <= 1e-12
    assert max(j["max_pose_deviation"] for j in result["joints"]) <= 1e-12


def test_a_session_log_is_a_profile(case, reduced_run, tmp_path, capsys):
    """PROFILE may be a recorded session: its inputs play again, from its start pose."""
    arm, _ = case
    first = reduced_run
    code, again = preflight(capsys, str(arm), first["files"]["session_log"], "--out",
                            str(tmp_path), "--no-report")
    # reduced speed was locked on in the recorded session: it stays on
    assert code == 0 and again["reduced"] is True
    assert again["tcp_peak_speed"] == pytest.approx(first["tcp_peak_speed"], rel=1e-12)
    assert np.allclose([j["peak_speed"] for j in again["joints"]],
                       [j["peak_speed"] for j in first["joints"]], rtol=1e-12, atol=0)


def test_either_lockstep_link_gives_the_same_verdict_and_log(case, tmp_path, capsys):
    """The messages cross to the child through shared rings or through the pipes alone
    (--lockstep-link): the summary (all but timing and file names) and every cycle record
    (all but the wall time of its computation) are the same, byte for byte."""
    import msgpack

    from runtime.sessions.log_reader import read_session
    arm, profile = case
    runs = {}
    for link in ("shm", "pipe"):
        code, summary = preflight(capsys, str(arm), str(profile), "--out",
                                  str(tmp_path / link), "--no-report", "--lockstep-link", link)
        records = [r.to_wire() for r in read_session(summary["files"]["session_log"]).records]
        for r in records:
            r.pop("compute_s")
        timing = ("started_at", "wall_s", "real_time_factor", "files")
        runs[link] = (code, {k: v for k, v in summary.items() if k not in timing},
                      [msgpack.packb(r) for r in records])
    assert runs["shm"][0] == runs["pipe"][0] == 1
    assert runs["shm"][1] == runs["pipe"][1]
    assert len(runs["shm"][2]) > 1000 and runs["shm"][2] == runs["pipe"][2]
