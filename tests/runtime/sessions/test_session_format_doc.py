"""docs/SESSION_FORMAT.md and the code in step.

A log written by jogwire is decoded here by a reader built from the page alone (struct,
zlib for inflate and CRC-32, msgpack, numpy for the arithmetic; nothing from
runtime.sessions), and its cycles must equal, bit for bit, what the module's reader gives.
The page's tables of columns, column types and cycle fields are checked against the code.
"""

from __future__ import annotations

import dataclasses
import re
import struct
import zlib
from pathlib import Path

import msgpack
import numpy as np
import pytest

from runtime.arm.model import load_arm
from runtime.sessions.log_blocks import COLUMN_TYPES, COLUMNS, SMOOTH
from runtime.sessions.log_reader import read_session
from runtime.sessions.log_schema import CycleRecord
from runtime.sessions.log_writer import SessionRecorder

ROOT = Path(__file__).resolve().parents[3]
PAGE = (ROOT / "docs" / "SESSION_FORMAT.md").read_text(encoding="utf-8")


def section(title: str) -> str:
    start = PAGE.index(title)
    end = PAGE.find("\n#", start + len(title))
    return PAGE[start:end if end >= 0 else None]


def table_rows(text: str) -> list[list[str]]:
    """The cells of a markdown table's body rows, backticks removed."""
    rows = [line for line in text.splitlines() if line.startswith("|")][2:]
    return [[c.strip().strip("`") for c in row.strip("|").split("|")] for row in rows]


def test_the_column_table_is_the_code_s() -> None:
    rows = table_rows(section("### Columns of a version 2 block"))
    assert [(name, kind) for name, kind, _ in rows] == list(COLUMNS)
    assert {name for name, _, delta in rows if delta == "delta2"} == set(SMOOTH)


def test_the_column_types_are_the_code_s() -> None:
    assert [row[0] for row in table_rows(section("### Column types"))] == list(COLUMN_TYPES)


def test_the_cycle_fields_are_the_record_s() -> None:
    keys = [row[0] for row in table_rows(section("### Cycle fields"))]
    assert sorted(keys) == sorted(f.name for f in dataclasses.fields(CycleRecord))


def test_magic_marker_and_version_as_written() -> None:
    assert "8F 4A 57 4C 4F 47 0D 0A" in PAGE and "C1 4A" in PAGE
    assert "format version 2" in PAGE.splitlines()[0]


# ----------------------------------------------------------------------------------------
# A reader from the page
# ----------------------------------------------------------------------------------------

def page_frames(data: bytes):
    assert data[:8] == bytes.fromhex("8F4A574C4F470D0A")
    (version,) = struct.unpack_from("<H", data, 8)
    pos = 10
    while pos < len(data):
        mark, length, crc = struct.unpack_from("<2sII", data, pos)
        assert mark == b"\xc1J"
        payload = data[pos + 10:pos + 10 + length]
        assert zlib.crc32(payload, zlib.crc32(data[pos + 2:pos + 6])) == crc
        yield version, msgpack.unpackb(payload, raw=False)
        pos += 10 + length


def page_eight(data: bytes, stride: int, delta: str) -> np.ndarray:
    m = len(data) // 8
    planes = np.frombuffer(data, np.uint8).reshape(8, m)
    d = np.zeros(m, dtype=np.uint64)
    for b in range(8):
        d |= planes[b].astype(np.uint64) << np.uint64(8 * b)
    rows = d.reshape(-1, stride)
    out = np.zeros_like(rows)
    prev = np.zeros(stride, dtype=np.uint64)
    prev_e = np.zeros(stride, dtype=np.uint64)
    for i, row in enumerate(rows):
        if delta == "xor":
            out[i] = row ^ prev
        else:
            e = prev_e + row          # e[i] = d[i] + e[i - 1]; v[i] = e[i] + v[i - 1]
            out[i] = prev + e
            prev_e = e
        prev = out[i]
    return out.reshape(m)


def page_column(kind: str, raw: bytes, n: int, desc: dict) -> list:
    stride, delta = desc.get("stride", 1), desc.get("delta")

    def floats(b: bytes, s: int = 1) -> list[float]:
        return page_eight(b, s, delta).view("<f8").tolist()

    def lengths() -> list[int]:
        return list(struct.unpack_from(f"<{n}I", raw))

    def split(flat: list, ls: list[int]) -> list[tuple]:
        out, at = [], 0
        for k in ls:
            out.append(tuple(flat[at:at + k]))
            at += k
        return out
    if kind == "f8":
        return floats(raw)
    if kind == "i8":
        return page_eight(raw, 1, delta).view("<i8").tolist()
    if kind == "f8?":
        values = floats(raw[n:])
        return [v if raw[i] else None for i, v in enumerate(values)]
    if kind == "bool":
        return [b != 0 for b in raw]
    if kind == "str":
        return [desc["values"][c] for c in struct.unpack_from(f"<{n}I", raw)]
    if kind == "f8[]":
        return split(floats(raw[4 * n:], stride), lengths())
    if kind == "bool[]":
        return split([b != 0 for b in raw[4 * n:]], lengths())
    if kind == "str:f8":
        codes = lengths()
        values = floats(raw[4 * n:], stride)
        rows, at = [], 0
        for c in codes:
            keys = desc["keys"][c]
            rows.append(dict(zip(keys, values[at:at + len(keys)])))
            at += len(keys)
        return rows
    assert kind == "msgpack"
    return msgpack.unpackb(raw, raw=False)


def page_cycles(data: bytes) -> list[dict]:
    cycles = []
    for version, m in page_frames(data):
        assert version == 2
        if m["kind"] != "cycles":
            continue
        assert m["codec"] == "zlib"
        body = zlib.decompress(m["body"])
        (length,) = struct.unpack_from("<I", body)
        layout = msgpack.unpackb(body[4:4 + length], raw=False)
        at, columns = 4 + length, {}
        for desc in layout:
            raw = body[at:at + desc["size"]]
            at += desc["size"]
            columns[desc["name"]] = page_column(desc["type"], raw, m["count"], desc)
        assert at == len(body)
        cycles += [dict(zip(columns, row)) for row in zip(*columns.values())]
    return cycles


def exact(value):
    if isinstance(value, float):
        return struct.pack("<d", value)
    if isinstance(value, dict):
        return tuple((k, exact(v)) for k, v in value.items())
    if isinstance(value, (list, tuple)):
        return tuple(exact(v) for v in value)
    return value


def test_a_reader_from_the_page_reads_what_jogwire_wrote(tmp_path: Path) -> None:
    arm = load_arm("elbow6")
    path = tmp_path / "s.jwlog"
    records = []
    for i in range(700):
        records.append(CycleRecord(
            cycle=i, t_s=0.002 * i + 1e-9 * (i % 7), axes=(0.1 * np.sin(i / 9),) * (i % 3),
            buttons=(i % 2 == 0, True), enabled=i > 5, enable_reason="held" if i > 5 else "no",
            twist=(0.05, 0.0, -0.0, 0.0, 0.0, float(np.cos(i / 50))), frame="base",
            q=tuple(float(np.sin(i / 100 + j)) for j in range(6)),
            rates=tuple(float(np.cos(i / 100 + j)) for j in range(6)),
            damping=0.0, sigma_min=float("nan") if i < 5 else 0.2 + 1e-3 * np.sin(i),
            manipulability=0.01, achieved_twist=(0.05, 0.0, 0.0, 0.0, 0.0, 1e-3 * i),
            tracking_error=1e-12 * i, scales={"speed": 1.0, "tcp": 0.5 + i * 1e-4}
            if i % 100 else {"speed": 0.9}, binding_limit=None if i % 11 else "speed",
            period_s=0.002, compute_s=1e-4 * (1 + i % 5), overrun=i % 97 == 0,
            reduced=False, input={"device": "keyboard", "present": True, "axes": [],
                                  "pressed": [3, "space"] if i % 2 else [], "command": None},
            state_age_s=None if i == 0 else 1e-3, overrun_streak=i % 3,
            safety_state="moving"))
    with SessionRecorder.start(path, arm, {"rate_hz": 500}, encode_in_caller=True) as rec:
        for r in records:
            rec.record(r)
    got = page_cycles(path.read_bytes())
    ours = read_session(path).records
    assert len(got) == len(ours) == 700
    for mine, theirs in zip(got, ours):
        assert {k: exact(v) for k, v in mine.items()} == \
            {f.name: exact(getattr(theirs, f.name)) for f in dataclasses.fields(theirs)}


@pytest.mark.parametrize("title", ["## Cycle blocks", "### Column types",
                                   "### Columns of a version 2 block", "## Versions"])
def test_the_page_has_its_sections(title: str) -> None:
    assert re.search(f"^{re.escape(title)}", PAGE, re.M)
