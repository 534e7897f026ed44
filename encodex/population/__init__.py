"""Population stage: every cell of every environment, in parallel, with checkpoints."""

from .run import CELL_COLUMNS, MODEL_COLUMNS, PopulationResult, RunInterrupted, run_population
from .settings import RunSettings

__all__ = ["CELL_COLUMNS", "MODEL_COLUMNS", "PopulationResult", "RunInterrupted", "RunSettings",
           "run_population"]
