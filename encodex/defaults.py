"""Defaults shared by the command line and the Python API.

Kept free of heavy imports so that the command line (``encodex --help``) starts fast while
reading the same values as :class:`encodex.population.settings.RunSettings`.
"""

#: Default number of cross-validation folds. Why 20 rather than 10: the step test works on the
#: k fold-wise differences; with 10 folds its studentised statistic has 9 degrees of freedom
#: and its p-values come in steps of 2^-10, and weakly tuned cells were found markedly less
#: often at the same false-label rate (``benchmarks/labels_at_the_edges.py``, results in
#: benchmarks/RESULTS.md). One-step fold fits keep the extra folds cheap.
DEFAULT_FOLDS = 20

#: Default number of contiguous chunks of time per fold (see :mod:`encodex.compare.folds`).
DEFAULT_CHUNKS_PER_FOLD = 3

#: Smallest improvement a later forward step must add, as a fraction of the current model's
#: held-out information (the effect-size floor of :mod:`encodex.compare.selection`).
MIN_STEP_GAIN = 0.02
