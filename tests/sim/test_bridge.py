"""sim/bridge.py: the Driver contract, the VirtualDriver (integration, dry-run CSV), limits at the
bridge's own boundary, driver failures, and the bridge as a separate process on loopback."""

from __future__ import annotations

import argparse
import csv
import re
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from runtime.arm.load import load_arm
from runtime.arm.model import Arm
from runtime.commands import bridge as bridge_command
from runtime.errors import ConfigError
from runtime.link.arm_process import ArmProcess
from runtime.link.protocol import Rates, hello_for
from runtime.link.transport import ArmClient
from sim.bridge import (
    BridgeTarget,
    Driver,
    JointSample,
    VirtualDriver,
    build_parser,
    load_driver,
    main,
)


class RecordingDriver(Driver):
    """A controller that only records what it is asked to do (for the bridge boundary)."""

    def __init__(self, q0: np.ndarray | None = None) -> None:
        self.q0 = q0
        self.written: list[np.ndarray] = []
        self.closed = 0

    def open(self, arm: Arm) -> JointSample:
        self.q = arm.home() if self.q0 is None else self.q0
        return JointSample(self.q, np.zeros(arm.n))

    def read_state(self) -> JointSample:
        return JointSample(self.q, np.zeros(len(self.q)))

    def write_rates(self, qd: np.ndarray) -> None:
        self.written.append(np.array(qd))

    def close(self) -> None:
        self.closed += 1


class FailingDriver(RecordingDriver):
    def read_state(self) -> JointSample:
        raise OSError("controller link lost")


@pytest.fixture(scope="module")
def reach7():
    return load_arm("reach7")


# ----------------------------------------------------------------------------------------
# VirtualDriver
# ----------------------------------------------------------------------------------------

def test_virtual_driver_integrates_rates(reach7, fake_clock) -> None:
    clock = fake_clock(read_cost_s=0.0)
    driver = VirtualDriver(clock=clock)
    q0 = driver.open(reach7).q
    qd = np.linspace(-0.2, 0.2, reach7.n)
    driver.write_rates(qd)
    clock.now += 0.5
    sample = driver.read_state()
    assert np.allclose(sample.q, q0 + 0.5 * qd) and np.array_equal(sample.qd, qd)
    driver.write_rates(np.zeros(reach7.n))
    clock.now += 1.0
    assert np.allclose(driver.read_state().q, q0 + 0.5 * qd)
    driver.close()


def test_virtual_driver_stops_at_the_joint_limits(reach7, fake_clock) -> None:
    clock = fake_clock(read_cost_s=0.0)
    driver = VirtualDriver(clock=clock)
    driver.open(reach7)
    qd = np.zeros(reach7.n)
    qd[0] = 1.0
    driver.write_rates(qd)
    clock.now += 10.0
    sample = driver.read_state()
    assert sample.q[0] == reach7.upper[0] and sample.qd[0] == 0.0


def test_dry_run_csv_has_every_command(tmp_path: Path, reach7, fake_clock) -> None:
    clock = fake_clock(read_cost_s=0.0)
    path = tmp_path / "commands.csv"
    driver = VirtualDriver(csv_path=path, clock=clock)
    driver.open(reach7)
    sent = [np.full(reach7.n, 0.01 * k) for k in range(5)]
    for qd in sent:
        clock.now += 0.002
        driver.write_rates(qd)
    driver.close()
    rows = list(csv.reader(path.read_text().splitlines()))
    assert rows[0] == ["t_s"] + [f"{n}_rad_s" for n in reach7.joint_names]
    assert [float(r[0]) for r in rows[1:]] == pytest.approx([0.002 * k for k in range(1, 6)])
    assert np.array_equal(np.array(rows[1:], dtype=float)[:, 1:], np.array(sent))


def test_dry_run_csv_units_for_a_prismatic_joint(tmp_path: Path) -> None:
    driver = VirtualDriver(csv_path=tmp_path / "c.csv")
    driver.open(load_arm("scara4"))
    driver.close()
    header = (tmp_path / "c.csv").read_text().splitlines()[0]
    assert header == "t_s,shoulder_rad_s,elbow_rad_s,quill_m_s,tool_yaw_rad_s"


# ----------------------------------------------------------------------------------------
# The bridge's own limits (defence in depth)
# ----------------------------------------------------------------------------------------

def test_bridge_never_asks_the_driver_for_more_than_max_speed(reach7) -> None:
    driver = RecordingDriver()
    target = BridgeTarget(reach7, driver, step_s=0.002)
    request = 2.5 * reach7.max_speed * np.array([1, -1, 0.2, 0, 0, 0, 1])
    target.set_rates(request)
    target.step()
    written = driver.written[-1]
    assert np.all(np.abs(written) <= reach7.max_speed * (1 + 1e-12))
    assert np.allclose(written, request / 2.5)           # uniform: the direction is kept
    assert target.read_state().limited


def test_bridge_brakes_before_a_position_limit(reach7) -> None:
    q0 = reach7.home()
    q0[3] = reach7.lower[3] + 0.002
    driver = RecordingDriver(q0)
    target = BridgeTarget(reach7, driver, step_s=0.002)
    request = np.zeros(reach7.n)
    request[3] = -reach7.max_speed[3]
    target.set_rates(request)
    target.step()
    # v ≤ sqrt(2·a·d), d = 2 mrad, a = rated accel (v² = 2ad).
    assert abs(driver.written[-1][3]) <= np.sqrt(2 * reach7.rated_accel[3] * 0.002) + 1e-12


def test_bridge_closes_the_driver_with_a_zero_command(reach7) -> None:
    driver = RecordingDriver()
    target = BridgeTarget(reach7, driver, step_s=0.002)
    target.set_rates(0.1 * reach7.max_speed)
    target.step()
    target.close()
    assert np.all(driver.written[-1] == 0) and driver.closed == 1


def test_a_failing_driver_stops_the_bridge_with_status_1(capsys) -> None:
    status = main(["reach7", "--endpoint", "tcp://127.0.0.1:*", "--driver",
                   f"{__name__}:FailingDriver", "--duration", "5"])
    assert status == 1
    assert "driver error: OSError: controller link lost" in capsys.readouterr().err


@pytest.mark.parametrize("spec, csv_path, words", [
    ("no_such_module:X", None, "cannot load driver"),
    ("csv:writer", None, "not a subclass of sim.bridge.Driver"),
    (f"{__name__}:RecordingDriver", "x.csv", "VirtualDriver only"),
])
def test_driver_option_errors(spec: str, csv_path, words: str) -> None:
    with pytest.raises(ConfigError, match=words):
        load_driver(spec, csv_path)


def test_jogwire_bridge_help_lists_every_option() -> None:
    options = {s for a in build_parser()._actions for s in a.option_strings
               if s.startswith("--") and a.help != argparse.SUPPRESS}   # not the old names
    listed = set(re.findall(r"^\s+(--[\w-]+)", bridge_command.OPTIONS_SUMMARY, flags=re.M))
    assert listed == options - {"--help"}


# ----------------------------------------------------------------------------------------
# As a separate process on loopback
# ----------------------------------------------------------------------------------------

@pytest.mark.e2e
def test_bridge_process_follows_limits_and_stops_when_rates_go_stale(tmp_path: Path,
                                                                     reach7) -> None:
    path = tmp_path / "dry.csv"
    hello = hello_for(reach7, "runtime", stale_after_s=0.1)
    with ArmProcess("bridge", "reach7", ["--endpoint", "tcp://127.0.0.1:*",
                                         "--dry-run-csv", str(path), "--duration", "20"],
                    stderr=subprocess.PIPE) as bridge, \
            ArmClient(bridge.endpoint, hello=hello) as client:
        theirs, first = client.handshake(10.0)
        assert theirs.role == "bridge" and first.status == "waiting"
        too_fast = np.zeros(reach7.n)
        too_fast[0] = 2 * reach7.max_speed[0]          # a runtime bug: twice the max speed
        seq, t_end, last = 0, time.monotonic() + 0.3, None
        while time.monotonic() < t_end:
            seq += 1
            client.send(Rates(seq, time.monotonic_ns(), too_fast))
            last = client.receive(0.002).state or last
        assert last.status == "tracking" and last.limited
        assert abs(last.qd[0]) == pytest.approx(reach7.max_speed[0])
        deadline = time.monotonic() + 3.0              # now silence: the watchdog ramps down
        while not (last.status == "stale" and abs(last.qd[0]) == 0.0):
            last = client.receive(0.05).state or last
            assert time.monotonic() < deadline, last
    rows = np.array(list(csv.reader(path.read_text().splitlines()))[1:], dtype=float)
    assert len(rows) > 100
    assert np.all(np.abs(rows[:, 1:]) <= reach7.max_speed * (1 + 1e-12))   # never more
    assert rows[:, 1].max() == pytest.approx(reach7.max_speed[0])
    assert rows[-1, 1] == 0.0


@pytest.mark.e2e
def test_jogwire_bridge_command_runs_the_bridge(tmp_path: Path) -> None:
    out = subprocess.run([sys.executable, "-m", "runtime.cli", "bridge", "planar3", "--endpoint",
                          "tcp://127.0.0.1:*", "--duration", "0.2"],
                         capture_output=True, text=True, timeout=60,
                         cwd=Path(__file__).resolve().parents[2])
    assert out.returncode == 0, out.stderr
    assert "jogwire bridge ready: arm=planar3" in out.stdout
    assert "stopped:" in out.stderr
