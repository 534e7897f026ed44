"""Compare stage: folds, held-out scores, forward and exhaustive selection, sklearn estimator."""

from .cell import CellAnalysis, ModelCV, ModelScorer, analyse_cell, cross_validate
from .estimator import SpikeGLM
from .folds import Folds, chunked_folds
from .scores import HeldOutScore, heldout_score, mean_rate_counts, pool_scores
from .selection import (Selection, Step, improvement_p, max_signflip_p, paired_p,
                        select_variables)

__all__ = ["CellAnalysis", "Folds", "HeldOutScore", "ModelCV", "ModelScorer", "Selection", "SpikeGLM", "Step",
           "analyse_cell", "chunked_folds", "cross_validate", "heldout_score", "improvement_p",
           "max_signflip_p", "paired_p",
           "mean_rate_counts", "pool_scores", "select_variables"]
