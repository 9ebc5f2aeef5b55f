"""The one home of hamstride's plot style: side styles and the muscle palette, shared by every figure.

Left and right differ by colour *and* line style *and* marker, so a plot reads in grey-scale print and for
colour-blind readers. The muscles take four colours of the qualitative "muted" scheme of Tol (2021), which is
designed to stay distinct under the common colour-vision deficiencies; none of them is a side colour (deep blue,
amber), and each muscle also has its own marker and line style.

References
----------
Tol P (2021). Colour schemes. SRON technical note SRON/EPS/TN/09-002, issue 3.2 ("muted" qualitative scheme).
"""
from __future__ import annotations

from types import MappingProxyType


__all__ = ["MUSCLE_ORDER", "SIDE_COLOUR", "SIDE_LINESTYLE", "SIDE_MARKER", "MUSCLE_COLOUR", "MUSCLE_MARKER",
           "MUSCLE_GLYPH", "MUSCLE_LINESTYLE", "MUSCLE_SHORT", "REFERENCE", "GRID", "FLAG", "TARGET_ZONE",
           "BAND_ALPHA", "muscle_style", "side_style"]
MUSCLE_ORDER = ("biceps_femoris_long", "semitendinosus", "semimembranosus", "biceps_femoris_short")

#: left: deep blue (dark in grey-scale), right: amber (light in grey-scale).
SIDE_COLOUR = MappingProxyType({"left": "#1b4f8a", "right": "#d9822b"})
SIDE_LINESTYLE = MappingProxyType({"left": "-", "right": "--"})
SIDE_MARKER = MappingProxyType({"left": "o", "right": "^"})

#: Tol (2021) "muted": wine, teal, olive, purple (hex values as published in the note).
MUSCLE_COLOUR = MappingProxyType({"biceps_femoris_long": "#882255", "semitendinosus": "#44AA99",
                                  "semimembranosus": "#999933", "biceps_femoris_short": "#AA4499"})
MUSCLE_MARKER = MappingProxyType({"biceps_femoris_long": "o", "semitendinosus": "s", "semimembranosus": "D",
                                  "biceps_femoris_short": "v"})
#: the same markers as text glyphs (DejaVu Sans has them), for titles and labels.
MUSCLE_GLYPH = MappingProxyType({"biceps_femoris_long": "●", "semitendinosus": "■", "semimembranosus": "◆",
                                 "biceps_femoris_short": "▼"})
MUSCLE_LINESTYLE = MappingProxyType({"biceps_femoris_long": "-", "semitendinosus": "--", "semimembranosus": "-.",
                                     "biceps_femoris_short": ":"})
MUSCLE_SHORT = MappingProxyType({"biceps_femoris_long": "BFlh", "semitendinosus": "ST", "semimembranosus": "SM",
                                 "biceps_femoris_short": "BFsh"})

#: greys and signal colours of the reports (not used for data series).
REFERENCE = "#555555"
GRID = "#e5e5e5"
FLAG = "#a8322d"
TARGET_ZONE = "#dfe8d8"   # the symmetry / LSI target zones (light green-grey)
BAND_ALPHA = 0.22


def muscle_style(muscle: str) -> dict:
    """Matplotlib keyword arguments (colour, marker, line style) of one muscle, the same in every figure."""
    return {"color": MUSCLE_COLOUR.get(muscle, "#444444"), "marker": MUSCLE_MARKER.get(muscle, "o"),
            "linestyle": MUSCLE_LINESTYLE.get(muscle, "-")}


def side_style(side: str) -> dict:
    """Matplotlib keyword arguments (colour, marker, line style) of one side, the same in every figure."""
    return {"color": SIDE_COLOUR.get(side, "#444444"), "marker": SIDE_MARKER.get(side, "o"),
            "linestyle": SIDE_LINESTYLE.get(side, "-")}
