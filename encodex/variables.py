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
EXTRA_ORDER: tuple[str, ...] = ("direction", "phase")

#: Basis kind of each built-in variable: "planar" (2-D, metres), "circular" (radians),
#: "interval" (bounded scalar).
KINDS: dict[str, str] = {
    "position": "planar",
    "heading": "circular",
    "speed": "interval",
    "distance": "interval",
    "time": "interval",
    "phase": "circular",
    "direction": "direction",
}

UNITS: dict[str, str] = {
    "position": "m",
    "heading": "rad",
    "speed": "m/s",
    "distance": "m",
    "time": "s",
    "phase": "rad",
    "direction": "sign",
}

#: On a track, ``direction`` is the running direction along the track (+1 towards the far
#: end or forwards round a loop, -1 back, 0 still) and its term is a factor-by-curve
#: difference: the log rate along the track is ``f(x) + s * d(x)``, so the term ``d`` says how
#: the position curve differs between the two running directions (see
#: :class:`encodex.design.bases.DirectionCurveBasis`).
DIRECTION = "direction"

#: Variables that enter a model only together with others: the direction term is a
#: difference between the position curves of the two running directions, so a model holds
#: it only beside ``position`` (forward selection offers both at once while position is not
#: in the model, and keeps the pair only if direction improves on position alone).
REQUIRES: dict[str, tuple[str, ...]] = {"direction": ("position",)}

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


def periodic_kind(period: float) -> str:
    """Kind string of a periodic variable whose period is not 2*pi, e.g. a circular track.

    ``periodic_kind(1.57)`` -> ``"circular:1.57"``: a circular basis with period 1.57 in the
    variable's unit (metres along a loop of 1.57 m). :func:`parse_kind` reads it back.
    """
    return f"circular:{float(period)!r}"


def parse_kind(kind: str) -> tuple[str, float | None]:
    """Split a kind string into its basis kind and period (None unless given).

    ``"circular:1.57"`` -> ``("circular", 1.57)``; ``"interval"`` -> ``("interval", None)``.
    """
    base, _, rest = str(kind).partition(":")
    return base, (float(rest) if rest else None)


def with_requirements(names: Iterable[str]) -> tuple[str, ...]:
    """The variables plus those they require (:data:`REQUIRES`), in canonical order."""
    out = set(names)
    for v in list(out):
        out |= set(REQUIRES.get(v, ()))
    return canonical_order(out)


def is_complete(names: Iterable[str]) -> bool:
    """True when every variable's requirements (:data:`REQUIRES`) are in the set too."""
    names = set(names)
    return all(set(REQUIRES.get(v, ())) <= names for v in names)


def without(names: Iterable[str], drop: str) -> tuple[str, ...]:
    """The variables without ``drop`` and without those that require it."""
    rest = [v for v in names if v != drop]
    return canonical_order(v for v in rest if drop not in REQUIRES.get(v, ()))
