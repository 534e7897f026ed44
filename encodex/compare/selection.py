"""Nested model comparison: forward and exhaustive selection of variables.

Forward selection (the search of Hardcastle, Maheswaranathan, Ganguli & Giocomo 2017,
Neuron 94:375): start from the mean-rate model; at each step score every model that adds one
remaining variable to the current one, take the candidate with the highest mean held-out
score (bits per spike, averaged over folds), and keep it only if it beats the current model
fold by fold by a one-sided Wilcoxon signed-rank test at level ``alpha``
(:func:`scipy.stats.wilcoxon`); stop at the first step that is not significant.

Multiple candidates: at each step the best of m candidates is tested, which would make the
chance of adding a variable to an untuned cell larger than ``alpha``. By default the test of
the best candidate is therefore held to ``alpha / m`` (Bonferroni over the candidates of the
step; Bonferroni 1936, Pubbl. R. Ist. Sup. Sci. Econ. Commer. Firenze 8:3), so that an
untuned cell is labelled with probability at most ``alpha`` at the first step; the p-values
reported are the raw ones. ``correction="none"`` tests at ``alpha`` (the uncorrected rule).

Exhaustive mode scores every subset of the variables first, then applies the same rule on the
whole lattice. Because the rule only reads scores, both modes give the same label; exhaustive
mode keeps the scores of all models for users who want the whole lattice.

This module knows nothing about spikes or designs: it receives a function that returns the
per-fold held-out scores of a model (a tuple of variable names in canonical order).
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import wilcoxon

from encodex.errors import SettingsError
from encodex.variables import canonical_order, is_complete, label, with_requirements, without

Model = tuple[str, ...]
ScoreFn = Callable[[Model], np.ndarray]


def improvement_p(new: np.ndarray, old: np.ndarray) -> float:
    """One-sided Wilcoxon signed-rank p-value that ``new`` beats ``old`` fold by fold.

    Parameters
    ----------
    new, old : ndarray, shape (k,)
        Held-out scores of two models on the same k folds.

    Returns
    -------
    float
        p-value of the alternative "differences new - old are shifted above zero"
        (:func:`scipy.stats.wilcoxon`, ``alternative="greater"``, exact distribution for
        small k without ties). Folds with a zero difference are dropped (Wilcoxon's
        convention); when every difference is zero (or not finite) the p-value is 1.
    """
    d = np.asarray(new, dtype=float) - np.asarray(old, dtype=float)
    d = d[np.isfinite(d)]
    if d.size == 0 or not np.any(d != 0):
        return 1.0
    return float(wilcoxon(d, alternative="greater", zero_method="wilcox").pvalue)


@dataclass(frozen=True)
class Step:
    """One forward step: candidates scored from ``base`` and the decision taken."""

    base: Model
    candidates: tuple[Model, ...]
    best: Model
    mean_improvement: float
    p_value: float
    accepted: bool


@dataclass(frozen=True)
class Selection:
    """Outcome of the nested comparison for one cell.

    Attributes
    ----------
    chosen : tuple of str
        Variables carried, canonical order (empty: "none").
    steps : tuple of Step
        The forward path, including the final rejected step (if any).
    p_value : float
        One-sided Wilcoxon p-value of the chosen model against the mean-rate model; for
        "none", that of the best single-variable model (NaN when no variable is available).
    gains : dict
        Held-out contribution of each available variable relative to the chosen model M, in
        bits per spike (mean over folds): ``score(M) - score(M without v)`` for v in M,
        ``score(M with v) - score(M)`` for v not in M.
    ambiguous_with : tuple of str
        Labels of other models with as many variables as M, scoring above the mean-rate
        model, that M does not beat significantly (p >= alpha).
    scores : dict
        Per-fold held-out scores of every model scored, keyed by model.
    """

    chosen: Model
    steps: tuple[Step, ...]
    p_value: float
    gains: dict[str, float]
    ambiguous_with: tuple[str, ...]
    scores: dict[Model, np.ndarray] = field(repr=False)

    @property
    def label(self) -> str:
        """Canonical label, e.g. ``"position+speed"`` or ``"none"``."""
        return label(self.chosen)


def _key(variables) -> Model:
    return canonical_order(variables)


def select_variables(
    variables: Sequence[str],
    score: ScoreFn,
    alpha: float = 0.05,
    exhaustive: bool = False,
    correction: str = "bonferroni",
) -> Selection:
    """Choose the variables a cell carries by nested, cross-validated comparison.

    Parameters
    ----------
    variables : sequence of str
        Variables available for this cell and environment.
    score : callable
        ``score(model) -> ndarray (k,)`` per-fold held-out bits per spike of the model with
        these variables (canonical-order tuple); ``score(())`` is the mean-rate model and is
        expected to be all zeros. Called at most once per model.
    alpha : float
        Level of the one-sided Wilcoxon signed-rank test of each addition.
    exhaustive : bool
        Score every subset before deciding (same rule, whole lattice kept).
    correction : {"bonferroni", "none"}
        Hold the best of m candidates of a step to ``alpha / m`` (default), or to ``alpha``.

    Returns
    -------
    Selection
    """
    if not 0.0 < alpha < 1.0:
        raise SettingsError(f"alpha must be in (0, 1) (got {alpha}); use 0.05")
    if correction not in ("bonferroni", "none"):
        raise SettingsError(f"correction must be 'bonferroni' or 'none' (got {correction!r})")
    available = _key(variables)
    if len(set(variables)) != len(tuple(variables)):
        raise SettingsError(f"variables listed twice: {list(variables)}")
    cache: dict[Model, np.ndarray] = {}

    def get(model) -> np.ndarray:
        model = _key(model)
        if model not in cache:
            cache[model] = np.asarray(score(model), dtype=float)
        return cache[model]

    get(())
    if exhaustive:
        for r in range(1, len(available) + 1):
            for sub in itertools.combinations(available, r):
                if is_complete(sub):
                    get(sub)

    current: Model = ()
    steps: list[Step] = []
    while True:
        remaining = [v for v in available if v not in current]
        if not remaining:
            break
        # A variable that needs another (direction needs position) is offered together with
        # it while that one is not in the model yet.
        cands = tuple(dict.fromkeys(with_requirements(current + (v,)) for v in remaining))
        means = [float(np.nanmean(get(c))) for c in cands]
        # Ties are broken by canonical order (first candidate wins): deterministic.
        best = _nested_best(cands[int(np.argmax(means))], current, cands, get, alpha,
                            correction)
        p = improvement_p(get(best), get(current))
        gain = float(np.nanmean(get(best)) - np.nanmean(get(current)))
        level = alpha / len(cands) if correction == "bonferroni" else alpha
        accepted = p < level
        steps.append(Step(current, cands, best, gain, p, accepted))
        if not accepted:
            break
        current = best

    if current:
        p_value = improvement_p(get(current), get(()))
    elif steps:
        p_value = steps[0].p_value
    else:
        p_value = float("nan")

    m_current = float(np.nanmean(get(current)))
    gains: dict[str, float] = {}
    for v in available:
        if v in current:
            gains[v] = m_current - float(np.nanmean(get(without(current, v))))
        else:
            gains[v] = float(np.nanmean(get(with_requirements(current + (v,))))) - m_current

    ambiguous: list[str] = []
    if current:
        for model, s in cache.items():
            if len(model) != len(current) or model == current:
                continue
            if float(np.nanmean(s)) <= 0.0:
                continue
            if improvement_p(get(current), s) >= alpha:
                ambiguous.append(model)
    ambiguous_labels = tuple(label(m) for m in sorted(ambiguous, key=_order_key))
    return Selection(
        chosen=current,
        steps=tuple(steps),
        p_value=p_value,
        gains=gains,
        ambiguous_with=ambiguous_labels,
        scores=dict(sorted(cache.items(), key=lambda kv: _order_key(kv[0]))),
    )


def _nested_best(best: Model, current: Model, cands, get, alpha, correction) -> Model:
    """The best candidate, or its main effect when the variable it depends on carries it all.

    A candidate that adds a variable together with the one it requires (position+direction
    from a model without position) is kept only if the dependent variable improves on the
    requirement alone fold by fold (same test and level as a step); otherwise the step goes
    on with the requirement alone (position), so that direction never rides in on the
    strength of position.
    """
    from encodex.variables import REQUIRES

    added = [v for v in best if v not in current]
    dependent = [v for v in added if set(REQUIRES.get(v, ())) & set(added)]
    if not dependent:
        return best
    main = _key(v for v in best if v not in dependent)
    if main not in cands:
        return best
    level = alpha / len(cands) if correction == "bonferroni" else alpha
    return best if improvement_p(get(best), get(main)) < level else main


def _order_key(model: Model):
    """Sort models by size, then canonical position of their variables."""
    from encodex.variables import VARIABLES, EXTRA_ORDER

    fixed = VARIABLES + EXTRA_ORDER
    idx = tuple(fixed.index(v) if v in fixed else len(fixed) for v in model)
    return (len(model), idx, model)


def model_sort_key(model: Model):
    """Public sort key for models: by number of variables, then canonical order."""
    return _order_key(model)
