"""The fault suite's marker; `python -m pytest -m faults` runs just these."""

from __future__ import annotations


def pytest_configure(config) -> None:
    config.addinivalue_line("markers", "faults: fault injection through the relay, separate "
                                       "processes on 127.0.0.1 (docs/FAULTS.md)")
