"""mnemode's colours and line styles, chosen by the role a line plays in a figure.

Roles: the **truth** (observed data) is black and heaviest; the **physics-only**
model, the uncorrected starting point, is orange dash-dot; **references** (the
oracle, the independent truth run) are reddish purple dotted and grey dashed;
**learned models** take blue, vermillion, bluish green, sky blue and yellow in
order, each with its own dash pattern, so two models whose lines coincide stay
distinguishable and a reader without colour vision can still tell them apart.

The hues are the eight-colour set of Okabe and Ito (2008), "Color Universal Design",
designed to stay distinct under the common colour-vision deficiencies.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["LineStyle", "TRUTH", "HISTORY", "PHYSICS_ONLY", "ORACLE", "FLOOR", "THRESHOLD", "GUIDE", "MODEL_COLOURS",
           "MODEL_DASHES", "SCHEME_COLOURS", "role_of", "line_styles"]

# Okabe & Ito (2008) colour-universal-design hues
_BLACK, _ORANGE, _SKY, _GREEN = "#000000", "#E69F00", "#56B4E9", "#009E73"
_YELLOW, _BLUE, _VERMILLION, _PURPLE = "#F0E442", "#0072B2", "#D55E00", "#CC79A7"


@dataclass(frozen=True)
class LineStyle:
    """Colour, dash pattern and width of one line, and the role that chose them."""

    color: str
    ls: object = "-"
    lw: float = 1.3
    role: str = "model"

    def kw(self) -> dict:
        """Keyword arguments for ``Axes.plot`` / ``Axes.stairs``."""
        return {"color": self.color, "ls": self.ls, "lw": self.lw}


TRUTH = LineStyle(_BLACK, "-", 1.9, "truth")
HISTORY = LineStyle("#8C8C8C", "-", 1.2, "history")          # the observed warm-up before a forecast
PHYSICS_ONLY = LineStyle(_ORANGE, (0, (6, 2, 1.5, 2)), 1.4, "physics")
ORACLE = LineStyle(_PURPLE, (0, (1, 1.2)), 1.6, "reference")
FLOOR = LineStyle("#999999", (0, (4, 2)), 1.3, "reference")   # the independent truth run
THRESHOLD = LineStyle("#4D4D4D", (0, (3, 3)), 1.0, "threshold")
GUIDE = LineStyle("#BFBFBF", "-", 0.6, "guide")                # zero lines, the forecast start

MODEL_COLOURS = (_BLUE, _VERMILLION, _GREEN, _SKY, _YELLOW)
MODEL_DASHES = ("-", (0, (5, 1.8)), (0, (1.2, 1.2)), (0, (7, 2, 1.5, 2, 1.5, 2)), (0, (3, 1.5)))

SCHEME_COLOURS = frozenset({TRUTH.color, HISTORY.color, PHYSICS_ONLY.color, ORACLE.color, FLOOR.color,
                            THRESHOLD.color, GUIDE.color, *MODEL_COLOURS})

_REFERENCES = {"oracle": ORACLE, "floor": FLOOR}


def role_of(name: str) -> str:
    """``physics`` for the physics-only model, ``reference`` for the oracle and floor, else ``model``."""
    if name == "physics_only":
        return "physics"
    return "reference" if name in _REFERENCES else "model"


def line_styles(names) -> dict[str, LineStyle]:
    """A :class:`LineStyle` per model name: by role, learned models in order of appearance.

    The ``k``-th learned model gets colour ``k mod 5`` and dash pattern
    ``k mod 5`` shifted by one every full round of colours, so no two of the first
    25 learned models share both.
    """
    out, k = {}, 0
    for name in names:
        role = role_of(name)
        if role == "physics":
            out[name] = PHYSICS_ONLY
        elif role == "reference":
            out[name] = _REFERENCES[name]
        else:
            c = len(MODEL_COLOURS)
            out[name] = LineStyle(MODEL_COLOURS[k % c], MODEL_DASHES[(k + k // c) % len(MODEL_DASHES)], 1.4, "model")
            k += 1
    return out
