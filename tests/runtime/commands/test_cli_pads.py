"""`jogwire pads` in this process against virtual pads that SDL itself attaches
(tests/virtual_pad.py): the list, the live check (headless lines and the window) and its
errors. Learning a pad, end to end into a drive, is in tests/e2e/test_drive_pad.py."""

from __future__ import annotations

import numpy as np
import pytest
from virtual_pad import Terminal, add_controller_mapping

from runtime import cli
from runtime.arm.model import load_arm
from runtime.control.mapping import InputFrame, Mapper, load_pad
from runtime.operator.inputs.pygame_init import pygame
from runtime.operator.pad_check import ON, PadCheckWindow, describe, pad_roles


def pads(monkeypatch, *argv: str) -> tuple[int, str]:
    term = Terminal()
    monkeypatch.setattr("sys.stdout", term)
    status = cli.main(["pads", *argv])
    return status, term.text


def test_list_without_pads(monkeypatch):
    from runtime.operator.inputs.pygame_init import init_events
    init_events()
    if pygame.joystick.get_count():
        pytest.skip("a pad is plugged into this machine")
    status, out = pads(monkeypatch)
    assert status == 0 and "no pad connected" in out


def test_list_names_each_pad_and_the_shipped_file_that_fits(monkeypatch, virtual_pads):
    raw = virtual_pads(axes=6, buttons=11, hats=1, name="raw pad")
    virtual_pads(axes=6, buttons=15, hats=0, controller=True, name="controller pad")
    status, out = pads(monkeypatch)
    assert status == 0 and "2 pads connected" in out
    assert "'raw pad'  6 axes, 11 buttons, 1 hat  (instance " \
        f"{raw.instance_id}," in out
    assert "'controller pad'  6 axes, 15 buttons, 0 hats" in out
    # SDL has no mapping for an unknown raw device; for a controller-typed one it has its
    # own, in SDL's order: the layout of twinstick_sdl.toml
    raw_part, ctl_part = out.split("'controller pad'")
    assert "no game-controller mapping" in raw_part and "--learn" in raw_part
    assert "leftshoulder b9" in ctl_part and "fit the shipped pad file 'twinstick_sdl'" in ctl_part


def test_live_check_shows_each_input_its_role_and_the_intent(monkeypatch, virtual_pads):
    pad = virtual_pads(axes=6, buttons=11, hats=1)
    term = Terminal()
    monkeypatch.setattr("sys.stdout", term)
    import threading

    def hand():
        start = term.wait_for("live (Ctrl-C ends):")
        term.wait_for("sticks at rest | nothing held", start=start)
        pad.set_axis(1, -0.8)
        pad.set_button(4, True)
        pad.set_hat(0, "up")

    t = threading.Thread(target=hand, daemon=True)
    t.start()
    status = cli.main(["pads", "--pad", "twinstick", "--headless", "--duration", "1.5"])
    t.join(5)
    out = term.text
    assert status == 0, out
    assert "axis 1 (stick 1 y): vx−, shift: wy−, joint−" in out       # the roles, once
    assert "button 4: enable" in out and "hat0:up: faster" in out
    # the live line: 0.8 up → dead zone 0.1 rescaled → expo 0.5 (REFERENCES §6), × preset
    # 0.4 (one faster than the start, hat up) × elbow6's 1.0 m/s cap
    x = (round(0.8 * 32767) / 32767 - 0.1) / 0.9
    vx = 0.4 * 1.0 * (0.5 * x + 0.5 * x ** 3)
    assert f"axis 1 -0.80 → vx−, shift: wy−, joint− | 4 → enable; hat0:up → faster | " \
           f"intent: ENABLE vx +{vx:.3f} m/s  [cartesian, base frame, preset 3 (40 %)" in out


def test_check_refuses_a_keyboard_file_and_learn_keeps_an_existing_file(monkeypatch,
                                                                         tmp_path, capsys):
    assert cli.main(["pads", "--pad", "keyboard", "--headless"]) == 2
    assert "keyboard mapping" in capsys.readouterr().err
    existing = tmp_path / "mine.toml"
    existing.write_text("keep me", encoding="utf-8")
    assert cli.main(["pads", "--learn", str(existing)]) == 2
    assert "exists" in capsys.readouterr().err
    assert existing.read_text(encoding="utf-8") == "keep me"
    assert cli.main(["pads", "--pad", "twinstick", "--duration", "0"]) == 2


def test_window_lights_held_buttons_and_draws_the_bars(tmp_path):
    """One frame of the check window (dummy video driver), read back as pixels."""
    pad = load_pad("twinstick")
    mapper = Mapper(pad, load_arm("elbow6"))
    frame = InputFrame("pad 'test' #0", True, axes=(0.0, -0.8, -1.0, 0.0, 0.0, -1.0),
                       pressed=frozenset({4}))
    intent = mapper.update(frame)
    window = PadCheckWindow("jogwire pads · test", pad.name)
    window.open()
    try:
        window.draw(frame, intent, pad_roles(pad), (0.0, 0.0, -1.0, 0.0, 0.0, -1.0), 11,
                    mapper.arm)
        img = pygame.surfarray.array3d(window.screen)
        pygame.image.save(window.screen, str(tmp_path / "check.png"))
    finally:
        window.close()
    # button 4's box: column 0, row 2 of the grid (x 596, y 104 + 2·29); axis 1's bar left
    # of centre (200 px from x 100, moved → ON)
    assert tuple(img[596 + 10, 104 + 2 * 29 + 10]) == ON
    assert tuple(img[200 - 30, 104 + 32 + 8]) == ON
    assert "intent: ENABLE vx +" in describe(frame, intent, pad_roles(pad),
                                             (0.0, 0.0, -1.0, 0.0, 0.0, -1.0), mapper.arm)
    assert len(np.unique(img.reshape(-1, 3), axis=0)) > 20


def test_a_pad_with_the_xpad_mapping_fits_twinstick(monkeypatch, virtual_pads):
    """SDL's game-controller database names an Xbox-360-style pad's indices on Linux the way
    twinstick.toml's comments list them (from memory); a mapping in that order, added for
    this virtual pad's GUID, must make the list point to twinstick."""
    pad = virtual_pads(axes=6, buttons=11, hats=1, name="xpad-order pad")
    index = next(i for i in range(pygame.joystick.get_count())
                 if pygame.joystick.Joystick(i).get_instance_id() == pad.instance_id)
    guid = pygame.joystick.Joystick(index).get_guid()
    add_controller_mapping(
        f"{guid},xpad-order pad,a:b0,b:b1,x:b2,y:b3,back:b6,start:b7,guide:b8,"
        "leftshoulder:b4,rightshoulder:b5,leftstick:b9,rightstick:b10,leftx:a0,lefty:a1,"
        "rightx:a3,righty:a4,lefttrigger:a2,righttrigger:a5,dpup:h0.1,dpdown:h0.4,"
        "dpleft:h0.8,dpright:h0.2,")   # (a trailing comma, as in SDL's database)
    status, out = pads(monkeypatch)
    assert status == 0
    assert "fit the shipped pad file 'twinstick':" in out.split("xpad-order pad")[1]


def test_single_joint_mode_is_described_in_the_joint_s_unit():
    pad = load_pad("twinstick")
    mapper = Mapper(pad, load_arm("elbow6"))
    mode = InputFrame("pad", True, axes=(0.0,) * 6, pressed=frozenset({2}))   # X: joint mode
    mapper.update(InputFrame("pad", True, axes=(0.0,) * 6))
    mapper.update(mode)
    up = InputFrame("pad", True, axes=(0.0, -1.0, 0.0, 0.0, 0.0, 0.0), pressed=frozenset({4}))
    line = describe(up, mapper.update(up), pad_roles(pad), (0.0,) * 6, mapper.arm)
    # full stick × preset 0.15 × base_yaw's 100 °/s (configs/arms/elbow6.toml)
    assert "intent: ENABLE joint base_yaw +15.0 °/s  [joint, base frame" in line


def test_the_window_check_ends_on_escape(virtual_pads):
    import time

    from runtime.operator.inputs.gamepad import GamepadSource
    from runtime.operator.pad_check import run_check
    virtual_pads()
    pad = load_pad("twinstick")
    source = GamepadSource()
    window = PadCheckWindow("jogwire pads · test", pad.name)
    window.open()
    try:
        assert pygame.event.post(pygame.event.Event(pygame.KEYDOWN, key=pygame.K_ESCAPE))
        t0 = time.monotonic()
        run_check(source, Mapper(pad, load_arm("elbow6")), print, window=window,
                  duration_s=5.0, clock=time.monotonic, sleep=time.sleep)
        assert time.monotonic() - t0 < 1.0
    finally:
        window.close()
        source.close()
