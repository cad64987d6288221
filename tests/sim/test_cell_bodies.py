"""sim/cell_bodies.py: workcell objects as PyBullet static bodies and the contacts the
simulated arm reads after each step, checked against closed-form overlaps of the same
shapes (sphere–capsule and half-space–capsule penetration depths are elementary geometry)."""

from __future__ import annotations

import time

import numpy as np
import pytest

from runtime.arm.kinematics import geometric_jacobian, joint_frames
from runtime.arm.load import load_arm
from runtime.arm.solids import Solid, capsule
from runtime.link.protocol import CellHello, Rates, hello_for
from runtime.link.transport import ArmClient
from sim.arm import SimulatedArm
from sim.arm_side import ArmSession
from sim.cell_bodies import SimCell

pytestmark = pytest.mark.sim

TOOL_LENGTH_M, TOOL_RADIUS_M = 0.10, 0.02


@pytest.fixture(scope="module")
def elbow6():
    return load_arm("elbow6")


def flange_pose(arm, q) -> np.ndarray:
    frames, _ = joint_frames(arm, q)
    return frames[-1] @ arm.flange


def tool_cell(objects: list[Solid]) -> SimCell:
    """A tool capsule along the flange's z axis, from the flange out TOOL_LENGTH_M, checked
    against every object."""
    tool = capsule("tool", np.zeros(3), np.array([0.0, 0.0, TOOL_LENGTH_M]), TOOL_RADIUS_M)
    return SimCell("test", objects, [("flange", "part_tool", tool, True)],
                   frozenset(frozenset(("tool", o.name)) for o in objects))


def at(point) -> np.ndarray:
    T = np.eye(4)
    T[:3, 3] = point
    return T


def contacts_after_one_step(arm, cell: SimCell) -> tuple:
    with SimulatedArm(arm, cell=cell) as sim:
        assert sim.read_state().contacts == ()          # nothing is read before a step
        sim.step()
        return sim.read_state().contacts


def test_a_ball_overlapping_the_tool_is_reported_with_its_depth(elbow6) -> None:
    F = flange_pose(elbow6, elbow6.home())
    tip, axis = (F @ [0, 0, TOOL_LENGTH_M, 1])[:3], F[:3, 2]
    # Ball centre 65 mm beyond the tip along the tool axis, radius 50 mm: the nearest point
    # of the tool's segment is its tip, so the overlap is 50 + 20 − 65 = 5 mm.
    ball = Solid("ball", "sphere", at(tip + 0.065 * axis), (0.05,))
    touching = contacts_after_one_step(elbow6, tool_cell([ball]))
    assert [(a, b) for a, b, _ in touching] == [("tool", "ball")]
    assert touching[0][2] == pytest.approx(0.005, abs=2e-4)   # one 1 ms step of sag at most


def test_a_floor_just_above_the_tool_tip_is_a_contact(elbow6) -> None:
    F = flange_pose(elbow6, elbow6.home())
    ends = np.array([F[:3, 3], (F @ [0, 0, TOOL_LENGTH_M, 1])[:3]])
    lowest = ends[:, 2].min() - TOOL_RADIUS_M
    floor = Solid("floor", "halfspace", at([0.0, 0.0, lowest + 0.003]))
    touching = contacts_after_one_step(elbow6, tool_cell([floor]))
    assert ("tool", "floor") in [(a, b) for a, b, _ in touching]
    depth = dict(((a, b), d) for a, b, d in touching)[("tool", "floor")]
    assert depth == pytest.approx(0.003, abs=2e-4)


def test_objects_clear_of_the_arm_give_no_contact(elbow6) -> None:
    far = [Solid("block", "box", at([2.0, 2.0, 0.3]), (0.1, 0.2, 0.3)),
           Solid("post", "cylinder", at([-2.0, 0.0, 0.5]), (0.05, 1.0)),
           Solid("floor", "halfspace", at([0.0, 0.0, -1.0]))]
    assert contacts_after_one_step(elbow6, tool_cell(far)) == ()


def test_a_box_the_arm_moves_into_is_reported(elbow6) -> None:
    F = flange_pose(elbow6, elbow6.home())
    tip = (F @ [0, 0, TOOL_LENGTH_M, 1])[:3]
    block = Solid("block", "box", at(tip + [0.0, 0.0, -0.03 - TOOL_RADIUS_M - 0.001]),
                  (0.2, 0.2, 0.03))       # its top 1 mm under the tool's lowest point
    with SimulatedArm(elbow6, cell=tool_cell([block])) as sim:
        sim.step()
        assert sim.read_state().contacts == ()
        J = geometric_jacobian(elbow6, elbow6.home())
        rates = np.linalg.pinv(J) @ [0.0, 0.0, -0.1, 0.0, 0.0, 0.0]   # TCP down at 0.1 m/s
        depths = []
        sim.set_rates(rates)
        for _ in range(200):
            sim.step()
            depths += [d for _, b, d in sim.read_state().contacts if b == "block"]
        assert len(depths) > 100             # touched after ~10 ms and stayed in contact


def test_contacts_reach_a_runtime_that_asked_over_a_loopback_socket(elbow6,
                                                                  serving_lockstep) -> None:
    """The wire's contact reports (docs/PROTOCOL.md §5a): a runtime that sends `cell` gets
    the arm side's `cell` back, then a `contact` before the state of every step that ended
    in contact, with that state's seq."""
    F = flange_pose(elbow6, elbow6.home())
    tip, axis = (F @ [0, 0, TOOL_LENGTH_M, 1])[:3], F[:3, 2]
    ball = Solid("ball", "sphere", at(tip + 0.065 * axis), (0.05,))
    ours = CellHello("test", "0123456789abcdef")
    session = ArmSession(hello_for(elbow6, "sim", stale_after_s=0.1), stale_after_s=0.1,
                         in_order=True, cell=ours)
    with SimulatedArm(elbow6, cell=tool_cell([ball])) as sim, \
            serving_lockstep(sim, session) as endpoint, \
            ArmClient(endpoint.server.endpoint,
                      hello=hello_for(elbow6, "runtime", stale_after_s=0.1)) as client:
        client.handshake(5.0)
        client.send(ours)
        answer, contacts, states = None, [], []
        for seq in (1, 2, 3):
            client.send(Rates(seq, time.monotonic_ns(), np.zeros(elbow6.n)))
            deadline = time.monotonic() + 5.0
            while not states or states[-1].applied_seq != seq:
                inbox = client.receive(1.0)
                answer = inbox.cell or answer
                contacts += inbox.contacts
                states += [inbox.state] if inbox.state is not None else []
                assert time.monotonic() < deadline, "no state for this step"
    assert answer == ours
    stepped = [s.seq for s in states if s.applied_seq > 0]
    assert [c.seq for c in contacts] == stepped
    assert all(c.pairs[0][:2] == ("tool", "ball") for c in contacts)
