"""The simulated arm is drawn in jogwire's palette: checked on the rendered pixels.

`jogwire sim ARM --snapshot` writes a PNG (PyBullet DIRECT, TinyRenderer); an independent
decoder (matplotlib's) reads it back. Lighting shades every colour, so a pixel is matched
to a palette colour c by the best shade s with pixel ≈ s·c: TinyRenderer lights a surface
as albedo × (ambient + diffuse·cos θ) plus a small specular term (pybullet's TinyRenderer
shader, from memory: ambient 0.6, diffuse 0.35, specular 0.05), i.e. a scale of the colour
between about 0.6 and 1. The nearest colour is the one with the smallest residual
|pixel − s·c|; the residual also proves the pixel is explained by that colour at all.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib.image
import numpy as np
import pybullet as pb
import pytest

from runtime import palette
from runtime.arm.model import load_arm
from sim.arm import SimulatedArm, main, write_png

ARMS = sorted(p.stem for p in (Path(__file__).resolve().parents[2] / "configs" / "arms")
              .glob("*.toml"))
ARM_PARTS = {"link": palette.ARM_LINK, "housing": palette.ARM_HOUSING, "tool": palette.TOOL}
SCENE = {**ARM_PARTS, "floor": palette.CELL_FLOOR, "cell object": palette.CELL_OBJECT}
SHADES = (0.4, 1.1)          # wider than the lighting's 0.6–1 (shadows, highlights)
EXPLAINED_LEVELS = 4.0       # residual, in 8-bit levels, of a pixel "in" a palette colour


def classify(path: Path) -> tuple[np.ndarray, np.ndarray]:
    """For every pixel but the ground: the nearest scene colour's name and the residual."""
    rgb = matplotlib.image.imread(path)[..., :3].reshape(-1, 3) * 255.0
    rgb = rgb[np.abs(rgb - np.array(palette.GROUND)).max(axis=1) > 0.5]
    names = list(SCENE)
    C = np.array([SCENE[n] for n in names], dtype=float)                 # (k, 3)
    shade = np.clip(rgb @ C.T / (C * C).sum(axis=1), *SHADES)             # (N, k)
    residual = np.linalg.norm(rgb[:, None, :] - shade[:, :, None] * C, axis=2)
    best = residual.argmin(axis=1)
    return np.array(names)[best], residual.min(axis=1)


def dominant_arm_part(names: np.ndarray) -> str:
    parts, counts = np.unique(names[np.isin(names, list(ARM_PARTS))], return_counts=True)
    return str(parts[counts.argmax()])


@pytest.mark.parametrize("arm", ARMS)
def test_snapshot_of_each_shipped_arm_is_in_the_palette(tmp_path: Path, arm: str) -> None:
    path = tmp_path / f"{arm}.png"
    assert main([arm, "--snapshot", str(path), "--size", "320x240"]) == 0
    names, residual = classify(path)
    assert len(names) > 0.05 * 320 * 240                  # the scene, on the window's ground
    assert np.mean(residual < EXPLAINED_LEVELS) > 0.99    # every colour is a palette colour
    assert dominant_arm_part(names) == "link"             # the links' colour dominates
    assert np.sum(names == "tool") > 20                   # the tool in the accent


def test_a_colour_outside_the_palette_is_seen(tmp_path: Path) -> None:
    """The check can fail: the same arm with its links repainted orange does not pass."""
    with SimulatedArm(load_arm("elbow6")) as sim:
        link = palette.unit(palette.ARM_LINK)
        for shape in pb.getVisualShapeData(sim.body, physicsClientId=sim.client):
            if np.allclose(shape[7], link, atol=1e-3):
                pb.changeVisualShape(sim.body, shape[1], rgbaColor=[0.85, 0.55, 0.15, 1.0],
                                     physicsClientId=sim.client)
        path = write_png(tmp_path / "orange.png", sim.render(320, 240))
    names, residual = classify(path)
    assert np.mean(residual < EXPLAINED_LEVELS) < 0.99
    assert dominant_arm_part(names[residual < EXPLAINED_LEVELS]) != "link"
