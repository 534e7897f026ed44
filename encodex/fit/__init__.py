"""Fit stage: penalised Poisson GLM solver and smoothness selection."""

from .engine import FitOptions, fit_poisson
from .folds import refit_folds
from .result import PoissonFit, Response, TermLayout, poisson_deviance, poisson_loglik
from .smoothing import PenaltyStructure, laml
from .solver import NewtonOptions, PenalisedPoissonNewton

__all__ = ["FitOptions", "NewtonOptions", "PenalisedPoissonNewton", "PenaltyStructure",
           "PoissonFit", "Response", "TermLayout", "fit_poisson", "laml", "poisson_deviance",
           "poisson_loglik", "refit_folds"]
