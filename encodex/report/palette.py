"""Colours of the report: one fixed colour per variable, others for environments.

A variable keeps its colour in every figure; environment colours are chosen from a separate
set so that no variable is ever drawn in an environment's colour.
"""

from __future__ import annotations

import zlib

__all__ = ["variable_colour", "environment_colour", "CHOSEN", "NEUTRAL"]

_VARIABLE = {
    "position": "#2a9d8f",   # teal
    "heading": "#c0392b",    # brick red
    "speed": "#7b4fa0",      # purple
    "distance": "#6a994e",   # green
    "time": "#b5838d",       # mauve
    "phase": "#c9a227",      # ochre
    "drift": "#8d6e63",      # brown
}
#: Colours for terms without a fixed one (user variables, nuisance terms), picked by name.
_SPARE = ("#3d7ea6", "#a05a2c", "#5f7161", "#9c6644", "#4a6fa5", "#8e7dbe")
_ENVIRONMENT = ("#264653", "#e09f3e", "#5c677d", "#9e2a2b")
#: Marker colour of what the selection kept; black so it never reads as an environment.
CHOSEN = "#111111"
#: Grey of reference lines and of the label "none".
NEUTRAL = "#9a9a9a"


def variable_colour(name: str) -> str:
    """The colour of a variable (or model term), the same in every figure."""
    if name in _VARIABLE:
        return _VARIABLE[name]
    return _SPARE[zlib.crc32(str(name).encode()) % len(_SPARE)]


def environment_colour(index: int) -> str:
    """The colour of the environment at ``index`` (order of first appearance)."""
    return _ENVIRONMENT[int(index) % len(_ENVIRONMENT)]
