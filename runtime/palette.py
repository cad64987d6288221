"""jogwire's colours, defined once: the status window, the simulated arm, the exported URDF,
the preflight report and the workcell drawings all take theirs from here.

The identity is the status window's: a dark slate ground, pale cool text and one green
accent for "motion allowed". The arm is drawn in neutrals so that the accent stays the one
colour in the picture that means something: light links, darker housings around the joint
axes, the accent for the tool and the TCP. Workcell objects are a muted slate blue, apart
from the arm's neutrals and from the warning hues, which keep their meaning (amber: close,
red: stop).

Colours are 8-bit sRGB triples. `unit` gives the 0–1 floats PyBullet and URDF want,
`hex_code` the "#rrggbb" text matplotlib and HTML want. No imports: every layer (the sim
included) may use this module.
"""

RGB = tuple[int, int, int]

# The operator's window: ground, panels, tracks, rules and text.
GROUND: RGB = (20, 24, 31)
PANEL: RGB = (31, 37, 48)
TRACK: RGB = (48, 56, 71)
LINE: RGB = (72, 82, 100)
TEXT: RGB = (226, 231, 239)
MUTED: RGB = (142, 152, 168)

# Meanings. ACCENT is jogwire's own colour: motion allowed, good, the tool.
ACCENT: RGB = (46, 176, 134)
READY: RGB = (84, 128, 204)
WARN: RGB = (222, 164, 52)
BLOCKED: RGB = (226, 112, 56)
BAD: RGB = (214, 64, 72)
GOOD: RGB = ACCENT
STATE_COLOURS: dict[str, RGB] = {
    "moving": ACCENT,
    "ready": READY,
    "rearm": WARN,
    "blocked": BLOCKED,
    "stopped": BAD,
}

# The arm, wherever it is drawn (sim, URDF, status window views, report pictures).
ARM_LINK: RGB = (206, 212, 221)      # light neutral, a touch cool like TEXT
ARM_HOUSING: RGB = (86, 95, 110)     # darker neutral: joint housings, the base
TOOL: RGB = ACCENT                   # tool and TCP

# The workcell: static objects, the floor (and other half-spaces), clearance.
CELL_OBJECT: RGB = (112, 128, 168)   # muted slate blue: fixtures, benches, guards
CELL_FLOOR: RGB = (56, 64, 79)       # a plate just lighter than the window's ground
CLEARANCE_LINE: RGB = MUTED          # the nearest pair while it is clear
CLEARANCE_WARN: RGB = WARN           # nearer than the slow-down distance
CLEARANCE_STOP: RGB = BAD            # at or below the stop distance, or touching

# Pictures on white paper (the preflight report): text-strength variants of the meanings,
# and one colour per plotted series (joints, limits), in this order, repeating after eight.
PAPER: RGB = (255, 255, 255)
INK: RGB = (32, 33, 36)
INK_MUTED: RGB = (95, 99, 104)
PASS_ON_PAPER: RGB = (27, 128, 96)   # ACCENT darkened for white text on it
FAIL_ON_PAPER: RGB = (179, 38, 46)   # BAD darkened likewise
SERIES: tuple[RGB, ...] = (
    (46, 160, 122),    # accent green, a shade deeper for white paper
    (84, 128, 204),    # blue
    (212, 150, 40),    # amber
    (134, 96, 196),    # violet
    (200, 84, 128),    # rose
    (48, 150, 180),    # cyan
    (112, 122, 138),   # slate
    (150, 112, 60),    # ochre
)


def unit(rgb: RGB, alpha: float = 1.0) -> tuple[float, float, float, float]:
    """(r, g, b, a) in 0–1, as PyBullet's rgbaColor and URDF's <color rgba> take it."""
    return (rgb[0] / 255.0, rgb[1] / 255.0, rgb[2] / 255.0, float(alpha))


def hex_code(rgb: RGB) -> str:
    """The "#rrggbb" text matplotlib and CSS take."""
    return "#{:02x}{:02x}{:02x}".format(*rgb)
