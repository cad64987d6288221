"""RunSettings: validated once, the one home of the defaults, and a faithful round trip
through the session header (the header's bytes must not change for the same run)."""

from __future__ import annotations

import dataclasses

import pytest

from runtime.control.settings import HEADER_ORDER, RunSettings
from runtime.errors import ConfigError, LogError


def test_defaults_and_derived_values() -> None:
    s = RunSettings()
    assert (s.rate_hz, s.stale_after_s, s.overrun_limit) == (500.0, 0.1, 5)
    assert s.dt_s == pytest.approx(0.002)
    assert s.round_trip_limit_s == 0.1                 # None: stale_after
    assert RunSettings(max_round_trip_s=0.25).round_trip_limit_s == 0.25
    safety = RunSettings(stale_after_s=0.2, overrun_limit=3).safety()
    assert (safety.stale_after_s, safety.overrun_limit) == (0.2, 3)


def test_it_is_frozen_and_keyword_only() -> None:
    with pytest.raises(dataclasses.FrozenInstanceError):
        RunSettings().rate_hz = 100.0                  # type: ignore[misc]
    with pytest.raises(TypeError):
        RunSettings(250.0)                             # type: ignore[misc]


@pytest.mark.parametrize("kw, field", [
    (dict(rate_hz=0.5), "rate"), (dict(rate_hz=float("nan")), "rate"),
    (dict(rate_hz=True), "rate"), (dict(stale_after_s=0.0), "stale-after"),
    (dict(stale_after_s=10.0), "stale-after"), (dict(max_round_trip_s=0.0), "max-round-trip"),
    (dict(overrun_limit=0), "overrun-limit"), (dict(overrun_limit=2.5), "overrun-limit"),
    (dict(reduced_locked="yes"), "reduced"), (dict(state_lag_cycles=2), "state-lag"),
    (dict(state_lag_cycles=True), "state-lag"),
])
def test_bad_values_are_refused_with_their_field(kw, field) -> None:
    with pytest.raises(ConfigError) as err:
        RunSettings(**kw)
    assert err.value.field == field


def test_a_drive_header_keeps_its_keys_in_order() -> None:
    header = RunSettings(rate_hz=500.0).to_header(
        command="drive", input="script:square", pad="keyboard", pad_source="k.toml",
        target="tcp://127.0.0.1:1", target_kind="sim child, paced", target_arm="elbow6",
        duration_s=3.0)
    assert list(header) == ["command", "input", "pad", "pad_source", "rate_hz",
                            "reduced_locked", "stale_after_s", "overrun_limit",
                            "max_round_trip_s", "target", "target_kind", "target_arm",
                            "duration_s"]
    assert header["max_round_trip_s"] == 0.1        # the limit in force is recorded


def test_a_lockstep_header_records_its_state_lag_instead_of_a_round_trip() -> None:
    header = RunSettings(stale_after_s=0.05, state_lag_cycles=0).to_header(
        command="preflight", input="script:x", profile="x", pad="keyboard", pad_source="k",
        step_hz=1000.0, target="sim child, lockstep", target_kind="sim child", clock="sim")
    assert list(header) == [k for k in HEADER_ORDER if k in header]
    assert "max_round_trip_s" not in header and header["state_lag_cycles"] == 0


@pytest.mark.parametrize("settings", [
    RunSettings(), RunSettings(rate_hz=250.0, stale_after_s=0.2, max_round_trip_s=0.05,
                               overrun_limit=3, reduced_locked=True, locked_axes=("wx",)),
    RunSettings(rate_hz=1000.0, state_lag_cycles=0),
])
def test_the_header_round_trips(settings) -> None:
    back = RunSettings.from_header(settings.to_header(command="drive"))
    # (a limit left to default is recorded as the value in force: the same gate)
    assert (back.stale_after_s, back.overrun_limit, back.round_trip_limit_s, back.dt_s) == \
        (settings.stale_after_s, settings.overrun_limit, settings.round_trip_limit_s,
         settings.dt_s)
    assert (back.reduced_locked, back.locked_axes, back.state_lag_cycles) == \
        (settings.reduced_locked, settings.locked_axes, settings.state_lag_cycles)
    assert back.to_header(command="drive") == settings.to_header(command="drive")


def test_a_bad_header_is_a_log_error_naming_the_file() -> None:
    with pytest.raises(LogError, match="s.jwlog: .*rate_hz"):
        RunSettings.from_header({"pad": "keyboard"}, where="s.jwlog")
    for bad in ({"stale_after_s": "soon"}, {"overrun_limit": 1.5}, {"rate_hz": 1e6},
                {"reduced_locked": 1}, {"state_lag_cycles": 3}):
        with pytest.raises(LogError, match="s.jwlog: the header settings are malformed"):
            RunSettings.from_header({"rate_hz": 500.0, **bad}, where="s.jwlog")
