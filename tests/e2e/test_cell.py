"""The workcell end to end: the shipped bench_plunge profile drives elbow6's tool into the
demo bench. Without clearance preflight fails naming the pair (the simulated arm's own
contact detection, PyBullet's getContactPoints, and jogwire's distances both see it); with
clearance on, `jogwire drive` of the same motion against the simulated arm stops above the
safety distance and PyBullet reports no contact."""

from __future__ import annotations

import json

import pytest

from runtime.arm.cell import load_cell
from runtime.arm.model import load_arm
from runtime.cli import main

pytestmark = [pytest.mark.e2e, pytest.mark.sim]


@pytest.fixture(scope="module")
def bench():
    return load_cell("bench", load_arm("elbow6"))


def test_without_clearance_preflight_fails_naming_the_pair_and_time(bench, tmp_path, capsys):
    code = main(["preflight", "elbow6", "bench_plunge", "--cell", "bench", "--no-clearance",
                 "--out", str(tmp_path), "--no-report", "--json"])
    out, err = capsys.readouterr()
    assert code == 1, err
    summary = json.loads(out)
    d_s = bench.clearance.safety_distance_m
    assert summary["verdict"] == "fail" and summary["cell"] == "bench"
    assert summary["contacts_measured"]                     # the simulated arm confirmed it
    touched = {(c["a"], c["b"]) for c in summary["contacts"]}
    assert ("gripper", "bench") in touched                  # the tool capsule hit the bench
    assert summary["clearance_pair"] == ["gripper", "bench"]
    assert summary["min_clearance"] < d_s
    contact = next(f for f in summary["findings"] if f["code"] == "contact")
    assert "gripper–bench" in contact["message"] and f"t = {contact['t_s']:.2f} s" in \
        contact["message"]
    clearance = next(f for f in summary["findings"] if f["code"] == "clearance")
    assert clearance["limit"] == d_s and clearance["t_s"] < contact["t_s"]
