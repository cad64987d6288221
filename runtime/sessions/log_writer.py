"""Writing a session log: the control loop hands cycles over, a thread writes them.

The control loop calls `SessionRecorder.record(rec)`, which only appends to a bounded
queue and never blocks. A background thread wakes every `flush_interval_s`, encodes what is
queued as one block of columns (format 2, `log_blocks`) and writes it with an unbuffered
write, so after a crash or kill -9 the file holds everything up to at most one flush
interval before the end. Disk errors stop the recorder (`failed` says why) and never reach
the loop.

Why frames and not plain concatenated msgpack: a torn tail is detectable either way, but
a damaged byte in the middle of a plain stream either decodes into a silently wrong value
or desynchronises everything after it. The CRC catches the damage; the length and the
marker let the reader skip the damaged frame, find the next good one and keep going.
0xC1 (the marker's first byte) is the one byte msgpack never emits as a type byte.
"""

from __future__ import annotations

import collections
import errno
import os
import re
import struct
import threading
import time
import zlib
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any, BinaryIO, Callable, Iterable, Mapping

import msgpack

from ..arm.model import Arm
from ..errors import LogError
from .log_blocks import (
    CycleBlock,
    PackedColumns,
    block_map,
    encode_records,
    pack_block,
    pack_records,
)
from .log_schema import (
    FORMAT_VERSION,
    FRAME_MARK,
    MAGIC,
    SESSION_SUFFIX,
    CycleRecord,
    SessionEnd,
    make_header,
)

PREAMBLE = struct.Struct("<8sH")
FRAME_HEAD = struct.Struct("<2sII")
_LENGTH = struct.Struct("<I")
WRITABLE_VERSIONS = (1, 2)
MAX_FLUSH_RECORDS = 2048      # records per block at most (a writer that fell behind)
CALLER_BLOCK_RECORDS = 256    # records per block when the caller encodes
GIL_BREAK_S = 50e-6           # the writer's pause between columns of a block


def encode_preamble(version: int = FORMAT_VERSION) -> bytes:
    return PREAMBLE.pack(MAGIC, version)


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
    and returns at once. The writer thread wakes every `flush_interval_s`, gathers all
    queued records into one block (format 2: columns, compressed, see `log_blocks`), writes
    it and, with `fsync=True`, asks the OS to put it on the disk.

    With `encode_in_caller=True`, `record()` collects records and packs a block's columns
    itself every `CALLER_BLOCK_RECORDS`; the thread only compresses (zlib runs without the
    interpreter lock, beside the caller) and writes. For a caller with time to spare between
    cycles (a lockstep run packs while the simulated arm steps) that avoids the thread's
    interpreter-lock bursts the caller would otherwise wait out.

    fsync is off by default: the worst cases it guards against are power loss and a kernel
    crash, since after a process crash or kill -9 everything written is already in the OS's
    cache and reaches the disk anyway. Turn it on where the host may lose power; it costs
    an I/O round trip per flush in the writer thread, never in the loop.
    """

    def __init__(self, file: BinaryIO, path: Path, *, flush_interval_s: float,
                 queue_size: int, fsync: bool, bytes_written: int,
                 encode_in_caller: bool = False, format_version: int = FORMAT_VERSION
                 ) -> None:
        self.path = path
        self.flush_interval_s = flush_interval_s
        self.format_version = format_version
        self._file = file
        self._fsync = fsync
        self._capacity = queue_size
        self._encode_in_caller = encode_in_caller
        self._queue: collections.deque[CycleRecord | _Encoded | _Packed] = collections.deque()
        self._collected: list[CycleRecord] = []       # encode_in_caller: the next block
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
              started_monotonic_ns: int | None = None, encode_in_caller: bool = False,
              format_version: int = FORMAT_VERSION) -> "SessionRecorder":
        """Create the file, write the preamble and header (synchronously, before any cycle)
        and start the writer thread. A file that cannot be created raises LogError.
        `format_version=1` writes the previous format (one msgpack frame per cycle)."""
        if not flush_interval_s > 0:
            raise ValueError(f"flush_interval_s must be positive, got {flush_interval_s}")
        if queue_size < 1:
            raise ValueError(f"queue_size must be at least 1, got {queue_size}")
        if format_version not in WRITABLE_VERSIONS:
            raise ValueError(f"format_version must be one of {WRITABLE_VERSIONS}")
        path = Path(path)
        header = make_header(arm, settings, started_at=started_at,
                             started_monotonic_ns=started_monotonic_ns,
                             format_version=format_version)
        data = encode_preamble(format_version) + encode_frame(header.to_wire())
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
                       fsync=fsync, bytes_written=len(data), encode_in_caller=encode_in_caller,
                       format_version=format_version)
        recorder._thread.start()
        return recorder

    # -- the loop's side --------------------------------------------------------------

    def record(self, rec: CycleRecord) -> bool:
        """Hand one cycle to the writer. Never blocks and never raises for disk trouble:
        returns False (and counts it) when the record was not taken."""
        if self._failed is not None or self._closed:
            self._refused += 1
            return False
        if len(self._queue) + len(self._collected) >= self._capacity:
            self._dropped += 1
            return False
        self._handed += 1
        if not self._encode_in_caller:
            self._queue.append(rec)
        else:
            self._collected.append(rec)
            if len(self._collected) >= CALLER_BLOCK_RECORDS:
                self._hand_over_collected()
        return True

    def record_block(self, block: CycleBlock) -> bool:
        """Hand over many cycles at once, already gathered into columns
        (`cycle_columns`): what `record` does for each of them, packed here in the caller.
        A block that cannot be packed goes record by record (the bad ones are skipped)."""
        if self._failed is not None or self._closed:
            self._refused += block.n
            return False
        if len(self._queue) + len(self._collected) >= self._capacity:
            self._dropped += block.n
            return False
        try:
            packed = pack_block(block) if self.format_version != 1 else None
        except Exception:  # noqa: BLE001 - one bad record must not stop the session
            packed = None
        if packed is None:
            return all([self.record(rec) for rec in block.records()])
        if self._collected:
            self._hand_over_collected()               # records handed earlier go first
        self._handed += block.n
        self._queue.append(_Packed(packed, block.n))
        return True

    def _hand_over_collected(self) -> None:
        records, self._collected = self._collected, []
        if self.format_version == 1:
            encoded, bad = _encode_v1(records)
            self._queue.extend(encoded)
        else:
            packed, bad = self._pack(records, pause=None)
            if packed is not None:
                self._queue.append(packed)
        self._unencodable_here += bad

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
            if self._collected and self._failed is None:
                self._hand_over_collected()
            self._closed = True
            self._stop.set()
        self._thread.join(timeout_s)
        if self._thread.is_alive() and self._failed is None:
            self._failed = f"the writer did not finish within {timeout_s:g} s (disk stalled?)"
        if not self._thread.is_alive():
            self._lost_in_writer += _count(self._queue)   # handed just as the writer failed
            self._queue.clear()
        return self.stats()

    def __enter__(self) -> "SessionRecorder":
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    # -- encoding (writer thread; the caller packs with encode_in_caller) ----------------

    def _encode(self, records: list[CycleRecord]) -> tuple[list[_Encoded], int]:
        """Frames for `records` and how many records could not be encoded (skipped)."""
        if self.format_version == 1:
            return _encode_v1(records)
        packed, bad = self._pack(records, pause=_let_the_loop_run)
        return ([] if packed is None else [packed.framed()]), bad

    @staticmethod
    def _pack(records: list[CycleRecord], pause: Callable[[], None] | None
              ) -> tuple[_Packed | None, int]:
        """The block of `records` before compression, and how many were skipped."""
        try:
            return _Packed(pack_records(records, pause), len(records)), 0
        except Exception:  # noqa: BLE001 - one bad record must not stop the session
            good = [r for r in records if _encodable(r)]
            if len(good) == len(records):     # not the records' fault: report it
                raise
            packed = SessionRecorder._pack(good, pause)[0] if good else None
            return packed, len(records) - len(good)

    # -- the writer thread ------------------------------------------------------------

    def _run(self) -> None:
        interval = self.flush_interval_s
        next_flush = time.monotonic() + interval
        try:
            while self._failed is None:
                stopping = self._stop.wait(max(0.0, next_flush - time.monotonic()))
                next_flush = max(next_flush + interval, time.monotonic())
                self._write_pending(everything=stopping)
                if stopping:
                    if self._failed is None:
                        self._write_end()
                    break
        except Exception as exc:  # noqa: BLE001 - a writer bug must never reach the loop
            self._fail(f"the session writer stopped: {exc!r}")
        finally:
            _close_quietly(self._file)

    def _take_pending(self) -> list[_Encoded]:
        """Everything queued now, encoded: one block per MAX_FLUSH_RECORDS records."""
        queue = self._queue
        self._queue_peak = max(self._queue_peak, len(queue))
        out: list[_Encoded] = []
        records: list[CycleRecord] = []
        for _ in range(len(queue)):
            item = queue.popleft()
            if isinstance(item, _Encoded):        # encoded by the caller (format 1)
                out.append(item)
                continue
            if isinstance(item, _Packed):         # packed by the caller: compressed here
                out.append(item.framed())
                continue
            records.append(item)
            if len(records) == MAX_FLUSH_RECORDS:
                out += self._encode_counted(records)
                records = []
        if records:
            out += self._encode_counted(records)
        return out

    def _encode_counted(self, records: list[CycleRecord]) -> list[_Encoded]:
        encoded, bad = self._encode(records)
        self._unencodable += bad
        return encoded

    def _write_pending(self, everything: bool) -> None:
        """Write what was queued when the flush began, as one block (records handed over
        while it is encoded wait for the next flush); with `everything`, until the queue
        is empty (the last flush)."""
        first = True
        while self._queue and self._failed is None and (first or everything):
            first = False
            frames = self._take_pending()
            data = b"".join(f.data for f in frames)
            try:
                _write_all(self._file, data)
            except OSError as exc:
                done = getattr(exc, "bytes_written", 0)
                whole = _complete_frames(frames, done)
                self._written += whole
                self._bytes += done
                self._fail(self._os_reason(exc), unwritten=_count(frames) - whole)
                return
            self._written += _count(frames)
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
        self._lost_in_writer += unwritten + _count(self._queue)
        self._queue.clear()
        self._failed = reason

    def _os_reason(self, exc: OSError) -> str:
        what = exc.strerror or str(exc)
        return f"writing {self.path} failed: {what}; recording stopped"


@dataclass(frozen=True)
class _Encoded:
    """A frame ready to write and how many cycle records it holds."""

    data: bytes
    records: int


@dataclass(frozen=True)
class _Packed:
    """A block's columns, packed by the caller; the writer thread compresses and frames it."""

    columns: PackedColumns
    records: int

    def framed(self) -> _Encoded:
        return _Encoded(encode_frame(block_map(self.records, self.columns)), self.records)


def _count(items: Iterable[CycleRecord | _Encoded | _Packed]) -> int:
    """Cycle records in a queue or frame list (a block counts its records)."""
    return sum(i.records if isinstance(i, (_Encoded, _Packed)) else 1 for i in items)


def _encode_v1(records: list[CycleRecord]) -> tuple[list[_Encoded], int]:
    out, bad = [], 0
    for rec in records:
        try:
            out.append(_Encoded(encode_frame(rec.to_wire()), 1))
        except Exception:  # noqa: BLE001 - one bad record must not stop the session
            bad += 1
    return out, bad


def _let_the_loop_run() -> None:
    """Release the interpreter lock between columns, and stay off it a moment: a control
    loop waiting for the lock takes it now, not after the interpreter's switch interval."""
    time.sleep(GIL_BREAK_S)


def _encodable(rec: CycleRecord) -> bool:
    try:
        encode_records([rec])
    except Exception:  # noqa: BLE001 - whatever fails, this record cannot be written
        return False
    return True


def _complete_frames(frames: list[_Encoded], n_bytes: int) -> int:
    """How many records of `frames`, written back to back, are whole in the first n_bytes."""
    whole, end = 0, 0
    for frame in frames:
        end += len(frame.data)
        if end > n_bytes:
            break
        whole += frame.records
    return whole


def _close_quietly(file: BinaryIO) -> None:
    try:
        file.close()
    except OSError:
        pass

