"""The toolkit's own named colours, defined once and used by every figure.

The hues are Paul Tol's colour-blind-safe qualitative schemes "bright" and "high contrast"
(P. Tol, *Colour Schemes*, SRON technical note SRON/EPS/TN/09-002, 2021), given a meaning
each: a figure asks for ``COLOURS["after"]``, never for a hex code. Marks that must read in
grey print differ by marker or line style as well as by colour.
"""

from __future__ import annotations

from types import MappingProxyType

__all__ = ["COLOURS", "SERIES", "colour"]

# Tol "bright": blue 4477AA, cyan 66CCEE, green 228833, yellow CCBB44, red EE6677,
# purple AA3377, grey BBBBBB; Tol "high contrast": dark blue 004488, ochre DDAA33, wine BB5566.
_BLUE, _CYAN, _GREEN, _YELLOW = "#4477AA", "#66CCEE", "#228833", "#CCBB44"
_RED, _PURPLE, _GREY = "#EE6677", "#AA3377", "#BBBBBB"
_DARK_BLUE, _OCHRE, _WINE = "#004488", "#DDAA33", "#BB5566"

COLOURS = MappingProxyType({
    "before": _RED,          # crosstalk with no compensation
    "after": _BLUE,          # residual with the settings written
    "bound": _DARK_BLUE,     # error bars and upper bounds of "after"
    "isolated": _GREEN,      # a qubit's gate error with every other qubit idle
    "within": _GREEN,        # a re-check that found the pair within tolerance
    "drifted": _OCHRE,       # a re-check that found the pair drifted
    "broken": _WINE,         # a re-check whose data did not fit
    "tolerance": _WINE,      # the tolerance line and the band above it
    "null": _PURPLE,         # the fitted null and its error ellipses
    "truth": "#222222",      # true values from a simulator
    "neutral": _GREY,        # marks that only give context
})

# Colours of one series per pair or per qubit, in order (Tol "bright" without its grey).
SERIES = (_BLUE, _RED, _GREEN, _YELLOW, _CYAN, _PURPLE)


def colour(role: str) -> str:
    """The colour of a named role (KeyError naming the known roles otherwise)."""
    try:
        return COLOURS[role]
    except KeyError:
        raise KeyError(f"no colour for {role!r}; known: {', '.join(COLOURS)}") from None
