"""Reading TOML config files so that every error can point at a file, a line and a field.

`tomllib` returns plain dicts without positions, so `TomlSource` keeps the text and finds
the line of a key inside a `[table]` or the index-th `[[table]]` by scanning it. That is
good enough for the hand-written configs jogwire ships (arms, pads, scripts). Pure: the
caller reads the file (`read_toml` is the one helper here that touches the disk).
"""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path
from typing import Any

from .errors import ConfigError


class TomlSource:
    """A TOML file's text, for pointing errors at a line."""

    def __init__(self, path: Path, text: str) -> None:
        self.path = path
        self.lines = text.splitlines()

    def line_of(self, table: str | None, index: int | None, key: str | None) -> int | None:
        """Line (1-based) of `key` inside `[table]` / the index-th `[[table]]`.

        Without a key (or when the key is absent) the table's header line; None at top level.
        """
        current: str | None = None
        count = -1
        header_line = None
        for no, raw in enumerate(self.lines, start=1):
            line = raw.split("#", 1)[0].strip()
            m = re.fullmatch(r"\[\[\s*([\w.\-]+)\s*\]\]", line) or \
                re.fullmatch(r"\[\s*([\w.\-]+)\s*\]", line)
            if m:
                current = m.group(1)
                if current == table:
                    count += 1
                    if index is None or count == index:
                        header_line = no
                continue
            in_scope = (current == table and (index is None or count == index)) if table \
                else current is None
            if in_scope and key and re.match(rf"{re.escape(key)}\s*=", line):
                return no
        return header_line

    def error(self, message: str, field_name: str, table: str | None = None,
              index: int | None = None, key: str | None = None) -> ConfigError:
        return ConfigError(message, path=self.path, line=self.line_of(table, index, key),
                           field=field_name)


def read_toml(path: Path, what: str = "config") -> tuple[dict[str, Any], TomlSource]:
    """Read and parse a TOML file; a missing file or bad syntax is a ConfigError with the line."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot read {what} file: {exc.strerror}", path=path) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"line (\d+)", str(exc))
        raise ConfigError(f"not valid TOML: {exc}", path=path,
                          line=int(m.group(1)) if m else None) from None
    return data, TomlSource(path, text)


def finite_number(src: TomlSource, value: Any, field_name: str, table: str | None = None,
                  index: int | None = None, key: str | None = None) -> float:
    """A finite int or float (not a bool), else a ConfigError at the key's line."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise src.error(f"must be a number, got {value!r}", field_name, table, index, key)
    if not math.isfinite(value):
        raise src.error(f"must be a finite number, got {value!r}", field_name, table, index, key)
    return float(value)


def unit_factor(src: TomlSource, data: dict[str, Any], key: str, units: dict[str, float],
                default: str) -> float:
    """The SI factor of the unit named at top-level `key` (e.g. length_unit = "mm" → 1e-3),
    else a ConfigError listing the known names."""
    name = data.get(key, default)
    if not isinstance(name, str) or name not in units:
        raise src.error(f"unknown unit {name!r}; use one of {', '.join(units)}", key, None, None,
                        key)
    return units[name]


def reject_unknown(src: TomlSource, data: dict[str, Any], allowed: set[str] | frozenset[str],
                   prefix: str = "", table: str | None = None, index: int | None = None) -> None:
    """Raise at the first key of `data` that is not in `allowed` (typos fail loudly)."""
    for key in data:
        if key not in allowed:
            raise src.error(f"unknown key {key!r}; expected one of {', '.join(sorted(allowed))}",
                            f"{prefix}{key}", table, index, key)
