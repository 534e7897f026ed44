"""Design stage: basis blocks with their penalties, assembled into a constrained design."""

from .bases import (DEFAULT_SIZES, Basis, Block, CircularBasis, IntervalBasis, PlanarBasis,
                    default_bases)
from .design import Design, Term, build_design, sum_to_zero_null_space
from .drift import DRIFT_TERM, drift_basis, drift_basis_size

__all__ = ["Basis", "Block", "CircularBasis", "DEFAULT_SIZES", "DRIFT_TERM", "Design",
           "IntervalBasis", "drift_basis", "drift_basis_size",
           "PlanarBasis", "Term", "build_design", "default_bases", "sum_to_zero_null_space"]
