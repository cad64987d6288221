"""The cycle table of a session log, for spreadsheets (CSV) and data tools (Parquet).

One row per cycle, one column per scalar: per-joint columns are named after the joints,
twist components vx … wz, each limit's scale `scale_<name>`, device axes and buttons by
index. Both exports stream the log block by block, so their memory does not grow with the
log. CSV needs nothing beyond the standard library; Parquet needs pyarrow (the optional
`analysis` extra: `pip install jogwire[analysis]`).
"""

from __future__ import annotations

import contextlib
import csv
import sys
from pathlib import Path
from typing import Any, Iterator, TextIO

import numpy as np

from ..errors import ConfigError
from .log_blocks import CycleBlock
from .log_reader import SessionReader
from .summary import SessionStats

TWIST_AXES = ("vx", "vy", "vz", "wx", "wy", "wz")
PYARROW_MISSING = ("Parquet export needs pyarrow, which is not installed; install the "
                   "analysis extra (pip install 'jogwire[analysis]') or use --csv")


def table_columns(stats: SessionStats) -> list[str]:
    """The column names of the cycle table, in order."""
    names = stats.arm.joint_names
    return (["cycle", "t_s", "enabled", "enable_reason", "reduced", "frame"]
            + [f"twist_{a}" for a in TWIST_AXES]
            + [f"q_{n}" for n in names] + [f"rate_{n}" for n in names]
            + [f"achieved_{a}" for a in TWIST_AXES]
            + ["damping", "sigma_min", "manipulability", "tracking_error"]
            + [f"scale_{s}" for s in sorted(stats.scale_names)]
            + ["binding_limit", "period_s", "compute_s", "overrun"]
            + [f"axis_{i}" for i in range(stats.n_axes)]
            + [f"button_{i}" for i in range(stats.n_buttons)])


def table_of(block: CycleBlock, stats: SessionStats) -> dict[str, Any]:
    """The rows of one block as columns: ndarrays for numbers and flags, lists where a
    value can be missing (None: a scale the cycle did not report, an axis or button the
    device lacks) and for text. NaN is a measured NaN (σ_min of a cycle without a solve)."""
    cols: dict[str, Any] = {"cycle": block["cycle"], "t_s": block["t_s"],
                            "enabled": block["enabled"],
                            "enable_reason": block["enable_reason"].tolist(),
                            "reduced": block["reduced"], "frame": block["frame"].tolist()}
    joints = stats.arm.joint_names
    for prefix, name, labels in (("twist", "twist", TWIST_AXES), ("q", "q", joints),
                                 ("rate", "rates", joints),
                                 ("achieved", "achieved_twist", TWIST_AXES)):
        m = block.matrix(name, len(labels))
        cols.update({f"{prefix}_{label}": m[:, k] for k, label in enumerate(labels)})
    for name in ("damping", "sigma_min", "manipulability", "tracking_error"):
        cols[name] = block[name]
    scales = block["scales"].rows()
    for s in sorted(stats.scale_names):
        cols[f"scale_{s}"] = [r.get(s) for r in scales]
    cols["binding_limit"] = block["binding_limit"].tolist()
    for name in ("period_s", "compute_s", "overrun"):
        cols[name] = block[name]
    cols.update(_padded("axis", block["axes"].rows(), stats.n_axes))
    cols.update(_padded("button", block["buttons"].rows(), stats.n_buttons))
    return cols


def _padded(prefix: str, rows: list[tuple[Any, ...]], width: int) -> dict[str, list[Any]]:
    return {f"{prefix}_{i}": [r[i] if i < len(r) else None for r in rows]
            for i in range(width)}


def _blocks(log: Path) -> Iterator[CycleBlock]:
    with SessionReader(log) as reader:
        yield from reader.blocks()


# ----------------------------------------------------------------------------------------
# CSV
# ----------------------------------------------------------------------------------------

def write_csv(log: Path, target: str, stats: SessionStats) -> int:
    """Write the cycle table of `log` to `target` ('-' = stdout); returns the row count.
    Flags as 1/0, a missing value as an empty cell, NaN as `nan`."""
    names = table_columns(stats)
    rows = 0
    try:
        with _open_text(target) as out:
            writer = csv.writer(out, lineterminator="\n")
            writer.writerow(names)
            for block in _blocks(log):
                cols = table_of(block, stats)
                writer.writerows(zip(*(_csv_cells(cols[name]) for name in names)))
                rows += block.n
    except OSError as exc:
        raise ConfigError(f"cannot write {target}: {exc.strerror or exc}", field="--csv"
                          ) from None
    return rows


def _csv_cells(values: Any) -> list[Any]:
    if isinstance(values, np.ndarray):
        return (values.astype(int) if values.dtype == bool else values).tolist()
    return ["" if v is None else int(v) if isinstance(v, bool) else v
            for v in values]


@contextlib.contextmanager
def _open_text(target: str) -> Iterator[TextIO]:
    if target == "-":
        yield sys.stdout
    else:
        with open(target, "w", encoding="utf-8", newline="") as f:
            yield f


# ----------------------------------------------------------------------------------------
# Parquet
# ----------------------------------------------------------------------------------------

def write_parquet(log: Path, target: str, stats: SessionStats) -> int:
    """Write the cycle table of `log` to the Parquet file `target` (a missing value is a
    null); returns the row count. ConfigError if pyarrow is not installed."""
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise ConfigError(PYARROW_MISSING, field="--parquet") from None
    schema = pa.schema([(name, _arrow_type(pa, name)) for name in table_columns(stats)])
    rows = 0
    try:
        with pq.ParquetWriter(target, schema) as writer:
            for block in _blocks(log):
                cols = table_of(block, stats)
                writer.write_table(pa.table({f.name: pa.array(cols[f.name], type=f.type)
                                             for f in schema}, schema=schema))
                rows += block.n
    except OSError as exc:
        raise ConfigError(f"cannot write {target}: {exc.strerror or exc}", field="--parquet"
                          ) from None
    return rows


def _arrow_type(pa: Any, name: str) -> Any:
    if name in ("cycle",):
        return pa.int64()
    if name in ("enabled", "reduced", "overrun") or name.startswith("button_"):
        return pa.bool_()
    if name in ("enable_reason", "frame", "binding_limit"):
        return pa.string()
    return pa.float64()

