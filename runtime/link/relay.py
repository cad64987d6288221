"""A link that misbehaves on purpose: the schedule behind `jogwire relay` (pure).

The relay sits on the arm link between the runtime and the arm side. Each direction is one
`Link`:

    runtime ──rates direction──►  relay  ──►  arm side       (hello, rates)
    runtime ◄──state direction──  relay  ◄──  arm side       (hello, state, refuse)

A `Link` is told of every message with its arrival time (`offer`) and says which frames go
out when (`release`). It reads no clock and opens no socket: the caller passes the times
and a seeded `random.Random`, so a given seed, fault set and arrival sequence always gives
the same deliveries. The faults of one direction (`LinkFaults`):

    delay, jitter   one-way latency delay ± jitter (uniform); the order is kept (a message
                    never overtakes the one before it, as on a stream transport)
    loss            a message is dropped with this probability
    duplicate       a message is delivered twice, the copy right after it
    reorder         a message is held back `reorder_hold_s` longer, so the next ones
                    overtake it
    garbage         a burst of `garbage_burst` malformed frames goes out just before the
                    message; each is derived from the message and is invalid under the
                    wire protocol (`GARBAGE_KINDS`), so a receiver must drop and count it
    stalls          windows in which nothing goes out: what comes due meanwhile is dropped,
                    or with `hold_in_stall` kept and released in one burst at the end (as a
                    buffering link would)

The hello exchange is forwarded faithfully: hello and refuse are never lost, duplicated,
reordered or accompanied by garbage (they still see delay, jitter and stalls), so both
ends still agree on the arm and the runtime's hello retries are not what is being tested.
Frames are forwarded byte for byte.

The faults other than stalls may wait (`from_s`): until then messages pass untouched, so a
run can start on a clean link and degrade at a chosen moment (or when asked: `Link.start`).

Options on the command line (`parse_*` below): durations as `40ms`, `1.5s`, `200us` (a bare
number is seconds), probabilities as `5%` or `0.05`, each optionally for one direction
(`rates=20%`), stalls as `[DIR=]LENGTH[@AT[/EVERY]]` (without `@AT`: on demand).
"""

from __future__ import annotations

import heapq
import math
import random
import re
from collections import Counter
from dataclasses import dataclass, field, fields
from typing import Any, Hashable

import msgpack

from ..errors import ConfigError, ProtocolError
from .protocol import MAX_JOINTS, PROTOCOL_VERSION, decode

DIRECTIONS = ("rates", "state")   # runtime → arm side, arm side → runtime
CONTROL_KINDS = ("hello", "refuse")
GARBAGE_KINDS = ("truncated", "trailing", "not_msgpack", "nonfinite", "version", "schema",
                 "type", "kind", "length", "oversize", "framing")
MAX_QUEUED = 20000    # deliveries a link holds at most (a long held stall); more are dropped

Frames = tuple[bytes, ...]


# ----------------------------------------------------------------------------------------
# Faults of one direction
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Stall:
    """Nothing goes out for length_s: from at_s (s on the relay's clock), again every every_s
    if given; with at_s None, only when asked (`Link.stall_now`, e.g. on a signal)."""

    length_s: float
    at_s: float | None = None
    every_s: float | None = None

    def covers(self, t_s: float) -> bool:
        if self.at_s is None or t_s < self.at_s:
            return False
        since = t_s - self.at_s
        if self.every_s is not None:
            since %= self.every_s
        return since < self.length_s

    def __str__(self) -> str:
        when = "on demand" if self.at_s is None else f"at {self.at_s:g} s"
        every = "" if self.every_s is None else f", every {self.every_s:g} s"
        return f"{self.length_s * 1e3:g} ms {when}{every}"


@dataclass(frozen=True)
class LinkFaults:
    """What one direction of the link does to messages (see the module docstring).

    Times in s, probabilities 0…1. garbage_kinds: which of GARBAGE_KINDS a burst draws from.
    from_s: the faults other than stalls start this long after the relay (inf: when asked).
    """

    delay_s: float = 0.0
    jitter_s: float = 0.0
    loss: float = 0.0
    duplicate: float = 0.0
    reorder: float = 0.0
    reorder_hold_s: float = 0.006
    garbage: float = 0.0
    garbage_burst: int = 3
    garbage_kinds: tuple[str, ...] = GARBAGE_KINDS
    stalls: tuple[Stall, ...] = ()
    hold_in_stall: bool = False
    from_s: float = 0.0

    def __post_init__(self) -> None:
        # Errors name the command-line option (delay_s → delay, from_s → faults-from).
        if not (self.from_s >= 0 and not math.isnan(self.from_s)):
            raise ConfigError(f"must be a time ≥ 0, got {self.from_s}", field="faults-from")
        for name in ("delay_s", "jitter_s", "reorder_hold_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ConfigError(f"must be a duration ≥ 0, got {value}",
                                  field=name.removesuffix("_s").replace("_", "-"))
        for name in ("loss", "duplicate", "reorder", "garbage"):
            value = getattr(self, name)
            if not 0.0 <= value <= 1.0:
                raise ConfigError(f"must be a probability between 0 and 1, got {value}",
                                  field=name)
        unknown = set(self.garbage_kinds) - set(GARBAGE_KINDS)
        if unknown or not self.garbage_kinds:
            raise ConfigError(f"garbage kinds must be some of {', '.join(GARBAGE_KINDS)}"
                              + (f"; unknown: {', '.join(sorted(unknown))}" if unknown else ""),
                              field="garbage-kinds")
        if not 1 <= self.garbage_burst <= 1000:
            raise ConfigError(f"must be 1…1000 frames, got {self.garbage_burst}",
                              field="garbage-burst")
        for stall in self.stalls:
            if not stall.length_s > 0 or (stall.every_s is not None and
                                          not stall.every_s > stall.length_s):
                raise ConfigError(f"stall {stall}: the length must be positive and shorter "
                                  "than the period", field="stall")

    def describe(self) -> str:
        parts = []
        if self.delay_s or self.jitter_s:
            parts.append(f"delay {self.delay_s * 1e3:g} ms ± {self.jitter_s * 1e3:g} ms")
        for name in ("loss", "duplicate", "reorder", "garbage"):
            if getattr(self, name):
                parts.append(f"{name} {100 * getattr(self, name):g} %")
        if self.reorder:
            parts.append(f"reorder hold {self.reorder_hold_s * 1e3:g} ms")
        if self.garbage:
            parts.append(f"garbage bursts of {self.garbage_burst}")
            if self.garbage_kinds != GARBAGE_KINDS:
                parts.append(f"garbage kinds {','.join(self.garbage_kinds)}")
        parts += [f"stall {s}" for s in self.stalls]
        if self.stalls and self.hold_in_stall:
            parts.append("held through stalls")
        if parts and self.from_s:
            parts.append("from " + ("a signal" if math.isinf(self.from_s) else
                                    f"{self.from_s:g} s") + " on (stalls keep their times)")
        return ", ".join(parts) or "clean"


# ----------------------------------------------------------------------------------------
# What a link did
# ----------------------------------------------------------------------------------------

@dataclass
class LinkCounters:
    """Per direction. `received` = `forwarded` + `lost` + `stalled` + `overflow` + queued;
    duplicates and garbage are extra frames on top of the forwarded messages."""

    received: int = 0          # messages that came in
    forwarded: int = 0         # of those, delivered (once)
    lost: int = 0              # dropped on purpose (loss)
    stalled: int = 0           # came due during a stall and were dropped
    held: int = 0              # came due during a stall and went out after it
    overflow: int = 0          # dropped because the link already held MAX_QUEUED
    duplicated: int = 0        # extra copies delivered
    reordered: int = 0         # messages held back so later ones overtook them
    garbage: int = 0           # malformed frames delivered
    send_failed: int = 0       # deliveries the socket would not take (counted by the caller)
    garbage_unsent: int = 0    # of those, garbage frames: `garbage` − this reached the peer
    kinds: Counter = field(default_factory=Counter)   # received, by message kind

    def as_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {f.name: getattr(self, f.name) for f in fields(self)}
        out["kinds"] = dict(sorted(self.kinds.items()))
        return out

    def line(self) -> str:
        kinds = ", ".join(f"{k} {v}" for k, v in sorted(self.kinds.items())) or "none"
        return (f"{self.received} received ({kinds}), {self.forwarded} forwarded, "
                f"{self.lost} lost, {self.stalled} dropped in stalls, {self.held} held "
                f"through stalls, {self.duplicated} duplicated, {self.reordered} reordered, "
                f"{self.garbage} garbage frames, {self.overflow} overflow, "
                f"{self.send_failed} send failures ({self.garbage_unsent} of them garbage)")


@dataclass(frozen=True)
class Delivery:
    """Frames to send at at_s to `route` (the peer the caller routes by). what: "message",
    "duplicate" or "garbage:<kind>"; `held` when a stall kept it back."""

    at_s: float
    frames: Frames
    route: Hashable
    what: str
    held: bool = False


# ----------------------------------------------------------------------------------------
# The schedule of one direction
# ----------------------------------------------------------------------------------------

class Link:
    """One direction of the relay: `offer` what arrives, `release` what is due.

    rng: the only source of randomness (seed it for a reproducible run). Draws are made
    only for the faults that are on, in a fixed order per message.
    """

    def __init__(self, faults: LinkFaults, rng: random.Random, *,
                 max_queued: int = MAX_QUEUED) -> None:
        self.faults = faults
        self.rng = rng
        self.max_queued = max_queued
        self.counters = LinkCounters()
        self._heap: list[tuple[float, int, Delivery]] = []
        self._order = 0
        self._fifo_s = -math.inf          # when the last in-order message goes out
        self._stall_until_s = -math.inf   # end of an on-demand stall
        self._was_stalled = False
        self._held_up_to_s = -math.inf    # deliveries due by then waited for a stall to end
        self._from_s = faults.from_s      # before then, messages pass untouched

    # -- in ------------------------------------------------------------------------------

    def offer(self, frames: Frames, route: Hashable, now_s: float) -> None:
        """A message arrived at now_s (s) from `route`'s side; schedule what it becomes."""
        f, rng, c = self.faults, self.rng, self.counters
        c.received += 1
        kind = message_kind(frames)
        c.kinds[kind] += 1
        if now_s < self._from_s:                 # not yet: in order, at once
            self._fifo_s = max(now_s, self._fifo_s)
            self._push(Delivery(self._fifo_s, frames, route, "message"))
            return
        control = kind in CONTROL_KINDS
        if not control and f.loss and rng.random() < f.loss:
            c.lost += 1
            return
        at = now_s + f.delay_s
        if f.jitter_s:
            at += rng.uniform(-f.jitter_s, f.jitter_s)
        at = max(at, now_s, self._fifo_s)
        if not control and f.reorder and rng.random() < f.reorder:
            at += f.reorder_hold_s          # later messages keep the in-order time: overtake
            c.reordered += 1
        else:
            self._fifo_s = at
        if not control and f.garbage and rng.random() < f.garbage:
            for _ in range(f.garbage_burst):
                kind_g = rng.choice(f.garbage_kinds)
                self._push(Delivery(at, make_garbage(frames, kind_g, rng), route,
                                    f"garbage:{kind_g}"))
        self._push(Delivery(at, frames, route, "message"))
        if not control and f.duplicate and rng.random() < f.duplicate:
            self._push(Delivery(at, frames, route, "duplicate"))

    def _push(self, d: Delivery) -> None:
        if len(self._heap) >= self.max_queued:
            if d.what == "message":
                self.counters.overflow += 1
            return
        self._order += 1
        heapq.heappush(self._heap, (d.at_s, self._order, d))

    def start(self, now_s: float) -> bool:
        """Start the faults now if they wait for it; True if they were waiting."""
        if now_s < self._from_s:
            self._from_s = now_s
            return True
        return False

    def is_active(self, now_s: float) -> bool:
        return now_s >= self._from_s

    # -- stalls --------------------------------------------------------------------------

    def stall_now(self, now_s: float, length_s: float) -> None:
        """Start an on-demand stall of length_s at now_s (extends a running one)."""
        self._stall_until_s = max(self._stall_until_s, now_s + length_s)

    def is_stalled(self, now_s: float) -> bool:
        return now_s < self._stall_until_s or any(s.covers(now_s) for s in self.faults.stalls)

    def stall_changed(self, now_s: float) -> bool | None:
        """True when a stall began since the last call, False when one ended, else None."""
        stalled = self.is_stalled(now_s)
        if stalled == self._was_stalled:
            return None
        self._was_stalled = stalled
        return stalled

    # -- out -----------------------------------------------------------------------------

    def release(self, now_s: float) -> list[Delivery]:
        """Everything due by now_s, in order. During a stall nothing goes out: what comes due
        is dropped, or kept for the end of the stall with `hold_in_stall`."""
        stalled = self.is_stalled(now_s)
        if stalled and self.faults.hold_in_stall:
            self._held_up_to_s = now_s
            return []
        out: list[Delivery] = []
        c = self.counters
        while self._heap and self._heap[0][0] <= now_s:
            _, _, d = heapq.heappop(self._heap)
            if stalled:
                c.stalled += d.what == "message"
                continue
            if d.what == "message":
                c.forwarded += 1
                if d.at_s <= self._held_up_to_s:
                    c.held += 1
                    d = Delivery(d.at_s, d.frames, d.route, d.what, held=True)
            elif d.what == "duplicate":
                c.duplicated += 1
            else:
                c.garbage += 1
            out.append(d)
        return out

    def next_release_s(self) -> float | None:
        """When the next delivery is due (s), None when nothing waits."""
        return self._heap[0][0] if self._heap else None

    def queued(self) -> int:
        return len(self._heap)

    def forget(self, route: Hashable) -> int:
        """Drop everything queued for `route` (its peer is gone); returns how many."""
        keep = [e for e in self._heap if e[2].route != route]
        gone = len(self._heap) - len(keep)
        if gone:
            self._heap = keep
            heapq.heapify(self._heap)
        return gone


# ----------------------------------------------------------------------------------------
# Messages: kind and garbage
# ----------------------------------------------------------------------------------------

def message_kind(frames: Frames) -> str:
    """The protocol kind of a one-frame message, "invalid" for anything else."""
    if len(frames) != 1:
        return "invalid"
    try:
        msg = decode(frames[0])
    except ProtocolError:
        return "invalid"
    return type(msg).__name__.lower()


def _as_map(payload: bytes) -> dict | None:
    try:
        obj = msgpack.unpackb(payload, raw=False, strict_map_key=False)
    except Exception:  # noqa: BLE001 - whatever the bytes are, they are not a map
        return None
    return obj if isinstance(obj, dict) else None


def _pack(m: dict) -> bytes:
    return msgpack.packb(m, use_bin_type=True)


def make_garbage(frames: Frames, kind: str, rng: random.Random) -> Frames:
    """A malformed frame (or frame pair) derived from a message, invalid for `kind`'s reason.

    Only changes that the wire protocol must reject are made: a cut-off or extended msgpack
    value, a byte msgpack never uses, NaN, another version, an unknown field or kind, a
    wrong type or array length, an array over the size cap, two frames instead of one.
    A changed number that would still be a valid message (a bit flip inside a float) is
    never produced: a receiver could not tell it from a real command.
    """
    payload = frames[-1] if frames else b""
    m = _as_map(payload)
    if kind == "framing":
        return (payload, payload)
    if kind == "truncated":
        return (payload[:rng.randrange(len(payload))] if payload else b"",)
    if kind == "trailing":
        return (payload + rng.randbytes(rng.randint(1, 4)),)
    if kind == "not_msgpack" or m is None or "kind" not in m:
        return (b"\xc1" + rng.randbytes(rng.randint(0, 15)),)
    m = dict(m)
    names = [k for k in m if k not in ("v", "kind")]
    arrays = [k for k in names if isinstance(m[k], list) and m[k] and
              all(isinstance(x, float) for x in m[k])]
    if kind == "version":
        m["v"] = PROTOCOL_VERSION + rng.randint(1, 9)
    elif kind == "schema":
        m["extra"] = 0
    elif kind == "kind":
        m["kind"] = f"{m['kind']}_x"
    elif kind == "nonfinite" and arrays:
        key = rng.choice(arrays)
        m[key] = list(m[key])
        m[key][rng.randrange(len(m[key]))] = rng.choice((math.nan, math.inf, -math.inf))
    elif kind == "length" and arrays:
        key = rng.choice(arrays)
        m[key] = list(m[key]) + [0.0]
    elif kind == "oversize":
        m[rng.choice(arrays) if arrays else "extra"] = [0.0] * (MAX_JOINTS + 1)
    elif names:   # "type", and the array kinds for messages without float arrays
        key = rng.choice(names)
        m[key] = 1.5 if isinstance(m[key], str) else "?"
    else:
        m["v"] = PROTOCOL_VERSION + 1
    return (_pack(m),)


# ----------------------------------------------------------------------------------------
# Command-line values
# ----------------------------------------------------------------------------------------

_UNITS_S = {"us": 1e-6, "µs": 1e-6, "ms": 1e-3, "s": 1.0, "": 1.0}


def parse_duration_s(text: str, option: str) -> float:
    """`40ms`, `1.5s`, `200us` or a bare number of seconds → seconds (≥ 0)."""
    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*(us|µs|ms|s|)\s*", text)
    if m is None:
        raise ConfigError(f"{text!r} is not a duration (e.g. 40ms, 1.5s)", field=option)
    value = float(m.group(1)) * _UNITS_S[m.group(2)]
    if not math.isfinite(value):
        raise ConfigError(f"{text!r} is not a finite duration", field=option)
    return value


def parse_fraction(text: str, option: str) -> float:
    """`5%` or `0.05` → 0.05 (0…1)."""
    t = text.strip()
    try:
        value = float(t[:-1]) / 100.0 if t.endswith("%") else float(t)
    except ValueError:
        raise ConfigError(f"{text!r} is not a probability (e.g. 5% or 0.05)",
                          field=option) from None
    if not 0.0 <= value <= 1.0:
        raise ConfigError(f"{text!r} is outside 0…100 %", field=option)
    return value


def parse_stall(text: str, option: str = "stall") -> Stall:
    """`LENGTH[@AT[/EVERY]]`: `300ms` (on demand), `300ms@2s`, `300ms@2s/5s`."""
    length, _, when = text.partition("@")
    at, _, every = when.partition("/")
    return Stall(length_s=parse_duration_s(length, option),
                 at_s=parse_duration_s(at, option) if when else None,
                 every_s=parse_duration_s(every, option) if every else None)


def split_direction(text: str, option: str) -> tuple[tuple[str, ...], str]:
    """`rates=20%` → (("rates",), "20%"); `20%` → (DIRECTIONS, "20%")."""
    name, sep, value = text.partition("=")
    if not sep:
        return DIRECTIONS, text
    if name.strip() not in DIRECTIONS:
        raise ConfigError(f"{text!r}: the direction must be one of {', '.join(DIRECTIONS)} "
                          f"(rates: runtime → arm side, state: arm side → runtime)",
                          field=option)
    return (name.strip(),), value


_PARSERS = {"delay_s": parse_duration_s, "jitter_s": parse_duration_s, "loss": parse_fraction,
            "duplicate": parse_fraction, "reorder": parse_fraction,
            "reorder_hold_s": parse_duration_s, "garbage": parse_fraction}


def faults_from_options(options: dict[str, list[str]], *, hold_in_stall: bool = False
                        ) -> dict[str, LinkFaults]:
    """Per-direction faults from option values, e.g. {"loss": ["rates=20%"], "delay_s":
    ["40ms"], "stall": ["state=300ms@2s"], "garbage_burst": ["5"]}. A later value for the
    same direction replaces an earlier one; stalls add up."""
    values: dict[str, dict[str, Any]] = {d: {"hold_in_stall": hold_in_stall, "stalls": []}
                                         for d in DIRECTIONS}
    for name, texts in options.items():
        option = "faults-from" if name == "from_s" else name.removesuffix("_s").replace("_", "-")
        for text in texts:
            directions, value = split_direction(text, option)
            if name == "stall":
                parsed: Any = parse_stall(value, option)
            elif name == "from_s":
                parsed = math.inf if value.strip() == "signal" else parse_duration_s(value, option)
            elif name == "garbage_kinds":
                parsed = tuple(k.strip() for k in value.split(",") if k.strip())
            elif name == "garbage_burst":
                try:
                    parsed = int(value)
                except ValueError:
                    raise ConfigError(f"{value!r} is not a whole number", field=option) from None
            elif name in _PARSERS:
                parsed = _PARSERS[name](value, option)
            else:
                raise ConfigError(f"unknown fault {name!r}", field=option)
            for d in directions:
                if name == "stall":
                    values[d]["stalls"].append(parsed)
                else:
                    values[d][name] = parsed
    out = {}
    for d in DIRECTIONS:
        v = values[d]
        v["stalls"] = tuple(v["stalls"])
        out[d] = LinkFaults(**v)
    return out
