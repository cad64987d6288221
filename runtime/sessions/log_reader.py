"""Reading a session log: stream the cycles, keep everything readable, report the rest.

`SessionReader` streams a file in bounded memory; `read_session` reads a whole one. Damage
(torn tail, corrupt frames, gaps, a missing end record) is reported as `Problem`s with the
byte offset where it starts; only an unreadable preamble or header raises LogError.
"""

from __future__ import annotations

import math
import os
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO, Iterator

import msgpack
import numpy as np

from ..errors import LogError
from .log_blocks import BLOCK_KIND, CycleBlock
from .log_blocks_decode import ParsedBlock, decode_blocks, parse_block
from .log_schema import (
    FORMAT_VERSION,
    FRAME_MARK,
    MAGIC,
    MAX_PAYLOAD_BYTES,
    CycleRecord,
    SessionEnd,
    SessionHeader,
)
from .log_writer import FRAME_HEAD, PREAMBLE

CHUNK_ROWS = 4096         # cycles per chunk of `blocks()`
RUN_ROWS = 4096           # format 2 blocks are decoded together up to this many cycles
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
        self._previous: int | None = None    # the last cycle number read

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> "SessionReader":
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def _read_header(self) -> tuple[SessionHeader, int]:
        where = str(self.path)
        head = self._read_at(0, PREAMBLE.size)
        if len(head) < len(MAGIC):
            if head and MAGIC.startswith(head):
                raise LogError(f"{where}: truncated: the file ends inside the preamble "
                               f"({len(head)} bytes)")
            raise LogError(f"{where}: not a jogwire session log "
                           f"({'empty file' if not head else f'only {len(head)} bytes'})")
        if head[:len(MAGIC)] != MAGIC:
            raise LogError(f"{where}: not a jogwire session log (it starts with "
                           f"{head[:len(MAGIC)]!r}, a session log with {MAGIC!r})")
        if len(head) < PREAMBLE.size:
            raise LogError(f"{where}: truncated: the file ends inside the preamble")
        _, version = PREAMBLE.unpack(head)
        if version > FORMAT_VERSION:
            raise LogError(f"{where}: written in session format {version}, newer than this "
                           f"jogwire reads (up to {FORMAT_VERSION}); upgrade jogwire to read it")
        if version < 1:
            raise LogError(f"{where}: invalid session format version {version}")
        got = self._frame_at(PREAMBLE.size)
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
        """Every readable cycle record, in file order."""
        for item in self._cycles():
            if not isinstance(item, CycleBlock):
                yield item
                continue
            try:
                records = item.records()
            except LogError as exc:             # the input column, decoded only now
                self._problem(BAD_RECORD, self._size, f"{item.n} cycles whose input cannot "
                              f"be read ({exc}); skipped")
                continue
            yield from records

    def blocks(self, rows: int = CHUNK_ROWS) -> Iterator[CycleBlock]:
        """Every readable cycle, column by column, in chunks of exactly `rows` cycles (the
        last one shorter) whatever the file's own blocks: a computation over the chunks
        then gives the same result, to the last bit, for formats 1 and 2 of a session.
        What `jogwire inspect` streams."""
        pending: list[CycleBlock] = []
        have = 0
        for block in self._raw_blocks(rows):
            pending.append(block)
            have += block.n
            while have >= rows:
                whole = CycleBlock.concat(pending)
                yield whole.rows(0, rows)
                rest = whole.rows(rows, whole.n)
                pending, have = ([rest] if rest.n else []), rest.n
        if have:
            yield CycleBlock.concat(pending)

    def _raw_blocks(self, rows: int) -> Iterator[CycleBlock]:
        """Format 2 blocks as stored; format 1 records gathered `rows` at a time."""
        batch: list[CycleRecord] = []
        for item in self._cycles():
            if isinstance(item, CycleBlock):
                yield item
                continue
            batch.append(item)
            if len(batch) == rows:
                yield CycleBlock.from_records(batch)
                batch = []
        if batch:
            yield CycleBlock.from_records(batch)

    def _cycles(self) -> Iterator[CycleRecord | CycleBlock]:
        """Cycle records (format 1) and runs of blocks (format 2) as they come, checked;
        problems reported, the end record kept. Iterates once."""
        if self._iterated:
            raise RuntimeError("a SessionReader iterates once; open a new one")
        self._iterated = True
        run: list[tuple[int, ParsedBlock]] = []     # blocks decoded together, with offsets
        for offset, payload in self._frames():
            m = _unpack(payload)
            kind = m.get("kind") if isinstance(m, dict) else None
            if kind == BLOCK_KIND:
                parsed = self._parse(offset, m)
                if parsed is not None and parsed.n:
                    run.append((offset, parsed))
                if sum(p.n for _, p in run) >= RUN_ROWS:
                    yield from self._decode_run(run)
                    run = []
                continue
            if run:
                yield from self._decode_run(run)
                run = []
            if kind == "cycle":
                rec = self._record(offset, m)
                if rec is not None:
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
        if run:
            yield from self._decode_run(run)
        if self.end is None:
            self._problem(UNCLOSED, self._size, "no end record: the session did not close "
                          "cleanly (crash, kill or power loss); everything before is kept")
        elif self.end.dropped or self.end.unencodable:
            self._problem(DROPPED, self._size,
                          f"the writer refused {self.end.dropped} records (queue full) and "
                          f"could not encode {self.end.unencodable}")

    def _record(self, offset: int, m: dict[str, Any]) -> CycleRecord | None:
        try:
            rec = CycleRecord.from_wire(m)
            _check_lengths(rec, self.header.arm.n)
        except LogError as exc:
            self._problem(BAD_RECORD, offset, f"{exc}; skipped")
            return None
        self._check_sequence(np.array([offset]), np.array([rec.cycle], dtype=np.int64))
        return rec

    def _parse(self, offset: int, m: dict[str, Any]) -> ParsedBlock | None:
        try:
            return parse_block(m)
        except Exception as exc:  # noqa: BLE001 - whatever the bytes say, not a block
            self._problem(BAD_RECORD, offset, f"a cycle block that cannot be read ({exc}); "
                          f"skipped")
            return None

    def _decode_run(self, run: list[tuple[int, ParsedBlock]]) -> Iterator[CycleBlock]:
        """Decode checked blocks together; drop malformed cycles and report gaps."""
        try:
            block = decode_blocks([p for _, p in run])
        except Exception as exc:  # noqa: BLE001 - a malformed block: find it, skip it
            if len(run) > 1:
                for one in run:
                    yield from self._decode_run([one])
                return
            self._problem(BAD_RECORD, run[0][0], f"a cycle block that cannot be decoded "
                          f"({exc}); skipped")
            return
        offsets = np.repeat([o for o, _ in run], [p.n for _, p in run])
        keep = _good_rows(block, self.header.arm.n)
        if not keep.all():
            for offset in np.unique(offsets[~keep]).tolist():
                mine = offsets == offset
                self._problem(BAD_RECORD, offset, f"{int((mine & ~keep).sum())} of "
                              f"{int(mine.sum())} cycles in this block are malformed (joint "
                              f"count, twist length or time); skipped")
            block, offsets = block.take(keep), offsets[keep]
        if block.n:
            self._check_sequence(offsets, block["cycle"])
            yield block

    def _check_sequence(self, offsets: np.ndarray, cycles: np.ndarray) -> None:
        """Report every break in the cycle numbers (within and before these cycles), at
        the offset of the record or block where the cycle after the break is."""
        previous = np.concatenate(([self._previous if self._previous is not None
                                    else cycles[0] - 1], cycles[:-1]))
        for i in np.flatnonzero(cycles != previous + 1).tolist():
            self._gap(int(offsets[i]), int(previous[i]), int(cycles[i]))
        self._previous = int(cycles[-1])

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
        head = self._read_at(offset, FRAME_HEAD.size)
        if len(head) < FRAME_HEAD.size:
            return "short" if FRAME_MARK.startswith(head[:2]) else "no record marker"
        mark, length, crc = FRAME_HEAD.unpack(head)
        if mark != FRAME_MARK:
            return "no record marker"
        if not 0 < length <= MAX_PAYLOAD_BYTES:
            return f"implausible record length {length}"
        payload = self._read_at(offset + FRAME_HEAD.size, length)
        if len(payload) < length:
            return "short"
        if zlib.crc32(payload, zlib.crc32(head[2:6])) != crc:
            return "CRC mismatch"
        return payload, offset + FRAME_HEAD.size + length

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


def _good_rows(block: CycleBlock, n_joints: int) -> np.ndarray:
    """Which rows of a block hold what `_check_lengths` asks of a record."""
    keep = np.isfinite(block["t_s"])
    for name, width in (("q", n_joints), ("rates", n_joints), ("twist", 6),
                        ("achieved_twist", 6)):
        keep &= block[name].lengths == width
    return keep


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
