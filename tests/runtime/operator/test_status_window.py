"""Status window under the SDL dummy video driver: frames render, PNGs are not blank, the
window loop hands events to the input sources and ends on close."""

from __future__ import annotations

import os

os.environ.setdefault("SDL_VIDEODRIVER", "dummy")
os.environ.setdefault("SDL_AUDIODRIVER", "dummy")

import numpy as np  # noqa: E402
import pytest  # noqa: E402

from runtime.arm.load import load_arm  # noqa: E402
from runtime.control.loop import FixedRateLoop  # noqa: E402
from runtime.operator.inputs.keyboard import KeyboardSource  # noqa: E402
from runtime.operator.inputs.pygame_init import pygame  # noqa: E402
from runtime.operator.status_window import (  # noqa: E402
    GROUND,
    SIZE,
    STATE_COLOURS,
    StatusSnapshot,
    StatusWindow,
    draw_status,
    render_png,
)

ARMS = ("elbow6", "reach7", "scara4", "planar3")


def snapshot(arm_name="elbow6", **changes) -> StatusSnapshot:
    arm = load_arm(arm_name)
    q = arm.home()
    stats = FixedRateLoop(500.0, clock=iter(np.arange(0, 1, 1e-4)).__next__,
                          sleep=lambda d: None).stats()
    base = dict(arm=arm, q=q, rates=0.3 * arm.max_speed * np.sin(np.arange(arm.n)),
                twist=np.array([0.05, 0.0, 0.0, 0.0, 0.0, 0.1]), allowed=True,
                gate_state="moving", gate_reason="enable held", input_name="test pad",
                speed_fraction=0.15, speed_m_s=0.15, sigma_min=0.03, manipulability=0.01,
                damping=0.05, binding_limit="acceleration", target="sim tcp://127.0.0.1:5601",
                connected=True, state_age_s=0.002, rtt_s=0.0005, timing=stats, elapsed_s=3.0)
    base.update(changes)
    return StatusSnapshot(**base)


def pixels(path) -> np.ndarray:
    return pygame.surfarray.array3d(pygame.image.load(str(path)))  # (W, H, 3)


def test_render_png_is_not_blank(tmp_path):
    path = render_png(snapshot(), tmp_path / "status.png")
    img = pixels(path)
    assert img.shape[:2] == SIZE
    colours = np.unique(img.reshape(-1, 3), axis=0)
    assert len(colours) > 50                                  # text, bars, arm: not flat
    not_ground = np.any(img != np.array(GROUND), axis=2).mean()
    assert 0.2 < not_ground < 0.95
    # the state box in the header wears the state's colour
    assert tuple(img[30, 30]) == STATE_COLOURS["moving"]


@pytest.mark.parametrize("state", sorted(STATE_COLOURS))
def test_each_gate_state_has_its_own_colour(tmp_path, state):
    img = pixels(render_png(snapshot(gate_state=state, allowed=state == "moving"),
                            tmp_path / f"{state}.png"))
    assert tuple(img[30, 30]) == STATE_COLOURS[state]


@pytest.mark.parametrize("arm_name", ARMS)
def test_every_arm_renders_with_and_without_data(arm_name):
    surf = pygame.Surface(SIZE)
    draw_status(surf, snapshot(arm_name))
    draw_status(surf, snapshot(arm_name, q=None, rates=None, twist=None, sigma_min=None,
                               damping=None, manipulability=None, timing=None, connected=False,
                               state_age_s=None, rtt_s=None, gate_state="blocked",
                               gate_reason="no arm state yet", allowed=False))
    draw_status(surf, snapshot(arm_name, mode="joint", joint=arm_name.startswith("p") and 2 or 1,
                               reduced=True, note="script square 1.0 / 9.0 s"))


def test_the_arm_view_follows_the_measured_pose():
    a, b = pygame.Surface(SIZE), pygame.Surface(SIZE)
    arm = load_arm("elbow6")
    draw_status(a, snapshot(q=arm.home()))
    draw_status(b, snapshot(q=arm.home() + np.radians([60, 0, 0, 0, 0, 0])))
    diff = np.any(pygame.surfarray.array3d(a) != pygame.surfarray.array3d(b), axis=2)
    view = diff[SIZE[0] // 2:, 150:380]    # the two projections, right half of the window
    assert view.sum() > 100
    assert diff[:SIZE[0] // 2, 250:].sum() == 0  # joints 2…6 did not move, their rows agree


def test_window_runs_draws_and_hands_events_to_the_inputs():
    window = StatusWindow()
    keys = KeyboardSource()
    seen = []

    def on_event(e):
        seen.append(e.type)
        keys.handle_event(e)

    try:
        window.open()
        pygame.event.clear()
        assert pygame.event.post(pygame.event.Event(pygame.KEYDOWN, key=pygame.K_SPACE))
        result = window.run(lambda: snapshot(), on_event=on_event,
                            should_stop=lambda: window.frames_drawn >= 3)
        assert result == "stopped" and window.frames_drawn == 3
        assert pygame.KEYDOWN in seen
        assert keys.read(0.0).pressed == {"space"}
        pygame.event.post(pygame.event.Event(pygame.QUIT))
        assert window.run(lambda: None, on_event=on_event) == "closed"
    finally:
        window.close()


def test_the_workcell_nearest_pair_and_binding_clearance_are_drawn():
    from runtime.arm.cell import load_cell
    from runtime.arm.distance import cell_distances
    from runtime.operator.cell_outlines import CellOutlines
    from runtime.operator.status_window import (
        CELL_OBJECT,
        CLEARANCE_STOP,
        CLEARANCE_WARN,
        clearance_colour,
        clearance_text,
    )
    arm = load_arm("elbow6")
    cell = load_cell("bench", arm)
    found = cell_distances(arm, cell, arm.home())
    i = found.nearest()
    near = dict(cell=CellOutlines.of_cell(cell), clearance_m=float(found.distances[i]),
                clearance_pair=found.pairs[i],
                clearance_points=np.array([found.points_arm[i], found.points_other[i]]))
    plain = draw_status(pygame.Surface(SIZE), snapshot())
    drawn = draw_status(pygame.Surface(SIZE), snapshot(**near, binding_limit="clearance"))
    img = pygame.surfarray.array3d(drawn)
    assert np.any(np.all(img == np.array(CELL_OBJECT), axis=2))       # the objects' outlines
    assert np.any(np.all(img == np.array(CLEARANCE_WARN), axis=2))    # the badge
    assert not np.array_equal(img, pygame.surfarray.array3d(plain))
    s = snapshot(**near)
    a, b = found.pairs[i]
    assert clearance_text(s) == f"nearest {a}–{b} {found.distances[i] * 1e3:.1f} mm"
    assert clearance_colour(snapshot(**{**near, "clearance_m": 0.01})) == CLEARANCE_STOP
    touching = snapshot(**near, contacts=(("gripper", "bench"),))
    assert clearance_colour(touching) == CLEARANCE_STOP
    assert clearance_text(touching).startswith("CONTACT gripper–bench")
