"""Decoding cycle blocks (session format 2), many at a time.

`parse_block` checks one block map completely (inflates it, reads its layout, checks every
column's size, row lengths, strides and dictionary codes) without decoding the values, so a
damaged block is refused on its own. `decode_blocks` then decodes a run of parsed blocks
together: each column of all of them in a few numpy calls (the deltas are undone with one
running XOR or sum over the run, corrected at each block's start), which is what lets
`jogwire inspect` read an hour-long log in seconds. The input column (msgpack) is decoded
only when asked for. The layout is docs/SESSION_FORMAT.md's.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import msgpack
import numpy as np

from ..errors import LogError
from .log_blocks import (
    ADDED_COLUMNS,
    BOOL,
    BOOL_LIST,
    CODEC,
    COLUMNS,
    DELTA2,
    F8,
    F8_LIST,
    F8_OPT,
    I8,
    MAX_BLOCK_ROWS,
    MSGPACK,
    STR,
    STR_F8_MAP,
    XOR,
    CycleBlock,
    KeyedFloats,
    Objects,
    Ragged,
    Strings,
    check_table,
    merge_tables,
)

MAX_BODY_BYTES = 256 * 1024 * 1024   # an inflated block larger than this is corruption
_LAYOUT_LENGTH_BYTES = 4
_u4 = np.dtype("<u4")
_u8 = np.dtype("<u8")
_EIGHT = {F8: np.float64, I8: np.int64}


@dataclass(frozen=True)
class Part:
    """One block's column, checked: its bytes split into what its type holds."""

    n: int
    desc: Mapping[str, Any]
    head: bytes          # flags, row lengths or codes before the eight-byte values, or b""
    values: bytes        # the values: eight-byte (deltas in byte planes) or flags, or b""
    stride: int


@dataclass(frozen=True)
class ParsedBlock:
    n: int
    parts: dict[str, Part]


def decode_block(m: Mapping[str, Any]) -> CycleBlock:
    """The CycleBlock of one block map (LogError if it is malformed)."""
    return decode_blocks([parse_block(m)])


def parse_block(m: Mapping[str, Any]) -> ParsedBlock:
    """Check a block map down to every column's sizes and codes; LogError says what is
    wrong. Columns of a type this version does not know are skipped."""
    n = m.get("count")
    if type(n) is not int or not 0 <= n <= MAX_BLOCK_ROWS:
        raise LogError(f"implausible row count {n!r}")
    if m.get("codec") != CODEC:
        raise LogError(f"unknown codec {m.get('codec')!r}")
    body = _inflate(m.get("body"))
    if len(body) < _LAYOUT_LENGTH_BYTES:
        raise LogError("block body shorter than its layout length")
    at = _LAYOUT_LENGTH_BYTES + int.from_bytes(body[:_LAYOUT_LENGTH_BYTES], "little")
    described = msgpack.unpackb(body[_LAYOUT_LENGTH_BYTES:at], raw=False)
    if not isinstance(described, list) or not all(isinstance(d, dict) for d in described):
        raise LogError("block layout is not a list of column maps")
    parts = {}
    for desc in described:
        size = desc.get("size")
        if type(size) is not int or size < 0 or at + size > len(body):
            raise LogError(f"column {desc.get('name')!r}: size {size!r} beyond the block")
        chunk, at = body[at:at + size], at + size
        kind = desc.get("type")
        if isinstance(kind, str) and kind in _PARSERS and isinstance(desc.get("name"), str):
            parts[desc["name"]] = _PARSERS[kind](chunk, n, desc)
    if at != len(body):
        raise LogError(f"block body has {len(body) - at} bytes after its columns")
    for name, kind in COLUMNS:
        if name not in parts and name in ADDED_COLUMNS:
            parts[name] = _absent(name, kind, n)
        if name not in parts:
            raise LogError(f"cycle block has no column {name!r}")
        if parts[name].desc["type"] != kind:
            raise LogError(f"column {name!r} is {parts[name].desc['type']!r}, not {kind!r}")
    return ParsedBlock(n, parts)


def _absent(name: str, kind: str, n: int) -> Part:
    """A column added within version 2, for a block written before it: all nil."""
    if kind == F8_OPT:
        return Part(n, {"name": name, "type": kind, "delta": XOR}, bytes(n), bytes(8 * n), 1)
    if kind == STR:
        return Part(n, {"name": name, "type": kind, "values": [None]}, bytes(4 * n), b"", 1)
    raise LogError(f"column {name!r} of type {kind!r} cannot be absent")


def decode_blocks(blocks: Sequence[ParsedBlock]) -> CycleBlock:
    """The rows of parsed blocks, in order, as one CycleBlock."""
    cols = {name: _DECODE[kind]([b.parts[name] for b in blocks]) for name, kind in COLUMNS}
    return CycleBlock(sum(b.n for b in blocks), cols)


def _inflate(data: Any) -> bytes:
    if not isinstance(data, bytes):
        raise LogError("block body is not binary")
    inflater = zlib.decompressobj()
    try:
        out = inflater.decompress(data, MAX_BODY_BYTES)  # bounded: damage cannot balloon memory
    except zlib.error as exc:
        raise LogError(f"block body does not inflate ({exc})") from None
    if not inflater.eof or inflater.unused_data:
        raise LogError("block body is not one complete zlib stream")
    return out


# ----------------------------------------------------------------------------------------
# Checking one block's columns
# ----------------------------------------------------------------------------------------

def _need(ok: bool, desc: Mapping[str, Any], what: str) -> None:
    if not ok:
        raise LogError(f"column {desc['name']!r}: {what}")


def _delta(desc: Mapping[str, Any]) -> str:
    delta = desc.get("delta")
    _need(delta in (XOR, DELTA2), desc, f"unknown delta {delta!r}")
    return str(delta)


def _stride(desc: Mapping[str, Any], count: int) -> int:
    stride = desc.get("stride", 1)
    _need(type(stride) is int and stride >= 1 and count % stride == 0, desc,
          f"stride {stride!r} does not divide {count} values")
    return int(stride)


def _parse_eight(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Part:
    _delta(desc)
    _need(len(chunk) == 8 * n, desc, f"{len(chunk)} bytes for {n} values")
    return Part(n, desc, b"", chunk, 1)


def _parse_optional(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Part:
    _delta(desc)
    _need(len(chunk) == 9 * n, desc, f"{len(chunk)} bytes for {n} optional values")
    return Part(n, desc, chunk[:n], chunk[n:], 1)


def _parse_bool(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Part:
    _need(len(chunk) == n, desc, f"{len(chunk)} bytes for {n} flags")
    return Part(n, desc, chunk, b"", 1)


def _parse_str(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Part:
    table = desc.get("values")
    _need(isinstance(table, list), desc, "no table of values")
    try:
        check_table(desc["name"], table)
    except TypeError as exc:
        raise LogError(str(exc)) from None
    _need(len(chunk) == 4 * n, desc, f"{len(chunk)} bytes for {n} codes")
    _codes_in_range(chunk, len(table), desc)
    return Part(n, desc, chunk, b"", 1)


def _codes_in_range(chunk: bytes, size: int, desc: Mapping[str, Any]) -> None:
    codes = np.frombuffer(chunk, _u4)
    _need(not codes.size or int(codes.max()) < size, desc, "codes out of range")


def _parse_list(item: int):
    def parse(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Part:
        _need(len(chunk) >= 4 * n, desc, f"too short for {n} row lengths")
        total = int(np.frombuffer(chunk[:4 * n], _u4).sum(dtype=np.int64))
        rest = chunk[4 * n:]
        _need(len(rest) == item * total, desc, f"{len(rest)} bytes for {total} values")
        if item == 8:
            _delta(desc)
            return Part(n, desc, chunk[:4 * n], rest, _stride(desc, total))
        return Part(n, desc, chunk[:4 * n], rest, 1)
    return parse


def _parse_map(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Part:
    keys = desc.get("keys")
    _need(isinstance(keys, list) and all(isinstance(k, list) for k in keys), desc,
          "no table of key lists")
    assert isinstance(keys, list)                  # (as _need checked)
    try:
        for names in keys:
            check_table(desc["name"], names)
    except TypeError as exc:
        raise LogError(str(exc)) from None
    _need(len(chunk) >= 4 * n, desc, f"too short for {n} codes")
    _codes_in_range(chunk[:4 * n], len(keys), desc)
    widths = np.array([len(k) for k in keys] or [0], dtype=np.int64)
    total = int(widths[np.frombuffer(chunk[:4 * n], _u4)].sum())
    rest = chunk[4 * n:]
    _need(len(rest) == 8 * total, desc, f"{len(rest)} bytes for {total} values")
    _delta(desc)
    return Part(n, desc, chunk[:4 * n], rest, _stride(desc, total))


def _parse_objects(chunk: bytes, n: int, desc: Mapping[str, Any]) -> Part:
    return Part(n, desc, chunk, b"", 1)     # checked when decoded (Objects)


_PARSERS = {F8: _parse_eight, I8: _parse_eight, F8_OPT: _parse_optional, BOOL: _parse_bool,
            STR: _parse_str, F8_LIST: _parse_list(8), BOOL_LIST: _parse_list(1),
            STR_F8_MAP: _parse_map, MSGPACK: _parse_objects}


# ----------------------------------------------------------------------------------------
# Decoding a run of blocks
# ----------------------------------------------------------------------------------------

def eight_values(parts: Sequence[Part], dtype: Any) -> np.ndarray:
    """The eight-byte values of `parts`, each part's deltas undone from its own start."""
    strides = {p.stride for p in parts}
    deltas = {p.desc["delta"] for p in parts}
    if len(strides) != 1 or len(deltas) != 1:       # rows of other widths: part by part
        return np.concatenate([eight_values([p], dtype) for p in parts]) if parts \
            else np.zeros(0, dtype)
    stride, delta = strides.pop(), deltas.pop()
    counts = [len(p.values) // 8 for p in parts]
    total = sum(counts)
    planes = np.concatenate([np.frombuffer(p.values, np.uint8).reshape(8, c)
                             for p, c in zip(parts, counts)], axis=1)
    d = planes.T.copy().view(_u8).reshape(-1, stride)
    rows = np.array(counts, dtype=np.int64) // stride
    before = np.cumsum(rows) - rows - 1              # each part's row before its first, or -1
    if delta == XOR:
        acc = np.bitwise_xor.accumulate(d, axis=0)
        v = acc ^ np.repeat(_at(acc, before), rows, axis=0)
    else:                                            # DELTA2: two running sums, mod 2**64
        e = d.cumsum(axis=0, dtype=_u8)
        big = e.cumsum(axis=0, dtype=_u8)
        k = (np.arange(len(d)) - np.repeat(before, rows)).astype(_u8)[:, None]
        v = big - np.repeat(_at(big, before), rows, axis=0) \
            - k * np.repeat(_at(e, before), rows, axis=0)
    return v.reshape(total).view(dtype)


def _at(rows: np.ndarray, index: np.ndarray) -> np.ndarray:
    """rows[index], with index −1 giving a row of zeros."""
    out = np.zeros((len(index), rows.shape[1]), dtype=_u8)
    ok = index >= 0
    out[ok] = rows[index[ok]]
    return out


def _heads(parts: Sequence[Part], dtype: Any) -> np.ndarray:
    return np.concatenate([np.frombuffer(p.head, dtype) for p in parts]) if parts \
        else np.zeros(0, dtype)


def _recoded(parts: Sequence[Part], key: str, freeze: Any) -> tuple[np.ndarray, tuple]:
    """Dictionary codes of all parts against one merged table."""
    if not parts:
        return np.zeros(0, _u4), ()
    return merge_tables([(np.frombuffer(p.head, _u4), tuple(freeze(v) for v in p.desc[key]))
                         for p in parts])


def _decode_str(parts: Sequence[Part]) -> Strings:
    codes, table = _recoded(parts, "values", lambda v: v)
    return Strings(codes, table)


def _decode_map(parts: Sequence[Part]) -> KeyedFloats:
    codes, keys = _recoded(parts, "keys", tuple)
    return KeyedFloats(codes, keys, eight_values(parts, np.float64))


_DECODE = {
    F8: lambda parts: eight_values(parts, np.float64),
    I8: lambda parts: eight_values(parts, np.int64),
    F8_OPT: lambda parts: (_heads(parts, np.uint8) != 0, eight_values(parts, np.float64)),
    BOOL: lambda parts: _heads(parts, np.uint8) != 0,
    STR: _decode_str,
    F8_LIST: lambda parts: Ragged(_heads(parts, _u4), eight_values(parts, np.float64)),
    BOOL_LIST: lambda parts: Ragged(
        _heads(parts, _u4),
        np.concatenate([np.frombuffer(p.values, np.uint8) for p in parts]) != 0 if parts
        else np.zeros(0, bool)),
    STR_F8_MAP: _decode_map,
    MSGPACK: lambda parts: Objects(tuple((p.head, p.n, 0, p.n) for p in parts)),
}
