"""`jogwire replay` (and preflight with a recorded profile) on good and damaged logs.

Damaged logs are made here from a good one: garbage, a truncated header, a newer format
version, a torn tail, a damaged frame in the middle. A log that cannot be used is a clear
error with exit status 2 and never a traceback; a log damaged after some cycles is used up
to the damage, with a warning.
"""

from __future__ import annotations

import json
import re
import struct
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from runtime.link.arm_process import child_env
from runtime.cli import main
from runtime.commands.replay import _check_start
from runtime.errors import ConfigError
from runtime.operator.inputs.script import ScriptSource, load_script
from runtime.control.mapping import load_pad
from runtime.arm.model import load_arm
from runtime.control.cycle import ControlCycle
from runtime.sessions.log_schema import FRAME_MARK, MAGIC, cycle_record
from runtime.sessions.log_writer import SessionRecorder

RATE_HZ = 500.0
DT = 1.0 / RATE_HZ
N = 600


@pytest.fixture(scope="module")
def good_log(tmp_path_factory) -> Path:
    """1.2 s of the shipped square profile on elbow6, recorded as `jogwire drive` records
    (keyboard pad settings, scripted input), against an ideal arm (q += q̇·dt)."""
    path = tmp_path_factory.mktemp("replay") / "square.jwlog"
    arm = load_arm("elbow6")
    cycle = ControlCycle(arm, load_pad("keyboard"), rate_hz=RATE_HZ)
    source = ScriptSource(load_script("square", arm))
    settings = {"command": "drive", "pad": "keyboard", "rate_hz": RATE_HZ,
                "reduced_locked": False, "stale_after_s": 0.05, "overrun_limit": 5}
    q = arm.home()
    # encoded by the caller: blocks of CALLER_BLOCK_RECORDS, several of them, as in a long
    # session, whatever the timing of the writer thread
    with SessionRecorder.start(path, arm, settings, encode_in_caller=True) as rec:
        for k in range(N):
            t = k * DT
            frame = source.read(t)
            out = cycle.step(frame, t, q, t)
            rec.record(cycle_record(k, t, frame, out, q, state_age_s=0.0, overrun_streak=0,
                                    period_s=DT, compute_s=1e-4, overrun=False))
            q = q + out.rates * DT
    return path


def damaged(tmp_path: Path, good: Path, how: str) -> Path:
    data = good.read_bytes()
    path = tmp_path / f"{how}.jwlog"
    if how == "garbage":
        data = b"this is not a session log at all\n" * 10
    elif how == "truncated_header":
        data = data[:40]
    elif how == "newer_version":
        data = MAGIC + struct.pack("<H", 99) + data[10:]
    elif how == "torn_tail":
        data = data[:len(data) * 2 // 3]
    elif how == "corrupt_middle":
        marks = [i for i in range(10, len(data)) if data.startswith(FRAME_MARK, i)]
        i = marks[len(marks) // 2] + 20            # inside the payload of a middle frame
        data = data[:i] + bytes(b ^ 0xFF for b in data[i:i + 8]) + data[i + 8:]
    path.write_bytes(data)
    return path


@pytest.mark.parametrize("how, says", [("garbage", "not a jogwire session log"),
                                       ("truncated_header", "truncated"),
                                       ("newer_version", "newer than this")])
@pytest.mark.parametrize("command", ["replay {log} --rerun", "replay {log}",
                                     "preflight elbow6 {log} --out {out}"])
def test_an_unusable_log_is_a_clear_error(tmp_path, good_log, capsys, how, says, command):
    bad = damaged(tmp_path, good_log, how)
    assert main(command.format(log=bad, out=tmp_path).split()) == 2
    err = capsys.readouterr().err
    assert says in err and str(bad) in err
    assert "Traceback" not in err


def test_no_traceback_from_the_command_line(tmp_path, good_log):
    bad = damaged(tmp_path, good_log, "truncated_header")
    proc = subprocess.run([sys.executable, "-m", "runtime.cli", "replay", str(bad), "--rerun"],
                          capture_output=True, text=True, env=child_env(), timeout=60)
    assert proc.returncode == 2
    assert proc.stderr.startswith("jogwire replay: ") and "Traceback" not in proc.stderr


def test_rerun_of_a_good_log_is_identical(good_log, capsys):
    assert main(["replay", str(good_log), "--rerun", "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["cycles"] == N and result["largest_difference"] == 0.0
    assert result["mode"] == "open loop" and result["identical"]


@pytest.mark.parametrize("how, kind", [("torn_tail", "torn_tail"),
                                       ("corrupt_middle", "corrupt")])
def test_a_log_damaged_after_some_cycles_reruns_up_to_the_damage(tmp_path, good_log, capsys,
                                                                  how, kind):
    bad = damaged(tmp_path, good_log, how)
    assert main(["replay", str(bad), "--rerun", "--json"]) == 0
    out, err = capsys.readouterr()
    result = json.loads(out)
    assert 0 < result["cycles"] < N and result["largest_difference"] == 0.0
    assert f"warning: {bad}: {kind}" in err


def test_another_arm_config_shows_its_differences(tmp_path, good_log, capsys):
    """elbow6 with quartered accelerations, as a TOML of its own: the re-run differs and
    says so with exit status 1."""
    text = Path(load_arm("elbow6").source).read_text()
    slow = tmp_path / "elbow6_slow.toml"
    slow.write_text(re.sub(r"max_accel = (\d+)", lambda m: f"max_accel = {int(m[1]) / 4:g}",
                           text))
    assert main(["replay", str(good_log), "--rerun", "--arm", str(slow)]) == 1
    out = capsys.readouterr().out
    assert "DIFFERENT" in out and "cycles differ" in out


def test_option_errors_are_clear(good_log, capsys):
    assert main(["replay", str(good_log), "--closed-loop"]) == 2
    assert "--closed-loop goes with --rerun" in capsys.readouterr().err
    assert main(["replay", str(good_log), "--rerun", "--speed", "2"]) == 2
    assert main(["replay", str(good_log), "--arm", "planar3", "--rerun"]) == 2
    assert "3 joints" in capsys.readouterr().err


def test_a_faster_replay_than_the_limits_allow_is_refused(good_log, capsys):
    """The square ramps at the acceleration limit: twice as fast would be 4× the limit."""
    assert main(["replay", str(good_log), "--speed", "2"]) == 2
    assert "fastest allowed" in capsys.readouterr().err


def test_sending_needs_the_target_at_the_recorded_start():
    arm = load_arm("elbow6")
    start = arm.home()
    _check_start(arm, start + np.radians(0.5), start, from_here=False)      # within 1°
    with pytest.raises(ConfigError, match="not at the recorded start pose"):
        _check_start(arm, start + np.radians([0, 0, 2.0, 0, 0, 0]), start, from_here=False)
    _check_start(arm, start + np.radians(5.0), start, from_here=True)


@pytest.mark.e2e
@pytest.mark.sim
def test_replay_sends_the_recorded_rates_to_the_simulated_arm(good_log, capsys):
    """The default target: the simulated arm, started at the recorded pose and paced by the
    recorded times; at half speed the 1.2 s log takes at least 2.4 s (no upper bound here:
    a loaded machine may be slower; timing is measured in benchmarks, not tests)."""
    assert main(["replay", str(good_log), "--speed", "0.5", "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["cycles"] == N and result["target"] == "the simulated arm"
    assert result["speed"] == 0.5 and result["wall_s"] >= 2 * (N - 1) * DT - 1e-3
    assert result["sent"] + result["skipped_late"] == N and result["sent"] > 0
