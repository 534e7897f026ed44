"""Basis objects: each owns its design block and its smoothness penalties.

Three kinds cover the behavioural variables:

* :class:`IntervalBasis` for a bounded scalar (speed in m/s, travelled distance in m, elapsed
  time in s): B-splines on a fixed range; values outside are clipped to it and counted.
* :class:`CircularBasis` for an angle in radians (heading, rhythm phase): periodic B-splines,
  continuous with continuous derivatives across 0 = 2*pi.
* :class:`PlanarBasis` for 2-D position in metres: tensor product of two interval bases, with one
  penalty per axis so that smoothness may differ along x and y.

Every basis evaluates to a :class:`Block` holding a fixed number of non-zeros per row (4 for a
cubic B-spline, 16 for a cubic tensor product); a dense matrix of every bin by every column is
never built.

References
----------
Eilers, P. H. C. & Marx, B. D. (1996). Flexible smoothing with B-splines and penalties.
*Statistical Science* 11:89-121.
Wood, S. N. (2017). *Generalized Additive Models: An Introduction with R*, 2nd ed., CRC Press,
sec. 5.3 (P-splines), 5.6 (tensor products).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from encodex.defaults import KNOT_PLACEMENTS
from encodex.errors import InputError, SettingsError
from encodex.variables import KINDS, parse_kind

from .bsplines import (breaks_knots, bspline_nonzeros, difference_penalty, quantile_breaks,
                       uniform_knots)

TWO_PI = 2.0 * np.pi


@dataclass(frozen=True)
class Block:
    """One term's design rows in fixed-non-zeros-per-row storage.

    Attributes
    ----------
    values : ndarray, shape (n, q)
        Non-zero basis values of each row.
    columns : ndarray of int32, shape (n, q)
        Column (basis function) index of each value, in ``[0, n_columns)``; distinct per row.
    n_columns : int
        Number of basis functions.
    n_clipped : int
        Number of input values that lay outside the basis range and were clipped to it.
    """

    values: np.ndarray
    columns: np.ndarray
    n_columns: int
    n_clipped: int = 0

    def toarray(self) -> np.ndarray:
        """Dense copy, for tests and small problems only."""
        out = np.zeros((self.values.shape[0], self.n_columns))
        rows = np.arange(self.values.shape[0])[:, None]
        np.add.at(out, (rows, self.columns), self.values)
        return out

    def tocsr(self):
        """The block as a ``scipy.sparse.csr_array``."""
        from scipy import sparse

        n, q = self.values.shape
        return sparse.csr_array(
            (self.values.ravel(), self.columns.ravel(), np.arange(0, n * q + 1, q)),
            shape=(n, self.n_columns),
        )


def _check_finite(values: np.ndarray, what: str) -> None:
    bad = ~np.isfinite(values)
    if bad.any():
        raise InputError(
            f"{what} has {int(bad.sum())} NaN or infinite values among the bins to fit; "
            "mask those bins (Session.valid) before building the design"
        )


@dataclass(frozen=True)
class IntervalBasis:
    """B-spline basis for a bounded scalar with a difference penalty.

    Parameters
    ----------
    n_basis : int
        Number of basis functions (columns).
    range : (float, float)
        Lower and upper end, in the variable's unit. Values outside are clipped and counted.
    degree : int
        Spline degree; 3 (cubic) by default.
    penalty_order : int
        Order of the difference penalty on adjacent coefficients; 2 by default (Eilers & Marx
        1996), whose unpenalised functions are the straight lines (with ``breaks``: straight
        in the knot-index scale).
    breaks : tuple of float
        Ends of the ``n_basis - degree`` knot intervals, from ``range[0]`` to ``range[1]``
        (e.g. :func:`~encodex.design.bsplines.quantile_breaks`); empty (default) for evenly
        spaced knots.
    """

    n_basis: int = 10
    range: tuple[float, float] = (0.0, 1.0)
    degree: int = 3
    penalty_order: int = 2
    breaks: tuple[float, ...] = ()

    def __post_init__(self):
        lo, hi = self.range
        if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
            raise SettingsError(f"basis range {self.range} must be finite with upper > lower")
        if self.n_basis < self.degree + 1:
            raise SettingsError(
                f"n_basis={self.n_basis} is too small for degree {self.degree}; use at least "
                f"{self.degree + 1}"
            )
        if not 0 <= self.penalty_order < self.n_basis:
            raise SettingsError(f"penalty_order must lie in [0, n_basis); got {self.penalty_order}")
        if self.breaks:
            b = np.asarray(self.breaks, dtype=float)
            if (b.size != self.n_basis - self.degree + 1 or not np.all(np.diff(b) > 0)
                    or b[0] != lo or b[-1] != hi):
                raise SettingsError(
                    f"breaks must be {self.n_basis - self.degree + 1} increasing values from "
                    f"{lo:g} to {hi:g} (got {list(self.breaks)}); leave them empty for evenly "
                    "spaced knots")

    kind = "interval"

    @property
    def n_columns(self) -> int:
        return self.n_basis

    @property
    def knots(self) -> np.ndarray:
        if self.breaks:
            return breaks_knots(np.asarray(self.breaks), self.degree)
        return uniform_knots(self.range[0], self.range[1], self.n_basis, self.degree)

    def evaluate(self, x: np.ndarray) -> Block:
        """Design rows at the points ``x`` (clipped to the range, clipping counted)."""
        x = np.asarray(x, dtype=float).ravel()
        _check_finite(x, "an interval variable")
        lo, hi = self.range
        outside = (x < lo) | (x > hi)
        xc = np.clip(x, lo, hi)
        vals, first = bspline_nonzeros(xc, self.knots, self.degree)
        cols = (first[:, None] + np.arange(self.degree + 1)).astype(np.int32)
        return Block(vals, cols, self.n_basis, int(outside.sum()))

    def penalties(self) -> list[np.ndarray]:
        """One difference penalty ``D'D`` on the coefficients."""
        return [difference_penalty(self.n_basis, self.penalty_order)]

    def grid(self, n: int = 100) -> np.ndarray:
        """Evenly spaced points covering the range, for response functions."""
        return np.linspace(self.range[0], self.range[1], n)

    def describe(self) -> dict:
        out = {"kind": self.kind, "n_basis": self.n_basis, "range": list(self.range),
               "degree": self.degree, "penalty_order": self.penalty_order}
        if self.breaks:
            out["breaks"] = list(self.breaks)
        return out


@dataclass(frozen=True)
class CircularBasis:
    """Periodic B-spline basis for an angle in radians, with a wrapped difference penalty.

    ``n_basis`` equally spaced B-splines of ``degree`` tile the circle; a function built from
    them and its first ``degree - 1`` derivatives are continuous across 0 = 2*pi. Angles are
    wrapped into [0, 2*pi) before evaluation. ``period`` (default 2*pi) sets another period
    in the variable's unit, e.g. the length in metres of a circular track: values are then
    wrapped into [0, period).
    """

    n_basis: int = 12
    degree: int = 3
    penalty_order: int = 2
    period: float = TWO_PI

    def __post_init__(self):
        if self.n_basis < self.degree + 1:
            raise SettingsError(
                f"n_basis={self.n_basis} is too small for a periodic basis of degree "
                f"{self.degree}; use at least {self.degree + 1}"
            )
        if not 0 <= self.penalty_order < self.n_basis:
            raise SettingsError(f"penalty_order must lie in [0, n_basis); got {self.penalty_order}")
        if not (np.isfinite(self.period) and self.period > 0):
            raise SettingsError(f"period must be a positive number, got {self.period}")

    kind = "circular"

    @property
    def range(self) -> tuple[float, float]:
        return (0.0, float(self.period))

    @property
    def n_columns(self) -> int:
        return self.n_basis

    @property
    def knots(self) -> np.ndarray:
        h = TWO_PI / self.n_basis
        return h * np.arange(-self.degree, self.n_basis + self.degree + 1, dtype=float)

    def evaluate(self, angle: np.ndarray) -> Block:
        """Design rows at the values (radians, or units of ``period``; wrapped)."""
        a = np.asarray(angle, dtype=float).ravel()
        _check_finite(a, "a circular variable")
        if self.period != TWO_PI:
            a = a * (TWO_PI / self.period)
        a = np.mod(a, TWO_PI)
        # np.mod can return exactly 2*pi for tiny negative inputs; fold it back to 0.
        a[a >= TWO_PI] = 0.0
        vals, first = bspline_nonzeros(a, self.knots, self.degree)
        # On the extended knot vector, function index j covers the same shape as j - n_basis:
        # wrapping the column index makes the basis periodic.
        cols = np.mod(first[:, None] + np.arange(self.degree + 1), self.n_basis).astype(np.int32)
        return Block(vals, cols, self.n_basis, 0)

    def penalties(self) -> list[np.ndarray]:
        """One wrapped difference penalty: coefficient ``n - 1`` neighbours coefficient 0."""
        return [difference_penalty(self.n_basis, self.penalty_order, circular=True)]

    def grid(self, n: int = 120) -> np.ndarray:
        return np.linspace(0.0, float(self.period), n, endpoint=False)

    def describe(self) -> dict:
        out = {"kind": self.kind, "n_basis": self.n_basis, "degree": self.degree,
               "penalty_order": self.penalty_order}
        if self.period != TWO_PI:
            out["period"] = float(self.period)
        return out


@dataclass(frozen=True)
class DirectionCurveBasis:
    """Factor-by-curve difference between running directions along a track.

    The term is ``s * d(x)``: ``x`` the track position (metres), ``s`` the running direction
    (+1 one way, -1 the other, 0 still) and ``d`` a spline in the basis ``track`` (interval
    for a linear track, periodic for a circular one) with its difference penalty. Beside a
    shared position curve ``f(x)`` the log rate is ``f + d`` in one direction and ``f - d``
    in the other: the shared curve plus a penalised difference. Still bins carry the shared
    curve alone. The construction is a smooth multiplied row by row by a numeric covariate
    (here ``s``), as the documentation of the R package mgcv describes its numeric ``by``
    variables (help page ``gam.models``, read in mgcv 1.8-41; Hastie & Tibshirani 1993,
    J. R. Stat. Soc. B 55:757, varying-coefficient models, cited from memory).

    The term is not constrained to sum to zero (``centred = False``): ``s * d(x)`` is not a
    constant for any ``d`` when both directions occur, so it cannot be confounded with the
    intercept, and a constant ``d`` (a rate that differs between directions everywhere) stays
    representable.

    Parameters
    ----------
    track : IntervalBasis or CircularBasis
        Basis of the track position.
    """

    track: IntervalBasis | CircularBasis = field(default_factory=IntervalBasis)

    kind = "direction"
    #: Covariates the term is evaluated on, stacked as columns (see build_design).
    inputs = ("position", "direction")
    centred = False

    @property
    def range(self) -> tuple[float, float]:
        return tuple(self.track.range)

    @property
    def n_columns(self) -> int:
        return self.track.n_columns

    def evaluate(self, values: np.ndarray) -> Block:
        """Design rows at (position, direction) pairs of shape (n, 2).

        A one-dimensional input is a grid of positions with direction +1 (the difference
        curve ``d`` itself, as response functions show it).
        """
        v = np.asarray(values, dtype=float)
        if v.ndim == 1:
            v = np.column_stack([v, np.ones(v.size)])
        if v.ndim != 2 or v.shape[1] != 2:
            raise InputError(f"a direction term needs (position, direction) pairs; got {v.shape}")
        _check_finite(v[:, 1], "running direction")
        b = self.track.evaluate(v[:, 0])
        return Block(b.values * v[:, 1:2], b.columns, b.n_columns, b.n_clipped)

    def penalties(self) -> list[np.ndarray]:
        """The track basis's difference penalty on the difference curve."""
        return self.track.penalties()

    def grid(self, n: int = 100) -> np.ndarray:
        return self.track.grid(n)

    def describe(self) -> dict:
        return {"kind": self.kind, "track": self.track.describe()}


@dataclass(frozen=True)
class PlanarBasis:
    """Tensor-product B-spline basis for 2-D position (metres), one penalty per axis.

    Column ``ix * n_y + iy`` is the product of the x-function ``ix`` and the y-function ``iy``.
    The two penalties are ``P_x (x) I`` and ``I (x) P_y`` (Kronecker products; Wood 2017,
    sec. 5.6.2), each with its own smoothing parameter.
    """

    n_x: int = 10
    n_y: int = 10
    x_range: tuple[float, float] = (0.0, 1.0)
    y_range: tuple[float, float] = (0.0, 1.0)
    degree: int = 3
    penalty_order: int = 2

    kind = "planar"

    def __post_init__(self):
        # Validate through the marginal bases.
        self.x_basis, self.y_basis  # noqa: B018

    @property
    def x_basis(self) -> IntervalBasis:
        return IntervalBasis(self.n_x, tuple(self.x_range), self.degree, self.penalty_order)

    @property
    def y_basis(self) -> IntervalBasis:
        return IntervalBasis(self.n_y, tuple(self.y_range), self.degree, self.penalty_order)

    @property
    def n_columns(self) -> int:
        return self.n_x * self.n_y

    def evaluate(self, xy: np.ndarray) -> Block:
        """Design rows at positions ``xy`` of shape (n, 2), metres."""
        xy = np.asarray(xy, dtype=float)
        if xy.ndim != 2 or xy.shape[1] != 2:
            raise InputError(f"position must have shape (n, 2); got {xy.shape}")
        bx = self.x_basis.evaluate(xy[:, 0])
        by = self.y_basis.evaluate(xy[:, 1])
        n, qx = bx.values.shape
        qy = by.values.shape[1]
        vals = (bx.values[:, :, None] * by.values[:, None, :]).reshape(n, qx * qy)
        cols = (bx.columns[:, :, None] * self.n_y + by.columns[:, None, :]).reshape(n, qx * qy)
        # A sample is clipped when either coordinate was.
        lo_x, hi_x = self.x_range
        lo_y, hi_y = self.y_range
        outside = ((xy[:, 0] < lo_x) | (xy[:, 0] > hi_x) | (xy[:, 1] < lo_y) | (xy[:, 1] > hi_y))
        return Block(vals, cols.astype(np.int32), self.n_columns, int(outside.sum()))

    def penalties(self) -> list[np.ndarray]:
        """``[P_x (x) I_ny, I_nx (x) P_y]``: roughness along x and along y."""
        px = self.x_basis.penalties()[0]
        py = self.y_basis.penalties()[0]
        return [np.kron(px, np.eye(self.n_y)), np.kron(np.eye(self.n_x), py)]

    def grid(self, n: int = 50) -> tuple[np.ndarray, np.ndarray]:
        """Grid vectors along x and y (metres)."""
        return self.x_basis.grid(n), self.y_basis.grid(n)

    def describe(self) -> dict:
        return {"kind": self.kind, "n_x": self.n_x, "n_y": self.n_y,
                "x_range": list(self.x_range), "y_range": list(self.y_range),
                "degree": self.degree, "penalty_order": self.penalty_order}


Basis = IntervalBasis | CircularBasis | PlanarBasis | DirectionCurveBasis

#: Default number of basis functions per variable (planar: per axis).
DEFAULT_SIZES: dict[str, int] = {"position": 10, "heading": 12, "speed": 8, "distance": 10,
                                 "time": 10, "phase": 12, "direction": 10}


#: Variables whose knots sit at quantiles of their values by default (``knots="quantile"``).
#: Distance and time since trial start restart at 0 every trial, so most bins lie early in
#: trials and a long tail reaches far: evenly spaced knots over the whole range (0-17 m,
#: 0-60 s in the simulated open field) were 2.4 m and 8.5 s apart, too coarse for fields
#: 0.2-0.3 m or 1.5-2.5 s wide, and the misfit was taken up by the other clock (distance
#: cells labelled distance+time: 10 of 30 at 60 min; 0 of 30 with knots at quantiles,
#: benchmarks/RESULTS.md, "Knots of the trial clocks").
QUANTILE_KNOT_VARIABLES = ("distance", "time")


def _data_range(values: np.ndarray, name: str) -> tuple[float, float]:
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        raise InputError(f"variable '{name}' has no finite values; drop it from the variables")
    lo, hi = float(v.min()), float(v.max())
    if hi <= lo:
        raise InputError(
            f"variable '{name}' is constant ({lo:g}) in these bins and cannot be modelled; "
            "drop it from the variables"
        )
    return lo, hi


def default_bases(covariates: Mapping[str, np.ndarray], variables=None,
                  sizes: Mapping[str, int] | None = None,
                  kinds: Mapping[str, str] | None = None,
                  knots: str = "quantile") -> dict[str, Basis]:
    """Bases for the given variables, with ranges taken from the data.

    Parameters
    ----------
    covariates : mapping of str to ndarray
        Covariates on the bins to be modelled (``position`` of shape (n, 2) in metres, angles in
        radians, scalars in their unit). Non-finite values are ignored when taking ranges.
    variables : iterable of str, optional
        Which variables; all keys of ``covariates`` by default.
    sizes : mapping, optional
        Number of basis functions per variable, overriding :data:`DEFAULT_SIZES`.
    kinds : mapping, optional
        Basis kind (``"interval"``, ``"circular"``, ``"planar"``) of variables not in
        :data:`encodex.variables.KINDS` (user-defined variables).
    knots : str
        "quantile" (default): the interior knots of :data:`QUANTILE_KNOT_VARIABLES` (distance
        and time since trial start) sit at quantiles of their values
        (:func:`~encodex.design.bsplines.quantile_breaks`); "even": every basis has evenly
        spaced knots.
    """
    if knots not in KNOT_PLACEMENTS:
        raise SettingsError(f"knots must be one of {', '.join(KNOT_PLACEMENTS)} (got "
                            f"{knots!r}); use knots='quantile'")
    sizes = {**DEFAULT_SIZES, **(sizes or {})}
    kinds = {**KINDS, **(kinds or {})}
    variables = list(covariates) if variables is None else list(variables)
    out: dict[str, Basis] = {}
    for name in variables:
        if name not in covariates:
            raise InputError(f"variable '{name}' is not among the covariates {sorted(covariates)}")
        kind = kinds.get(name, "interval")
        n = int(sizes.get(name, 10))
        if kind == "direction":
            if "position" not in covariates:
                raise InputError("the direction term needs the track position among the "
                                 "covariates; pass covariates['position'] too")
            pos_kind = kinds.get("position", "planar")
            if parse_kind(pos_kind)[0] == "planar":
                raise InputError("direction applies to a track (1-D position); this session's "
                                 "position is 2-D: use heading instead")
            track = _single_basis("position", covariates["position"], pos_kind, n)
            out[name] = DirectionCurveBasis(track)
            continue
        out[name] = _single_basis(name, covariates[name], kind, n,
                                  knots == "quantile" and name in QUANTILE_KNOT_VARIABLES)
    return out


def _single_basis(name, values, kind, n, at_quantiles: bool = False) -> Basis:
    v = np.asarray(values, dtype=float)
    base, period = parse_kind(kind)
    if base == "planar":
        return PlanarBasis(n, n, _data_range(v[:, 0], name + " x"),
                           _data_range(v[:, 1], name + " y"))
    if base == "circular":
        return CircularBasis(n) if period is None else CircularBasis(n, period=period)
    if base == "interval":
        lo, hi = _data_range(v, name)
        if at_quantiles:
            breaks = quantile_breaks(v, n - IntervalBasis.degree)
            return IntervalBasis(n, (lo, hi), breaks=tuple(float(b) for b in breaks))
        return IntervalBasis(n, (lo, hi))
    raise SettingsError(f"unknown basis kind '{kind}' for '{name}'; use interval, "
                        "circular or planar")
