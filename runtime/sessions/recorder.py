"""Session log: every control cycle written to a crash-tolerant file, and the reader for it.

A session file (extension `.jwlog`, layout in docs/SESSION_FORMAT.md) is

    preamble   MAGIC (8 bytes) · format version (uint16, little-endian)
    frame*     FRAME_MARK (2 bytes) · payload length (uint32 LE) · CRC-32 (uint32 LE) · payload

Every payload is one msgpack map with a "kind": first the "header" (versions, the full arm
model, the settings, the start time), then one "cycle" per control cycle, and last an "end"
written by a clean `close()`.

Why frames and not plain concatenated msgpack: a torn tail is detectable either way, but
a damaged byte in the middle of a plain stream either decodes into a silently wrong value
or desynchronises everything after it. The CRC catches the damage; the length and the
marker let the reader skip the damaged frame, find the next good one and keep going.
0xC1 (the marker's first byte) is the one byte msgpack never emits as a type byte.

Writing: the control loop calls `SessionRecorder.record(rec)`, which only appends to a
bounded queue and never blocks. A background thread wakes every `flush_interval_s`, encodes
what is queued and writes it with unbuffered writes, so after a crash or kill -9 the file
holds everything up to at most one flush interval before the end. Disk errors stop the
recorder (`failed` says why) and never reach the loop.
"""

from __future__ import annotations

import collections
import errno
import importlib.metadata
import math
import os
import platform
import re
import struct
import threading
import time
import tomllib
import zlib
from dataclasses import MISSING, dataclass, fields, is_dataclass
from datetime import datetime
from pathlib import Path
from typing import Any, BinaryIO, Callable, Iterator, Mapping, Sequence

import msgpack
import numpy as np

from ..errors import LogError
from ..control.mapping import InputFrame
from ..arm.model import JOINT_KINDS, Arm, Joint, SolverSettings
from ..control.cycle import CycleOutput, frame_to_wire

SESSION_SUFFIX = ".jwlog"
MAGIC = b"\x8fJWLOG\r\n"          # high first byte: binary; \r\n: catches text-mode mangling
FORMAT_VERSION = 1
FRAME_MARK = b"\xc1J"
MAX_PAYLOAD_BYTES = 16 * 1024 * 1024   # a longer length field is corruption, not a record

# Written as the header's protocol_version while runtime.link.protocol has no PROTOCOL_VERSION.
UNKNOWN_PROTOCOL_VERSION = None

_PREAMBLE = struct.Struct("<8sH")
_FRAME_HEAD = struct.Struct("<2sII")
_LENGTH = struct.Struct("<I")
_CHUNK_RECORDS = 8         # records per write; the write releases the GIL, so the loop
                           # never waits on the writer's Python work for more than a chunk
_SCAN_WINDOW = 1 << 16     # bytes read at a time when looking for the next good frame
_READ_BLOCK = 1 << 18      # the reader's buffer

# Problem kinds reported by the reader.
TORN_TAIL = "torn_tail"        # the file ends inside a frame (crash or kill mid-write)
CORRUPT = "corrupt"            # bytes that are not a valid frame; reading resumed after them
BAD_RECORD = "bad_record"      # a valid frame whose content is not a readable record
UNKNOWN_KIND = "unknown_kind"  # a record kind this version does not know (skipped)
GAP = "gap"                    # cycle numbers not consecutive: records missing
DROPPED = "dropped"            # the writer reported records it could not take
UNCLOSED = "unclosed"          # no end record: the session did not close cleanly


# ----------------------------------------------------------------------------------------
# Records
# ----------------------------------------------------------------------------------------

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
    # With a workcell (None without one): the nearest pair at the measured pose q.
    min_clearance_m: float | None = None  # its distance, m (negative: overlapping)
    clearance_pair: tuple[str, str] | None = None  # (part of the arm, object or part)

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
            "clearance_pair": None if self.clearance_pair is None
            else [str(v) for v in self.clearance_pair],
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
                values[key] = _as_float(m[key])
            for key in ("axes", "twist", "q", "rates", "achieved_twist"):
                values[key] = _float_tuple(m[key])
            for key in ("enabled", "overrun"):
                values[key] = _as_bool(m[key])
            key = "buttons"
            values[key] = _bool_tuple(m[key])
            for key in ("enable_reason", "frame"):
                values[key] = _as_str(m[key])
            key = "binding_limit"
            values[key] = None if m[key] is None else _as_str(m[key])
            key = "scales"
            values[key] = {_as_str(k): _as_float(v) for k, v in m[key].items()}
            key = "reduced"                       # optional: added fields keep a default
            values[key] = _as_bool(m.get(key, False))
            key = "input"
            values[key] = m.get(key)
            if values[key] is not None and not isinstance(values[key], Mapping):
                raise TypeError(f"{values[key]!r} is not a map")
            key = "state_age_s"
            values[key] = None if m.get(key) is None else _as_float(m[key])
            key = "overrun_streak"
            values[key] = int(m.get(key, 0))
            key = "safety_state"
            values[key] = _as_str(m.get(key, ""))
            key = "min_clearance_m"
            values[key] = None if m.get(key) is None else _as_float(m[key])
            key = "clearance_pair"
            pair = m.get(key)
            if pair is not None and not (isinstance(pair, list) and len(pair) == 2):
                raise TypeError(f"{pair!r} is not a pair of names")
            values[key] = None if pair is None else (_as_str(pair[0]), _as_str(pair[1]))
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
    return tuple(_as_float(v) for v in values)


def _bool_tuple(values: Any) -> tuple[bool, ...]:
    if not isinstance(values, list):
        raise TypeError(f"{values!r} is not a list")
    if not set(map(type, values)) <= {bool}:
        raise TypeError(f"{values!r} is not a list of true/false")
    return tuple(values)


def _as_float(value: Any) -> float:
    if type(value) is float:
        return value
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise TypeError(f"{value!r} is not a number")
    return float(value)


def _as_bool(value: Any) -> bool:
    if not isinstance(value, bool):
        raise TypeError(f"{value!r} is not true/false")
    return value


def _as_str(value: Any) -> str:
    if not isinstance(value, str):
        raise TypeError(f"{value!r} is not a string")
    return value


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
            "settings": _plain(self.settings, "settings"),
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
                       software_version=_as_str(m["software_version"]),
                       protocol_version=protocol,
                       arm=arm_from_dict(m["arm"]),
                       settings=dict(m["settings"]),
                       started_at=_as_str(m["started_at"]),
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
            return cls(ended_at=_as_str(m["ended_at"]), handed=int(m["handed"]),
                       written=int(m["written"]), dropped=int(m["dropped"]),
                       unencodable=int(m.get("unencodable", 0)))
        except KeyError as exc:
            raise LogError(f"end record has no {exc.args[0]!r}") from None
        except (TypeError, ValueError) as exc:
            raise LogError(f"end record is malformed ({exc})") from None


def make_header(arm: Arm, settings: Mapping[str, Any], *, started_at: datetime | None = None,
                started_monotonic_ns: int | None = None) -> SessionHeader:
    """The header of a session starting now (or at the times given)."""
    when = started_at if started_at is not None else datetime.now().astimezone()
    return SessionHeader(
        format_version=FORMAT_VERSION,
        software_version=software_version(),
        protocol_version=protocol_version(),
        arm=arm,
        settings=_plain(dict(settings), "settings"),
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


# ----------------------------------------------------------------------------------------
# The arm model as plain data
# ----------------------------------------------------------------------------------------

def arm_to_dict(arm: Arm) -> dict[str, Any]:
    """Every field of the arm (joints with origins, base, flange, tool, task axes, TCP caps,
    solver settings, home) as msgpack/JSON-ready values; 4×4 matrices as nested lists."""
    return _plain(arm, "arm")


def arm_from_dict(data: Mapping[str, Any]) -> Arm:
    """The Arm that `arm_to_dict` wrote, field for field. Raises LogError naming a missing
    or malformed field; keys this version does not know are ignored."""
    if not isinstance(data, Mapping):
        raise LogError("arm: not a map")
    raw_joints = data.get("joints")
    if not isinstance(raw_joints, list) or not raw_joints:
        raise LogError("arm.joints: missing or empty")
    joints = []
    for i, raw in enumerate(raw_joints):
        values = _restore_fields(Joint, raw, f"arm.joints[{i}]")
        if values["kind"] not in JOINT_KINDS:
            raise LogError(f"arm.joints[{i}].kind: unknown joint kind {values['kind']!r}")
        joints.append(Joint(**values))
    solver = SolverSettings(**_restore_fields(SolverSettings, data.get("solver", {}),
                                              "arm.solver"))
    values = _restore_fields(Arm, data, "arm", skip=("joints", "solver"))
    return Arm(joints=tuple(joints), solver=solver, **values)


def _plain(value: Any, where: str) -> Any:
    """`value` as msgpack-ready data: dataclasses → maps, arrays and tuples → lists."""
    if value is None or isinstance(value, (bool, int, float, str, bytes)):
        return value
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    if is_dataclass(value) and not isinstance(value, type):
        return {f.name: _plain(getattr(value, f.name), f"{where}.{f.name}")
                for f in fields(value)}
    if isinstance(value, Mapping):
        return {str(k): _plain(v, f"{where}.{k}") for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v, f"{where}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"{where}: cannot record a value of type {type(value).__name__}")


def _restore_fields(cls: type, data: Any, where: str, skip: Sequence[str] = ()
                    ) -> dict[str, Any]:
    """Constructor arguments of dataclass `cls` from a map, typed by the field annotations."""
    if not isinstance(data, Mapping):
        raise LogError(f"{where}: not a map")
    out: dict[str, Any] = {}
    for f in fields(cls):
        if f.name in skip:
            continue
        if f.name not in data:
            if f.default is MISSING and f.default_factory is MISSING:
                raise LogError(f"{where}.{f.name}: missing")
            continue
        out[f.name] = _coerce(str(f.type), data[f.name], f"{where}.{f.name}")
    return out


def _coerce(annotation: str, value: Any, where: str) -> Any:
    """Check and convert one value by its (string) annotation: float, str, bool, Mat4,
    tuple[X, ...], each optionally `| None`."""
    kind = annotation.strip()
    if kind.endswith("| None"):
        if value is None:
            return None
        kind = kind[: -len("| None")].strip()
    try:
        if kind == "float":
            return _as_float(value)
        if kind == "str":
            return _as_str(value)
        if kind == "bool":
            return _as_bool(value)
        if kind == "Mat4":
            m = np.array(value, dtype=float)
            if m.shape != (4, 4):
                raise ValueError(f"shape {m.shape}, expected (4, 4)")
            return m
        if kind.startswith("tuple["):
            if not isinstance(value, list):
                raise TypeError(f"{value!r} is not a list")
            inner = kind[len("tuple["):].split(",")[0].strip()
            return tuple(_coerce(inner, v, f"{where}[{i}]") for i, v in enumerate(value))
    except (TypeError, ValueError) as exc:
        raise LogError(f"{where}: {exc}") from None
    return value


# ----------------------------------------------------------------------------------------
# Frames
# ----------------------------------------------------------------------------------------

def encode_preamble(version: int = FORMAT_VERSION) -> bytes:
    return _PREAMBLE.pack(MAGIC, version)


def encode_frame(record: Mapping[str, Any]) -> bytes:
    """One framed record: marker, length, CRC-32 over length and payload, msgpack payload."""
    payload = msgpack.packb(record, use_bin_type=True)
    length = _LENGTH.pack(len(payload))
    crc = zlib.crc32(payload, zlib.crc32(length))
    return FRAME_MARK + length + _LENGTH.pack(crc) + payload


def _write_all(file: BinaryIO, data: bytes) -> None:
    """Write every byte (an unbuffered file may take less than offered per call). On
    failure the OSError carries `bytes_written`, what the file took before it failed."""
    view = memoryview(data)
    done = 0
    try:
        while done < len(data):
            n = file.write(view[done:])
            if not n:
                raise OSError(errno.EIO, "the file took no bytes")
            done += n
    except OSError as exc:
        exc.bytes_written = done  # type: ignore[attr-defined]
        raise


# ----------------------------------------------------------------------------------------
# Writing
# ----------------------------------------------------------------------------------------

Opener = Callable[[Path], BinaryIO]


def open_new_file(path: Path) -> BinaryIO:
    """Create `path` for writing, unbuffered; never overwrite an existing session."""
    return open(path, "xb", buffering=0)


def new_session_path(folder: str | Path, arm_name: str, when: datetime | None = None) -> Path:
    """A free file name in `folder` (created if needed): `YYYYmmdd-HHMMSS-<arm>.jwlog`."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    when = when if when is not None else datetime.now()
    stem = f"{when:%Y%m%d-%H%M%S}-{re.sub(r'[^A-Za-z0-9_.-]+', '_', arm_name) or 'arm'}"
    path = folder / f"{stem}{SESSION_SUFFIX}"
    n = 2
    while path.exists():
        path = folder / f"{stem}-{n}{SESSION_SUFFIX}"
        n += 1
    return path


@dataclass(frozen=True)
class RecorderStats:
    """Counts of a recorder so far; `failed` is why it stopped, None while healthy."""

    handed: int          # records record() accepted
    written: int         # records written to the file
    dropped: int         # refused because the queue was full (the disk could not keep up)
    lost: int            # accepted or offered after a failure and never written
    unencodable: int     # records that could not be encoded (a caller bug), skipped
    bytes_written: int
    queue_peak: int      # most records waiting at one flush
    failed: str | None


class SessionRecorder:
    """Writes one session file from a background thread. Start it with `start()`.

    `record()` is the only call made from the control loop: it appends to a bounded queue
    and returns at once. The writer thread wakes every `flush_interval_s`, encodes and
    writes all queued records and, with `fsync=True`, asks the OS to put them on the disk.

    With `encode_in_caller=True`, `record()` encodes the record itself (~20 µs) and the
    thread only writes bytes. For a caller with time to spare between cycles (a lockstep
    run encodes while the simulated arm steps) that is cheaper than the thread's encoding,
    which holds the interpreter lock in bursts the caller then waits out.

    fsync is off by default: the worst cases it guards against are power loss and a kernel
    crash, since after a process crash or kill -9 everything written is already in the OS's
    cache and reaches the disk anyway. Turn it on where the host may lose power; it costs
    an I/O round trip per flush in the writer thread, never in the loop.
    """

    def __init__(self, file: BinaryIO, path: Path, *, flush_interval_s: float,
                 queue_size: int, fsync: bool, bytes_written: int,
                 encode_in_caller: bool = False) -> None:
        self.path = path
        self.flush_interval_s = flush_interval_s
        self._file = file
        self._fsync = fsync
        self._capacity = queue_size
        self._encode_in_caller = encode_in_caller
        self._queue: collections.deque[CycleRecord | bytes] = collections.deque()
        self._stop = threading.Event()
        self._closed = False
        self._failed: str | None = None
        # Each counter has one writing thread. Caller side:
        self._handed = 0
        self._dropped = 0
        self._refused = 0
        self._unencodable_here = 0
        # Writer side:
        self._written = 0
        self._lost_in_writer = 0
        self._unencodable = 0
        self._bytes = bytes_written
        self._queue_peak = 0
        self._thread = threading.Thread(target=self._run, name="jogwire-recorder", daemon=True)

    @classmethod
    def start(cls, path: str | Path, arm: Arm, settings: Mapping[str, Any], *,
              flush_interval_s: float = 0.2, queue_size: int = 4096, fsync: bool = False,
              opener: Opener = open_new_file, started_at: datetime | None = None,
              started_monotonic_ns: int | None = None,
              encode_in_caller: bool = False) -> "SessionRecorder":
        """Create the file, write the preamble and header (synchronously, before any cycle)
        and start the writer thread. A file that cannot be created raises LogError."""
        if not flush_interval_s > 0:
            raise ValueError(f"flush_interval_s must be positive, got {flush_interval_s}")
        if queue_size < 1:
            raise ValueError(f"queue_size must be at least 1, got {queue_size}")
        path = Path(path)
        header = make_header(arm, settings, started_at=started_at,
                             started_monotonic_ns=started_monotonic_ns)
        data = encode_preamble() + encode_frame(header.to_wire())
        file = None
        try:
            file = opener(path)
            _write_all(file, data)
            file.flush()
            if fsync:
                os.fsync(file.fileno())
        except OSError as exc:
            if file is not None:
                _close_quietly(file)
            raise LogError(f"cannot write session log {path}: {exc.strerror or exc}") from None
        recorder = cls(file, path, flush_interval_s=flush_interval_s, queue_size=queue_size,
                       fsync=fsync, bytes_written=len(data), encode_in_caller=encode_in_caller)
        recorder._thread.start()
        return recorder

    # -- the loop's side --------------------------------------------------------------

    def record(self, rec: CycleRecord) -> bool:
        """Hand one cycle to the writer. Never blocks and never raises for disk trouble:
        returns False (and counts it) when the record was not taken."""
        if self._failed is not None or self._closed:
            self._refused += 1
            return False
        if len(self._queue) >= self._capacity:
            self._dropped += 1
            return False
        if self._encode_in_caller:
            try:
                item: CycleRecord | bytes = encode_frame(rec.to_wire())
            except Exception:  # noqa: BLE001 - one bad record must not stop the session
                self._unencodable_here += 1
                return False
        else:
            item = rec
        self._queue.append(item)
        self._handed += 1
        return True

    @property
    def failed(self) -> str | None:
        """Why recording stopped (e.g. the disk is full), None while it works."""
        return self._failed

    def stats(self) -> RecorderStats:
        return RecorderStats(handed=self._handed, written=self._written,
                             dropped=self._dropped, lost=self._refused + self._lost_in_writer,
                             unencodable=self._unencodable + self._unencodable_here,
                             bytes_written=self._bytes,
                             queue_peak=self._queue_peak, failed=self._failed)

    def close(self, timeout_s: float = 5.0) -> RecorderStats:
        """Write what is queued and the end record, close the file, return the counts.
        Waits at most `timeout_s` for the writer (a stalled disk must not hang the exit)."""
        if not self._closed:
            self._closed = True
            self._stop.set()
        self._thread.join(timeout_s)
        if self._thread.is_alive() and self._failed is None:
            self._failed = f"the writer did not finish within {timeout_s:g} s (disk stalled?)"
        if not self._thread.is_alive():
            self._lost_in_writer += len(self._queue)   # handed just as the writer failed
            self._queue.clear()
        return self.stats()

    def __enter__(self) -> "SessionRecorder":
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    # -- the writer thread ------------------------------------------------------------

    def _run(self) -> None:
        interval = self.flush_interval_s
        next_flush = time.monotonic() + interval
        try:
            while self._failed is None:
                stopping = self._stop.wait(max(0.0, next_flush - time.monotonic()))
                next_flush = max(next_flush + interval, time.monotonic())
                self._write_pending()
                if stopping:
                    if self._failed is None:
                        self._write_end()
                    break
        except Exception as exc:  # noqa: BLE001 - a writer bug must never reach the loop
            self._fail(f"the session writer stopped: {exc!r}")
        finally:
            _close_quietly(self._file)

    def _write_pending(self) -> None:
        queue = self._queue
        self._queue_peak = max(self._queue_peak, len(queue))
        while queue and self._failed is None:
            frames = []
            for _ in range(min(len(queue), _CHUNK_RECORDS)):
                item = queue.popleft()
                if isinstance(item, bytes):       # encoded by the caller
                    frames.append(item)
                    continue
                try:
                    frames.append(encode_frame(item.to_wire()))
                except Exception:  # noqa: BLE001 - one bad record must not stop the session
                    self._unencodable += 1
            data = b"".join(frames)
            try:
                _write_all(self._file, data)
            except OSError as exc:
                whole = _complete_frames(frames, getattr(exc, "bytes_written", 0))
                self._written += whole
                self._bytes += getattr(exc, "bytes_written", 0)
                self._fail(self._os_reason(exc), unwritten=len(frames) - whole)
                return
            self._written += len(frames)
            self._bytes += len(data)
        try:
            self._file.flush()
            if self._fsync:
                os.fsync(self._file.fileno())
        except OSError as exc:
            self._fail(self._os_reason(exc))

    def _write_end(self) -> None:
        end = SessionEnd(ended_at=datetime.now().astimezone().isoformat(timespec="microseconds"),
                         handed=self._handed, written=self._written, dropped=self._dropped,
                         unencodable=self._unencodable + self._unencodable_here)
        data = encode_frame(end.to_wire())
        try:
            _write_all(self._file, data)
            self._file.flush()
        except OSError as exc:
            self._fail(self._os_reason(exc))
            return
        self._bytes += len(data)
        try:
            fd = self._file.fileno()
        except (OSError, ValueError, AttributeError):
            return                          # not an OS file (an injected one): nothing to sync
        try:
            os.fsync(fd)                    # once per session: a clean close is durable
        except OSError as exc:
            if exc.errno != errno.EINVAL:   # EINVAL: a file that cannot be synced (a pipe)
                self._fail(self._os_reason(exc))

    def _fail(self, reason: str, unwritten: int = 0) -> None:
        self._lost_in_writer += unwritten + len(self._queue)
        self._queue.clear()
        self._failed = reason

    def _os_reason(self, exc: OSError) -> str:
        what = exc.strerror or str(exc)
        return f"writing {self.path} failed: {what}; recording stopped"


def _complete_frames(frames: list[bytes], n_bytes: int) -> int:
    """How many of `frames`, written back to back, fit whole in the first n_bytes."""
    whole, end = 0, 0
    for frame in frames:
        end += len(frame)
        if end > n_bytes:
            break
        whole += 1
    return whole


def _close_quietly(file: BinaryIO) -> None:
    try:
        file.close()
    except OSError:
        pass


# ----------------------------------------------------------------------------------------
# Reading
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Problem:
    """Something wrong in a session file, where it starts (byte offset) and what was done."""

    kind: str
    offset: int
    message: str

    def __str__(self) -> str:
        return f"{self.kind} at byte {self.offset}: {self.message}"


@dataclass(frozen=True)
class Session:
    """A whole session file in memory. For long sessions iterate a SessionReader instead."""

    path: Path
    header: SessionHeader
    records: tuple[CycleRecord, ...]
    end: SessionEnd | None
    problems: tuple[Problem, ...]

    @property
    def closed_cleanly(self) -> bool:
        return self.end is not None


def read_session(path: str | Path) -> Session:
    """Read everything readable. Problems (torn tail, corruption, gaps) are listed in
    `problems` with byte offsets; an unreadable preamble or header raises LogError."""
    with SessionReader(path) as reader:
        records = tuple(reader)
        return Session(path=reader.path, header=reader.header, records=records,
                       end=reader.end, problems=tuple(reader.problems))


class SessionReader:
    """Streams a session file: `header` at once, cycle records by iterating (once).

    `problems` and `end` are complete when the iteration has finished.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        try:
            self._file: BinaryIO = open(self.path, "rb")
        except OSError as exc:
            raise LogError(f"cannot open session log {self.path}: {exc.strerror or exc}"
                           ) from None
        self._buf = b""
        self._buf_start = 0
        try:
            self._size = os.fstat(self._file.fileno()).st_size
            self.problems: list[Problem] = []
            self.end: SessionEnd | None = None
            self.header, self._body = self._read_header()
        except BaseException:
            self._file.close()
            raise
        self._iterated = False

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> "SessionReader":
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def _read_header(self) -> tuple[SessionHeader, int]:
        where = str(self.path)
        head = self._read_at(0, _PREAMBLE.size)
        if len(head) < len(MAGIC):
            if head and MAGIC.startswith(head):
                raise LogError(f"{where}: truncated: the file ends inside the preamble "
                               f"({len(head)} bytes)")
            raise LogError(f"{where}: not a jogwire session log "
                           f"({'empty file' if not head else f'only {len(head)} bytes'})")
        if head[:len(MAGIC)] != MAGIC:
            raise LogError(f"{where}: not a jogwire session log (it starts with "
                           f"{head[:len(MAGIC)]!r}, a session log with {MAGIC!r})")
        if len(head) < _PREAMBLE.size:
            raise LogError(f"{where}: truncated: the file ends inside the preamble")
        _, version = _PREAMBLE.unpack(head)
        if version > FORMAT_VERSION:
            raise LogError(f"{where}: written in session format {version}, newer than this "
                           f"jogwire reads (up to {FORMAT_VERSION}); upgrade jogwire to read it")
        if version < 1:
            raise LogError(f"{where}: invalid session format version {version}")
        got = self._frame_at(_PREAMBLE.size)
        if isinstance(got, str):
            if got == "short":
                raise LogError(f"{where}: truncated header: the file ends at byte {self._size}, "
                               f"inside the header record")
            raise LogError(f"{where}: the header record is corrupt ({got})")
        payload, body = got
        m = _unpack(payload)
        if not isinstance(m, dict) or m.get("kind") != "header":
            raise LogError(f"{where}: the first record is not a session header")
        try:
            header = SessionHeader.from_wire(m)
        except LogError as exc:
            raise LogError(f"{where}: {exc}") from None
        if header.format_version != version:
            raise LogError(f"{where}: the header says format {header.format_version}, the "
                           f"preamble {version}")
        return header, body

    def __iter__(self) -> Iterator[CycleRecord]:
        if self._iterated:
            raise RuntimeError("a SessionReader iterates once; open a new one")
        self._iterated = True
        n = self.header.arm.n
        previous: int | None = None
        for offset, payload in self._frames():
            m = _unpack(payload)
            kind = m.get("kind") if isinstance(m, dict) else None
            if kind == "cycle":
                try:
                    rec = CycleRecord.from_wire(m)
                    _check_lengths(rec, n)
                except LogError as exc:
                    self._problem(BAD_RECORD, offset, f"{exc}; skipped")
                    continue
                if previous is not None and rec.cycle != previous + 1:
                    self._gap(offset, previous, rec.cycle)
                previous = rec.cycle
                yield rec
            elif kind == "end":
                try:
                    self.end = SessionEnd.from_wire(m)
                except LogError as exc:
                    self._problem(BAD_RECORD, offset, str(exc))
            elif m is None:
                self._problem(BAD_RECORD, offset, "the payload is not msgpack; skipped")
            elif isinstance(kind, str) and kind != "header":
                self._problem(UNKNOWN_KIND, offset,
                              f"record kind {kind!r} is unknown to this version; skipped")
            else:
                self._problem(BAD_RECORD, offset, "not a cycle or end record; skipped")
        if self.end is None:
            self._problem(UNCLOSED, self._size, "no end record: the session did not close "
                          "cleanly (crash, kill or power loss); everything before is kept")
        elif self.end.dropped or self.end.unencodable:
            self._problem(DROPPED, self._size,
                          f"the writer refused {self.end.dropped} records (queue full) and "
                          f"could not encode {self.end.unencodable}")

    def _frames(self) -> Iterator[tuple[int, bytes]]:
        """(offset, payload) of every good frame after the header; damage is reported and
        skipped by resynchronising on the next good frame."""
        offset = self._body
        while offset < self._size:
            got = self._frame_at(offset)
            if not isinstance(got, str):
                payload, after = got
                yield offset, payload
                offset = after
                continue
            resume = self._next_good_frame(offset + 1)
            if resume is None:
                if got == "short":
                    self._problem(TORN_TAIL, offset,
                                  f"the last {self._size - offset} bytes are an incomplete "
                                  f"record (the writer was stopped mid-write); dropped")
                else:
                    self._problem(CORRUPT, offset,
                                  f"the last {self._size - offset} bytes are unreadable "
                                  f"({got}); dropped")
                return
            self._problem(CORRUPT, offset, f"{resume - offset} bytes unreadable ({got}); "
                          f"reading resumed at byte {resume}")
            offset = resume

    def _frame_at(self, offset: int) -> tuple[bytes, int] | str:
        """The payload of the frame at `offset` and the offset after it, or why there is
        no good frame there ("short" when the file ends inside it)."""
        head = self._read_at(offset, _FRAME_HEAD.size)
        if len(head) < _FRAME_HEAD.size:
            return "short" if FRAME_MARK.startswith(head[:2]) else "no record marker"
        mark, length, crc = _FRAME_HEAD.unpack(head)
        if mark != FRAME_MARK:
            return "no record marker"
        if not 0 < length <= MAX_PAYLOAD_BYTES:
            return f"implausible record length {length}"
        payload = self._read_at(offset + _FRAME_HEAD.size, length)
        if len(payload) < length:
            return "short"
        if zlib.crc32(payload, zlib.crc32(head[2:6])) != crc:
            return "CRC mismatch"
        return payload, offset + _FRAME_HEAD.size + length

    def _next_good_frame(self, start: int) -> int | None:
        pos = start
        while pos < self._size:
            window = self._read_at(pos, _SCAN_WINDOW)
            i = window.find(FRAME_MARK)
            while i >= 0:
                if not isinstance(self._frame_at(pos + i), str):
                    return pos + i
                i = window.find(FRAME_MARK, i + 1)
            if len(window) < _SCAN_WINDOW:
                return None
            pos += len(window) - (len(FRAME_MARK) - 1)
        return None

    def _read_at(self, offset: int, n: int) -> bytes:
        """n bytes from `offset` (fewer at the end of the file), through a block buffer:
        frames are small and read in order, so most reads are a slice of it."""
        start = offset - self._buf_start
        if start < 0 or start + n > len(self._buf):
            self._file.seek(offset)
            self._buf = self._file.read(max(n, _READ_BLOCK))
            self._buf_start, start = offset, 0
        return self._buf[start:start + n]

    def _gap(self, offset: int, previous: int, cycle: int) -> None:
        if cycle > previous + 1:
            missing = cycle - previous - 1
            self._problem(GAP, offset, f"cycles {previous + 1}..{cycle - 1} are missing "
                          f"({missing} record{'s' if missing != 1 else ''})")
        else:
            self._problem(GAP, offset, f"cycle {cycle} follows cycle {previous}")

    def _problem(self, kind: str, offset: int, message: str) -> None:
        self.problems.append(Problem(kind, offset, message))


def _unpack(payload: bytes) -> Any:
    try:
        return msgpack.unpackb(payload, raw=False)
    except Exception:  # noqa: BLE001 - whatever the bytes are, they are not a record
        return None


def _check_lengths(rec: CycleRecord, n_joints: int) -> None:
    for name in ("q", "rates"):
        if len(getattr(rec, name)) != n_joints:
            raise LogError(f"{name} has {len(getattr(rec, name))} values, the arm "
                           f"{n_joints} joints")
    for name in ("twist", "achieved_twist"):
        if len(getattr(rec, name)) != 6:
            raise LogError(f"{name} has {len(getattr(rec, name))} values, not 6")
    if not math.isfinite(rec.t_s):
        raise LogError(f"t_s is {rec.t_s}")


_BUTTONS_LOGGED = 16  # pad buttons 0…15 as flags; `input` keeps every key by name


def cycle_record(cycle: int, t_s: float, frame: InputFrame, out: CycleOutput,
                 q: Sequence[float] | None, *, state_age_s: float | None, overrun_streak: int,
                 period_s: float, compute_s: float, overrun: bool) -> CycleRecord:
    """The log record of one `ControlCycle.step` (drive, preflight and re-runs share it)."""
    sol, intent = out.solution, out.intent
    nan = float("nan")
    # With a workcell the solve reports its clearance (runtime/control/clearance.py).
    clearance = None if sol is None else sol.clearance
    return CycleRecord(
        cycle=cycle, t_s=t_s, axes=tuple(frame.axes),
        buttons=frame.button_flags(_BUTTONS_LOGGED), enabled=out.verdict.allowed,
        enable_reason=out.verdict.reason, twist=tuple(intent.twist.tolist()),
        frame=intent.frame, q=() if q is None else tuple(float(v) for v in q),
        rates=tuple(out.rates.tolist()),
        damping=0.0 if sol is None else sol.damping,
        sigma_min=nan if sol is None else sol.sigma_min,
        manipulability=nan if sol is None else sol.manipulability,
        achieved_twist=(0.0,) * 6 if sol is None else tuple(sol.achieved_twist.tolist()),
        tracking_error=0.0 if sol is None else sol.tracking_error,
        scales={} if sol is None else dict(sol.scales),
        binding_limit=None if sol is None else sol.binding_limit,
        period_s=period_s, compute_s=compute_s, overrun=overrun, reduced=intent.reduced,
        input=frame_to_wire(frame), state_age_s=state_age_s, overrun_streak=overrun_streak,
        safety_state=out.verdict.state,
        min_clearance_m=None if clearance is None else clearance.min_distance_m,
        clearance_pair=None if clearance is None else clearance.nearest_pair)
