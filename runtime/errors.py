"""The one exception tree of jogwire.

    JogwireError                 anything jogwire raises on purpose
    ├── ConfigError              a config/arm/pad/profile file is wrong (file, line, field)
    ├── ProtocolError            a wire message is malformed (counted and dropped by receivers)
    ├── ModelMismatch            the target's arm does not match the runtime's model
    ├── TransportError           a socket cannot be set up as asked (e.g. remote without keys)
    └── LogError                 a session log cannot be read (what was readable is kept)

Expected outcomes (a saturated joint, a damped solve, a failed preflight) are data in
reports, never exceptions.
"""

from __future__ import annotations

from pathlib import Path


class JogwireError(Exception):
    """Base class of every error jogwire raises on purpose."""


class ConfigError(JogwireError):
    """A configuration file is wrong. The message names the file, line and field."""

    def __init__(self, message: str, *, path: str | Path | None = None,
                 line: int | None = None, field: str | None = None) -> None:
        self.path = None if path is None else str(path)
        self.line = line
        self.field = field
        where = ""
        if self.path is not None:
            where = self.path + (f":{line}" if line is not None else "")
        if field is not None:
            where = f"{where} [{field}]" if where else f"[{field}]"
        super().__init__(f"{where}: {message}" if where else message)


class ProtocolError(JogwireError):
    """A wire message failed validation. `reason` is a short machine-readable tag."""

    def __init__(self, message: str, *, reason: str = "malformed") -> None:
        self.reason = reason
        super().__init__(message)


class ModelMismatch(JogwireError):
    """The arm on the other side of the wire is not the arm in our model."""


class TransportError(JogwireError):
    """A socket could not be opened as asked."""


class LogError(JogwireError):
    """A session log could not be read (fully)."""


class DeviceError(JogwireError):
    """An input device did not give what was needed (no pad plugged in, a step timed out)."""
