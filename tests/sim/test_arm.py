"""sim/arm.py: the PyBullet arm in-process (DIRECT), its guard, determinism, the snapshot, and
the lockstep endpoint over a loopback socket in the same process."""

from __future__ import annotations

import math
import time
from pathlib import Path

import matplotlib.image
import numpy as np
import pybullet as pb
import pytest

from runtime import palette
from runtime.arm.kinematics import tcp_pose
from runtime.arm.load import load_arm
from runtime.link.protocol import Rates, hello_for
from runtime.link.transport import ArmClient
from sim.arm import SimulatedArm, main, write_png
from sim.arm_side import ArmSession

pytestmark = pytest.mark.sim


@pytest.fixture(scope="module")
def reach7():
    return load_arm("reach7")


@pytest.fixture
def sim(reach7):
    with SimulatedArm(reach7) as s:
        yield s


def test_starts_at_home_with_gravity_on(sim, reach7) -> None:
    assert np.allclose(sim.read_state().q, reach7.home(), atol=1e-12)
    params = pb.getPhysicsEngineParameters(physicsClientId=sim.client)
    assert params["gravityAccelerationZ"] == pytest.approx(-9.81)
    assert params["fixedTimeStep"] == pytest.approx(1e-3)


@pytest.mark.parametrize("name", ["reach7", "elbow6", "scara4", "planar3"])
def test_joint_mapping_and_tcp_agree_with_our_kinematics(name: str) -> None:
    # PyBullet's forward kinematics of the exported URDF is an outside reference for ours;
    # its link-frame pose agrees with an exact FK to about 6e-8 m (REFERENCES §10).
    arm = load_arm(name)
    rng = np.random.default_rng(4)
    with SimulatedArm(arm) as sim:
        for _ in range(5):
            q = rng.uniform(np.maximum(arm.lower, -3), np.minimum(arm.upper, 3))
            sim.reset(q)
            assert np.allclose(sim.read_state().q, q, atol=1e-12)
            T = sim.tcp_pose()
            expected = tcp_pose(arm, q)
            assert np.allclose(T[:3, 3], expected[:3, 3], atol=1e-6)
            assert np.allclose(T[:3, :3], expected[:3, :3], atol=1e-6)


def test_constant_rate_moves_each_joint_by_rate_times_time(sim, reach7) -> None:
    qd = 0.3 * reach7.max_speed * np.array([1, -1, 1, 1, -1, 1, -1])
    q0 = sim.read_state().q
    for _ in range(1000):           # 1 s at 1 ms
        sim.set_rates(qd)
        sim.step()
    s = sim.read_state()
    # Velocity motors with the arm's efforts track within ~1e-3 rad over 1 s under gravity
    # (measured ≤ 8e-4 here); the guard must not have acted.
    assert np.allclose(s.q - q0, qd * 1.0, atol=2e-3)
    assert np.allclose(s.qd, qd, atol=1e-3)
    assert not s.limited and math.isclose(s.t_s, 1.0)


def test_holds_still_under_gravity_with_zero_rates(sim) -> None:
    q0 = sim.read_state().q
    for _ in range(500):
        sim.step()
    assert np.max(np.abs(sim.read_state().q - q0)) < 1e-3


def test_speeds_are_clamped_by_the_arm_itself(sim, reach7) -> None:
    # PyBullet does not enforce URDF velocity in VELOCITY_CONTROL (REFERENCES §7): we do.
    request = np.zeros(reach7.n)
    request[0], request[2] = 3 * reach7.max_speed[0], reach7.max_speed[2]
    for _ in range(50):
        sim.set_rates(request)
        sim.step()
    s = sim.read_state()
    assert s.limited
    assert s.command[0] == pytest.approx(reach7.max_speed[0])
    assert s.command[2] == pytest.approx(reach7.max_speed[2] / 3)   # same scale: direction kept
    assert abs(s.qd[0]) <= reach7.max_speed[0] * 1.001


def test_never_runs_through_a_position_limit(sim, reach7) -> None:
    q = reach7.home()
    q[1] = reach7.upper[1] - 0.05
    sim.reset(q)
    request = np.zeros(reach7.n)
    request[1] = reach7.max_speed[1]
    peak = -np.inf
    for _ in range(400):
        sim.set_rates(request)
        sim.step()
        peak = max(peak, sim.read_state().q[1])
    assert peak <= reach7.upper[1] + 1e-6
    assert sim.read_state().qd[1] == pytest.approx(0.0, abs=1e-2)


def test_set_rates_checks_its_input(sim) -> None:
    with pytest.raises(ValueError):
        sim.set_rates(np.zeros(3))
    with pytest.raises(ValueError):
        sim.set_rates(np.full(7, np.nan))


def command_sequence(n: int, steps: int) -> np.ndarray:
    t = np.arange(steps)[:, None] * 1e-3
    return 0.4 * np.sin(2 * math.pi * (0.5 + np.arange(n)) * t)


def test_in_process_runs_are_deterministic(reach7) -> None:
    cmds = command_sequence(reach7.n, 300)
    runs = []
    for _ in range(2):
        with SimulatedArm(reach7) as s:
            for c in cmds:
                s.set_rates(c)
                s.step()
            runs.append(s.read_state().q)
    assert np.array_equal(runs[0], runs[1])


def test_lockstep_over_a_socket_equals_the_in_process_run(reach7, serving_lockstep) -> None:
    """The endpoint steps once per rates message and sends one state back; the result is
    bit-for-bit the in-process run with the same commands."""
    cmds = command_sequence(reach7.n, 200)
    with SimulatedArm(reach7) as reference:
        for c in cmds:
            reference.set_rates(c)
            reference.step()
        expected = reference.read_state().q

    session = ArmSession(hello_for(reach7, "sim", stale_after_s=0.1), stale_after_s=0.1)
    with SimulatedArm(reach7) as sim, serving_lockstep(sim, session) as endpoint, \
            ArmClient(endpoint.server.endpoint,
                      hello=hello_for(reach7, "runtime", stale_after_s=0.1)) as client:
        _, first = client.handshake(5.0)
        assert first.status == "waiting" and np.allclose(first.q, reach7.home())
        for seq, c in enumerate(cmds, start=1):
            client.send(Rates(seq, time.monotonic_ns(), c))
            deadline = time.monotonic() + 5.0
            while True:
                state = client.receive(1.0).state
                if state is not None and state.applied_seq == seq:
                    break
                assert time.monotonic() < deadline, "no state for this step"
        assert endpoint.steps == len(cmds)
        assert np.array_equal(np.array(state.q), expected)
        assert state.status == "tracking"


def test_snapshot_png_shows_the_arm(tmp_path: Path, reach7) -> None:
    path = tmp_path / "reach7.png"
    assert main(["reach7", "--snapshot", str(path), "--size", "160x120",
                 "--q", "0,20,0,-60,0,40,0", "--deg"]) == 0
    image = matplotlib.image.imread(path)          # an independent PNG decoder
    assert image.shape == (120, 160, 4)
    rgb = (image[..., :3] * 255).round().astype(int)
    link = np.array(palette.ARM_LINK)            # shaded: within 0.5–1 of the link colour
    lit = np.all((rgb >= 0.5 * link - 2) & (rgb <= link + 2), axis=-1) & (rgb.min(axis=-1) > 90)
    assert lit.sum() > 100                         # the arm's links are in the picture
    assert tuple(rgb[0, 0]) == palette.GROUND      # on the window's ground
    assert len(np.unique(rgb.reshape(-1, 3), axis=0)) > 50   # shaded, not a flat image


def test_write_png_round_trips_through_another_decoder(tmp_path: Path) -> None:
    rgba = np.random.default_rng(1).integers(0, 256, size=(7, 5, 4), dtype=np.uint8)
    back = matplotlib.image.imread(write_png(tmp_path / "x.png", rgba))
    assert np.array_equal((back * 255).round().astype(np.uint8), rgba)


def test_jogwire_sim_help_lists_every_option() -> None:
    import re

    from runtime.commands import sim as sim_command
    from sim.arm import build_parser
    options = {s for a in build_parser()._actions for s in a.option_strings if s.startswith("--")}
    listed = set(re.findall(r"(--[\w-]+)", sim_command.OPTIONS_SUMMARY)) - {"--help"}
    assert listed == options - {"--help"}


def test_bad_snapshot_arguments_say_what_is_wrong(tmp_path: Path, capsys) -> None:
    assert main(["reach7", "--snapshot", str(tmp_path / "x.png"), "--q", "1,2"]) == 2
    assert "--q needs 7 finite values" in capsys.readouterr().err
    assert main(["no_such_arm", "--snapshot", str(tmp_path / "x.png")]) == 2
    assert "no arm named" in capsys.readouterr().err
