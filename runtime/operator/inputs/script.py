"""Scripted input: a TOML file of timed twist segments, played as if an operator held enable.

Used for headless runs, tests and preflight motion profiles. Format (configs/profiles/):

    name = "square"
    summary = "a 10 cm square in the base x-y plane"
    angle_unit = "deg"        # angular twist components and revolute joint rates: deg/s or rad/s
    lead_in_s = 0.5           # enable released this long before the first segment
    repeat = 1                # play the segments this many times

    [[segment]]
    duration_s = 2.0          # required, > 0
    twist = [0.05, 0, 0, 0, 0, 0]   # vx vy vz in m/s, wx wy wz in angle_unit/s (default zero)
    frame = "base"            # or "tool"
    reduced = false
    enable = true             # false: the operator lets go of enable for this segment
    # joint = "elbow"         # single-joint jog instead of a twist (name or index) ...
    # joint_rate = 10.0       # ... at this rate (angle_unit/s, or m/s for a prismatic joint)
    # stop = true             # press the stop button during this segment
    # reset = true            # press reset during this segment

The clock starts at the first `read`. During the lead-in and after the last segment the
enable is released, so the first segment's enable is a fresh press for the safety gate
(a script whose lead_in_s is 0 starts with enable "held at start" and will not move).
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ...arm.load import resolve_shipped
from ...arm.model import ANGLE_UNITS, FRAMES, Arm, configs_dir
from ...control.intent import DirectCommand, InputFrame
from ...tomlsource import TomlSource, finite_number, read_toml, reject_unknown

_RELEASED = DirectCommand(enable=False)


@dataclass(frozen=True)
class Segment:
    """One stretch of a script, in SI units (m/s, rad/s)."""

    duration_s: float
    command: DirectCommand


@dataclass(frozen=True)
class Script:
    name: str
    segments: tuple[Segment, ...]
    lead_in_s: float = 0.5
    repeat: int = 1
    summary: str = ""
    source: str = ""

    @property
    def motion_s(self) -> float:
        """Length of the segments, repeats included (s)."""
        return self.repeat * sum(s.duration_s for s in self.segments)

    @property
    def duration_s(self) -> float:
        """Lead-in plus segments (s); after this the script holds enable released."""
        return self.lead_in_s + self.motion_s


def profile_names() -> list[str]:
    return sorted(p.stem for p in (configs_dir() / "profiles").glob("*.toml"))


def resolve_script_path(name_or_path: str | Path) -> Path:
    """A shipped script's name (configs/profiles/, shared with preflight) or a .toml path."""
    return resolve_shipped("script", name_or_path, folder_name="profiles")


def load_script(name_or_path: str | Path, arm: Arm | None = None) -> Script:
    """Load and validate a script (a shipped profile name or a path).

    `arm` resolves joint names and kinds; a script with joint segments needs it.
    """
    path = resolve_script_path(name_or_path)
    data, src = read_toml(path, "script")
    return script_from_toml(data, src, arm)


def script_from_toml(data: dict[str, Any], src: TomlSource, arm: Arm | None = None) -> Script:
    reject_unknown(src, data, {"name", "summary", "angle_unit", "lead_in_s", "repeat",
                               "segment"})
    name = data.get("name", src.path.stem)
    if not isinstance(name, str) or not name.strip():
        raise src.error("must be a non-empty string", "name", None, None, "name")
    unit = data.get("angle_unit", "deg")
    if unit not in ANGLE_UNITS:
        raise src.error(f"unknown unit {unit!r}; use deg or rad", "angle_unit", None, None,
                        "angle_unit")
    angle = ANGLE_UNITS[unit]
    lead_in = finite_number(src, data.get("lead_in_s", 0.5), "lead_in_s", None, None,
                            "lead_in_s")
    if lead_in < 0:
        raise src.error("must not be negative", "lead_in_s", None, None, "lead_in_s")
    repeat = data.get("repeat", 1)
    if isinstance(repeat, bool) or not isinstance(repeat, int) or repeat < 1:
        raise src.error(f"must be a whole number ≥ 1, got {repeat!r}", "repeat", None, None,
                        "repeat")
    raw = data.get("segment")
    if not isinstance(raw, list) or not raw:
        raise src.error("a script needs at least one [[segment]]", "segment")
    segments = tuple(_segment(src, spec, i, angle, arm) for i, spec in enumerate(raw))
    return Script(name=name, segments=segments, lead_in_s=lead_in, repeat=repeat,
                  summary=str(data.get("summary", "")), source=str(src.path))


def _segment(src: TomlSource, spec: Any, i: int, angle: float, arm: Arm | None) -> Segment:
    f, where = f"segment[{i}].", ("segment", i)
    if not isinstance(spec, dict):
        raise src.error("each segment is a [[segment]] table", f"segment[{i}]", "segment")
    reject_unknown(src, spec, {"duration_s", "twist", "frame", "reduced", "enable", "joint",
                               "joint_rate", "stop", "reset"}, f, *where)
    if "duration_s" not in spec:
        raise src.error("missing 'duration_s'", f + "duration_s", *where)
    duration = finite_number(src, spec["duration_s"], f + "duration_s", *where, "duration_s")
    if duration <= 0:
        raise src.error("must be positive", f + "duration_s", *where, "duration_s")
    twist_raw = spec.get("twist", [0.0] * 6)
    if not isinstance(twist_raw, list) or len(twist_raw) != 6:
        raise src.error(f"must list 6 numbers (vx vy vz wx wy wz), got {twist_raw!r}",
                        f + "twist", *where, "twist")
    values = [finite_number(src, v, f + "twist", *where, "twist") for v in twist_raw]
    twist = tuple(v if k < 3 else v * angle for k, v in enumerate(values))
    frame = spec.get("frame", "base")
    if frame not in FRAMES:
        raise src.error(f"got {frame!r}; use base or tool", f + "frame", *where, "frame")
    flags = {}
    for key, default in (("reduced", False), ("enable", True), ("stop", False),
                         ("reset", False)):
        v = spec.get(key, default)
        if not isinstance(v, bool):
            raise src.error("must be true or false", f + key, *where, key)
        flags[key] = v
    joint, rate = _joint(src, spec, f, where, angle, arm)
    if joint is not None and any(twist):
        raise src.error("a segment jogs either a joint or a twist, not both", f + "twist",
                        *where, "twist")
    return Segment(duration_s=duration,
                   command=DirectCommand(twist=twist, frame=frame, joint=joint, joint_rate=rate,
                                         **flags))


def _joint(src: TomlSource, spec: dict[str, Any], f: str, where: tuple[str, int], angle: float,
           arm: Arm | None) -> tuple[int | None, float]:
    if "joint" not in spec:
        if "joint_rate" in spec:
            raise src.error("joint_rate needs a joint", f + "joint_rate", *where, "joint_rate")
        return None, 0.0
    if arm is None:
        raise src.error("a joint segment needs the arm to check the joint against", f + "joint",
                        *where, "joint")
    ref = spec["joint"]
    if isinstance(ref, str) and ref in arm.joint_names:
        index = arm.joint_names.index(ref)
    elif isinstance(ref, int) and not isinstance(ref, bool) and 0 <= ref < arm.n:
        index = ref
    else:
        raise src.error(f"no joint {ref!r} in arm {arm.name!r} ({', '.join(arm.joint_names)})",
                        f + "joint", *where, "joint")
    rate = finite_number(src, spec.get("joint_rate", 0.0), f + "joint_rate", *where,
                         "joint_rate")
    return index, rate * (angle if arm.joints[index].is_revolute else 1.0)


class ScriptSource:
    """Plays a `Script`. `read(now_s)` never blocks; the clock starts at the first read."""

    def __init__(self, script: Script) -> None:
        self.script = script
        self.name = f"script {script.name}"
        self._t0: float | None = None
        self._ends: list[float] = []
        t = script.lead_in_s
        for _ in range(script.repeat):
            for seg in script.segments:
                t += seg.duration_s
                self._ends.append(t)
        self._commands = [seg.command for seg in script.segments] * script.repeat

    def elapsed_s(self, now_s: float) -> float:
        return 0.0 if self._t0 is None else now_s - self._t0

    def progress(self, now_s: float) -> tuple[str, float, float]:
        """(script name, elapsed s, duration s) for the status."""
        return self.script.name, self.elapsed_s(now_s), self.script.duration_s

    def finished(self, now_s: float) -> bool:
        """True once the last segment has ended (enable is then held released)."""
        return self._t0 is not None and self.elapsed_s(now_s) >= self.script.duration_s

    def command_at(self, t_s: float) -> DirectCommand:
        """The command in force `t_s` seconds after the script started."""
        if t_s < self.script.lead_in_s or math.isnan(t_s):
            return _RELEASED
        k = bisect.bisect_right(self._ends, t_s)
        return self._commands[k] if k < len(self._commands) else _RELEASED

    def read(self, now_s: float) -> InputFrame:
        if self._t0 is None:
            self._t0 = now_s
        return InputFrame(device=self.name, present=True,
                          command=self.command_at(now_s - self._t0))

    def close(self) -> None:
        pass
