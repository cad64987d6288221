"""The `jogwire` entry point: errors end in one line and exit status 2, never a traceback;
the same option names across commands, with the old spellings still accepted."""

from __future__ import annotations

import pytest

from runtime import cli
from runtime.cli import build_parser, main
from sim.bridge import build_parser as bridge_parser


@pytest.mark.parametrize("argv, path", [
    (["keys", "/proc/no-such/keys"], "/proc/no-such"),
    (["drive", "--sessions", "/proc/no-such", "--input", "script:square", "--duration", "1"],
     "/proc/no-such"),
])
def test_a_path_that_fails_is_one_line_naming_it(capsys, argv, path) -> None:
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"jogwire {argv[0]}: {path}") and err.count("\n") == 1
    assert "Traceback" not in err


def test_a_bad_setting_is_one_line_with_a_field_tag(capsys) -> None:
    assert main(["drive", "--rate", "5000", "--no-record"]) == 2
    err = capsys.readouterr().err
    assert err == "jogwire drive: [rate]: the control rate must be between 1 and 2000 Hz, " \
                  "got 5000\n"


def test_ctrl_c_is_exit_status_130(monkeypatch) -> None:
    def interrupted(_args):
        raise KeyboardInterrupt
    monkeypatch.setattr("runtime.commands.keys.run", interrupted)
    assert main(["keys", "somewhere"]) == 130


def test_os_error_text_names_both_paths_of_a_rename() -> None:
    exc = OSError(18, "Invalid cross-device link", "a.jwlog", None, "b.jwlog")
    assert cli.describe_os_error(exc) == "a.jwlog → b.jwlog: Invalid cross-device link"
    assert cli.describe_os_error(OSError("no path")) == "no path"


def test_old_option_spellings_still_work() -> None:
    parser = build_parser()
    assert parser.parse_args(["drive", "--summary-json", "s.json"]).json_file == "s.json"
    assert parser.parse_args(["drive", "--json-file", "s.json"]).json_file == "s.json"
    assert parser.parse_args(["relay", "--report", "r.json"]).json_file == "r.json"
    assert bridge_parser().parse_args(["elbow6", "--rate-hz", "250"]).rate_hz == 250.0
    assert bridge_parser().parse_args(["elbow6", "--rate", "250"]).rate_hz == 250.0
    assert bridge_parser().parse_args(["elbow6"]).rate_hz == 500.0


@pytest.mark.parametrize("command", ["drive", "preflight"])
def test_the_rate_is_spelled_rate_with_the_one_default(command) -> None:
    args = ["elbow6", "gentle"] if command == "preflight" else []
    assert build_parser().parse_args([command, *args]).rate == 500.0
