"""Teach jogwire a gamepad: the user moves each stick and presses each button when asked, and
the result is a pad file (configs/pads format) for `jogwire drive --pad`.

`PadLearner` is the procedure as a small state machine, pure: feed it what the pad reads
(`feed(now_s, frame)`), show its `prompt`, and when it is `done` take `result()`.
`learn_pad` runs it against a gamepad source with an injected clock, and `write_pad_file`
writes the file and reads it back through the pad loader (`jogwire pads --learn`).

    rest     leave the pad alone for `rest_s`: each axis's resting value and noise
    sticks   left up, left right, right up, right right: the axis that moves furthest from
             rest (at least PUSH_MIN of full travel) for `hold_s`, and its sign; then let go
    buttons  enable, stop, reset (required), then shift, frame, mode, reduced, faster,
             slower, next and previous joint (optional: press enable to leave one out)

Axes that rest near an end of their travel (|rest| > 0.5: triggers, which SDL reports at
−1 when released) are not stick candidates. The dead zone is measured: twice the largest
stick deflection seen at rest (the rest phase and the moments after each stick is let go,
where a stick's spring brings it back to a slightly different place each time), at least
DEADZONE_MIN and at most DEADZONE_MAX. The factor 2 and the bounds are our choice; published
advice puts a stick's dead zone at 0.1–0.2 (Sutphin 2013, REFERENCES §6).

The bindings follow the shipped pads' conventions (base frame x forward, y left, z up): left
stick up → +x, left → +y; right stick up → +z, right → turn clockwise seen from above (−wz);
with shift held the left stick rotates (right → +wx, up → +wy); in single-joint mode the left
stick up drives the joint forward.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Protocol

from ..control.mapping import Button, InputFrame, load_pad
from ..errors import ConfigError, DeviceError

PUSH_MIN = 0.7          # a stick counts as pushed this far from rest (fraction of travel)
RELEASE_MAX = 0.25      # … and as let go within this of rest
TRIGGER_REST = 0.5      # an axis resting further out than this is a trigger, not a stick
DEADZONE_MIN, DEADZONE_MAX = 0.05, 0.3
SETTLE_S = 0.2          # rest samples taken this long after each stick is let go

STICK_STEPS = (("left", "up"), ("left", "right"), ("right", "up"), ("right", "right"))
# (action, what it does, required)
BUTTON_STEPS = (
    ("enable", "hold to move; a shoulder button suits it", True),
    ("stop", "stop, latched until reset", True),
    ("reset", "clears a stop", True),
    ("shift", "hold: the left stick rotates instead of translating", False),
    ("frame", "toggles base / tool frame", False),
    ("mode", "toggles Cartesian / single-joint mode", False),
    ("reduced", "toggles reduced speed", False),
    ("faster", "next speed preset", False),
    ("slower", "previous speed preset", False),
    ("joint_next", "single-joint mode: next joint", False),
    ("joint_prev", "single-joint mode: previous joint", False),
)


@dataclass(frozen=True)
class Stick:
    """A stick's axes and the signs its 'up' and 'right' read with."""

    x: int
    y: int
    right_sign: float
    up_sign: float


@dataclass(frozen=True)
class LearnedPad:
    device: str                              # the pad's name as SDL reports it
    rest: tuple[float, ...]                  # resting value per axis
    left: Stick
    right: Stick
    buttons: dict[str, Button]               # action → button (optional ones may be absent)
    rest_deflection: float                   # largest stick deflection seen at rest
    deadzone: float

    @property
    def drift_note(self) -> str | None:
        """Said when the measured dead zone had to be capped."""
        if 2.0 * self.rest_deflection <= DEADZONE_MAX:
            return None
        return (f"the sticks rest up to {self.rest_deflection:.2f} from centre: dead zone "
                f"capped at {DEADZONE_MAX:g}; this pad's sticks drift a lot")


@dataclass
class _Step:
    kind: str                                # "rest", "stick", "button"
    name: str                                # "rest", "left up", "enable" …
    required: bool = True
    phase: str = "act"                       # "act" (push / press), or a stick's "release"
    started_s: float | None = None


@dataclass
class PadLearner:
    """The learning procedure (see the module docstring). Times in s on the caller's clock."""

    rest_s: float = 1.0
    hold_s: float = 0.3
    step_timeout_s: float = 30.0
    failed: str | None = None
    notes: list[str] = field(default_factory=list)

    def __post_init__(self) -> None:
        self._steps = [_Step("rest", "rest")] + \
            [_Step("stick", f"{side} {way}") for side, way in STICK_STEPS] + \
            [_Step("button", action, required) for action, _, required in BUTTON_STEPS]
        self._i = 0
        self._device = ""
        self._rest_samples: list[tuple[float, ...]] = []
        self._rest: tuple[float, ...] = ()
        self._stick_axes: dict[str, tuple[int, float]] = {}   # "left up" → (axis, sign)
        self._buttons: dict[str, Button] = {}
        self._candidate: tuple[int, float, float] | None = None  # axis, sign, since_s
        self._let_go_s: float | None = None          # when the stick came back near rest
        self._pressed: Button | None = None
        self._hint = ""

    # -- what to show ---------------------------------------------------------------------

    @property
    def done(self) -> bool:
        return self._i >= len(self._steps) or self.failed is not None

    @property
    def step(self) -> tuple[int, int]:
        """(this step's number from 1, number of steps)."""
        return min(self._i + 1, len(self._steps)), len(self._steps)

    @property
    def prompt(self) -> str:
        if self.failed is not None:
            return f"failed: {self.failed}"
        if self.done:
            return "done"
        s = self._steps[self._i]
        n, total = self.step
        head = f"[{n}/{total}] "
        if s.kind == "rest":
            return head + f"leave the pad alone (no stick, no button) for {self.rest_s:g} s"
        if s.phase == "release":
            return head + "let go of the stick"
        if s.kind == "stick":
            side, way = s.name.split()
            return head + f"push the {side.upper()} stick fully {way.upper()} and hold it" + \
                self._hint
        purpose = {a: p for a, p, _ in BUTTON_STEPS}[s.name]
        skip = "" if s.required else " (or press ENABLE to leave it out)"
        return head + f"press and release the button for {_shout(s.name)} ({purpose})" + \
            skip + self._hint

    # -- input ----------------------------------------------------------------------------

    def feed(self, now_s: float, frame: InputFrame) -> None:
        """One reading of the pad. An absent pad pauses the procedure."""
        if self.done or not frame.present:
            return
        self._device = self._device or frame.device
        s = self._steps[self._i]
        if s.started_s is None:
            s.started_s = now_s
        if s.kind != "rest" and now_s - s.started_s > self.step_timeout_s:
            self._time_out(s)                  # (the rest restarts while a button is held)
            return
        if s.kind == "rest":
            self._feed_rest(now_s, s, frame)
        elif s.kind == "stick":
            self._feed_stick(now_s, s, frame)
        else:
            self._feed_button(s, frame)

    def result(self) -> LearnedPad:
        if not self.done or self.failed is not None:
            raise RuntimeError("the procedure has not finished")
        sticks = {}
        for side in ("left", "right"):
            (ax_up, up_sign), (ax_right, right_sign) = (self._stick_axes[f"{side} up"],
                                                        self._stick_axes[f"{side} right"])
            sticks[side] = Stick(x=ax_right, y=ax_up, right_sign=right_sign, up_sign=up_sign)
        deflection = max((math.hypot(sample[st.x], sample[st.y])
                          for sample in self._rest_samples for st in sticks.values()),
                         default=0.0)
        deadzone = max(DEADZONE_MIN, math.ceil(2.0 * deflection * 100 - 1e-9) / 100)
        return LearnedPad(device=self._device, rest=self._rest, left=sticks["left"],
                          right=sticks["right"], buttons=dict(self._buttons),
                          rest_deflection=deflection, deadzone=min(deadzone, DEADZONE_MAX))

    # -- the steps ------------------------------------------------------------------------

    def _next(self) -> None:
        self._i += 1
        self._candidate = self._let_go_s = None
        self._pressed = None
        self._hint = ""

    def _time_out(self, s: _Step) -> None:
        if s.kind == "button" and not s.required:
            self.notes.append(f"{s.name}: nothing pressed in {self.step_timeout_s:g} s, "
                              "left out")
            self._next()
        else:
            self.failed = (f"step {s.name!r}: nothing usable in {self.step_timeout_s:g} s "
                           f"({self.prompt})")

    def _feed_rest(self, now_s: float, s: _Step, frame: InputFrame) -> None:
        if frame.pressed:
            s.started_s = now_s            # a button held: start the rest over
            self._rest_samples.clear()
            return
        self._rest_samples.append(tuple(frame.axes))
        if now_s - s.started_s >= self.rest_s:
            n = len(self._rest_samples)
            self._rest = tuple(sum(v[a] for v in self._rest_samples) / n
                               for a in range(len(frame.axes)))
            self._next()

    def _deflections(self, axes: tuple[float, ...]) -> list[tuple[float, int]]:
        """(deflection from rest, axis) of the stick candidates."""
        return [(axes[a] - r, a) for a, r in enumerate(self._rest)
                if abs(r) <= TRIGGER_REST and a < len(axes)]

    def _feed_stick(self, now_s: float, s: _Step, frame: InputFrame) -> None:
        moved = self._deflections(frame.axes)
        if s.phase == "release":
            if any(abs(d) >= RELEASE_MAX for d, _ in moved):
                self._let_go_s = None
            elif self._let_go_s is None:
                self._let_go_s = now_s
            elif now_s - self._let_go_s >= SETTLE_S:
                self._rest_samples.append(tuple(frame.axes))   # where it came back to
                self._next()
            return
        d, axis = max(moved, key=lambda m: abs(m[0]), default=(0.0, -1))
        if abs(d) < PUSH_MIN:
            self._candidate = None
            return
        sign = math.copysign(1.0, d)
        if self._candidate is None or self._candidate[:2] != (axis, sign):
            self._candidate = (axis, sign, now_s)
            return
        if now_s - self._candidate[2] < self.hold_s:
            return
        taken = [name for name, (a, _) in self._stick_axes.items() if a == axis]
        if taken:
            self._hint = f" — axis {axis} is already the {taken[0].upper()} axis"
            return
        self._stick_axes[s.name] = (axis, sign)
        s.phase, self._candidate, self._hint = "release", None, ""

    def _feed_button(self, s: _Step, frame: InputFrame) -> None:
        """A press, then the release of everything: the button pressed is the answer."""
        if self._pressed is None:
            if frame.pressed:
                self._pressed = min(frame.pressed, key=lambda b: (isinstance(b, str), str(b)))
            return
        if frame.pressed:
            return                                 # wait for the release
        button, self._pressed = self._pressed, None
        owner = next((a for a, b in self._buttons.items() if b == button), None)
        if owner == "enable" and not s.required:
            self.notes.append(f"{s.name}: left out")
            self._next()
        elif owner is not None:
            self._hint = f" — {_label(button)} is already {_shout(owner)}; press another"
        else:
            self._buttons[s.name] = button
            self._next()


def _shout(action: str) -> str:
    return action.replace("_", " ").upper()


def _label(button: Button) -> str:
    return f"button {button}" if isinstance(button, int) else button


# ----------------------------------------------------------------------------------------
# The pad file
# ----------------------------------------------------------------------------------------

def _toml_button(button: Button) -> str:
    return str(button) if isinstance(button, int) else f'"{button}"'


def pad_file_text(learned: LearnedPad, name: str) -> str:
    """The pad file for `learned`, in the shipped files' format and conventions."""
    L, R = learned.left, learned.right
    b = learned.buttons

    def sign(s: float) -> str:
        return "1" if s > 0 else "-1"

    def reads(stick: Stick) -> str:
        return (f"axis {stick.x} (right reads {'+' if stick.right_sign > 0 else '-'}), "
                f"axis {stick.y} (up reads {'+' if stick.up_sign > 0 else '-'})")

    lines = [
        f"# {name}: learned with `jogwire pads --learn` from the pad {learned.device!r}.",
        "# Check it live with `jogwire pads --pad THIS_FILE`; learn again to change it.",
        f"#   left stick:  {reads(L)}",
        f"#   right stick: {reads(R)}",
        "#   axes at rest: " + ", ".join(f"{a} {v:+.3f}" for a, v in enumerate(learned.rest)),
        "#",
        "# Hold ENABLE to move. Base frame: x forward, y left, z up.",
        f"name = {json.dumps(name, ensure_ascii=False)}",
        f"summary = {json.dumps('learned from ' + learned.device, ensure_ascii=False)}",
        'device = "gamepad"',
        f"sticks = [[{L.x}, {L.y}], [{R.x}, {R.y}]]",
        "",
        "[shaping]",
        f"deadzone = {learned.deadzone:.2f}".ljust(26) +
        f"# the sticks rested up to {learned.rest_deflection:.3f} from centre",
        'curve = "expo"',
        "expo = 0.5",
        "",
        "[speed]",
        "presets = [0.05, 0.15, 0.4, 1.0]   # fractions of the arm's TCP caps and joint speeds",
        "start = 1",
        "",
        "[buttons]",
    ]
    for action, purpose, _ in BUTTON_STEPS:
        if action in b:
            lines.append(f"{action} = {_toml_button(b[action])}".ljust(26) + f"# {purpose}")
    bindings = [
        (L.y, "vx", L.up_sign, "main", "left stick up → +x"),
        (L.x, "vy", -L.right_sign, "main", "left stick left → +y"),
        (R.y, "vz", R.up_sign, "main", "right stick up → +z"),
        (R.x, "wz", -R.right_sign, "any", "right stick right → turn clockwise seen from above"),
    ]
    if "shift" in b:
        bindings += [(L.x, "wx", L.right_sign, "shift", "shift + left stick right → roll +x"),
                     (L.y, "wy", L.up_sign, "shift", "shift + left stick up → pitch +y")]
    bindings.append((L.y, "joint", L.up_sign, "any", "single-joint mode: left stick up"))
    for axis, drive, s, layer, comment in bindings:
        lines += ["", "[[axis]]", f"index = {axis:<18}# {comment}", f'drive = "{drive}"',
                  f"sign = {sign(s)}"]
        if layer != "main":
            lines.append(f'layer = "{layer}"')
    return "\n".join(lines) + "\n"


# ----------------------------------------------------------------------------------------
# The procedure at the terminal
# ----------------------------------------------------------------------------------------

class PadSource(Protocol):
    """What the procedure needs of the gamepad source (operator.inputs.gamepad)."""

    @property
    def device_name(self) -> str | None: ...

    def pump(self) -> list: ...

    def read(self, now_s: float) -> InputFrame: ...


def learn_pad(source: PadSource, say: Callable[[str], None], *, clock: Callable[[], float],
              sleep: Callable[[float], None], step_timeout_s: float = 30.0,
              poll_s: float = 0.005) -> LearnedPad:
    """Walk the user through `PadLearner` with the first pad `source` sees; each new prompt
    goes to `say`. Raises DeviceError when no pad comes or a required step times out."""
    learner = PadLearner(step_timeout_s=step_timeout_s)
    absent_since: float | None = clock()
    told = ""
    while not learner.done:
        source.pump()
        now = clock()
        frame = source.read(now)
        if frame.present:
            absent_since = None
            learner.feed(now, replace(frame, device=source.device_name or frame.device))
            prompt = learner.prompt
        else:
            absent_since = now if absent_since is None else absent_since
            if now - absent_since > step_timeout_s:
                raise DeviceError(f"no pad for {step_timeout_s:g} s")
            prompt = "waiting for a pad: plug one in"
        if prompt != told:
            say(prompt)
            told = prompt
        sleep(poll_s)
    if learner.failed is not None:
        raise DeviceError(learner.failed)
    learned = learner.result()
    for note in learner.notes + [learned.drift_note]:
        if note:
            say(f"note: {note}")
    return learned


def write_pad_file(learned: LearnedPad, path: str | Path, *, force: bool = False) -> Path:
    """Write the pad file (its name is the file's stem) and read it back through the pad
    loader, so what is written is what `jogwire drive --pad` will load."""
    path = Path(path)
    if path.suffix != ".toml":
        raise ConfigError(f"{path}: a pad file ends in .toml", field="learn")
    if path.exists() and not force:
        raise ConfigError(f"{path} exists; choose another name or add --force", field="learn")
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".part")
    tmp.write_text(pad_file_text(learned, path.stem), encoding="utf-8")
    try:
        load_pad(tmp)
    except ConfigError:
        tmp.unlink()
        raise
    tmp.replace(path)
    return path
