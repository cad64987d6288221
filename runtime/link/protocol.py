"""The wire between the runtime and the arm side: messages, encode/decode, timing rules (pure).

One message is one msgpack map in one ZeroMQ frame. Every map has string keys, a protocol
version `v` and a `kind`:

    hello    who is speaking and which arm it means (name, joint names, limits digest)
    rates    runtime → arm: joint rates to follow now (rad/s or m/s), sequence, send time
    state    arm → runtime: measured q and q̇, the last applied rates sequence, a status
    refuse   arm → runtime: why the arm side ignores this peer (mismatch, busy, …)
    twist    input program → runtime: a tool twist (m/s, rad/s), frame, enable flag
    cell     both ways, only after hello: which workcell this side holds (name, digest); a
             runtime that sends it asks for contact reports
    contact  arm → runtime that sent `cell`: arm parts touching cell objects (pairs, depth)

`docs/PROTOCOL.md` is the normative text (field tables, sockets, timing); a test checks that
it and `FIELDS` below agree. Decoding is strict: anything that is not exactly a message of
this version raises `ProtocolError(reason=…)` with `reason` one of `REASONS`; receivers
count and drop it. `encode` runs the same checks, so we never send what a peer must refuse.

Times on the wire are integer nanoseconds of the *sender's* monotonic clock; the helpers at
the end (`SequenceGate`, `LatenessFilter`, `StateFreshness`, `RoundTripMeter`) turn them into
the timing rules (newest wins, a late message is dropped, no fresh state → command zero, a
slow link is measured). They take the receive time as an argument: this module reads no
clock.
"""

from __future__ import annotations

import bisect
import hashlib
import math
from collections import deque
from dataclasses import dataclass, fields
from typing import Any, Callable, Union

import msgpack
import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..arm.cell import Cell
from ..arm.model import FRAMES, Arm, limits_digest
from ..arm.solids import Solid, cell_solids, solid_of, tool_solids
from ..errors import ModelMismatch, ProtocolError

PROTOCOL_VERSION = 1
MAX_MESSAGE_BYTES = 16384   # a hello for MAX_JOINTS joints with long names stays well below
MAX_JOINTS = 64
MAX_NAME_CHARS = 64         # arm and joint names, digests
MAX_TEXT_CHARS = 512        # refusal texts
MAX_CONTACTS = 16           # pairs in one contact message, deepest first
MAX_SEQ = 2**64 - 1
INT64_MIN, INT64_MAX = -2**63, 2**63 - 1

ROLES = ("runtime", "observer", "sim", "bridge")
STATUSES = ("waiting", "tracking", "stale")
REFUSE_CODES = ("mismatch", "busy", "no_hello", "not_controller", "version")

FLAG_REDUCED_SPEED = 1      # rates.flags bit 0: the operator selected reduced speed
KNOWN_FLAGS = FLAG_REDUCED_SPEED

# Why a message was dropped (ProtocolError.reason); receivers count drops by these names.
REASONS = ("type", "oversize", "msgpack", "version", "kind", "schema", "length", "nonfinite",
           "range")

FloatVector = tuple[float, ...]


def _floats(values: Any) -> FloatVector:
    if type(values) is tuple and all(type(x) is float for x in values):
        return values  # already what we keep (decode builds these)
    if isinstance(values, np.ndarray):
        return tuple(values.astype(np.float64).ravel().tolist())
    return tuple(map(float, values))


@dataclass(frozen=True)
class Hello:
    """Who is speaking and which arm it means. Sent first by both ends (see PROTOCOL.md).

    role: "runtime" (wants to command), "observer" (state only), "sim" or "bridge".
    joints: joint names in the order of every q, q̇ array on the wire.
    digest: `runtime.arm.model.limits_digest(arm)`: names, kinds, position/speed/accel limits.
    geometry: `geometry_digest(arm)`, or "" when the sender does not know the kinematics.
    stale_after_s: the sender's watchdog timeout (s).
    """

    role: str
    arm: str
    joints: tuple[str, ...]
    digest: str
    geometry: str
    stale_after_s: float

    def __post_init__(self) -> None:
        object.__setattr__(self, "joints", tuple(self.joints))


@dataclass(frozen=True)
class Rates:
    """Joint rates to follow from now on (rad/s revolute, m/s prismatic), in hello order.

    seq: 1, 2, … per runtime session; the arm side never applies one ≤ the last applied.
    t_ns: the sender's monotonic clock when it sent this (ns), echoed back in `State`.
    """

    seq: int
    t_ns: int
    qd: FloatVector
    flags: int = 0

    def __post_init__(self) -> None:
        object.__setattr__(self, "qd", _floats(self.qd))

    @property
    def reduced_speed(self) -> bool:
        return bool(self.flags & FLAG_REDUCED_SPEED)


@dataclass(frozen=True)
class State:
    """What the arm side measured at the end of one of its steps.

    q (rad or m) and qd (rad/s or m/s) in hello order; applied_seq/echo_ns: `seq`/`t_ns` of
    the rates the arm is following (0 when none); status: one of STATUSES; limited: the arm
    side had to reduce the command at its own limits (speed or position) on this step.
    """

    seq: int
    t_ns: int
    q: FloatVector
    qd: FloatVector
    applied_seq: int
    echo_ns: int
    status: str
    limited: bool = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "q", _floats(self.q))
        object.__setattr__(self, "qd", _floats(self.qd))


@dataclass(frozen=True)
class Refuse:
    """The arm side ignores this peer's messages; `code` is one of REFUSE_CODES."""

    code: str
    reason: str


@dataclass(frozen=True)
class Twist:
    """A tool twist from an input program: (vx, vy, vz) m/s, (wx, wy, wz) rad/s.

    frame: "base" or "tool" (axes the twist is expressed in; the reference point is the
    TCP); enable: the sender's hold-to-move switch is held.
    """

    seq: int
    t_ns: int
    twist: FloatVector
    frame: str = "base"
    enable: bool = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "twist", _floats(self.twist))


@dataclass(frozen=True)
class CellHello:
    """Which workcell this side holds: its `name` and `digest` (`cell_digest`), both "" for
    none. A runtime sends it after the arm side accepted its hello, to ask for `Contact`
    reports; the arm side answers with its own. A side that predates cells never sends it
    and drops it when received (docs/PROTOCOL.md, "Versions")."""

    name: str
    digest: str


@dataclass(frozen=True)
class Contact:
    """Arm parts touching workcell objects (or each other) at the end of one arm-side step.

    seq: the `seq` of the state sent right after it for the same step; t_ns: the arm side's
    clock when measured. a[i] (a part of the arm: a link or the tool) touches b[i] (a cell
    object or another part) penetrating depth_m[i] ≥ 0 (m); deepest first, at most
    MAX_CONTACTS pairs; total: how many pairs touch in all.
    """

    seq: int
    t_ns: int
    a: tuple[str, ...]
    b: tuple[str, ...]
    depth_m: FloatVector
    total: int

    def __post_init__(self) -> None:
        object.__setattr__(self, "a", tuple(self.a))
        object.__setattr__(self, "b", tuple(self.b))
        object.__setattr__(self, "depth_m", _floats(self.depth_m))

    @property
    def pairs(self) -> list[tuple[str, str, float]]:
        return list(zip(self.a, self.b, self.depth_m))


Message = Union[Hello, Rates, State, Refuse, Twist, CellHello, Contact]
KINDS: dict[str, type] = {"hello": Hello, "rates": Rates, "state": State, "refuse": Refuse,
                          "twist": Twist, "cell": CellHello, "contact": Contact}
_KIND_OF = {cls: kind for kind, cls in KINDS.items()}


# ----------------------------------------------------------------------------------------
# Field checks. Each takes the raw value and the expected joint count (or None) and returns
# the value to build the dataclass with, or raises ProtocolError.
# ----------------------------------------------------------------------------------------

Check = Callable[[Any, "int | None", str], Any]


def _bad(reason: str, field: str, what: str) -> ProtocolError:
    return ProtocolError(f"field {field!r}: {what}", reason=reason)


def _integer(lo: int, hi: int) -> Check:
    def check(value: Any, n: int | None, field: str) -> int:
        if type(value) is not int:
            raise _bad("type", field, f"expected an integer, got {type(value).__name__}")
        if not lo <= value <= hi:
            raise _bad("range", field, f"{value} is outside {lo}…{hi}")
        return value
    return check


def _flags(value: Any, n: int | None, field: str) -> int:
    value = _FLAG_WORD(value, n, field)
    if value & ~KNOWN_FLAGS:
        raise _bad("range", field, f"unknown flag bits {value & ~KNOWN_FLAGS:#x}")
    return int(value)


def _bool(value: Any, n: int | None, field: str) -> bool:
    if type(value) is not bool:
        raise _bad("type", field, f"expected true/false, got {type(value).__name__}")
    return value


def _number(value: Any, field: str) -> float:
    if type(value) is float:
        if not math.isfinite(value):
            raise _bad("nonfinite", field, f"{value} is not a finite number")
        return value
    if type(value) is int:
        if not INT64_MIN <= value <= 2**64 - 1:
            raise _bad("range", field, "integer out of range")
        return float(value)
    raise _bad("type", field, f"expected a number, got {type(value).__name__}")


def _positive_float(value: Any, n: int | None, field: str) -> float:
    x = _number(value, field)
    if x <= 0.0:
        raise _bad("range", field, f"must be positive, got {x}")
    return x


def _float_array(length: Callable[[int | None], int | None]) -> Check:
    def check(value: Any, n: int | None, field: str) -> FloatVector:
        if type(value) is not list and type(value) is not tuple:  # tuple: when encoding
            raise _bad("type", field, f"expected an array, got {type(value).__name__}")
        want = length(n)
        if want is not None and len(value) != want:
            raise _bad("length", field, f"expected {want} values, got {len(value)}")
        if not 1 <= len(value) <= MAX_JOINTS:
            raise _bad("length", field, f"expected 1…{MAX_JOINTS} values, got {len(value)}")
        if all(type(x) is float for x in value):  # the usual case, checked in bulk
            if not all(map(math.isfinite, value)):
                raise _bad("nonfinite", field, "contains NaN or infinity")
            return tuple(value)
        return tuple(_number(x, field) for x in value)
    return check


def _text(max_chars: int, *, empty: bool = False) -> Check:
    def check(value: Any, n: int | None, field: str) -> str:
        if type(value) is not str:
            raise _bad("type", field, f"expected a string, got {type(value).__name__}")
        if len(value) > max_chars or (not value and not empty):
            raise _bad("range", field, f"length {len(value)} is outside "
                                       f"{0 if empty else 1}…{max_chars}")
        return value
    return check


def _one_of(choices: tuple[str, ...]) -> Check:
    def check(value: Any, n: int | None, field: str) -> str:
        if type(value) is not str:
            raise _bad("type", field, f"expected a string, got {type(value).__name__}")
        if value not in choices:
            raise _bad("range", field, f"{value[:40]!r} is not one of {', '.join(choices)}")
        return value
    return check


def _name_list(value: Any, n: int | None, field: str, most: int) -> tuple[str, ...]:
    """1…`most` names of 1…MAX_NAME_CHARS characters."""
    if type(value) is not list and type(value) is not tuple:  # tuple: when encoding
        raise _bad("type", field, f"expected an array, got {type(value).__name__}")
    if not 1 <= len(value) <= most:
        raise _bad("length", field, f"expected 1…{most} names, got {len(value)}")
    return tuple(_text(MAX_NAME_CHARS)(x, n, field) for x in value)


def _names(value: Any, n: int | None, field: str) -> tuple[str, ...]:
    """Joint names: 1…MAX_JOINTS, none repeated."""
    names = _name_list(value, n, field, MAX_JOINTS)
    if len(set(names)) != len(names):
        raise _bad("range", field, "joint names repeat")
    return names


def _part_names(value: Any, n: int | None, field: str) -> tuple[str, ...]:
    """Contact parts: 1…MAX_CONTACTS names (repeats allowed)."""
    return _name_list(value, n, field, MAX_CONTACTS)


def _depths(value: Any, n: int | None, field: str) -> FloatVector:
    depths = _SOME_FLOATS(value, n, field)
    if len(depths) > MAX_CONTACTS:
        raise _bad("length", field, f"expected 1…{MAX_CONTACTS} values, got {len(depths)}")
    if min(depths) < 0.0:
        raise _bad("range", field, "a penetration depth is negative")
    return tuple(depths)


_FLAG_WORD = _integer(0, 2**32 - 1)
_SEQ = _integer(0, MAX_SEQ)
_TIME = _integer(INT64_MIN, INT64_MAX)
_JOINT_FLOATS = _float_array(lambda n: n)
_SOME_FLOATS = _float_array(lambda n: None)
_SIX_FLOATS = _float_array(lambda n: 6)

# kind → (wire key, check) for every field besides `v` and `kind`, in dataclass order.
FIELDS: dict[str, tuple[tuple[str, Check], ...]] = {
    "hello": (("role", _one_of(ROLES)), ("arm", _text(MAX_NAME_CHARS)), ("joints", _names),
              ("digest", _text(MAX_NAME_CHARS)), ("geometry", _text(MAX_NAME_CHARS, empty=True)),
              ("stale_after_s", _positive_float)),
    "rates": (("seq", _integer(1, MAX_SEQ)), ("t_ns", _TIME), ("qd", _JOINT_FLOATS),
              ("flags", _flags)),
    "state": (("seq", _SEQ), ("t_ns", _TIME), ("q", _JOINT_FLOATS), ("qd", _JOINT_FLOATS),
              ("applied_seq", _SEQ), ("echo_ns", _TIME), ("status", _one_of(STATUSES)),
              ("limited", _bool)),
    "refuse": (("code", _one_of(REFUSE_CODES)), ("reason", _text(MAX_TEXT_CHARS, empty=True))),
    "twist": (("seq", _integer(1, MAX_SEQ)), ("t_ns", _TIME), ("twist", _SIX_FLOATS),
              ("frame", _one_of(FRAMES)), ("enable", _bool)),
    "cell": (("name", _text(MAX_NAME_CHARS, empty=True)),
             ("digest", _text(MAX_NAME_CHARS, empty=True))),
    "contact": (("seq", _SEQ), ("t_ns", _TIME), ("a", _part_names), ("b", _part_names),
                ("depth_m", _depths), ("total", _integer(1, 2**32 - 1))),
}
assert all([f.name for f in fields(KINDS[k])] == [key for key, _ in FIELDS[k]] for k in KINDS)
_KEYS = {kind: frozenset(("v", "kind", *(key for key, _ in spec)))
         for kind, spec in FIELDS.items()}


def _checked(kind: str, data: dict[str, Any], n_joints: int | None) -> dict[str, Any]:
    """The field values of a `kind` map, each checked; raises ProtocolError."""
    spec, expected = FIELDS[kind], _KEYS[kind]
    if data.keys() != expected:
        missing = sorted(expected - data.keys())
        extra = sorted(repr(k)[:40] for k in data.keys() - expected)
        what = f"missing {missing}" if missing else f"unknown {extra}"
        raise ProtocolError(f"{kind}: fields {what}", reason="schema")
    values = {key: check(data[key], n_joints, key) for key, check in spec}
    if kind == "state" and len(values["q"]) != len(values["qd"]):
        raise _bad("length", "qd", f"{len(values['qd'])} values for {len(values['q'])} joints")
    if kind == "contact":
        if not len(values["a"]) == len(values["b"]) == len(values["depth_m"]):
            raise _bad("length", "depth_m", "a, b and depth_m differ in length")
        if values["total"] < len(values["a"]):
            raise _bad("range", "total", "fewer pairs in all than in this message")
    return values


# ----------------------------------------------------------------------------------------
# encode / decode
# ----------------------------------------------------------------------------------------

def to_map(msg: Message) -> dict[str, Any]:
    """The msgpack map of `msg` (plain Python values, keys as on the wire)."""
    kind = _KIND_OF.get(type(msg))
    if kind is None:
        raise ProtocolError(f"cannot encode a {type(msg).__name__}", reason="kind")
    out: dict[str, Any] = {"v": PROTOCOL_VERSION, "kind": kind}
    for key, _ in FIELDS[kind]:
        out[key] = getattr(msg, key)   # tuples pack as msgpack arrays
    return out


def encode(msg: Message) -> bytes:
    """One wire frame for `msg`. Raises ProtocolError if `msg` breaks the schema (never sent)."""
    data = to_map(msg)
    _checked(data["kind"], data, None)
    packed: bytes = msgpack.packb(data, use_bin_type=True)
    return packed


_UNPACK_LIMITS = dict(raw=False, strict_map_key=True, use_list=True,
                      max_str_len=4 * MAX_TEXT_CHARS, max_bin_len=0, max_ext_len=0,
                      max_array_len=MAX_JOINTS, max_map_len=16)


def decode(data: Any, *, n_joints: int | None = None) -> Message:
    """The message in one wire frame, checked field by field.

    n_joints: when given, `rates`/`state` arrays must have exactly this many values.
    Raises ProtocolError(reason=…) for anything else; never another exception.
    """
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise ProtocolError(f"expected bytes, got {type(data).__name__}", reason="type")
    if len(data) > MAX_MESSAGE_BYTES:  # checked before unpacking a byte of it
        raise ProtocolError(f"{len(data)} bytes exceeds the {MAX_MESSAGE_BYTES}-byte cap",
                            reason="oversize")
    try:
        obj = msgpack.unpackb(data, **_UNPACK_LIMITS)
    except Exception as exc:  # msgpack raises several ValueError kinds and TypeError
        text = str(exc)
        reason = ("type" if "max_bin_len" in text or "max_ext_len" in text   # never allowed
                  else "oversize" if "exceeds max" in text else "msgpack")
        raise ProtocolError(f"not one msgpack value: {type(exc).__name__}: {exc}"[:200],
                            reason=reason) from None
    if type(obj) is not dict:
        raise ProtocolError(f"expected a map, got {type(obj).__name__}", reason="type")
    version = obj.get("v")
    if type(version) is not int:
        raise ProtocolError("no integer protocol version 'v'",
                            reason="schema" if version is None else "type")
    if version != PROTOCOL_VERSION:
        raise ProtocolError(f"protocol version {version}; this side speaks {PROTOCOL_VERSION}",
                            reason="version")
    kind = obj.get("kind")
    if type(kind) is not str:
        raise ProtocolError("no string 'kind'", reason="schema" if kind is None else "type")
    if kind not in FIELDS:
        raise ProtocolError(f"unknown kind {kind[:40]!r}", reason="kind")
    message: Message = KINDS[kind](**_checked(kind, obj, n_joints))
    return message


# ----------------------------------------------------------------------------------------
# hello: building and checking
# ----------------------------------------------------------------------------------------

def _numbers(values: ArrayLike) -> str:
    """Numbers for a digest: rounded to 1e-6, "%.6f", −0 as 0, one space between."""
    return " ".join(f"{round(float(x), 6) + 0.0:.6f}" for x in np.ravel(values))


def geometry_digest(arm: Arm) -> str:
    """A short hash of the chain's geometry, independent of how its fixed transforms are split.

    At q = 0, frame_i = base · origin_1 · … · origin_i (joint i's frame, in the base frame)
    and T_tcp = frame_n · flange · tool. One line per joint, "<kind> px py pz zx zy zz" (its
    position in m and its axis), then "tcp" and the 12 numbers of T_tcp's top three rows
    (row-major); every number rounded to 1e-6 and printed "%.6f" (−0 as 0); lines joined by
    "\n"; SHA-256 of the UTF-8 text, first 16 hex digits.
    """
    numbers = _numbers
    lines, T = [], np.asarray(arm.base, dtype=np.float64)
    for joint in arm.joints:
        T = T @ joint.origin
        lines.append(f"{joint.kind} {numbers(T[:3, 3])} {numbers(T[:3, 2])}")
    lines.append(f"tcp {numbers((T @ arm.tip)[:3, :4].ravel())}")
    return hashlib.sha256("\n".join(lines).encode()).hexdigest()[:16]


def rates_message(seq: int, t_ns: int, qd: Any, *, reduced: bool = False) -> Rates:
    """Rates number `seq` stamped `t_ns`, with the reduced-speed flag when `reduced`."""
    return Rates(seq=seq, t_ns=t_ns, qd=qd, flags=FLAG_REDUCED_SPEED if reduced else 0)
def cell_digest(cell: Cell) -> str:
    """A short hash of what a workcell holds, for the `cell` message (PROTOCOL.md §5a).

    One line per object in the file's order, "<name> <kind> <pose> <sizes>" (the object as
    a `runtime.arm.solids.Solid`: the 12 numbers of its pose's top three rows, row-major,
    then its sizes in m); then one line per tool capsule, "tool <name> capsule …" in the
    flange frame; then "keep_in box …" if there is one. Numbers rounded to 1e-6 and printed
    "%.6f" (−0 as 0); lines joined by "\n"; SHA-256 of the UTF-8 text, first 16 hex digits.
    """
    def line(prefix: str, solid: Solid) -> str:
        return f"{prefix}{solid.kind} {_numbers(solid.pose[:3, :4])} {_numbers(solid.sizes)}"
    lines = [line(f"{s.name} ", s) for s in cell_solids(cell)]
    lines += [line(f"tool {s.name} ", s) for s in tool_solids(cell.tool)]
    if cell.keep_in is not None:
        lines.append(line("keep_in ", solid_of(cell.keep_in)))
    return hashlib.sha256("\n".join(lines).encode()).hexdigest()[:16]


def cell_hello_for(cell: Cell | None) -> CellHello:
    """Our `cell` message for `cell` (name and digest; both "" for none)."""
    return CellHello("", "") if cell is None else CellHello(cell.name[:MAX_NAME_CHARS],
                                                            cell_digest(cell))


def hello_for(arm: Arm, role: str, *, stale_after_s: float) -> Hello:
    """Our hello for `arm`, speaking as `role`."""
    return Hello(role=role, arm=arm.name, joints=arm.joint_names, digest=limits_digest(arm),
                 geometry=geometry_digest(arm), stale_after_s=float(stale_after_s))


def hello_differences(ours: Hello, theirs: Hello) -> list[str]:
    """What makes `theirs` a different arm from `ours` (empty when they agree).

    The arm name is not compared: a bridge may call the same arm differently. Geometry is
    compared only when both sides declare it.
    """
    diffs = []
    if len(ours.joints) != len(theirs.joints):
        diffs.append(f"joint count differs: ours {len(ours.joints)}, "
                     f"theirs {len(theirs.joints)}")
    else:
        for i, (a, b) in enumerate(zip(ours.joints, theirs.joints)):
            if a != b:
                diffs.append(f"joint {i + 1} is named {a!r} here, {b!r} there")
                break
    if ours.digest != theirs.digest:
        diffs.append(f"limits digest differs: ours {ours.digest}, theirs {theirs.digest} "
                     "(position, speed or acceleration limits, or joint kinds)")
    if ours.geometry and theirs.geometry and ours.geometry != theirs.geometry:
        diffs.append(f"geometry digest differs: ours {ours.geometry}, theirs {theirs.geometry} "
                     "(link lengths, twists, base or tool)")
    return diffs


def check_hello(ours: Hello, theirs: Hello) -> None:
    """Raise ModelMismatch naming every field in which `theirs` is another arm than `ours`."""
    diffs = hello_differences(ours, theirs)
    if diffs:
        raise ModelMismatch(f"arm mismatch: ours {ours.arm!r} ({ours.role}), theirs "
                            f"{theirs.arm!r} ({theirs.role}): " + "; ".join(diffs))


# ----------------------------------------------------------------------------------------
# Timing rules
# ----------------------------------------------------------------------------------------

class SequenceGate:
    """Newest wins: accepts a sequence number only if it is above every one accepted before."""

    def __init__(self) -> None:
        self.last = 0

    def accept(self, seq: int) -> bool:
        if seq <= self.last:
            return False
        self.last = seq
        return True

    def reset(self) -> None:
        self.last = 0


class LatenessFilter:
    """Drops messages that arrive later than usual by more than `max_late_s`.

    The two ends share no clock, but for each message offset = recv_ns − sent_ns is its
    one-way delay plus a constant clock offset, so offset − min(offset) is how much later it
    came than the quickest message seen. The minimum rises by `drift` seconds per second of
    receive time, so a slow drift between the two clocks never turns into false drops; a
    sudden jump in delay larger than `max_late_s` drops messages until it is absorbed.
    """

    def __init__(self, max_late_s: float, *, drift: float = 1e-3) -> None:
        self.max_late_ns = int(max_late_s * 1e9)
        self.drift = drift
        self._base: int | None = None
        self._base_at = 0

    def lateness_ns(self, sent_ns: int, recv_ns: int) -> int:
        """How much later than the quickest recent message this one arrived (ns, ≥ 0)."""
        offset = recv_ns - sent_ns
        if self._base is None:
            self._base = offset
        else:
            self._base += int(self.drift * max(0, recv_ns - self._base_at))
            self._base = min(self._base, offset)
        self._base_at = recv_ns
        return offset - self._base

    def accept(self, sent_ns: int, recv_ns: int) -> bool:
        return self.lateness_ns(sent_ns, recv_ns) <= self.max_late_ns

    def reset(self) -> None:
        self._base = None


class StateFreshness:
    """The runtime's watchdog on the arm's state: no fresh state for stale_after → zero.

    `offer` each received State with its receive time; stale (by sequence) or late ones are
    refused. `command(qd, now_ns)` passes the rates through only while the newest accepted
    state is younger than stale_after_s, and returns zeros otherwise.
    """

    def __init__(self, stale_after_s: float, *, drift: float = 1e-3) -> None:
        self.stale_after_ns = int(stale_after_s * 1e9)
        self.gate = SequenceGate()
        self.lateness = LatenessFilter(stale_after_s, drift=drift)
        self.latest: State | None = None
        self.received_ns: int | None = None
        self.refused = 0

    def offer(self, state: State, recv_ns: int) -> bool:
        late = not self.lateness.accept(state.t_ns, recv_ns)
        if late or not self.gate.accept(state.seq):
            self.refused += 1
            return False
        self.latest, self.received_ns = state, recv_ns
        return True

    def refuse_overtaken(self, n: int) -> None:
        """States that reached us after a newer one in the same read (`Inbox.overtaken`):
        never offered, since the newer one was, and refused all the same."""
        self.refused += n

    def age_s(self, now_ns: int) -> float:
        """Seconds since the newest accepted state arrived (inf before the first)."""
        return math.inf if self.received_ns is None else (now_ns - self.received_ns) * 1e-9

    def is_fresh(self, now_ns: int) -> bool:
        return self.received_ns is not None and now_ns - self.received_ns <= self.stale_after_ns

    def command(self, qd: NDArray[np.float64], now_ns: int) -> NDArray[np.float64]:
        return np.asarray(qd, dtype=np.float64) if self.is_fresh(now_ns) else np.zeros(len(qd))

    def reset(self) -> None:
        self.gate.reset()
        self.lateness.reset()
        self.latest = self.received_ns = None


class RoundTripMeter:
    """The link's round trip as the runtime sees it, on its own clock alone: a state that
    shows rates applied for the first time echoes their send time (`echo_ns`), so
    receive time − echo is one round trip (`add` each such sample).

    `level_s` is the median of the samples received in the last `window_s` (at most
    `max_samples` of them; the newest always counts), None before the first: one late state
    barely moves it (the lateness filters deal with a single late message), a link that stays
    slow for half a window moves it all the way. The upper median of an even count is taken.
    """

    def __init__(self, window_s: float = 0.5, max_samples: int = 256) -> None:
        if not (window_s > 0 and max_samples >= 1):
            raise ValueError("window_s must be positive and max_samples ≥ 1")
        self.window_s = window_s
        self.max_samples = max_samples
        self._recent: deque[tuple[float, float]] = deque()   # (received s, round trip s)
        self._sorted: list[float] = []
        self.level_s: float | None = None

    def add(self, round_trip_s: float, now_s: float) -> None:
        self._recent.append((now_s, round_trip_s))
        bisect.insort(self._sorted, round_trip_s)
        while len(self._recent) > self.max_samples or \
                self._recent[0][0] < now_s - self.window_s:
            _, old = self._recent.popleft()
            del self._sorted[bisect.bisect_left(self._sorted, old)]
        self.level_s = self._sorted[len(self._sorted) // 2]

    def reset(self) -> None:
        self._recent.clear()
        self._sorted.clear()
        self.level_s = None
