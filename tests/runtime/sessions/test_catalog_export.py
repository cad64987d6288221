"""Finding and exporting sessions: `jogwire inspect DIR`, the cycle table as Parquet, the
sessions folder's cap.

The Parquet check reads the file back with pyarrow (an outside reference reader) and
compares it with the cycle table built here straight from the records.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from runtime.arm.load import load_arm
from runtime.cli import main
from runtime.sessions.archive import ArchiveCap, prune_sessions
from runtime.sessions.catalog import CatalogFilter, catalog
from runtime.sessions.log_reader import read_session
from runtime.sessions.log_schema import CycleRecord
from runtime.sessions.log_writer import SessionRecorder

DT = 0.002


def record(i: int, *, binding: str | None = None, moving: bool = True, n: int = 6
           ) -> CycleRecord:
    speed = 0.1 if moving else 0.0
    return CycleRecord(
        cycle=i, t_s=DT * i, axes=(0.25, -0.5) if i % 2 else (0.25,), buttons=(i % 3 == 0,),
        enabled=True, enable_reason="held", twist=(speed, 0.0, 0.0, 0.0, 0.0, 0.0),
        frame="base", q=(0.01 * i,) * n, rates=(speed,) * n, damping=0.0,
        sigma_min=math.nan if i == 0 else 0.3 - 0.001 * i, manipulability=0.02,
        achieved_twist=(speed, 0.0, 0.0, 0.0, 0.0, 0.0), tracking_error=0.0,
        scales={"speed": 1.0} if i % 2 else {"speed": 0.5, "tcp": 1.0},
        binding_limit=binding, period_s=DT, compute_s=1e-4, overrun=False, reduced=i == 3)


def write(path: Path, arm_name: str, started: datetime, recs: list[CycleRecord]) -> Path:
    with SessionRecorder.start(path, load_arm(arm_name), {"rate_hz": 500},
                               started_at=started, encode_in_caller=True) as rec:
        for r in recs:
            rec.record(r)
    return path


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("sessions")
    day = datetime(2031, 3, 10, 9, 0, tzinfo=timezone.utc)
    write(d / "a.jwlog", "elbow6", day, [record(i) for i in range(300)])
    write(d / "b.jwlog", "scara4", day + timedelta(days=1),
          [record(i, moving=i < 100, n=4) for i in range(200)])
    write(d / "c.jwlog", "elbow6", day + timedelta(days=2),
          [record(i, binding="speed" if 50 <= i < 60 else None) for i in range(100)])
    (d / "broken.jwlog").write_bytes(b"not a session")
    (d / "notes.txt").write_text("not listed")
    return d


def test_a_folder_is_one_row_per_session_oldest_first(folder: Path) -> None:
    rows = catalog(folder)
    assert [Path(r["file"]).name for r in rows] == ["a.jwlog", "b.jwlog", "broken.jwlog",
                                                    "c.jwlog"]
    a, b, broken, c = rows
    assert (a["arm"], a["cycles"], a["closed_cleanly"], a["limit_episodes"]) == \
        ("elbow6", 300, True, 0)
    assert a["duration_s"] == pytest.approx(299 * DT)
    assert b["cycles"] == 200 and b["problems"] == 0
    assert b["time_moving_s"] == pytest.approx(100 * DT)       # moving for 100 cycles
    assert a["tcp_peak_speed"] == pytest.approx(0.1)
    assert a["min_sigma"] == pytest.approx(0.3 - 0.299)
    assert a["min_clearance"] is None                         # not recorded by these logs
    assert c["limit_episodes"] == 1 and c["limits"] == ["speed"]
    assert "not a jogwire session log" in broken["error"]


@pytest.mark.parametrize("filt, names", [
    (CatalogFilter(arm="elbow6"), ["a.jwlog", "c.jwlog"]),
    (CatalogFilter(limit_events=True), ["c.jwlog"]),
    (CatalogFilter(since=datetime(2031, 3, 11, tzinfo=timezone.utc)), ["b.jwlog", "c.jwlog"]),
    (CatalogFilter(until=datetime(2031, 3, 11, tzinfo=timezone.utc)), ["a.jwlog"]),
])
def test_filters(folder: Path, filt: CatalogFilter, names: list[str]) -> None:
    assert [Path(r["file"]).name for r in catalog(folder, filt)] == names


def test_the_command_prints_a_table_and_json(folder: Path, capsys) -> None:
    assert main(["inspect", str(folder)]) == 0
    out = capsys.readouterr().out
    header = out.splitlines()[0].split()
    assert header[:3] == ["started", "arm", "length"] and "clean" in header
    assert "2031-03-10 09:00:00" in out and "unreadable:" in out
    assert main(["inspect", str(folder), "--arm", "elbow6", "--since", "2031-03-11",
                 "--until", "2031-03-12", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [Path(r["file"]).name for r in rows] == ["c.jwlog"]
    assert main(["inspect", str(folder), "--arm", "nobody"]) == 0
    assert "no session log matches the filters" in capsys.readouterr().out


def test_filters_are_for_folders(folder: Path, capsys) -> None:
    assert main(["inspect", str(folder / "a.jwlog"), "--arm", "elbow6"]) == 2
    assert "[arm]" in capsys.readouterr().err
    assert main(["inspect", str(folder), "--since", "last week"]) == 2
    assert "[since]" in capsys.readouterr().err


def test_rows_are_cached_until_a_log_changes(folder: Path, tmp_path: Path, monkeypatch) -> None:
    import shutil

    import runtime.sessions.catalog as cat
    d = tmp_path / "copy"
    shutil.copytree(folder, d)
    (d / cat.CACHE_NAME).unlink(missing_ok=True)
    first = catalog(d)
    assert (d / cat.CACHE_NAME).exists()
    read = []
    real = cat.summarise
    monkeypatch.setattr(cat, "summarise", lambda p: read.append(Path(p).name) or real(p))
    assert catalog(d) == first and read == []                     # all from the cache
    os.utime(d / "b.jwlog", ns=(1, 1))                             # b changed
    assert catalog(d) == first and read == ["b.jwlog"]
    (d / cat.CACHE_NAME).write_text("{not json")                   # a broken cache is ignored
    assert catalog(d) == first and len(read) == 4
    assert json.loads((d / cat.CACHE_NAME).read_text())["sessions"].keys() == \
        {"a.jwlog", "b.jwlog", "c.jwlog"}                          # unreadable: not cached


# ----------------------------------------------------------------------------------------
# Cycle table exports
# ----------------------------------------------------------------------------------------

def expected_table(path: Path) -> dict[str, list]:
    """The cycle table built from the records one by one (not through the export code)."""
    s = read_session(path)
    names = s.header.arm.joint_names
    axes = ("vx", "vy", "vz", "wx", "wy", "wz")
    rows = []
    for r in s.records:
        row = {"cycle": r.cycle, "t_s": r.t_s, "enabled": r.enabled,
               "enable_reason": r.enable_reason, "reduced": r.reduced, "frame": r.frame}
        row.update({f"twist_{a}": v for a, v in zip(axes, r.twist)})
        row.update({f"q_{n}": v for n, v in zip(names, r.q)})
        row.update({f"rate_{n}": v for n, v in zip(names, r.rates)})
        row.update({f"achieved_{a}": v for a, v in zip(axes, r.achieved_twist)})
        row.update(damping=r.damping, sigma_min=r.sigma_min,
                   manipulability=r.manipulability, tracking_error=r.tracking_error)
        row.update({f"scale_{k}": r.scales.get(k) for k in ("speed", "tcp")})
        row.update(binding_limit=r.binding_limit, period_s=r.period_s, compute_s=r.compute_s,
                   overrun=r.overrun)
        row.update({f"axis_{i}": r.axes[i] if i < len(r.axes) else None
                    for i in range(2)})
        row.update({"button_0": r.buttons[0]})
        rows.append(row)
    return {k: [row[k] for row in rows] for k in rows[0]}


def same_cells(a: list, b: list) -> bool:
    def key(v):
        return ("nan",) if isinstance(v, float) and math.isnan(v) else (type(v).__name__, v)
    return [key(v) for v in a] == [key(v) for v in b]


def test_parquet_read_back_with_pyarrow_equals_the_cycle_table(folder: Path, tmp_path: Path,
                                                                capsys) -> None:
    pq = pytest.importorskip("pyarrow.parquet")
    target = tmp_path / "a.parquet"
    assert main(["inspect", str(folder / "a.jwlog"), "--parquet", str(target), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["parquet"]["rows"] == 300
    table = pq.read_table(target).to_pydict()
    expected = expected_table(folder / "a.jwlog")
    assert list(table) == list(expected)
    for name, values in expected.items():
        assert same_cells(table[name], values), name


def test_csv_matches_the_same_table(folder: Path, tmp_path: Path) -> None:
    import csv
    target = tmp_path / "a.csv"
    assert main(["inspect", str(folder / "a.jwlog"), "--csv", str(target)]) == 0
    with open(target, newline="") as f:
        rows = list(csv.DictReader(f))
    expected = expected_table(folder / "a.jwlog")
    assert list(rows[0]) == list(expected) and len(rows) == 300
    assert rows[1]["axis_1"] == "-0.5" and rows[0]["axis_1"] == ""        # missing: empty
    assert rows[0]["scale_tcp"] == "1.0" and rows[1]["scale_tcp"] == ""
    assert rows[3]["reduced"] == "1" and rows[3]["button_0"] == "1"


def test_parquet_without_pyarrow_says_what_to_install(folder: Path, tmp_path: Path,
                                                      monkeypatch, capsys) -> None:
    import builtins
    real_import = builtins.__import__

    def no_pyarrow(name, *args, **kwargs):
        if name.startswith("pyarrow"):
            raise ImportError(name)
        return real_import(name, *args, **kwargs)
    monkeypatch.setattr(builtins, "__import__", no_pyarrow)
    assert main(["inspect", str(folder / "a.jwlog"), "--parquet",
                 str(tmp_path / "x.parquet")]) == 2
    err = capsys.readouterr().err
    assert "pip install 'jogwire[analysis]'" in err and "--csv" in err


# ----------------------------------------------------------------------------------------
# The sessions folder's cap
# ----------------------------------------------------------------------------------------

def aged(folder: Path, sizes_days: dict[str, tuple[int, float]], now: float) -> None:
    for name, (size, days) in sizes_days.items():
        p = folder / name
        p.write_bytes(b"x" * size)
        os.utime(p, (now - days * 86400, now - days * 86400))


def test_the_cap_drops_the_oldest_first_and_never_the_current(tmp_path: Path) -> None:
    now = 2_000_000_000.0
    aged(tmp_path, {"old.jwlog": (400, 9), "mid.jwlog": (300, 5), "new.jwlog": (300, 1),
                    "current.jwlog": (500, 20), "other.bin": (10_000, 30)}, now)
    removed = prune_sessions(tmp_path, ArchiveCap(max_bytes=900), keep=tmp_path / "current.jwlog",
                             now_s=now)
    # 1500 bytes of logs: old (400) then mid (300) go; current is older but never removed
    assert [(r.path.name, r.size_bytes) for r in removed] == [("old.jwlog", 400),
                                                             ("mid.jwlog", 300)]
    assert all("over 0.0009 MB" in r.reason for r in removed)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["current.jwlog", "new.jwlog",
                                                         "other.bin"]


def test_the_age_cap(tmp_path: Path) -> None:
    now = 2_000_000_000.0
    aged(tmp_path, {"a.jwlog": (1, 10), "b.jwlog": (1, 3), "c.jwlog": (1, 0.5)}, now)
    removed = prune_sessions(tmp_path, ArchiveCap(max_age_s=2 * 86400), keep=None, now_s=now)
    assert [(r.path.name, r.reason) for r in removed] == [("a.jwlog", "older than 2 days"),
                                                         ("b.jwlog", "older than 2 days")]
    assert prune_sessions(tmp_path, ArchiveCap(), keep=None, now_s=now) == []


def test_a_file_that_cannot_be_removed_is_reported(tmp_path: Path, monkeypatch) -> None:
    now = 2_000_000_000.0
    aged(tmp_path, {"a.jwlog": (10, 10)}, now)

    def refuse(self, *args, **kwargs):
        raise PermissionError(13, "Permission denied")
    monkeypatch.setattr(Path, "unlink", refuse)
    (r,) = prune_sessions(tmp_path, ArchiveCap(max_age_s=86400), keep=None, now_s=now)
    assert r.error == "Permission denied" and (tmp_path / "a.jwlog").exists()


def test_cap_values_are_checked() -> None:
    with pytest.raises(ValueError):
        ArchiveCap(max_bytes=-1)
    with pytest.raises(ValueError):
        ArchiveCap(max_age_s=0)
    assert dataclasses.replace(ArchiveCap(), max_bytes=0).active
