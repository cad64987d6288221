"""`jogwire inspect`: summary, CSV and JSON of a session built here with known peaks.

The synthetic session (elbow6, 1000 cycles of 2 ms) is designed so every summary value can
be worked out by hand; the expected numbers below are that arithmetic.
"""

from __future__ import annotations

import csv
import json
import dataclasses
import math
import subprocess
import sys
from pathlib import Path

import pytest

from runtime.cli import main
from runtime.arm.model import load_arm
from runtime.sessions.log_schema import CycleRecord
from runtime.sessions.log_writer import SessionRecorder
from runtime.sessions.summary import Distribution

ROOT = Path(__file__).resolve().parents[3]
DT = 0.002
N = 1000


def binding(i: int) -> str | None:
    if 495 <= i < 505:
        return "position:shoulder"
    if 250 <= i < 600 or 900 <= i < 910:
        return "speed"
    return None


def synthetic_record(i: int) -> CycleRecord:
    t = DT * i
    # base_yaw: trapezoid, 2 rad/s² up to 1 rad/s, held, 2 rad/s² down to 0 at t = 1.7 s
    r0 = max(0.0, min(2.0 * t, 1.0, 2.0 * (1.7 - t)))
    # wrist_pitch: a 10-cycle spike of 4 rad/s, above its rated 220 deg/s (3.84 rad/s)
    r4 = 4.0 if 400 <= i < 410 else 0.0
    rates = (r0, 0.0, -0.3, 0.0, r4, 0.0)
    q = (0.0, 2.0 if i == 500 else 0.0, 0.0, 0.0, 0.0, 0.0)
    linear = (0.3, 0.4, 0.0) if 100 <= i < 200 else (0.15, 0.2, 0.0) if 300 <= i < 400 \
        else (0.01, 0.0, 0.0)
    angular = (0.0, 0.0, 0.7) if i == 700 else (0.0, 0.0, 0.1)
    overrun = i in (10, 20, 30)
    return CycleRecord(
        cycle=i, t_s=t, axes=(0.1, -0.1, 0.0), buttons=(True, False), enabled=i < 900,
        enable_reason="held" if i < 900 else "released", twist=linear + angular,
        frame="base", q=q, rates=rates, damping=0.01 if 630 <= i < 650 else 0.0,
        # a cycle without motion allowed has no solve: NaN, as cycle_record writes it
        sigma_min=math.nan if i >= 900 else 0.004 if i == 640 else 0.2, manipulability=0.02,
        achieved_twist=linear + angular, tracking_error=0.0,
        scales={"speed": 0.8 if binding(i) == "speed" else 1.0, "tcp": 1.0},
        binding_limit=binding(i), period_s=0.005 if overrun else DT,
        compute_s=0.0015 if i == 30 else 0.0003, overrun=overrun, reduced=300 <= i < 400)


@pytest.fixture(scope="module")
def session(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("inspect") / "demo.jwlog"
    # encoded by the caller: blocks of CALLER_BLOCK_RECORDS, several of them, whatever the
    # timing of the writer thread
    rec = SessionRecorder.start(path, load_arm("elbow6"), {"rate_hz": 500, "pad": "twin"},
                                encode_in_caller=True)
    for i in range(N):
        assert rec.record(synthetic_record(i))
    assert rec.close().failed is None
    return path


def run_json(capsys, *args: str) -> dict:
    assert main(["inspect", *args, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_json_summary_holds_the_hand_computed_values(session: Path, capsys) -> None:
    s = run_json(capsys, str(session))
    assert s["arm"] == "elbow6" and s["cycles"] == N
    assert s["duration_s"] == pytest.approx((N - 1) * DT)
    assert s["time_enabled_s"] == pytest.approx(897 * DT + 3 * 0.005)
    assert s["time_reduced_s"] == pytest.approx(100 * DT)
    j = {x["name"]: x for x in s["joints"]}
    # trapezoid: peak speed 1 rad/s, peak |Δv/Δt| = 2 rad/s²
    assert j["base_yaw"]["peak_speed"] == pytest.approx(1.0)
    assert j["base_yaw"]["peak_accel"] == pytest.approx(2.0)
    # elbow runs at −0.3 rad/s from the first cycle: a session starts from rest, so that
    # first step is commanded, 0.3 rad/s in one 2 ms cycle (runtime.sessions.stats)
    assert j["elbow"]["peak_speed"] == pytest.approx(0.3)
    assert j["elbow"]["peak_accel"] == pytest.approx(0.3 / DT)
    # the spike: 4 rad/s reached in one 2 ms cycle → 2000 rad/s²; both over rated
    assert j["wrist_pitch"]["peak_speed"] == pytest.approx(4.0)
    assert j["wrist_pitch"]["peak_accel"] == pytest.approx(4.0 / DT)
    assert j["wrist_pitch"]["peak_speed_t_s"] == pytest.approx(400 * DT)
    assert j["wrist_pitch"]["over_rated_speed"] and j["wrist_pitch"]["over_rated_accel"]
    assert j["wrist_pitch"]["over_max_speed"] and j["wrist_pitch"]["over_max_accel"]
    assert not any(j["base_yaw"][k] for k in ("over_max_speed", "over_rated_speed",
                                              "over_max_accel", "over_rated_accel"))
    assert j["wrist_pitch"]["rated_speed"] == pytest.approx(math.radians(220))
    # shoulder reached q = 2 rad against its +120° limit
    assert j["shoulder"]["min_limit_distance"] == pytest.approx(math.radians(120) - 2.0)
    assert j["base_yaw"]["min_limit_distance"] == pytest.approx(math.radians(170))
    # |(0.3, 0.4, 0)| = 0.5 m/s (a 3-4-5 triangle); reduced: |(0.15, 0.2, 0)| = 0.25 m/s
    assert s["tcp_peak_speed"] == pytest.approx(0.5)
    assert s["tcp_peak_speed_t_s"] == pytest.approx(100 * DT)
    assert s["tcp_peak_speed_reduced"] == pytest.approx(0.25)
    assert s["tcp_cap"] == pytest.approx(1.0)
    assert s["tcp_peak_angular_speed"] == pytest.approx(0.7)
    assert s["min_sigma"] == pytest.approx(0.004)
    assert s["min_sigma_t_s"] == pytest.approx(640 * DT)
    assert s["time_damped_s"] == pytest.approx(20 * DT)
    assert s["limit_events"] == [
        {"limit": "speed", "cycles": 245 + 95 + 10, "episodes": 3},
        {"limit": "position:shoulder", "cycles": 10, "episodes": 1}]
    loop = s["loop"]
    assert loop["overruns"] == 3
    assert loop["period_max_s"] == pytest.approx(0.005)
    assert loop["compute_max_s"] == pytest.approx(0.0015)
    # quantiles come from a histogram of logarithmic bins 1e-4 wide: within 5e-5 relative
    assert loop["compute_median_s"] == pytest.approx(0.0003, rel=Distribution.RELATIVE_WIDTH)
    assert s["recorder"] == {"closed_cleanly": True, "handed": N, "written": N, "dropped": 0}
    assert s["problems"] == []
    assert s["settings"] == {"rate_hz": 500, "pad": "twin"}


def test_human_summary_is_an_aligned_table(session: Path, capsys) -> None:
    assert main(["inspect", str(session)]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert "cycles    1000 over 2.00 s, 500.0 Hz mean" in lines
    assert any(ln.startswith("TCP       peak linear speed 0.500 m/s") for ln in lines)
    assert "in reduced speed 0.250 m/s" in out
    assert any(ln.startswith("σ_min     lowest 0.004 at t = 1.28 s") for ln in lines)
    assert "3 overruns in 1000 cycles" in out
    assert "problems  none" in lines

    head = next(i for i, ln in enumerate(lines) if ln.startswith("  joint "))
    table = lines[head:head + 7]
    names = [ln.split()[0] for ln in table[1:]]
    assert names == list(load_arm("elbow6").joint_names)
    header = table[0]
    for title in ("unit", "peak speed", "rated", "peak accel", "closest to limit"):
        end = header.index(title) + len(title)            # right edge of that column
        for row in table[1:]:
            assert row[end - 1] != " " and (end == len(row) or row[end] == " "), (title, row)
    wrist = next(ln for ln in table if ln.split()[0] == "wrist_pitch")
    assert "speed OVER RATED" in wrist and "accel OVER RATED" in wrist
    assert "OVER RATED" not in next(ln for ln in table if ln.split()[0] == "base_yaw")
    limits = lines.index("  limit              cycles  episodes")
    assert lines[limits + 1].split() == ["speed", "350", "3"]
    assert lines[limits + 2].split() == ["position:shoulder", "10", "1"]


def test_csv_export_has_one_column_per_scalar(session: Path, tmp_path: Path, capsys) -> None:
    out = tmp_path / "table.csv"
    assert main(["inspect", str(session), "--csv", str(out)]) == 0
    assert f"cycle table: {N} rows written to {out}" in capsys.readouterr().out
    with out.open(newline="") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == N
    names = load_arm("elbow6").joint_names
    columns = list(rows[0])
    for n in names:
        assert f"q_{n}" in columns and f"rate_{n}" in columns
    assert {"t_s", "enabled", "twist_vx", "achieved_wz", "sigma_min", "scale_speed",
            "scale_tcp", "binding_limit", "period_s", "overrun", "axis_2",
            "button_1"} <= set(columns)
    r = rows[500]
    want = synthetic_record(500)
    assert float(r["t_s"]) == want.t_s and float(r["q_shoulder"]) == 2.0
    assert float(r["rate_base_yaw"]) == want.rates[0]
    assert r["binding_limit"] == "position:shoulder" and r["enabled"] == "1"
    assert rows[0]["binding_limit"] == "" and rows[950]["enabled"] == "0"


def test_degrees_in_the_table(session: Path, capsys) -> None:
    assert main(["inspect", str(session), "--deg"]) == 0
    row = next(ln for ln in capsys.readouterr().out.splitlines()
               if ln.startswith("  base_yaw "))
    # 1 rad/s = 57.296 deg/s; the max of 100 deg/s comes back from the arm file's degrees
    assert row.split()[1:5] == ["deg", "57.296", "100.000", "120.000"]


def test_csv_and_json_cannot_share_stdout(session: Path, capsys) -> None:
    assert main(["inspect", str(session), "--csv", "-", "--json"]) == 2
    assert "both want standard output" in capsys.readouterr().err


def test_csv_to_stdout(session: Path, capsys) -> None:
    assert main(["inspect", str(session), "--csv", "-"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("cycle,t_s,enabled,") and len(lines) == N + 1


def test_a_torn_log_is_summarised_with_its_problem(session: Path, tmp_path: Path,
                                                   capsys) -> None:
    torn = tmp_path / "torn.jwlog"
    data = session.read_bytes()
    torn.write_bytes(data[:len(data) - 300])     # inside the last block of cycles
    s = run_json(capsys, str(torn))
    assert 0 < s["cycles"] < N
    assert [p["kind"] for p in s["problems"]] == ["torn_tail", "unclosed"]
    assert s["recorder"]["closed_cleanly"] is False
    assert main(["inspect", str(torn)]) == 0
    out = capsys.readouterr().out
    assert "did not close cleanly" in out and "torn_tail at byte" in out


def test_a_log_without_cycles(tmp_path: Path, capsys) -> None:
    path = tmp_path / "empty.jwlog"
    SessionRecorder.start(path, load_arm("planar3"), {}).close()
    assert main(["inspect", str(path)]) == 0
    assert "no cycles recorded" in capsys.readouterr().out
    s = run_json(capsys, str(path))
    assert s["cycles"] == 0 and s["tcp_peak_speed"] is None
    assert all(j["peak_speed"] is None for j in s["joints"])


def test_not_a_session_log_is_a_clean_error(tmp_path: Path) -> None:
    bad = tmp_path / "notes.jwlog"
    bad.write_text("just some text\n")
    done = subprocess.run([sys.executable, "-m", "runtime.cli", "inspect", str(bad)],
                          capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert done.returncode == 2
    assert done.stderr.startswith("jogwire inspect:") and "not a jogwire session log" in \
        done.stderr
    assert "Traceback" not in done.stderr and done.stdout == ""


def test_an_acceleration_at_exactly_the_max_is_not_flagged(tmp_path: Path, capsys) -> None:
    """A ramp of max_accel·dt per cycle (what the acceleration limit commands) reads back a
    few ulp off max_accel; that is at the limit, not above it."""
    arm = load_arm("elbow6")
    a = float(arm.max_accel[0])
    path = tmp_path / "ramp.jwlog"
    rec = SessionRecorder.start(path, arm, {"rate_hz": 500})
    for i in range(40):
        r = dataclasses.replace(synthetic_record(i), rates=(a * DT * min(i, 20),) + (0.0,) * 5,
                                achieved_twist=(0.0,) * 6)
        rec.record(r)
    rec.close()
    j = run_json(capsys, str(path))["joints"][0]
    assert j["peak_accel"] == pytest.approx(a, rel=1e-9)
    assert not j["over_max_accel"] and not j["over_rated_accel"]
