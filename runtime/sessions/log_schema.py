"""What a session log holds: the header, one record per control cycle, the end record.

The records are plain frozen dataclasses with `to_wire()` / `from_wire()` (msgpack-ready
maps); `cycle_record` builds the record of one control cycle, and `frame_to_wire` /
`frame_from_wire` carry the input frame a re-run feeds through the cycle again. The file
layout is in docs/SESSION_FORMAT.md; writing is `log_writer`, reading `log_reader`.
"""

from __future__ import annotations

import importlib.metadata
import platform
import time
import tomllib
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from types import MappingProxyType
from typing import Any, Mapping, Sequence

import msgpack
import numpy as np

from ..arm.model import Arm
from ..arm.serial import arm_from_dict, arm_to_dict, as_bool, as_float, as_str, plain_data
from ..control.cycle import CycleOutput
from ..control.intent import DirectCommand, InputFrame
from ..errors import LogError

SESSION_SUFFIX = ".jwlog"
MAGIC = b"\x8fJWLOG\r\n"          # high first byte: binary; \r\n: catches text-mode mangling
FORMAT_VERSION = 2                 # 1: one msgpack frame per cycle; 2: cycle blocks
FRAME_MARK = b"\xc1J"
MAX_PAYLOAD_BYTES = 16 * 1024 * 1024   # a longer length field is corruption, not a record

# Written as the header's protocol_version while runtime.link.protocol has no PROTOCOL_VERSION.
UNKNOWN_PROTOCOL_VERSION = None


@dataclass(frozen=True)
class CycleRecord:
    """One control cycle as the loop saw it. Units: s, m, rad; rates rad/s or m/s per joint.

    Sequences are tuples of floats. An ndarray is accepted too (it is converted when the
    writer encodes the record), but must not be modified after it is handed over.
    """

    cycle: int                          # loop cycle number, consecutive from 0
    t_s: float                          # time since the session started (header), s
    axes: tuple[float, ...]             # raw device axes as read
    buttons: tuple[bool, ...]           # raw device buttons, True = pressed
    enabled: bool                       # motion enabled this cycle
    enable_reason: str                  # the safety gate's reason for the enable state
    twist: tuple[float, ...]            # commanded twist vx vy vz wx wy wz (m/s, rad/s)
    frame: str                          # frame of `twist`: "base" or "tool"
    q: tuple[float, ...]                # measured joint positions (rad or m)
    rates: tuple[float, ...]            # joint rates sent (rad/s or m/s)
    damping: float                      # DLS damping λ used
    sigma_min: float                    # smallest singular value of the task Jacobian
    manipulability: float               # Yoshikawa w of the task Jacobian
    achieved_twist: tuple[float, ...]   # J(q)·rates in the base frame (m/s, rad/s)
    tracking_error: float               # commanded vs achieved twist, as the solver reports it
    scales: Mapping[str, float]         # each limit's scale factor (1 = not limiting)
    binding_limit: str | None           # the limit that bound this cycle, None if none
    period_s: float                     # measured time since the previous cycle started
    compute_s: float                    # time spent computing this cycle
    overrun: bool                       # the cycle missed its deadline
    reduced: bool = False               # reduced-speed mode active
    # What a re-run needs to feed the same cycle through the pipeline again:
    input: Mapping[str, Any] | None = None  # the input frame (runtime.control.cycle.frame_to_wire)
    state_age_s: float | None = None    # age of q when used (s); None: no arm state yet
    overrun_streak: int = 0             # consecutive overrunning cycles before this one
    safety_state: str = ""              # the safety gate's state name
    # With a workcell (None without one, or when the cycle did not solve): the nearest pair
    # as the solve measured it at q (runtime/control/clearance.py).
    min_clearance_m: float | None = None  # m; exact within d_i, a lower bound beyond
    clearance_arm: str | None = None      # that pair within d_i: the arm's part …
    clearance_other: str | None = None    # … and the object (or other part) it is near

    @property
    def clearance_pair(self) -> tuple[str, str] | None:
        if self.clearance_arm is None or self.clearance_other is None:
            return None
        return self.clearance_arm, self.clearance_other

    def to_wire(self) -> dict[str, Any]:
        """The msgpack map of this record (plain Python values only)."""
        return {
            "kind": "cycle",
            "cycle": int(self.cycle),
            "t_s": float(self.t_s),
            "axes": _float_list(self.axes),
            "buttons": [bool(b) for b in self.buttons],
            "enabled": bool(self.enabled),
            "enable_reason": str(self.enable_reason),
            "twist": _float_list(self.twist),
            "frame": str(self.frame),
            "q": _float_list(self.q),
            "rates": _float_list(self.rates),
            "damping": float(self.damping),
            "sigma_min": float(self.sigma_min),
            "manipulability": float(self.manipulability),
            "achieved_twist": _float_list(self.achieved_twist),
            "tracking_error": float(self.tracking_error),
            "scales": {str(k): float(v) for k, v in self.scales.items()},
            "binding_limit": None if self.binding_limit is None else str(self.binding_limit),
            "period_s": float(self.period_s),
            "compute_s": float(self.compute_s),
            "overrun": bool(self.overrun),
            "reduced": bool(self.reduced),
            "input": None if self.input is None else dict(self.input),
            "state_age_s": None if self.state_age_s is None else float(self.state_age_s),
            "overrun_streak": int(self.overrun_streak),
            "safety_state": str(self.safety_state),
            "min_clearance_m": None if self.min_clearance_m is None
            else float(self.min_clearance_m),
            "clearance_arm": None if self.clearance_arm is None else str(self.clearance_arm),
            "clearance_other": None if self.clearance_other is None
            else str(self.clearance_other),
        }

    @classmethod
    def from_wire(cls, m: Mapping[str, Any]) -> "CycleRecord":
        """Rebuild a record from its map. Unknown keys are ignored (a newer writer may add
        fields); a missing or mistyped field raises LogError naming it."""
        key = "cycle"
        try:
            if type(m[key]) is not int:
                raise TypeError(f"{m[key]!r} is not an integer")
            values: dict[str, Any] = {key: m[key]}
            for key in ("t_s", "damping", "sigma_min", "manipulability", "tracking_error",
                        "period_s", "compute_s"):
                values[key] = as_float(m[key])
            for key in ("axes", "twist", "q", "rates", "achieved_twist"):
                values[key] = _float_tuple(m[key])
            for key in ("enabled", "overrun"):
                values[key] = as_bool(m[key])
            key = "buttons"
            values[key] = _bool_tuple(m[key])
            for key in ("enable_reason", "frame"):
                values[key] = as_str(m[key])
            key = "binding_limit"
            values[key] = None if m[key] is None else as_str(m[key])
            key = "scales"
            values[key] = {as_str(k): as_float(v) for k, v in m[key].items()}
            key = "reduced"                       # optional: added fields keep a default
            values[key] = as_bool(m.get(key, False))
            key = "input"
            values[key] = m.get(key)
            if values[key] is not None and not isinstance(values[key], Mapping):
                raise TypeError(f"{values[key]!r} is not a map")
            key = "state_age_s"
            values[key] = None if m.get(key) is None else as_float(m[key])
            key = "overrun_streak"
            values[key] = int(m.get(key, 0))
            key = "safety_state"
            values[key] = as_str(m.get(key, ""))
            for key in ("min_clearance_m",):
                values[key] = None if m.get(key) is None else as_float(m[key])
            for key in ("clearance_arm", "clearance_other"):
                values[key] = None if m.get(key) is None else as_str(m[key])
        except KeyError:
            raise LogError(f"cycle record has no {key!r}") from None
        except (TypeError, ValueError, AttributeError) as exc:
            raise LogError(f"cycle record field {key!r} is malformed ({exc})") from None
        return cls(**values)


def _float_list(values: Sequence[float] | np.ndarray) -> list[float]:
    if isinstance(values, np.ndarray):
        return values.astype(float).tolist()
    return [float(v) for v in values]


def _float_tuple(values: Any) -> tuple[float, ...]:
    if not isinstance(values, list):
        raise TypeError(f"{values!r} is not a list")
    if set(map(type, values)) <= {float}:       # the common case, checked at C speed
        return tuple(values)
    return tuple(as_float(v) for v in values)


def _bool_tuple(values: Any) -> tuple[bool, ...]:
    if not isinstance(values, list):
        raise TypeError(f"{values!r} is not a list")
    if not set(map(type, values)) <= {bool}:
        raise TypeError(f"{values!r} is not a list of true/false")
    return tuple(values)


@dataclass(frozen=True)
class SessionHeader:
    """What a session was recorded with: enough to replay it with exactly that arm."""

    format_version: int
    software_version: str
    protocol_version: int | None
    arm: Arm
    settings: dict[str, Any]
    started_at: str               # wall clock, ISO 8601 with UTC offset
    started_monotonic_ns: int     # monotonic clock at t_s = 0
    environment: dict[str, str]   # python, numpy, msgpack and platform versions

    def to_wire(self) -> dict[str, Any]:
        return {
            "kind": "header",
            "format_version": self.format_version,
            "software_version": self.software_version,
            "protocol_version": self.protocol_version,
            "arm": arm_to_dict(self.arm),
            "settings": plain_data(self.settings, "settings"),
            "started_at": self.started_at,
            "started_monotonic_ns": int(self.started_monotonic_ns),
            "environment": dict(self.environment),
        }

    @classmethod
    def from_wire(cls, m: Mapping[str, Any]) -> "SessionHeader":
        try:
            protocol = m["protocol_version"]
            if protocol is not None and type(protocol) is not int:
                raise TypeError(f"protocol_version {protocol!r} is not an integer")
            return cls(format_version=int(m["format_version"]),
                       software_version=as_str(m["software_version"]),
                       protocol_version=protocol,
                       arm=arm_from_dict(m["arm"]),
                       settings=dict(m["settings"]),
                       started_at=as_str(m["started_at"]),
                       started_monotonic_ns=int(m["started_monotonic_ns"]),
                       environment=dict(m.get("environment", {})))
        except KeyError as exc:
            raise LogError(f"header has no {exc.args[0]!r}") from None
        except (TypeError, ValueError) as exc:
            raise LogError(f"header is malformed ({exc})") from None


@dataclass(frozen=True)
class SessionEnd:
    """The closing record: what the writer took, wrote and had to refuse."""

    ended_at: str
    handed: int          # records record() accepted
    written: int         # records written to the file
    dropped: int         # records refused because the queue was full
    unencodable: int     # records the writer could not encode (skipped)

    def to_wire(self) -> dict[str, Any]:
        return {"kind": "end", "ended_at": self.ended_at, "handed": self.handed,
                "written": self.written, "dropped": self.dropped,
                "unencodable": self.unencodable}

    @classmethod
    def from_wire(cls, m: Mapping[str, Any]) -> "SessionEnd":
        try:
            return cls(ended_at=as_str(m["ended_at"]), handed=int(m["handed"]),
                       written=int(m["written"]), dropped=int(m["dropped"]),
                       unencodable=int(m.get("unencodable", 0)))
        except KeyError as exc:
            raise LogError(f"end record has no {exc.args[0]!r}") from None
        except (TypeError, ValueError) as exc:
            raise LogError(f"end record is malformed ({exc})") from None


def make_header(arm: Arm, settings: Mapping[str, Any], *, started_at: datetime | None = None,
                started_monotonic_ns: int | None = None,
                format_version: int = FORMAT_VERSION) -> SessionHeader:
    """The header of a session starting now (or at the times given)."""
    when = started_at if started_at is not None else datetime.now().astimezone()
    return SessionHeader(
        format_version=format_version,
        software_version=software_version(),
        protocol_version=protocol_version(),
        arm=arm,
        settings=plain_data(dict(settings), "settings"),
        started_at=when.isoformat(timespec="microseconds"),
        started_monotonic_ns=(time.monotonic_ns() if started_monotonic_ns is None
                              else int(started_monotonic_ns)),
        environment={"python": platform.python_version(), "numpy": np.__version__,
                     "msgpack": ".".join(map(str, msgpack.version)),
                     "platform": platform.platform()},
    )


def software_version() -> str:
    """jogwire's installed version; in an uninstalled checkout, pyproject's version."""
    try:
        return importlib.metadata.version("jogwire")
    except importlib.metadata.PackageNotFoundError:
        pass
    try:
        pyproject = Path(__file__).resolve().parents[2] / "pyproject.toml"
        return str(tomllib.loads(pyproject.read_text(encoding="utf-8"))["project"]["version"])
    except (OSError, KeyError, tomllib.TOMLDecodeError):
        return "unknown"


def protocol_version() -> int | None:
    """The wire protocol version of this software (UNKNOWN_PROTOCOL_VERSION without one)."""
    try:
        from ..link.protocol import PROTOCOL_VERSION
    except ImportError:
        return UNKNOWN_PROTOCOL_VERSION
    return PROTOCOL_VERSION


_BUTTONS_LOGGED = 16  # pad buttons 0…15 as flags; `input` keeps every key by name
_NO_BUTTONS = (False,) * _BUTTONS_LOGGED


def _plain_floats(values: Sequence[float] | np.ndarray | None) -> tuple[float, ...]:
    """Python floats (an ndarray converted in one call); () for None."""
    if values is None:
        return ()
    if isinstance(values, np.ndarray):
        return tuple(values.astype(float, copy=False).tolist())
    return tuple(map(float, values))


def cycle_record(cycle: int, t_s: float, frame: InputFrame, out: CycleOutput,
                 q: Sequence[float] | None, *, state_age_s: float | None, overrun_streak: int,
                 period_s: float, compute_s: float, overrun: bool) -> CycleRecord:
    """The log record of one `ControlCycle.step` (drive, preflight and re-runs share it)."""
    return record_of_row(cycle_row(cycle, t_s, frame, out, q, state_age_s=state_age_s,
                                   overrun_streak=overrun_streak, period_s=period_s,
                                   compute_s=compute_s, overrun=overrun))


CycleRow = tuple[Any, ...]
"""The values of one cycle's record in field order, as the loop has them: float rows
(axes, twist, q, rates, achieved_twist) still arrays or sequences, `scales` the solver's own
map. `record_of_row` makes the record; `CycleBlock.from_rows` gathers many at once."""


def cycle_row(cycle: int, t_s: float, frame: InputFrame, out: CycleOutput,
              q: Sequence[float] | None, *, state_age_s: float | None, overrun_streak: int,
              period_s: float, compute_s: float, overrun: bool) -> CycleRow:
    """What `cycle_record` records of one cycle, before the float rows become tuples."""
    sol, intent, verdict = out.solution, out.intent, out.verdict
    buttons = frame.button_flags(_BUTTONS_LOGGED) if frame.pressed else _NO_BUTTONS
    head = (cycle, t_s, frame.axes, buttons, verdict.allowed, verdict.reason, intent.twist,
            intent.frame, () if q is None else q, out.rates)
    tail = (period_s, compute_s, overrun, intent.reduced, frame_to_wire(frame), state_age_s,
            overrun_streak, verdict.state)
    if sol is None:
        return head + _UNSOLVED + tail + (None, None, None)
    clearance = sol.clearance                 # with a workcell only
    pair = None if clearance is None else clearance.nearest_pair
    return head + (sol.damping, sol.sigma_min, sol.manipulability, sol.achieved_twist,
                   sol.tracking_error, sol.scales, sol.binding_limit) + tail + (
        None if clearance is None else clearance.min_distance_m,
        None if pair is None else pair[0], None if pair is None else pair[1])


def record_of_row(row: CycleRow) -> CycleRecord:
    """The record of a `cycle_row`: float rows as tuples of floats, `scales` a copy."""
    values = list(row)
    values[_AXES] = tuple(values[_AXES])
    for i in _FLOAT_ROWS:
        values[i] = _plain_floats(values[i])
    values[_SCALES] = dict(values[_SCALES])
    return CycleRecord(*values)


def _frozen_zeros(n: int) -> np.ndarray:
    out = np.zeros(n)
    out.flags.writeable = False         # shared by every unsolved row
    return out


# damping, sigma_min, manipulability, achieved_twist, tracking_error, scales, binding_limit
_UNSOLVED: CycleRow = (0.0, float("nan"), float("nan"), _frozen_zeros(6), 0.0,
                       MappingProxyType({}), None)
_FIELD_INDEX = {name: i for i, name in enumerate(CycleRecord.__dataclass_fields__)}
# Made tuples of floats for a record (axes stay as the device gave them)
_FLOAT_ROWS = tuple(_FIELD_INDEX[name] for name in ("twist", "q", "rates", "achieved_twist"))
_AXES, _SCALES = _FIELD_INDEX["axes"], _FIELD_INDEX["scales"]


def frame_to_wire(frame: InputFrame) -> dict[str, Any]:
    """An InputFrame as msgpack-ready values; `frame_from_wire` gives it back exactly."""
    c = frame.command
    return {
        "device": frame.device,
        "present": frame.present,
        "axes": [float(a) for a in frame.axes],
        "pressed": sorted(frame.pressed, key=lambda b: (isinstance(b, str), str(b))),
        "command": None if c is None else {
            "twist": [float(v) for v in c.twist], "frame": c.frame, "enable": c.enable,
            "reduced": c.reduced, "joint": c.joint, "joint_rate": float(c.joint_rate),
            "stop": c.stop, "reset": c.reset},
    }


def frame_from_wire(m: dict[str, Any]) -> InputFrame:
    c = m.get("command")
    command = None if c is None else DirectCommand(
        twist=tuple(float(v) for v in c["twist"]), frame=str(c["frame"]),
        enable=bool(c["enable"]), reduced=bool(c["reduced"]),
        joint=None if c["joint"] is None else int(c["joint"]),
        joint_rate=float(c["joint_rate"]), stop=bool(c["stop"]), reset=bool(c["reset"]))
    return InputFrame(device=str(m["device"]), present=bool(m["present"]),
                      axes=tuple(float(a) for a in m["axes"]),
                      pressed=frozenset(m["pressed"]), command=command)
