"""Defaults shared by the command line and the Python API.

Kept free of heavy imports so that the command line (``encodex --help``) starts fast while
reading the same values as :class:`encodex.population.settings.RunSettings`.
"""

#: Default number of cross-validation folds. Why 20 rather than 10: the step test works on the
#: k fold-wise differences; with 10 folds its p-values come in steps of 2^-10 and a
#: studentised statistic has 9 degrees of freedom. On the same simulated cells 20 folds found
#: more weakly tuned cells (0.25x tuning: 36 against 32 of 54; 1 Hz: 49 against 44) with 1 false
#: label in 1000 untuned cells (``benchmarks/labels_at_the_edges.py``, benchmarks/RESULTS.md),
#: for about 1.15x the CPU per cell (one-step fold fits keep the extra folds cheap).
DEFAULT_FOLDS = 20

#: Default number of contiguous chunks of time per fold (see :mod:`encodex.compare.folds`).
DEFAULT_CHUNKS_PER_FOLD = 3

#: Smallest improvement a later forward step must add, as a fraction of the current model's
#: held-out information (the effect-size floor of :mod:`encodex.compare.selection`).
MIN_STEP_GAIN = 0.01

#: Step tests of forward selection (:mod:`encodex.compare.selection`); the first is the default.
#: "signflip": sign-flip max-statistic test of the largest pooled improvement (fold-wise gains
#: clipped at 3x their median, weighted by held-out spikes); "signflip-t":
#: the same with studentised means (the default before the sparse-cell study); "bonferroni"
#: and "none": one-sided Wilcoxon at alpha / m and at alpha.
CORRECTIONS = ("signflip", "signflip-t", "bonferroni", "none")

#: Knot placements of the bases; the first is the default ("quantile": distance and time since
#: trial start get knots at quantiles of their values; "even": evenly spaced for every
#: variable). See :data:`encodex.design.bases.QUANTILE_KNOT_VARIABLES`.
KNOT_PLACEMENTS = ("quantile", "even")

#: The step tests that are sign-flip randomisation tests (p-values compared with ``<=``).
SIGNFLIP_TESTS = ("signflip", "signflip-t")
