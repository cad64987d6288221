"""The lockstep link's frames through shared memory, the pipes beside them as doorbell and end.

    runtime  ──ring 0 (runtime → arm side)──►  sim child (`sim.arm --link shm:R,W,M`)
             ◄──ring 1 (arm side → runtime)──
             the two pipes: a byte wakes a reader that sleeps; EOF when a process is gone

A lockstep run hands one message each way per control cycle. Over a pipe, a message that
finds its reader asleep costs a wake-up (tens to hundreds of µs on a virtual machine), more
than either side's work. Here each direction is a ring of SLOTS frames in memory both
processes map (a memfd passed like the pipe ends: no name, nothing left behind by a killed
process; a named `multiprocessing.shared_memory` segment would need removing, and in Python
3.11 the attaching child's resource tracker would remove it when the child exits). The
writer copies the frame into the next slot and then stores the count of frames written;
the reader reads that count first, copies the frame out and then stores the count it has
taken. A reader that waits polls the count: BUSY_S without pause, then until
`spin_s` yielding its core to anything runnable between looks; then it sleeps in `select`
on its pipe. The pipe's end (EOF) still says the other process is gone, at once.

The payload is the wire's own encoded message, so nothing above this changes.

The bell. Writing to a pipe costs a system call, and waking a sleeping reader much more, so
a reader about to sleep raises a flag in the ring first and the writer writes a byte to the
pipe only when the flag is up. Each side puts a full memory barrier between its store and
its load (taking a process-local lock: a locked instruction on x86-64), so at least one of
them sees the other's store: the writer the flag, or the reader the new count. Should that
ever fail, the reader sleeps at most NAP_S before it looks again: a late frame, never a
lost one.

Why the rings need no lock between the processes: one writer and one reader per ring, and
on x86-64 stores become visible to other cores in program order and loads are not reordered
with older loads or younger stores (the "TSO" model). A count is one aligned 8-byte store (a
memoryview of format "Q" stores it with one `memcpy` of 8 bytes, a single move), so it is
never seen half-written. Other processors may reorder stores, so `usable()` is False there
and the runtime uses the pipes alone.
"""

from __future__ import annotations

import mmap
import os
import platform
import select
import struct
import threading
import time
from collections import Counter

from .protocol import MAX_MESSAGE_BYTES

SLOTS = 8                     # frames a ring holds; lockstep has at most 2–3 in flight
BUSY_S = 5e-5                 # a waiting reader polls the count without yielding this long
SPIN_S = 0.002                # … and yielding its core between looks until this long
NAP_S = 0.002                 # a sleeping reader looks again at least this often
_LENGTH = struct.Struct("<I")
_LINE = 64                    # each word on its own cache line (no false sharing)
_STRIDE = -(-(_LENGTH.size + MAX_MESSAGE_BYTES) // _LINE) * _LINE
_RING_BYTES = 3 * _LINE + SLOTS * _STRIDE       # written, taken, reader asleep; slots
MEMORY_BYTES = 2 * _RING_BYTES
TO_ARM, TO_RUNTIME = 0, 1      # ring numbers
_BELL = b"\x00"
_ROOM_SLEEP_S = 1e-4          # a full ring (the reader far behind): re-check this often
_FENCE = threading.Lock()     # taking it is a locked instruction: a full memory barrier


def usable() -> str | None:
    """None if shared rings can carry the link here, else why not (the pipes then do)."""
    if not hasattr(os, "memfd_create"):
        return "this system has no memfd_create"
    if platform.machine().lower() not in ("x86_64", "amd64"):
        return (f"the rings rely on x86-64's store order; this processor is "
                f"{platform.machine() or 'unknown'}")
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    if (cores or 1) < 2:
        return "one core: a waiting side would spin on the core the other side needs"
    return None


def create_memory() -> int:
    """A file descriptor of MEMORY_BYTES of zeroed shared memory, to pass to the child."""
    fd = os.memfd_create("jogwire-lockstep", os.MFD_CLOEXEC)
    os.ftruncate(fd, MEMORY_BYTES)
    return fd


class RingChannel:
    """Frames through the two rings in `memory_fd`; the pipe ends wake and end.

    arm_side: this end writes ring TO_RUNTIME and reads ring TO_ARM (the child); else the
    reverse. Offers what `pipes.PipeChannel` offers: send, poll, take, ended, close."""

    kind = "shm"

    def __init__(self, read_fd: int, write_fd: int, memory_fd: int, *, arm_side: bool,
                 spin_s: float = SPIN_S) -> None:
        self.read_fd, self.write_fd = read_fd, write_fd
        os.set_blocking(read_fd, False)
        os.set_blocking(write_fd, False)    # a full pipe of bells: the reader has enough
        self.memory = mmap.mmap(memory_fd, MEMORY_BYTES)   # stays mapped once the fd closes
        self.words = memoryview(self.memory).cast("Q")
        out_ring, in_ring = (TO_RUNTIME, TO_ARM) if arm_side else (TO_ARM, TO_RUNTIME)
        self.out_written, self.out_taken, self.out_asleep, self.out_slots = _layout(out_ring)
        self.in_written, self.in_taken, self.in_asleep, self.in_slots = _layout(in_ring)
        self.spin_s = spin_s
        self.ended = False                 # the other process closed its ends (or died)
        self.dropped: Counter[str] = Counter()
        self.received = 0

    def send(self, payload: bytes) -> bool:
        """Put one frame in the outgoing ring (and ring the bell if the reader sleeps);
        False if the other process is gone. A frame over the cap keeps only its length:
        the reader counts it `oversize`, as over a pipe. (A reader gone is seen here once a
        wait has seen its end, at the latest BUSY_S + `spin_s` into that wait.)"""
        if self.ended:
            return False
        words = self.words
        written = words[self.out_written]
        while written - words[self.out_taken] >= SLOTS:
            if not self._wait_for_room():
                return False
        at = self.out_slots + (written % SLOTS) * _STRIDE
        n = len(payload)
        _LENGTH.pack_into(self.memory, at, n)
        if n <= MAX_MESSAGE_BYTES:
            self.memory[at + 4:at + 4 + n] = payload
        words[self.out_written] = written + 1          # last: the frame is whole
        with _FENCE:                                   # the count out before the flag is read
            pass
        if not words[self.out_asleep]:
            return True                                # the reader is looking: no bell needed
        try:
            os.write(self.write_fd, _BELL)
        except BlockingIOError:
            pass                                       # bells enough are waiting
        except OSError:                                # the reader closed its end
            self.ended = True
            return False
        return True

    def poll(self, timeout_s: float) -> bool:
        """Wait up to timeout_s for a frame (or the end of the link); True if there.
        Polls the count for the first BUSY_S, then yields the core to anything else
        runnable between looks until `spin_s`, then sleeps until a bell rings (or NAP_S
        passes: see "the bell" in the module's notes)."""
        words, written, taken, asleep = self.words, self.in_written, self.in_taken, \
            self.in_asleep
        if self.ended or words[written] != words[taken]:
            return True                    # already there (the usual lockstep case)
        now = time.monotonic()
        deadline = now + max(timeout_s, 0.0)
        busy_until, spin_until = now + min(BUSY_S, timeout_s), now + min(self.spin_s, timeout_s)
        try:
            while True:
                if self.ended or words[written] != words[taken]:
                    return True
                now = time.monotonic()
                if now < busy_until:
                    continue
                if now < spin_until:
                    os.sched_yield()
                    continue
                words[asleep] = 1          # from here on, the writer rings
                with _FENCE:               # the flag out before the count is read
                    pass
                self._drain_bells()        # a bell rung after this wakes the select below
                if self.ended or words[written] != words[taken]:
                    return True
                if now >= deadline:
                    return False
                select.select([self.read_fd], [], [], min(deadline - now, NAP_S))
        finally:
            if self.read_fd >= 0:
                words[asleep] = 0

    def take(self) -> list[bytes]:
        """Every frame in the incoming ring, in order, without waiting; oversized ones are
        counted in `dropped` and skipped."""
        if self.read_fd < 0:
            return []
        words, memory = self.words, self.memory
        taken, written = words[self.in_taken], words[self.in_written]
        out = []
        while taken < written:
            at = self.in_slots + (taken % SLOTS) * _STRIDE
            (n,) = _LENGTH.unpack_from(memory, at)
            self.received += 1
            if n > MAX_MESSAGE_BYTES:
                self.dropped["oversize"] += 1
            else:
                out.append(memory[at + 4:at + 4 + n])
            taken += 1
            words[self.in_taken] = taken               # after the copy: the slot is free
        return out

    def _drain_bells(self) -> None:
        """Read the bells rung so far; EOF means the other process is gone."""
        try:
            while os.read(self.read_fd, 1 << 16):
                pass
            self.ended = True
        except BlockingIOError:
            pass
        except OSError:
            self.ended = True

    def _wait_for_room(self) -> bool:
        """The outgoing ring is full: wait for the reader to take a frame; False if it is
        gone. (Lockstep never gets here; a pipe writer would block the same way.)"""
        self._drain_bells()
        if self.ended:
            return False
        time.sleep(_ROOM_SLEEP_S)
        return True

    def close(self) -> None:
        if self.read_fd < 0:
            return
        close_fds(self.read_fd, self.write_fd)
        self.read_fd = self.write_fd = -1
        self.words.release()
        self.memory.close()
        self.ended = True


def close_fds(*fds: int) -> None:
    """Close each descriptor, ignoring errors (an end the other side already closed)."""
    for fd in fds:
        try:
            os.close(fd)
        except OSError:
            pass


def _layout(ring: int) -> tuple[int, int, int, int]:
    """(index of the written count, of the taken count, of the reader's asleep flag, byte
    offset of slot 0) in the shared memory (words as indexes of 8-byte words)."""
    base = ring * _RING_BYTES
    return base // 8, (base + _LINE) // 8, (base + 2 * _LINE) // 8, base + 3 * _LINE
