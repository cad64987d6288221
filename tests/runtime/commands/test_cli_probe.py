"""`jogwire probe`: the table, the JSON object (stable keys) and clean errors, in-process and as
a real subprocess."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from runtime.cli import main
from runtime.commands.probe import probe_report
from runtime.arm.kinematics import analyse_pose
from runtime.arm.model import load_arm
from sim.urdf import write_urdf

ROOT = Path(__file__).resolve().parents[3]
KEYS = {"arm", "joint_names", "q", "tcp_pose", "jacobian", "singular_values", "manipulability",
        "condition_number"}


def probe_json(capsys, *args: str) -> dict:
    assert main(["probe", *args, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_json_has_the_stable_keys_and_the_kinematics(capsys) -> None:
    out = probe_json(capsys, "elbow6", "--q", "0.1,-0.3,-1.2,0.4,-0.9,0.2")
    assert KEYS <= set(out)
    arm = load_arm("elbow6")
    q = np.array([0.1, -0.3, -1.2, 0.4, -0.9, 0.2])
    report = analyse_pose(arm, q)
    assert out["arm"] == "elbow6" and out["joint_names"] == list(arm.joint_names)
    assert out["q"] == q.tolist()
    assert np.shape(out["tcp_pose"]) == (4, 4) and np.shape(out["jacobian"]) == (6, 6)
    # Exact: JSON floats are written with repr, so the numbers survive the text unchanged.
    assert out["tcp_pose"] == report.tcp_pose.tolist()
    assert out["jacobian"] == report.jacobian.tolist()
    assert out["singular_values"] == report.singular_values.tolist()
    assert out["manipulability"] == report.manipulability
    assert out["condition_number"] == report.condition_number


def test_default_pose_is_home_and_degrees_are_converted(capsys) -> None:
    arm = load_arm("scara4")
    assert probe_json(capsys, "scara4")["q"] == arm.home().tolist()
    out = probe_json(capsys, "scara4", "--deg", "--q", "30,60,0.05,-90")
    # Revolute values in degrees, prismatic in metres (the quill stays 0.05 m).
    np.testing.assert_allclose(out["q"], [math.radians(30), math.radians(60), 0.05,
                                          math.radians(-90)], rtol=0, atol=1e-15)


def test_space_separated_and_negative_values(capsys) -> None:
    a = probe_json(capsys, "planar3", "--q", "-0.5", "1", "0.25")
    b = probe_json(capsys, "planar3", "--q=-0.5,1,0.25")
    assert a["q"] == b["q"] == [-0.5, 1.0, 0.25]


def test_condition_number_is_null_when_infinite(capsys, tmp_path: Path) -> None:
    # A 2-joint arm asked for three task directions: σ_min = 0, so κ = inf → JSON null.
    path = tmp_path / "two.toml"
    path.write_text('name = "two"\nconvention = "dh"\ntask = ["vx", "vy", "wz"]\n'
                    + "".join(f'[[joints]]\nname = "j{i}"\ntype = "revolute"\na = 0.3\n'
                              "lower = -90\nupper = 90\nmax_speed = 90\nmax_accel = 90\n"
                              for i in (1, 2)), encoding="utf-8")
    out = probe_json(capsys, str(path))
    assert out["condition_number"] is None and out["manipulability"] == 0.0


def test_urdf_with_base_and_tip(capsys, tmp_path: Path) -> None:
    urdf = write_urdf(load_arm("reach7"), tmp_path / "reach7.urdf")
    out = probe_json(capsys, str(urdf), "--base", "base_link", "--tip", "link_7")
    assert out["joint_names"] == list(load_arm("reach7").joint_names)
    # The tip here is joint 7's frame: the TCP lies d7 = 0.08 m (reach7.toml) plus the
    # 0.10 m tool further along the same axis.
    full = probe_json(capsys, str(urdf))
    d = np.array(full["tcp_pose"])[:3, 3] - np.array(out["tcp_pose"])[:3, 3]
    assert np.linalg.norm(d) == pytest.approx(0.18, abs=1e-12)


def test_human_table(capsys) -> None:
    assert main(["probe", "elbow6", "--deg", "--q", "0,-20,-70,0,-60,0"]) == 0
    text = capsys.readouterr().out
    for word in ("base_yaw", "flange_roll", "TCP pose", "Jacobian", "vx", "wz",
                 "singular values", "manipulability", "condition number"):
        assert word in text
    assert "-0.0000" not in text and "outside its limits" not in text
    assert main(["probe", "planar3", "--deg", "--q", "0,170,0"]) == 0
    assert "outside its limits" in capsys.readouterr().out  # j2 stops at ±160°
    assert main(["probe", "elbow6", "--q", "0,0,0,0,0,0"]) == 0
    assert "singular pose" in capsys.readouterr().out


@pytest.mark.parametrize("q, message", [("1,2,3", "6 joints"),
                                        ("1,2,3,4,5,x", "'x' is not a number"),
                                        ("1,2,3,4,5,nan", "finite")])
def test_bad_q_is_a_clean_error(capsys, q: str, message: str) -> None:
    assert main(["probe", "elbow6", "--q", q]) == 2
    err = capsys.readouterr().err
    assert message in err and "--q" in err and "Traceback" not in err


def test_unknown_arm_is_a_clean_error(capsys) -> None:
    assert main(["probe", "no_such_arm"]) == 2
    assert "elbow6" in capsys.readouterr().err


def test_probe_report_is_a_plain_dict_others_can_extend() -> None:
    arm = load_arm("planar3")
    report = probe_report(arm, arm.home())
    assert KEYS <= set(report)
    report["scale"] = 1.0  # e.g. a twist solve adds its own keys
    json.dumps(report, allow_nan=False)


def test_subprocess_json() -> None:
    done = subprocess.run([sys.executable, "-m", "runtime.cli", "probe", "elbow6", "--json"],
                          cwd=ROOT, capture_output=True, text=True, timeout=60, check=False)
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    arm = load_arm("elbow6")
    assert out["q"] == arm.home().tolist()
    assert out["jacobian"] == analyse_pose(arm, arm.home()).jacobian.tolist()


def test_cell_adds_every_pair_nearest_first(capsys) -> None:
    out = probe_json(capsys, "elbow6", "--cell", "bench")
    assert out["cell"] == "bench"
    pairs = out["clearances"]
    distances = [p["distance_m"] for p in pairs]
    assert distances == sorted(distances) and len(pairs) > 20
    first = pairs[0]
    assert set(first) == {"pair", "distance_m", "point_arm_m", "point_other_m", "normal"}
    # the witness points lie `distance` apart along the unit normal (other side → arm side)
    gap = np.subtract(first["point_arm_m"], first["point_other_m"])
    np.testing.assert_allclose(gap, first["distance_m"] * np.array(first["normal"]), atol=1e-12)
    # elbow6 at home: the shoulder link (radius 0.04) starts 0.33 m above the bench top
    shoulder = next(p for p in pairs if p["pair"] == ["shoulder", "bench"])
    assert shoulder["distance_m"] == pytest.approx(0.29, abs=1e-12)


def test_cell_twist_solve_reports_clearance_and_bad_cells_exit_2(capsys, tmp_path) -> None:
    # the gripper 53 mm above the bench top, straight down at 0.3 m/s: the velocity damper
    # (Faverjon & Tournassoud 1987) allows an approach of gain·(d − d_s) = 5·0.023 m/s
    out = probe_json(capsys, "elbow6", "--cell", "bench", "--twist=0,0,-0.3,0,0,0",
                     "--q=0,-0.9618,-1.6899,0,0.0325,0")
    nearest = out["clearances"][0]
    assert nearest["pair"] == ["gripper", "bench"] and nearest["normal"] == [0.0, 0.0, 1.0]
    d = nearest["distance_m"]
    assert out["clearance"]["min_distance_m"] == d
    assert out["binding_limit"] == "clearance"
    assert out["clearance"]["binding_pair"] == ["gripper", "bench"]
    # the gripper turns a little with the wrist: its vz equals the TCP's to about 1 mm/s
    assert out["achieved_twist"][2] == pytest.approx(-5.0 * (d - 0.03), abs=2e-3)
    assert main(["probe", "planar3", "--cell", "bench"]) == 2
    assert "overlaps 'j2' of planar3" in capsys.readouterr().err
    assert main(["probe", "elbow6", "--cell", "nowhere"]) == 2
    assert "no cell named 'nowhere'" in capsys.readouterr().err
