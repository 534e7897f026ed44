"""The fitted model: coefficients, uncertainty, scores and response functions."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.special import gammaln

from encodex.design import Basis, Design

#: Normal quantile of a two-sided 95% band.
Z95 = 1.959963984540054


@dataclass(frozen=True)
class TermLayout:
    """What a fit needs to know of a term after the design is gone (small, picklable)."""

    name: str
    basis: Basis
    Z: np.ndarray
    theta_slice: slice


@dataclass(frozen=True)
class Response:
    """A term's fitted response: the log of the factor by which it multiplies the rate.

    ``log_modulation`` is the term's value (natural log). Each term sums to zero over the
    bins it was fitted on, so a factor of 1 is the rate with the term at its average log
    value, not the mean rate; :func:`encodex.population.curves.response_arrays` gives the
    baseline in Hz that turns it into a rate.

    For interval and circular terms ``grid`` is 1-D and ``log_modulation`` and ``se`` have
    its shape; for a planar term ``grid`` is ``(grid_x, grid_y)`` and ``log_modulation`` has
    shape ``(len(grid_y), len(grid_x))`` (rows along y, as an image).

    The band is the pointwise Bayesian credible interval ``log_modulation +- 1.96 se`` from the
    posterior covariance ``(H + S_lambda)^{-1}`` (Wood 2017, sec. 6.10; Marra & Wood 2012,
    Scand. J. Stat. 39:53, who show its good frequentist coverage across the function).
    """

    variable: str
    grid: np.ndarray | tuple[np.ndarray, np.ndarray]
    log_modulation: np.ndarray
    se: np.ndarray

    @property
    def lower(self) -> np.ndarray:
        return self.log_modulation - Z95 * self.se

    @property
    def upper(self) -> np.ndarray:
        return self.log_modulation + Z95 * self.se

    @property
    def modulation(self) -> np.ndarray:
        """Factor by which the term multiplies the rate (see the class docstring for its 1)."""
        return np.exp(self.log_modulation)

    @property
    def log_gain(self) -> np.ndarray:
        """Former name of :attr:`log_modulation`, kept for code written before the rename
        ("gain" now means held-out information in bits per spike only)."""
        return self.log_modulation


@dataclass(frozen=True)
class PoissonFit:
    """A fitted penalised Poisson GLM.

    Attributes
    ----------
    terms : tuple of TermLayout
    theta : ndarray
        Constrained coefficients (intercept first).
    beta : ndarray
        Basis coefficients with intercept, ``Z theta``.
    lambdas : ndarray
        Smoothing parameters, one per penalty (planar terms have two).
    covariance : ndarray or None
        Posterior covariance of ``theta``, ``(H + S_lambda)^{-1}``; None only for one-step
        fold fits asked for without it (:func:`encodex.fit.refit_folds`,
        ``covariances=False``), whose ``edf`` is then empty.
    edf : dict of str to float
        Effective degrees of freedom per term (``tr(F)`` over its coefficients,
        ``F = (H + S)^{-1} H``); the intercept counts 1 and is not listed.
    loglik : float
        Poisson log-likelihood on the fitted rows (with ``log y!``).
    deviance : float
        Poisson deviance on the fitted rows.
    laml : float or None
        The smoothness criterion at the selected lambdas when smoothness was selected: log
        Laplace approximate restricted marginal likelihood (REML-type; mgcv's REML score is
        its negative).
    converged : bool
    reason : str
        "converged" or why not.
    n_iter : int
        Newton iterations in total.
    n_outer : int
        Smoothness-selection updates: performance-iteration rounds plus Newton steps on log
        lambda (0 with fixed lambdas).
    offset : float or ndarray
        Offset used in the fit; an array whose values are all equal (the usual log bin
        width) is kept as that one number, so that a fit sent between processes or kept for
        every cell of a population does not carry a bins-long array.
    """

    terms: tuple[TermLayout, ...]
    theta: np.ndarray
    lambdas: np.ndarray
    covariance: np.ndarray | None
    edf: dict
    loglik: float
    deviance: float
    laml: float | None
    converged: bool
    reason: str
    n_iter: int
    n_outer: int
    offset: float | np.ndarray = field(repr=False, default=0.0)

    def __post_init__(self):
        off = self.offset
        if np.ndim(off) == 1 and np.size(off) and np.all(off == off[0]):
            object.__setattr__(self, "offset", float(off[0]))

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(t.name for t in self.terms)

    @property
    def intercept(self) -> float:
        return float(self.theta[0])

    @property
    def edf_total(self) -> float:
        return 1.0 + float(sum(self.edf.values()))

    def term_beta(self, name: str) -> np.ndarray:
        t = self._layout(name)
        return t.Z @ self.theta[t.theta_slice]

    @property
    def beta(self) -> np.ndarray:
        return np.concatenate([[self.theta[0]]] + [self.term_beta(t.name) for t in self.terms])

    def _layout(self, name: str) -> TermLayout:
        for t in self.terms:
            if t.name == name:
                return t
        raise KeyError(f"term '{name}' is not in this model ({', '.join(self.names) or 'none'})")

    def theta_for(self, design: Design) -> np.ndarray:
        """This fit's coefficients laid out for ``design`` (which must hold the same terms)."""
        if design.names != self.names:
            raise ValueError(f"design terms {design.names} differ from the fit's {self.names}")
        return self.theta

    def predict(self, design: Design, rows: np.ndarray | None = None, offset=None) -> np.ndarray:
        """Expected spike count per bin, ``exp(offset + X beta)``.

        Parameters
        ----------
        design : Design
            A design with the same terms (e.g. the one fitted, or one built on new bins with
            the same bases).
        rows : ndarray of int, optional
            Row indices to predict; all rows by default.
        offset : float or ndarray, optional
            Log exposure per bin; the fit's offset by default (a scalar log bin width).
        """
        off = self.offset if offset is None else offset
        if rows is not None and np.ndim(off) == 1:
            off = np.asarray(off)[rows]
        return np.exp(design.linear_predictor(self.theta_for(design), rows) + off)

    def response(self, name: str, grid=None, n: int | None = None) -> Response:
        """Fitted log modulation of term ``name`` on a grid, with its standard error.

        Parameters
        ----------
        name : str
            Variable name.
        grid : ndarray or (ndarray, ndarray), optional
            Points in the variable's unit (planar: x and y vectors, metres); by default the
            basis's own grid of ``n`` points (per axis for planar).
        """
        t = self._layout(name)
        b = t.basis
        if grid is None:
            grid = b.grid() if n is None else b.grid(n)
        cov = self.covariance[t.theta_slice, t.theta_slice]
        th = self.theta[t.theta_slice]
        if b.kind == "planar":
            gx, gy = (np.asarray(g, dtype=float) for g in grid)
            xx, yy = np.meshgrid(gx, gy)
            pts = np.column_stack([xx.ravel(), yy.ravel()])
            xz = b.evaluate(pts).toarray() @ t.Z
            est = (xz @ th).reshape(len(gy), len(gx))
            se = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", xz, cov, xz), 0)).reshape(est.shape)
            return Response(name, (gx, gy), est, se)
        g = np.asarray(grid, dtype=float)
        xz = b.evaluate(g).toarray() @ t.Z
        est = xz @ th
        se = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", xz, cov, xz), 0))
        return Response(name, g, est, se)


def poisson_loglik(y: np.ndarray, mu: np.ndarray, mask: np.ndarray | None = None,
                   spikes: np.ndarray | None = None) -> float:
    """Poisson log-likelihood ``sum y log mu - mu - log y!`` over rows with mask 1.

    Bins without spikes contribute only ``-mu``, so logs are taken on the bins with spikes
    alone (a few percent of 20 ms bins; pass their indices as ``spikes`` when known).
    ``mu == 0`` where a spike fell gives ``-inf``.
    """
    y = np.asarray(y, dtype=float)
    mu = np.asarray(mu, dtype=float)
    spikes = np.flatnonzero(y) if spikes is None else spikes
    ys = y[spikes]
    with np.errstate(divide="ignore"):
        log_part = ys * np.log(mu[spikes]) - gammaln(ys + 1.0)
    if mask is None:
        return float(np.sum(log_part) - np.sum(mu))
    return float(np.dot(mask[spikes], log_part) - np.dot(mask, mu))


def poisson_deviance(y: np.ndarray, mu: np.ndarray, mask: np.ndarray | None = None,
                     spikes: np.ndarray | None = None) -> float:
    """Poisson deviance ``2 sum (y log(y / mu) - (y - mu))`` over rows with mask 1.

    As in :func:`poisson_loglik`, the logs are taken on the bins with spikes only (bins
    without spikes contribute ``2 mu``).
    """
    y = np.asarray(y, dtype=float)
    mu = np.asarray(mu, dtype=float)
    spikes = np.flatnonzero(y) if spikes is None else spikes
    ys = y[spikes]
    with np.errstate(divide="ignore"):
        log_part = ys * (np.log(ys) - np.log(mu[spikes]))
    if mask is None:
        return float(2.0 * (np.sum(log_part) - np.sum(y) + np.sum(mu)))
    return float(2.0 * (np.dot(mask[spikes], log_part) - np.dot(mask, y) + np.dot(mask, mu)))


def poisson_loglik_deviance(y: np.ndarray, mu: np.ndarray, spikes: np.ndarray,
                            log_factorials: np.ndarray) -> tuple[float, float]:
    """:func:`poisson_loglik` and :func:`poisson_deviance` (no mask) from one pass.

    ``spikes`` are the indices of the bins with counts and ``log_factorials`` their
    ``log y!``, computed once by a caller that scores several predictions of the same counts
    (the held-out scores of a fold: the model's and the mean-rate model's). The expressions
    are those of the two functions, so the values are the same to the bit.
    """
    y = np.asarray(y, dtype=float)
    mu = np.asarray(mu, dtype=float)
    ys = y[spikes]
    sum_mu = np.sum(mu)
    with np.errstate(divide="ignore"):
        log_mu = np.log(mu[spikes])
        loglik = float(np.sum(ys * log_mu - log_factorials) - sum_mu)
        deviance = float(2.0 * (np.sum(ys * (np.log(ys) - log_mu)) - np.sum(y) + sum_mu))
    return loglik, deviance


def log_factorial_sum(y: np.ndarray, mask: np.ndarray | None = None) -> float:
    """``sum log y!`` over rows with mask 1 (only counts above 1 contribute)."""
    y = np.asarray(y, dtype=float)
    many = np.flatnonzero(y > 1)
    terms = gammaln(y[many] + 1.0)
    return float(np.sum(terms) if mask is None else np.dot(np.asarray(mask)[many], terms))
