"""Names, kinds and canonical order of the behavioural variables.

This module is the single place that knows which variables exist, what kind of basis each
takes and in which order they are written in labels. Every stage imports it; it imports
nothing from encodex.
"""

from __future__ import annotations

from collections.abc import Iterable

#: Built-in variables in canonical label order, with their units.
VARIABLES: tuple[str, ...] = ("position", "heading", "speed", "distance", "time")

#: Variables that may be added after the built-ins (kept in this order after them).
EXTRA_ORDER: tuple[str, ...] = ("phase",)

#: Basis kind of each built-in variable: "planar" (2-D, metres), "circular" (radians),
#: "interval" (bounded scalar).
KINDS: dict[str, str] = {
    "position": "planar",
    "heading": "circular",
    "speed": "interval",
    "distance": "interval",
    "time": "interval",
    "phase": "circular",
}

UNITS: dict[str, str] = {
    "position": "m",
    "heading": "rad",
    "speed": "m/s",
    "distance": "m",
    "time": "s",
    "phase": "rad",
}

#: Label of a cell that carries none of the variables.
NONE_LABEL = "none"


def canonical_order(names: Iterable[str]) -> tuple[str, ...]:
    """Sort variable names into canonical order.

    Built-in variables come first in the order of :data:`VARIABLES`, then ``phase``, then any
    user-defined variables alphabetically.
    """
    fixed = VARIABLES + EXTRA_ORDER
    names = set(names)
    known = [v for v in fixed if v in names]
    other = sorted(names - set(fixed))
    return tuple(known + other)


def label(names: Iterable[str]) -> str:
    """Return the canonical label of a set of variables, e.g. ``"position+speed"``.

    An empty set gives ``"none"``.
    """
    ordered = canonical_order(names)
    return "+".join(ordered) if ordered else NONE_LABEL


def parse_label(text: str) -> tuple[str, ...]:
    """Inverse of :func:`label`: ``"position+speed"`` -> ``("position", "speed")``."""
    text = text.strip()
    if text in ("", NONE_LABEL):
        return ()
    return canonical_order(text.split("+"))
