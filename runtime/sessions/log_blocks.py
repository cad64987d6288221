"""Cycle blocks: many cycle records stored column by column (session format 2).

A block is one frame of the log holding every cycle record of one flush. Each field is one
column for the whole block, numbers as little-endian binary, and the columns together are
compressed with zlib. Encoding and decoding are done in bulk with numpy: no Python-level
work per record beyond gathering the field values (`operator.attrgetter`, `zip`).

Eight-byte numbers (float64, int64) are stored as the XOR of each value's bits with the
value `stride` places before it, then byte plane by byte plane (all least significant bytes
first). Successive cycles differ in their low bits only, so the high planes become long
runs of zero bytes that zlib squeezes to almost nothing; the round trip is bit-exact (NaN
payloads and -0.0 included). docs/SESSION_FORMAT.md gives the layout byte for byte;
`COLUMNS` is the list it documents (tests/runtime/sessions/test_session_format_doc.py keeps
the two in step).
"""

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
ZLIB_LEVEL = 6                  # zlib's default; 9 gains ~2 % for three times the time

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
)
FIELDS = tuple(name for name, _ in COLUMNS)
_NULLABLE_STR = {"binding_limit"}
_LAYOUT_LENGTH = struct.Struct("<I")
MAX_BODY_BYTES = 256 * 1024 * 1024   # an inflated block larger than this is corruption
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
class CycleBlock:
    """Cycle records column by column, by field name: an ndarray for f8, i8 and bool; a
    (present, values) pair of ndarrays for f8?; `Strings`, `Ragged` (f8[], bool[]),
    `KeyedFloats` (str:f8) and a list of maps or None (msgpack)."""

    n: int
    columns: dict[str, Any] = field(repr=False)

    def __getitem__(self, name: str) -> Any:
        return self.columns[name]

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
        keep = np.zeros(self.n, dtype=bool)
        keep[start:stop] = True
        return self.take(keep)

    @classmethod
    def concat(cls, blocks: Sequence["CycleBlock"]) -> "CycleBlock":
        """The rows of `blocks`, in order, as one block."""
        if len(blocks) == 1:
            return blocks[0]
        return cls(sum(b.n for b in blocks),
                   {name: _concat([b.columns[name] for b in blocks]) for name in FIELDS})

    def records(self) -> list[CycleRecord]:
        """The block as CycleRecords (Python objects per row: for replay-sized logs)."""
        per_field = [_as_rows(self.columns[name]) for name in FIELDS]
        return [CycleRecord(*row) for row in zip(*per_field)]

    @classmethod
    def from_records(cls, records: Sequence[CycleRecord]) -> "CycleBlock":
        """Gather records into columns. Raises (TypeError, ValueError, LogError) on a
        value that does not fit its column."""
        n = len(records)
        if n == 0:
            return cls(0, {name: _GATHER[kind](()) for name, kind in COLUMNS})
        values = zip(*map(attrgetter(*FIELDS), records))
        cols = {}
        for (name, kind), vals in zip(COLUMNS, values):
            cols[name] = _GATHER[kind](vals)
            if kind == STR:
                _check_table(name, cols[name].table)
        return cls(n, cols)


def _check_table(name: str, table: Sequence[Any]) -> None:
    allowed = (str, type(None)) if name in _NULLABLE_STR else (str,)
    for v in table:
        if not isinstance(v, allowed):
            raise TypeError(f"{name}: {v!r} is not text")


def _take(col: Any, keep: np.ndarray) -> Any:
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
    widths = np.array([len(col.keys[c]) for c in col.codes.tolist()], dtype=np.int64)
    return KeyedFloats(col.codes[keep], col.keys, col.flat[np.repeat(keep, widths)])


def _concat(parts: list[Any]) -> Any:
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
        codes, table = _merge_tables([(p.codes, p.table) for p in parts])
        return Strings(codes, table)
    codes, keys = _merge_tables([(p.codes, p.keys) for p in parts])
    return KeyedFloats(codes, keys, np.concatenate([p.flat for p in parts]))


def _merge_tables(parts: list[tuple[np.ndarray, tuple[Any, ...]]]
                  ) -> tuple[np.ndarray, tuple[Any, ...]]:
    """Dictionary-coded parts re-coded against one table."""
    table = tuple(dict.fromkeys(chain.from_iterable(t for _, t in parts)))
    index = {v: i for i, v in enumerate(table)}
    codes = [np.array([index[v] for v in t], dtype=_u4)[c] if len(t) else c.astype(_u4)
             for c, t in parts]
    return np.concatenate(codes), table


def _as_rows(col: Any) -> list[Any]:
    """One Python value per row, as CycleRecord holds it."""
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
    table = list(dict.fromkeys(values))
    index = {v: i for i, v in enumerate(table)}
    return np.fromiter(map(index.__getitem__, values), _u4, len(values)), table


def _gather_str(vals: Sequence[Any]) -> Strings:
    codes, table = _dictionary(vals)
    return Strings(codes, tuple(table))


def _gather_list(dtype: Any) -> Callable[[Sequence[Any]], Ragged]:
    def gather(vals: Sequence[Any]) -> Ragged:
        lengths = np.fromiter(map(len, vals), _u4, len(vals))
        flat = np.fromiter(chain.from_iterable(vals), dtype, int(lengths.sum()))
        return Ragged(lengths, flat)
    return gather


def _gather_map(vals: Sequence[Mapping[str, float]]) -> KeyedFloats:
    codes, keys = _dictionary(list(map(tuple, vals)))
    for names in keys:
        _check_table("scales", names)
    flat = np.fromiter(chain.from_iterable(m.values() for m in vals), np.float64)
    return KeyedFloats(codes, tuple(keys), flat)


def _gather_optional(vals: Sequence[float | None]) -> tuple[np.ndarray, np.ndarray]:
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


def unpack_eight(data: bytes, stride: int, delta: str, dtype: Any) -> np.ndarray:
    """The inverse of `pack_eight`: len(data) / 8 values of `dtype`."""
    m = len(data) // 8
    bits = np.frombuffer(data, np.uint8).reshape(8, m).T.copy().view(_u8).reshape(-1, stride)
    if delta == XOR:
        bits = np.bitwise_xor.accumulate(bits, axis=0)
    elif delta == DELTA2:
        bits = np.cumsum(np.cumsum(bits, axis=0, dtype=_u8), axis=0, dtype=_u8)
    else:
        raise LogError(f"unknown delta {delta!r}")
    return bits.reshape(m).view(dtype)


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
    return _block_map(block.n, [_pack_column(name, kind, block.columns[name])
                                for name, kind in COLUMNS])


def encode_records(records: Sequence[CycleRecord], pause: Callable[[], None] | None = None
                   ) -> dict[str, Any]:
    """The block map of `records`, gathered and packed one column at a time, calling
    `pause()` between columns: a writer thread sleeps there, so that it never holds the
    interpreter lock for longer than one column while the control loop wants it."""
    packed = []
    for name, kind in COLUMNS:
        col = _GATHER[kind](list(map(attrgetter(name), records)))
        if kind == STR:
            _check_table(name, col.table)
        packed.append(_pack_column(name, kind, col))
        if pause is not None:
            pause()
    return _block_map(len(records), packed)


def _block_map(n: int, packed: list[tuple[dict[str, Any], bytes]]) -> dict[str, Any]:
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


def decode_block(m: Mapping[str, Any]) -> CycleBlock:
    """The CycleBlock of a block map; LogError says what is wrong with a malformed one."""
    n = m.get("count")
    if type(n) is not int or not 0 <= n <= MAX_BLOCK_ROWS:
        raise LogError(f"implausible row count {n!r}")
    if m.get("codec") != CODEC:
        raise LogError(f"unknown codec {m.get('codec')!r}")
    body = _inflate(m.get("body"))
    if len(body) < _LAYOUT_LENGTH.size:
        raise LogError("block body shorter than its layout length")
    (length,) = _LAYOUT_LENGTH.unpack_from(body)
    at = _LAYOUT_LENGTH.size + length
    described = msgpack.unpackb(body[_LAYOUT_LENGTH.size:at], raw=False)
    if not isinstance(described, list) or not all(isinstance(d, dict) for d in described):
        raise LogError("block layout is not a list of column maps")
    cols = {}
    for desc in described:
        size = desc.get("size")
        if type(size) is not int or size < 0 or at + size > len(body):
            raise LogError(f"column {desc.get('name')!r}: size {size!r} beyond the block")
        chunk = body[at:at + size]
        at += size
        decoder = _DECODERS.get(desc.get("type"))   # unknown types: a newer writer's column
        if decoder is not None:
            cols[desc["name"]] = decoder(chunk, n, desc)
    if at != len(body):
        raise LogError(f"block body has {len(body) - at} bytes after its columns")
    missing = [name for name in FIELDS if name not in cols]
    if missing:
        raise LogError(f"cycle block has no column {missing[0]!r}")
    return CycleBlock(n, cols)


def _inflate(data: Any) -> bytes:
    if not isinstance(data, bytes):
        raise LogError("block body is not binary")
    inflater = zlib.decompressobj()
    out = inflater.decompress(data, MAX_BODY_BYTES)    # bounded: damage cannot balloon memory
    if not inflater.eof or inflater.unused_data:
        raise LogError("block body is not one complete zlib stream")
    return out


def _expect(chunk: bytes, size: int, what: str) -> None:
    if len(chunk) != size:
        raise LogError(f"{what}: {len(chunk)} bytes, expected {size}")


def _lengths(chunk: bytes, n: int, desc: Mapping[str, Any], item: int) -> tuple[np.ndarray, bytes]:
    if len(chunk) < 4 * n:
        raise LogError(f"{desc['name']}: too short for {n} row lengths")
    lengths = np.frombuffer(chunk, _u4, n)
    rest = chunk[4 * n:]
    _expect(rest, int(lengths.sum(dtype=np.int64)) * item, desc["name"])
    return lengths, rest


def _decode_eight(dtype: Any) -> Callable[[bytes, int, Mapping[str, Any]], np.ndarray]:
    def decode(chunk: bytes, n: int, desc: Mapping[str, Any]) -> np.ndarray:
        _expect(chunk, 8 * n, desc["name"])
        return unpack_eight(chunk, 1, desc["delta"], dtype)
    return decode


def _decode_bool(chunk: bytes, n: int, desc: Mapping[str, Any]) -> np.ndarray:
    _expect(chunk, n, desc["name"])
    return np.frombuffer(chunk, np.uint8) != 0


def _decode_optional(chunk: bytes, n: int, desc: Mapping[str, Any]
                     ) -> tuple[np.ndarray, np.ndarray]:
    _expect(chunk, 9 * n, desc["name"])
    return (np.frombuffer(chunk[:n], np.uint8) != 0,
            unpack_eight(chunk[n:], 1, desc["delta"], np.float64))


def _codes(chunk: bytes, n: int, table_size: int, what: str) -> np.ndarray:
    codes = np.frombuffer(chunk[:4 * n], _u4)
    if len(codes) != n or (n and int(codes.max()) >= table_size):
        raise LogError(f"{what}: codes out of range")
    return codes


def _decode_str(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Strings:
    table = tuple(desc["values"])
    _check_table(desc["name"], table)
    _expect(chunk, 4 * n, desc["name"])
    return Strings(_codes(chunk, n, len(table), desc["name"]), table)


def _decode_f8_list(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Ragged:
    lengths, rest = _lengths(chunk, n, desc, 8)
    stride = _checked_stride(desc, len(rest) // 8)
    return Ragged(lengths, unpack_eight(rest, stride, desc["delta"], np.float64))


def _decode_bool_list(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Ragged:
    lengths, rest = _lengths(chunk, n, desc, 1)
    return Ragged(lengths, np.frombuffer(rest, np.uint8) != 0)


def _decode_map(chunk: bytes, n: int, desc: Mapping[str, Any]) -> KeyedFloats:
    keys = tuple(tuple(k) for k in desc["keys"])
    for names in keys:
        _check_table(desc["name"], names)
    codes = _codes(chunk, n, len(keys), desc["name"])
    widths = np.array([len(k) for k in keys], dtype=np.int64)
    rest = chunk[4 * n:]
    _expect(rest, int(widths[codes].sum()) * 8 if n else 0, desc["name"])
    stride = _checked_stride(desc, len(rest) // 8)
    return KeyedFloats(codes, keys, unpack_eight(rest, stride, desc["delta"], np.float64))


def _checked_stride(desc: Mapping[str, Any], count: int) -> int:
    stride = desc.get("stride", 1)
    if type(stride) is not int or stride < 1 or (count and count % stride):
        raise LogError(f"{desc['name']}: stride {stride!r} does not divide {count} values")
    return stride


def _decode_objects(chunk: bytes, n: int, desc: Mapping[str, Any]) -> list[Any]:
    values = msgpack.unpackb(chunk, raw=False)
    if not isinstance(values, list) or len(values) != n:
        raise LogError(f"{desc['name']}: not a list of {n} values")
    if any(v is not None and not isinstance(v, dict) for v in values):
        raise LogError(f"{desc['name']}: a value is not a map")
    return values


_DECODERS: dict[str, Callable[[bytes, int, Mapping[str, Any]], Any]] = {
    F8: _decode_eight(np.float64), I8: _decode_eight(np.int64), BOOL: _decode_bool,
    F8_OPT: _decode_optional, STR: _decode_str, F8_LIST: _decode_f8_list,
    BOOL_LIST: _decode_bool_list, STR_F8_MAP: _decode_map, MSGPACK: _decode_objects,
}
