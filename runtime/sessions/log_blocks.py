"""Cycle blocks: many cycle records stored column by column (session format 2).

A block is one frame of the log holding every cycle record of one flush. Each field is one
column for the whole block, numbers as little-endian binary, and the columns together are
compressed with zlib. Encoding works in bulk with numpy, one column at a time: no
Python-level work per record beyond collecting each field's values.

Eight-byte numbers (float64, int64) are stored as deltas of their bit patterns down each
column (XOR with the previous row, or the second difference), then byte plane by byte
plane (all least significant bytes first). Successive cycles differ in their low bits
only, so the high planes become long runs of zero bytes that zlib squeezes to almost
nothing; the round trip is bit-exact (NaN payloads and -0.0 included). Decoding is
`log_blocks_decode`. docs/SESSION_FORMAT.md gives the layout byte for byte; `COLUMNS` is
the list it documents (tests/runtime/sessions/test_session_format_doc.py keeps the two in
step)"""

from __future__ import annotations

import struct
import zlib
from dataclasses import dataclass, field
from itertools import chain
from operator import attrgetter
from typing import Any, Callable, Mapping, Sequence

import msgpack
import numpy as np

from ..errors import LogError
from .log_schema import CycleRecord

BLOCK_KIND = "cycles"
CODEC = "zlib"
MAX_BLOCK_ROWS = 1 << 20        # more rows in one block is corruption, not a flush
ZLIB_LEVEL = 6                  # zlib's default; 9 gained < 1 % on the demo log

# Column types (docs/SESSION_FORMAT.md, "Column types").
F8, I8, F8_OPT, BOOL, STR, F8_LIST, BOOL_LIST, STR_F8_MAP, MSGPACK = (
    "f8", "i8", "f8?", "bool", "str", "f8[]", "bool[]", "str:f8", "msgpack")
COLUMN_TYPES = (F8, I8, F8_OPT, BOOL, STR, F8_LIST, BOOL_LIST, STR_F8_MAP, MSGPACK)
# Deltas of eight-byte columns: XOR for noisy measurements (timing, tracking error),
# DELTA2 (second difference) for smooth signals (poses, rates, time, counters); measured
# on the demo session: 89 bytes a cycle with the choice below, 102 with XOR throughout.
XOR, DELTA2 = "xor", "delta2"
SMOOTH = frozenset({"cycle", "t_s", "q", "rates", "sigma_min", "manipulability", "twist",
                    "overrun_streak"})

# The columns of a version 2 cycle block, in the order written: (field, type).
COLUMNS: tuple[tuple[str, str], ...] = (
    ("cycle", I8), ("t_s", F8), ("axes", F8_LIST), ("buttons", BOOL_LIST),
    ("enabled", BOOL), ("enable_reason", STR), ("twist", F8_LIST), ("frame", STR),
    ("q", F8_LIST), ("rates", F8_LIST), ("damping", F8), ("sigma_min", F8),
    ("manipulability", F8), ("achieved_twist", F8_LIST), ("tracking_error", F8),
    ("scales", STR_F8_MAP), ("binding_limit", STR), ("period_s", F8), ("compute_s", F8),
    ("overrun", BOOL), ("reduced", BOOL), ("input", MSGPACK), ("state_age_s", F8_OPT),
    ("overrun_streak", I8), ("safety_state", STR),
    ("min_clearance_m", F8_OPT), ("clearance_arm", STR), ("clearance_other", STR),
)
FIELDS = tuple(name for name, _ in COLUMNS)
# Columns added within version 2: a block written before them reads as all nil there.
ADDED_COLUMNS = frozenset({"min_clearance_m", "clearance_arm", "clearance_other"})
_NULLABLE_STR = {"binding_limit", "clearance_arm", "clearance_other"}
_LAYOUT_LENGTH = struct.Struct("<I")
_u4 = np.dtype("<u4")
_u8 = np.dtype("<u8")


# ----------------------------------------------------------------------------------------
# Decoded columns
# ----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Strings:
    """A dictionary-coded text column: row i is `table[codes[i]]` (None allowed)."""

    codes: np.ndarray
    table: tuple[str | None, ...]

    def tolist(self) -> list[str | None]:
        return [self.table[c] for c in self.codes.tolist()]


@dataclass(frozen=True)
class Ragged:
    """A list per row, stored flat: row i is flat[starts[i]:starts[i] + lengths[i]]."""

    lengths: np.ndarray
    flat: np.ndarray

    def uniform(self, width: int) -> np.ndarray | None:
        """The rows as an (n, width) matrix, or None if any row has another length."""
        if self.lengths.size and not np.all(self.lengths == width):
            return None
        return self.flat.reshape(len(self.lengths), width)

    def rows(self) -> list[tuple[Any, ...]]:
        values = self.flat.tolist()
        ends = np.cumsum(self.lengths).tolist()
        return [tuple(values[e - k:e]) for e, k in zip(ends, self.lengths.tolist())]


@dataclass(frozen=True)
class KeyedFloats:
    """A text → float map per row: the keys dictionary-coded, the values flat in key order."""

    codes: np.ndarray
    keys: tuple[tuple[str, ...], ...]
    flat: np.ndarray

    def rows(self) -> list[dict[str, float]]:
        values = self.flat.tolist()
        out, at = [], 0
        for code in self.codes.tolist():
            names = self.keys[code]
            out.append(dict(zip(names, values[at:at + len(names)])))
            at += len(names)
        return out

    def names(self) -> set[str]:
        used = np.unique(self.codes).tolist()
        return {name for code in used for name in self.keys[code]}


@dataclass(frozen=True)
class Objects:
    """A msgpack column not decoded yet: segments (msgpack array of n values, lo, hi), the
    column being values lo … hi − 1 of each array in turn. Decoded on first use."""

    segments: tuple[tuple[bytes, int, int, int], ...]

    def tolist(self) -> list[Any]:
        out: list[Any] = []
        for data, n, lo, hi in self.segments:
            values = msgpack.unpackb(data, raw=False)
            if not isinstance(values, list) or len(values) != n:
                raise LogError(f"a msgpack column is not a list of {n} values")
            if any(v is not None and not isinstance(v, dict) for v in values[lo:hi]):
                raise LogError("a msgpack column holds a value that is not a map")
            out += values[lo:hi]
        return out

    def rows(self, start: int, stop: int) -> "Objects":
        kept, at = [], 0
        for data, n, lo, hi in self.segments:
            a, b = max(lo, lo + start - at), min(hi, lo + stop - at)
            if a < b:
                kept.append((data, n, a, b))
            at += hi - lo
        return Objects(tuple(kept))


@dataclass(frozen=True)
class CycleBlock:
    """Cycle records column by column, by field name: an ndarray for f8, i8 and bool; a
    (present, values) pair of ndarrays for f8?; `Strings`, `Ragged` (f8[], bool[]),
    `KeyedFloats` (str:f8) and a list of maps or None (msgpack; `Objects` until first
    asked for)."""

    n: int
    columns: dict[str, Any] = field(repr=False)

    def __getitem__(self, name: str) -> Any:
        col = self.columns[name]
        if isinstance(col, Objects):
            col = self.columns[name] = col.tolist()
        return col

    def matrix(self, name: str, width: int) -> np.ndarray:
        """A list column as an (n, width) float matrix (LogError if a row differs)."""
        m = self.columns[name].uniform(width)
        if m is None:
            raise LogError(f"{name}: rows of other lengths than {width}")
        return m

    def take(self, keep: np.ndarray) -> "CycleBlock":
        """The rows where `keep` (a boolean mask) is true."""
        if keep.all():
            return self
        return CycleBlock(int(keep.sum()), {k: _take(c, keep) for k, c in self.columns.items()})

    def rows(self, start: int, stop: int) -> "CycleBlock":
        """Rows start … stop − 1."""
        start, stop = max(0, start), min(self.n, stop)
        if (start, stop) == (0, self.n):
            return self
        return CycleBlock(max(0, stop - start),
                          {k: _slice(c, start, stop) for k, c in self.columns.items()})

    @classmethod
    def concat(cls, blocks: Sequence["CycleBlock"]) -> "CycleBlock":
        """The rows of `blocks`, in order, as one block."""
        if len(blocks) == 1:
            return blocks[0]
        return cls(sum(b.n for b in blocks),
                   {name: _concat([b.columns[name] for b in blocks]) for name in FIELDS})

    def records(self) -> list[CycleRecord]:
        """The block as CycleRecords (Python objects per row: for replay-sized logs)."""
        per_field = [_as_rows(self[name]) for name in FIELDS]
        return [CycleRecord(*row) for row in zip(*per_field)]

    @classmethod
    def from_records(cls, records: Sequence[CycleRecord]) -> "CycleBlock":
        """Gather records into columns. Raises (TypeError, ValueError, LogError) on a
        value that does not fit its column."""
        return cls.from_rows(list(map(attrgetter(*FIELDS), records)))

    @classmethod
    def from_rows(cls, rows: Sequence[Sequence[Any]]) -> "CycleBlock":
        """Gather rows of field values in FIELDS order into columns: a record's values, or
        a `log_schema.cycle_row` (whose float rows may still be arrays: the same column).
        Raises as `from_records` does."""
        fields = zip(*rows) if rows else [()] * len(COLUMNS)
        cols = {}
        for (name, kind), vals in zip(COLUMNS, fields):
            cols[name] = _GATHER[kind](vals)
            if kind == STR:
                check_table(name, cols[name].table)
        return cls(len(rows), cols)


def check_table(name: str, table: Sequence[Any]) -> None:
    allowed = (str, type(None)) if name in _NULLABLE_STR else (str,)
    for v in table:
        if not isinstance(v, allowed):
            raise TypeError(f"{name}: {v!r} is not text")


def _slice(col: Any, start: int, stop: int) -> Any:
    if isinstance(col, (np.ndarray, list)):
        return col[start:stop]
    if isinstance(col, tuple):                       # f8?: (present, values)
        return col[0][start:stop], col[1][start:stop]
    if isinstance(col, Strings):
        return Strings(col.codes[start:stop], col.table)
    if isinstance(col, Objects):
        return col.rows(start, stop)
    if isinstance(col, Ragged):
        ends = np.cumsum(col.lengths, dtype=np.int64)
        return Ragged(col.lengths[start:stop], col.flat[_flat_range(ends, start, stop)])
    widths = np.array([len(k) for k in col.keys] or [0], dtype=np.int64)[col.codes]
    ends = np.cumsum(widths)
    return KeyedFloats(col.codes[start:stop], col.keys, col.flat[_flat_range(ends, start, stop)])


def _flat_range(ends: np.ndarray, start: int, stop: int) -> slice:
    """The flat values of rows start … stop − 1, given each row's end offset."""
    first = int(ends[start - 1]) if start > 0 else 0
    last = int(ends[stop - 1]) if stop > 0 else 0
    return slice(first, max(first, last))


def _take(col: Any, keep: np.ndarray) -> Any:
    if isinstance(col, Objects):
        col = col.tolist()
    if isinstance(col, np.ndarray):
        return col[keep]
    if isinstance(col, tuple):                       # f8?: (present, values)
        return col[0][keep], col[1][keep]
    if isinstance(col, Strings):
        return Strings(col.codes[keep], col.table)
    if isinstance(col, list):
        return [v for v, k in zip(col, keep.tolist()) if k]
    if isinstance(col, Ragged):
        return Ragged(col.lengths[keep], col.flat[np.repeat(keep, col.lengths)])
    widths = np.array([len(k) for k in col.keys] or [0], dtype=np.int64)[col.codes]
    return KeyedFloats(col.codes[keep], col.keys, col.flat[np.repeat(keep, widths)])


def _concat(parts: list[Any]) -> Any:
    if all(isinstance(p, Objects) for p in parts):
        return Objects(tuple(chain.from_iterable(p.segments for p in parts)))
    parts = [p.tolist() if isinstance(p, Objects) else p for p in parts]
    first = parts[0]
    if isinstance(first, np.ndarray):
        return np.concatenate(parts)
    if isinstance(first, tuple):                     # f8?: (present, values)
        return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])
    if isinstance(first, list):
        return list(chain.from_iterable(parts))
    if isinstance(first, Ragged):
        return Ragged(np.concatenate([p.lengths for p in parts]),
                      np.concatenate([p.flat for p in parts]))
    if isinstance(first, Strings):
        codes, table = merge_tables([(p.codes, p.table) for p in parts])
        return Strings(codes, table)
    codes, keys = merge_tables([(p.codes, p.keys) for p in parts])
    return KeyedFloats(codes, keys, np.concatenate([p.flat for p in parts]))


def merge_tables(parts: list[tuple[np.ndarray, tuple[Any, ...]]]
                  ) -> tuple[np.ndarray, tuple[Any, ...]]:
    """Dictionary-coded parts re-coded against one table."""
    table = tuple(dict.fromkeys(chain.from_iterable(t for _, t in parts)))
    index = {v: i for i, v in enumerate(table)}
    codes = [np.array([index[v] for v in t], dtype=_u4)[c] if len(t) else c.astype(_u4)
             for c, t in parts]
    return np.concatenate(codes), table


def _as_rows(col: Any) -> list[Any]:
    """One Python value per row, as CycleRecord holds it (Objects already decoded)."""
    if isinstance(col, np.ndarray):
        return col.tolist()
    if isinstance(col, tuple):
        present, values = col
        return [v if p else None for p, v in zip(present.tolist(), values.tolist())]
    if isinstance(col, Strings):
        return col.tolist()
    if isinstance(col, list):
        return col
    return col.rows()


# ----------------------------------------------------------------------------------------
# Gathering record values into columns (writer side)
# ----------------------------------------------------------------------------------------

def _dictionary(values: Sequence[Any]) -> tuple[np.ndarray, list[Any]]:
    n = len(values)
    if n and values.count(values[0]) == n:      # one value throughout: the usual block
        return np.zeros(n, _u4), [values[0]]
    table = list(dict.fromkeys(values))
    index = {v: i for i, v in enumerate(table)}
    return np.fromiter(map(index.__getitem__, values), _u4, len(values)), table


def _gather_str(vals: Sequence[Any]) -> Strings:
    codes, table = _dictionary(vals)
    return Strings(codes, tuple(table))


def _gather_list(dtype: Any) -> Callable[[Sequence[Any]], Ragged]:
    def gather(vals: Sequence[Any]) -> Ragged:
        lengths = np.fromiter(map(len, vals), _u4, len(vals))
        if len(vals) and lengths.min() == lengths.max() > 0:    # rows of one length
            flat = np.array(vals, dtype).reshape(-1)
        else:
            flat = np.fromiter(chain.from_iterable(vals), dtype, int(lengths.sum()))
        return Ragged(lengths, flat)
    return gather


def _gather_map(vals: Sequence[Mapping[str, float]]) -> KeyedFloats:
    codes, keys = _dictionary(list(map(tuple, vals)))
    for names in keys:
        check_table("scales", names)
    flat = np.fromiter(chain.from_iterable(m.values() for m in vals), np.float64)
    return KeyedFloats(codes, tuple(keys), flat)


def _gather_optional(vals: Sequence[float | None]) -> tuple[np.ndarray, np.ndarray]:
    n = len(vals)
    if vals.count(None) == n:                      # absent throughout (no workcell)
        return np.zeros(n, bool), np.zeros(n)
    if None not in vals:
        return np.ones(n, bool), np.array(vals, dtype=np.float64).reshape(n)
    present = np.fromiter((v is not None for v in vals), bool, len(vals))
    values = np.fromiter((0.0 if v is None else v for v in vals), np.float64, len(vals))
    return present, values


def _gather_objects(vals: Sequence[Any]) -> list[Any]:
    return [None if v is None else dict(v) for v in vals]


_GATHER: dict[str, Callable[[Sequence[Any]], Any]] = {
    F8: lambda vals: np.array(vals, dtype=np.float64).reshape(len(vals)),
    I8: lambda vals: np.array(vals, dtype=np.int64).reshape(len(vals)),
    BOOL: lambda vals: np.array(vals, dtype=bool).reshape(len(vals)),
    F8_OPT: _gather_optional,
    STR: _gather_str,
    F8_LIST: _gather_list(np.float64),
    BOOL_LIST: _gather_list(bool),
    STR_F8_MAP: _gather_map,
    MSGPACK: _gather_objects,
}


# ----------------------------------------------------------------------------------------
# Bytes
# ----------------------------------------------------------------------------------------

def pack_eight(values: np.ndarray, stride: int, delta: str) -> bytes:
    """Eight-byte values → deltas of their bit patterns per component (`stride` values a
    row, the row before the first taken as zeros) → byte planes, least significant first."""
    bits = np.ascontiguousarray(values).view(_u8).reshape(-1, stride)
    if delta == XOR:
        bits = bits ^ _shifted(bits)
    else:                              # DELTA2: second difference, wrapping modulo 2**64
        bits = bits - _shifted(bits)
        bits = bits - _shifted(bits)
    return bits.reshape(-1).view(np.uint8).reshape(-1, 8).T.tobytes()


def _shifted(rows: np.ndarray) -> np.ndarray:
    """The rows moved down by one, zeros first."""
    out = np.zeros_like(rows)
    out[1:] = rows[:-1]
    return out


def _stride(lengths: np.ndarray) -> int:
    """The common row length of a list column (1 when rows differ or are empty)."""
    if lengths.size and int(lengths[0]) > 0 and np.all(lengths == lengths[0]):
        return int(lengths[0])
    return 1


def encode_block(block: CycleBlock) -> dict[str, Any]:
    """The msgpack map of a cycle block (the payload of its frame)."""
    return block_map(block.n, pack_block(block))


def pack_block(block: CycleBlock) -> "PackedColumns":
    """The columns of a gathered block, packed (`block_map` compresses them)."""
    return [_pack_column(name, kind, block.columns[name]) for name, kind in COLUMNS]


PackedColumns = list[tuple[dict[str, Any], bytes]]
"""Each column's layout map and bytes, in COLUMNS order: a block before compression."""


def encode_records(records: Sequence[CycleRecord], pause: Callable[[], None] | None = None
                   ) -> dict[str, Any]:
    """The block map of `records` (`pack_records`, then `block_map`)."""
    return block_map(len(records), pack_records(records, pause))


def pack_records(records: Sequence[CycleRecord], pause: Callable[[], None] | None = None
                 ) -> PackedColumns:
    """The columns of `records`, gathered and packed one at a time, calling `pause()`
    between columns: a writer thread sleeps there, so that it never holds the interpreter
    lock for longer than one column while the control loop wants it. Raises for a record
    that cannot be encoded; `block_map` never does."""
    packed = []
    for name, kind in COLUMNS:
        col = _GATHER[kind](list(map(attrgetter(name), records)))
        if kind == STR:
            check_table(name, col.table)
        packed.append(_pack_column(name, kind, col))
        if pause is not None:
            pause()
    return packed


def block_map(n: int, packed: PackedColumns) -> dict[str, Any]:
    """The block map of `n` records' packed columns: the layout, then the compressed body
    (zlib works without the interpreter lock, so another thread may run meanwhile)."""
    layout = msgpack.packb([desc for desc, _ in packed], use_bin_type=True)
    body = b"".join([_LAYOUT_LENGTH.pack(len(layout)), layout] + [data for _, data in packed])
    return {"kind": BLOCK_KIND, "count": n, "codec": CODEC,
            "body": zlib.compress(body, ZLIB_LEVEL)}


def _pack_column(name: str, kind: str, col: Any) -> tuple[dict[str, Any], bytes]:
    """A column's layout map and bytes (docs/SESSION_FORMAT.md, "Column types")."""
    desc: dict[str, Any] = {"name": name, "type": kind}
    if kind in (F8, I8, F8_OPT, F8_LIST, STR_F8_MAP):
        desc["delta"] = DELTA2 if name in SMOOTH else XOR
    if kind in (F8, I8):
        data = pack_eight(col, 1, desc["delta"])
    elif kind == BOOL:
        data = col.astype(np.uint8).tobytes()
    elif kind == F8_OPT:
        data = col[0].astype(np.uint8).tobytes() + pack_eight(col[1], 1, desc["delta"])
    elif kind == STR:
        desc["values"] = list(col.table)
        data = col.codes.astype(_u4).tobytes()
    elif kind == F8_LIST:
        desc["stride"] = _stride(col.lengths)
        data = (col.lengths.astype(_u4).tobytes()
                + pack_eight(col.flat, desc["stride"], desc["delta"]))
    elif kind == BOOL_LIST:
        data = col.lengths.astype(_u4).tobytes() + col.flat.astype(np.uint8).tobytes()
    elif kind == STR_F8_MAP:
        desc["keys"] = [list(k) for k in col.keys]
        desc["stride"] = len(col.keys[0]) if len(col.keys) == 1 and col.keys[0] else 1
        data = (col.codes.astype(_u4).tobytes()
                + pack_eight(col.flat, desc["stride"], desc["delta"]))
    else:
        data = msgpack.packb(col, use_bin_type=True)
    desc["size"] = len(data)
    return desc, data
