"""Nested model comparison: forward and exhaustive selection of variables.

Forward selection (the search of Hardcastle, Maheswaranathan, Ganguli & Giocomo 2017,
Neuron 94:375): start from the mean-rate model; at each step score every model that adds one
remaining variable to the current one, take the candidate with the highest mean held-out
score (bits per spike, averaged over folds), and keep it only if it beats the current model
fold by fold by a one-sided Wilcoxon signed-rank test at level ``alpha``
(:func:`scipy.stats.wilcoxon`); stop at the first step that is not significant.

Multiple candidates: at each step the best of m candidates is tested, which would make the
chance of adding a variable to an untuned cell larger than ``alpha`` if it were tested as if
it had been the only one. Four step tests (``correction``):

* ``"signflip"`` (default): an exact sign-flip randomisation test of the largest candidate
  statistic (the max-statistic method of Westfall & Young 1993, *Resampling-Based Multiple
  Testing*, Wiley, ch. 2 and 4). The statistic of candidate c is the mean of its fold-wise
  differences ``d_c = score(c) - score(current)`` (bits per spike), each clipped at three
  times the candidate's median absolute difference and, when the spikes held out in each
  fold are given (``fold_weights``; :func:`encodex.compare.cell.analyse_cell` always gives
  them), weighted by them: the pooled improvement (:func:`max_signflip_p`). Under the null
  hypothesis that no candidate improves on the current model the differences of a fold are
  symmetric about zero jointly, so flipping the sign of whole folds (all candidates
  together, which keeps their correlation) leaves their distribution unchanged; the p-value
  of the best candidate is the share of the 2^k sign vectors whose largest statistic reaches
  the observed one of that candidate (enumerated exactly for k <= :data:`EXACT_MAX_FOLDS`,
  else a seeded sample). It is tested at ``alpha`` and the reported step p-value is this
  adjusted one. The correlation of the candidates (they share the folds and the current
  model) makes it less strict than Bonferroni at the same false-label rate.
* ``"signflip-t"``: the same test with each candidate's mean studentised (its t statistic);
  the default until sparse cells showed it pays for every candidate (see
  :func:`max_signflip_p`).
* ``"bonferroni"``: one-sided Wilcoxon signed-rank test of the best candidate held to
  ``alpha / m`` (Bonferroni 1936, Pubbl. R. Ist. Sup. Sci. Econ. Commer. Firenze 8:3); the
  p-values reported are the raw ones.
* ``"none"``: the Wilcoxon test at ``alpha`` (the uncorrected rule).

Each :class:`Step` records the level it was tested at.

Effect-size floor (``min_step_gain``): a later step must also raise the held-out information
by at least this fraction of the current model's (default :data:`MIN_STEP_GAIN`, 1%). With
long recordings a tiny improvement becomes significant when the true terms are not fitted
exactly (a field or a tuning curve smoothed a little, a shape the basis cannot follow) and a
correlated variable takes up the remainder: in the labels-at-the-edges study such extras
added 0.2-1.1% of the current model's information, true second variables of equally tuned
weak cells 22-62%, and a second variable tuned a quarter as deeply as the first about 1-30%
(benchmarks/floor_mixed_cells.py: a 2% floor lost 3 of 24 such cells at 60 min, 1% none).
The first step has no floor (the baseline carries no information).

Exhaustive mode scores every subset of the variables first, then applies the same rule on the
whole lattice. Because the rule only reads scores, both modes give the same label; exhaustive
mode keeps the scores of all models for users who want the whole lattice.

This module knows nothing about spikes or designs: it receives a function that returns the
per-fold held-out scores of a model (a tuple of variable names in canonical order).
"""

from __future__ import annotations

import functools
import itertools
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import wilcoxon

from encodex.defaults import CORRECTIONS, MIN_STEP_GAIN, SIGNFLIP_TESTS
from encodex.errors import SettingsError
from encodex.variables import canonical_order, is_complete, label, with_requirements, without

Model = tuple[str, ...]
ScoreFn = Callable[[Model], np.ndarray]

#: Statistic of each sign-flip step test (see :func:`max_signflip_p`).
SIGNFLIP_STATISTIC = {"signflip": "clipped", "signflip-t": "t"}

#: Up to this many folds the 2^k sign vectors are enumerated (65,536 at 16 folds); above, a
#: fixed-seed sample of :data:`SIGNFLIP_SAMPLES` sign vectors is drawn instead.
EXACT_MAX_FOLDS = 16
SIGNFLIP_SAMPLES = 2**16 - 1


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


@functools.lru_cache(maxsize=4)
def sign_vectors(k: int) -> np.ndarray:
    """Sign vectors over ``k`` folds used by the sign-flip test, shape (n, k), entries +-1.

    All 2^k vectors (first row all +1, the observed data) when ``k <= EXACT_MAX_FOLDS``;
    otherwise the all-+1 vector and :data:`SIGNFLIP_SAMPLES` vectors drawn from a fixed seed
    (the same for every cell and worker, so results are reproducible). The array is cached:
    do not modify it.
    """
    if k <= EXACT_MAX_FOLDS:
        codes = np.arange(2**k, dtype=np.int64)[:, None]
        bits = (codes >> np.arange(k, dtype=np.int64)) & 1
        return (1 - 2 * bits).astype(float)
    draws = np.random.default_rng(0).integers(0, 2, size=(SIGNFLIP_SAMPLES, k))
    return np.vstack([np.ones((1, k)), 1.0 - 2.0 * draws])


def n_sign_vectors(k: int) -> int:
    """Number of sign vectors the sign-flip test uses with ``k`` folds (the observed included).

    ``2**k`` (all of them, an exact test) up to :data:`EXACT_MAX_FOLDS` folds; above, the
    observed vector and :data:`SIGNFLIP_SAMPLES` random ones (a randomisation test that is
    still exact in level because the observed vector is counted: Phipson & Smyth 2010,
    Stat. Appl. Genet. Mol. Biol. 9:39). ``1 / n_sign_vectors(k)`` is the smallest p-value.
    """
    return 2**k if k <= EXACT_MAX_FOLDS else SIGNFLIP_SAMPLES + 1


def smallest_p(correction: str, k: int) -> float:
    """Smallest p-value the step test of ``correction`` can give with ``k`` folds.

    The sign-flip test: ``1 / n_sign_vectors(k)``; the one-sided Wilcoxon signed-rank test
    (exact distribution): ``2**-k``, reached when every fold improves.
    """
    return 1.0 / n_sign_vectors(k) if correction in SIGNFLIP_TESTS else 2.0**-k


def _studentised(sums: np.ndarray, sumsq: np.ndarray, k: int) -> np.ndarray:
    """t statistic of a mean from its sum and sum of squares over k folds (inf when sd = 0)."""
    mean = sums / k
    var = np.maximum(sumsq - k * mean * mean, 0.0) / (k - 1)
    se = np.sqrt(var / k)
    # Relative floor: rounding leaves a tiny positive variance where it should be zero.
    tiny = 1e-12 * np.sqrt(sumsq / k)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(se > tiny, mean / np.where(se > tiny, se, 1.0), np.sign(mean) * np.inf)
    return np.where(np.isnan(t), 0.0, t)


#: Fold-wise differences are clipped at this multiple of their median absolute size (per
#: candidate) before the "clipped" statistic averages them (Huber-type, see max_signflip_p).
CLIP_MEDIANS = 3.0

#: Statistics of :func:`max_signflip_p`.
STATISTICS = ("clipped", "mean", "t")


def _clipped(d: np.ndarray) -> np.ndarray:
    """Each column clipped at +-CLIP_MEDIANS times its median absolute value.

    The bound depends on the absolute values only, which sign flips leave unchanged, and the
    clip is odd (``clip(-x) = -clip(x)``): flipping then clipping equals clipping then
    flipping, so the sign-flip test of the clipped values is still exact.
    """
    bound = CLIP_MEDIANS * np.median(np.abs(d), axis=0)
    return np.clip(d, -bound, bound)


def max_signflip_p(differences: np.ndarray, statistic: str = "clipped",
                   weights: np.ndarray | None = None) -> np.ndarray:
    """Adjusted p-values of candidates by the sign-flip max-statistic test.

    Parameters
    ----------
    differences : ndarray, shape (k, m)
        Fold-wise held-out differences (bits per spike) of m candidates against the current
        model, on the same k folds. Non-finite entries count as zero (no evidence).
    statistic : {"clipped", "mean", "t"}
        Statistic of a candidate: the mean of its fold-wise differences after clipping each
        at :data:`CLIP_MEDIANS` times the candidate's median absolute difference (default);
        the plain mean; or the studentised mean (t).
    weights : ndarray, shape (k,), optional
        Fold weights, normally the spikes held out in each fold: each fold's differences are
        multiplied by ``w_f / mean(w)`` (after the clip), so that the mean is the pooled
        improvement (total held-out log-likelihood gain over total spikes, bits per spike)
        rather than the average of the folds' own ratios, in which a fold with three spikes
        counts as much as one with thirty. The weights are fixed under flips: the test stays
        exact.

    Returns
    -------
    ndarray, shape (m,)
        ``p_c = #{s : max_j T_j(s) >= T_c} / n_s`` over the sign vectors ``s`` of
        :func:`sign_vectors` (one-sided: a large statistic means the candidate beats the
        current model), with ``T_j(s)`` the statistic of ``s * d_j``. Single-step max-T
        adjusted p-values (Westfall & Young 1993, Resampling-Based Multiple Testing, Wiley,
        sec. 2.6); with one candidate "mean" and "t" give the exact one-sided sign-flip
        (Fisher-Pitman) test of the mean (Good 2005, Permutation, Parametric and Bootstrap
        Tests of Hypotheses, 3rd ed., sec. 3.5): with the sum of squares fixed under flips, t
        is monotone in the mean. The smallest possible value is ``1 / n_sign_vectors(k)``
        (``2**-k`` up to :data:`EXACT_MAX_FOLDS` folds).

    Notes
    -----
    Why not t: with few spikes per fold the fold-wise differences are heavy-tailed and a real
    candidate's are more spread than a null candidate's. Studentising puts every candidate on
    one footing, so the observed best pays for all m candidates; on the plain scale of bits per
    spike a candidate whose flipped means stay small (no effect, little spread) hardly raises
    the maximum. On simulated sparse cells (0.1 Hz, 30 min, 54 cells) the first step found a
    true variable in 19 cells with the (clipped) mean and 8 with t; weighting the folds by
    their spikes, 23.

    Why clipped: on the plain scale one candidate with a single wild fold (e.g. a place field
    refitted without the only visits to part of the arena) makes the maximum under flips large
    for every sign vector that flips that fold, and the step loses all power. Clipping each
    candidate's differences at three times its median absolute difference (an odd, Huber-type
    function, Huber 1964, Ann. Math. Stat. 35:73; robust permutation statistics: Lambert 1985,
    Ann. Stat. 13:606, cited from memory) bounds one fold's pull while keeping each
    candidate's own scale. The bound is a function of the absolute differences, which flips
    do not change, so the test stays exact.
    """
    if statistic not in STATISTICS:
        raise SettingsError(f"statistic must be one of {', '.join(STATISTICS)} (got "
                            f"{statistic!r})")
    d = np.asarray(differences, dtype=float)
    if d.ndim == 1:
        d = d[:, None]
    d = np.where(np.isfinite(d), d, 0.0)
    k = d.shape[0]
    if k < 2:
        return np.ones(d.shape[1])
    if statistic == "clipped":
        d = _clipped(d)
    if weights is not None:
        # After the clip: a fold is bounded on the scale of bits per spike, where folds are
        # comparable, and then counted by its spikes.
        w = np.asarray(weights, dtype=float)
        if w.shape != (k,) or not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
            raise SettingsError(f"weights must be {k} non-negative numbers, not all zero")
        d = d * (w / w.mean())[:, None]
    sumsq = np.sum(d * d, axis=0)
    signs = sign_vectors(k)
    if statistic == "t":
        observed = _studentised(d.sum(axis=0), sumsq, k)
        flipped = _studentised(signs @ d, sumsq, k)
        # An infinite statistic (equal differences in every fold) is compared exactly: inf
        # minus a relative tolerance would be NaN and count as never reached, giving p = 0.
        tol = np.where(np.isfinite(observed), 1e-9 * np.maximum(1.0, np.abs(observed)), 0.0)
    else:
        observed = d.sum(axis=0) / k
        flipped = (signs @ d) / k
        tol = 1e-9 * np.sqrt(sumsq / k)
    # Equal statistics must count as reached despite rounding in the products.
    top = flipped.max(axis=1)
    count = np.sum(top[:, None] >= (observed - tol)[None, :], axis=0)
    return count / signs.shape[0]


def paired_p(new: np.ndarray, old: np.ndarray, correction: str = "signflip",
             weights: np.ndarray | None = None) -> float:
    """One-sided p-value that ``new`` beats ``old`` fold by fold, by the step test's own kind.

    The exact sign-flip test of the step test's statistic for the sign-flip tests
    (:func:`max_signflip_p` with one candidate: the clipped mean for "signflip", the mean
    for "signflip-t"), the Wilcoxon signed-rank test (:func:`improvement_p`) otherwise.
    ``weights`` (spikes per fold) are used by "signflip" only (see :func:`max_signflip_p`).
    """
    if correction in SIGNFLIP_TESTS:
        d = np.asarray(new, dtype=float) - np.asarray(old, dtype=float)
        return float(max_signflip_p(d[:, None], SIGNFLIP_STATISTIC[correction],
                                    _weights(correction, weights))[0])
    return improvement_p(new, old)


def describe_test(correction: str, alpha: float, k: int | None = None) -> str:
    """One sentence naming the step test and its level, for run.json and README.txt.

    With the number of folds ``k`` the sentence also says how the sign-flip null
    distribution was obtained (enumerated, or sampled above :data:`EXACT_MAX_FOLDS` folds).
    """
    if correction in SIGNFLIP_TESTS:
        how = ""
        if k is not None and k <= EXACT_MAX_FOLDS:
            how = f", all {2**k} sign vectors of the {k} folds enumerated"
        elif k is not None:
            how = (f", the observed and {SIGNFLIP_SAMPLES} random sign vectors of the {k} "
                   f"folds (fixed seed)")
        what = ("pooled improvement (each fold's improvement clipped at "
                f"{CLIP_MEDIANS:g} times the candidate's median absolute improvement, then "
                "weighted by the fold's held-out spikes)"
                if correction == "signflip" else "studentised mean improvement")
        return (f"exact sign-flip randomisation test of the largest {what} "
                "among the candidates of the step, folds flipped for all "
                f"candidates together (max-statistic, Westfall & Young 1993){how}, at "
                f"alpha={alpha:g}")
    text = f"one-sided Wilcoxon signed-rank test at alpha={alpha:g}"
    if correction == "bonferroni":
        text += " divided by the number of candidates of the step (Bonferroni)"
    return text


def _weights(correction: str, weights):
    """Fold weights as the step test uses them: by "signflip" only (the others unweighted)."""
    return weights if correction == "signflip" else None


def _step_test(cands, best_index, get, current, alpha, correction,
               weights=None) -> tuple[float, float]:
    """(p-value, level) of the best candidate of a forward step."""
    if correction in SIGNFLIP_TESTS:
        diffs = np.column_stack([get(c) - get(current) for c in cands])
        p = max_signflip_p(diffs, SIGNFLIP_STATISTIC[correction],
                           _weights(correction, weights))[best_index]
        return float(p), alpha
    p = improvement_p(get(cands[best_index]), get(current))
    return p, (alpha / len(cands) if correction == "bonferroni" else alpha)


@dataclass(frozen=True)
class Step:
    """One forward step: candidates scored from ``base`` and the decision taken.

    ``p_value`` is the step test's p-value of ``best`` (adjusted for the candidates with
    the sign-flip tests, raw with "bonferroni" and "none"); ``accepted`` is ``p_value <= level``
    with the sign-flip tests and ``p_value < level`` with the Wilcoxon rules.
    """

    base: Model
    candidates: tuple[Model, ...]
    best: Model
    mean_improvement: float
    p_value: float
    accepted: bool
    #: Level the p-value was compared with (alpha, or alpha / m with Bonferroni).
    level: float = float("nan")
    #: Smallest mean improvement (bits per spike) the step had to add: ``min_step_gain``
    #: times the current model's mean held-out score (0 for the first step).
    min_gain: float = 0.0


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
        One-sided p-value of the chosen model against the baseline model (:func:`paired_p`
        of the step test's kind); for "none", the first step's p-value (NaN when no
        variable is available).
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
    correction: str = "signflip",
    min_step_gain: float = MIN_STEP_GAIN,
    fold_weights: np.ndarray | None = None,
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
        Level of the test of each addition (false-label rate of an untuned cell).
    exhaustive : bool
        Score every subset before deciding (same rule, whole lattice kept).
    correction : {"signflip", "signflip-t", "bonferroni", "none"}
        Step test (module docstring): sign-flip max-statistic test of the pooled clipped
        (default) or studentised mean improvement at ``alpha``, Wilcoxon at ``alpha / m``,
        or Wilcoxon at ``alpha``.
    min_step_gain : float
        A step is also refused unless its mean improvement is at least this fraction of the
        current model's mean held-out score (module docstring; 0 switches the floor off).
    fold_weights : ndarray, shape (k,), optional
        Spikes held out in each fold. The "signflip" test then weighs each fold's difference
        by its spikes (its statistic is the pooled improvement, :func:`max_signflip_p`);
        choosing the best candidate and the effect-size floor still use the plain mean over
        folds.

    Returns
    -------
    Selection
    """
    if not 0.0 < alpha < 1.0:
        raise SettingsError(f"alpha must be in (0, 1) (got {alpha}); use 0.05")
    if not 0.0 <= min_step_gain < 1.0:
        raise SettingsError(f"min_step_gain must be in [0, 1) (got {min_step_gain}); use "
                            f"{MIN_STEP_GAIN}")
    if correction not in CORRECTIONS:
        raise SettingsError(f"correction must be one of {', '.join(CORRECTIONS)} (got "
                            f"{correction!r}); use signflip")
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
                            correction, fold_weights)
        i_best = cands.index(best)
        p, level = _step_test(cands, i_best, get, current, alpha, correction, fold_weights)
        gain = float(np.nanmean(get(best)) - np.nanmean(get(current)))
        floor = min_step_gain * max(float(np.nanmean(get(current))), 0.0)
        # An exact randomisation p-value is valid with <= (size at most alpha).
        accepted = p <= level if correction in SIGNFLIP_TESTS else p < level
        accepted = accepted and gain >= floor
        steps.append(Step(current, cands, best, gain, p, accepted, level, floor))
        if not accepted:
            break
        current = best

    if current:
        p_value = paired_p(get(current), get(()), correction, fold_weights)
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
            if paired_p(get(current), s, correction, fold_weights) >= alpha:
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


def _nested_best(best: Model, current: Model, cands, get, alpha, correction,
                 weights=None) -> Model:
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
    if correction in SIGNFLIP_TESTS:  # one comparison: the exact sign-flip test of its own
        p = paired_p(get(best), get(main), correction, weights)
        return best if p <= alpha else main
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
