"""Cross-validated nested model comparison for one cell in one environment.

Smoothness (documented choice)
------------------------------
Two ways of fitting a model on the training folds are offered (``fold_fits``):

* "one-step" (default): the model is fitted once to all bins of the environment, its
  smoothing parameters selected by LAML, and each fold's model is one Newton step from that
  fit on the objective of the fold's training bins (:func:`encodex.fit.refit_folds`). The
  held-out bins reach a fold's model only through that starting point (a second-order
  effect) and through the smoothing parameters (one to three numbers per term).
  ``reference_checks/test_one_step_folds.py`` bounds the held-out scores and labels against
  exact refits on simulated cells.
* "refit": for every model and every fold, the smoothing parameters are selected by LAML on
  the training bins of that fold only (``fit_poisson(..., rows=train)``); the held-out bins
  are never seen by the fit nor by the smoothness selection. Each fold's fit is warm-started
  from the previous fold's fit of the same model (coefficients and smoothing parameters); the
  end point does not depend on the warm start beyond the solver's tolerance. About four times
  slower.

The mean-rate model needs no fit: its rate is the training spike count over the training
exposure. With nuisance terms (the slow drift, :mod:`encodex.design.drift`) every model holds
them and the baseline is the nuisance-only model, cross-validated like the others; scores are
then held-out gains over that baseline. The model reported for plotting (response curves) is the chosen model fitted on all
bins of the environment with LAML (with "one-step", the all-bins fit already made).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from encodex.compare.folds import Folds
from encodex.compare.scores import HeldOutScore, heldout_score, mean_rate_counts, pool_scores
from encodex.compare.selection import MIN_STEP_GAIN, Model, Selection, select_variables
from encodex.errors import SettingsError
from encodex.threads import single_threaded
from encodex.variables import label


@dataclass(frozen=True)
class ModelCV:
    """Held-out scores of one model on every fold, and pooled over all held-out bins."""

    model: Model
    folds: tuple[HeldOutScore, ...]
    pooled: HeldOutScore
    n_not_converged: int = 0
    reasons: tuple[str, ...] = ()
    #: Held-out expected counts of every row (each from the fold model that did not see it),
    #: row order; the input of the goodness-of-fit checks (:mod:`encodex.compare.goodness`).
    heldout: np.ndarray | None = None

    @property
    def bits_per_spike(self) -> np.ndarray:
        """Per-fold held-out bits per spike."""
        return np.array([s.bits_per_spike for s in self.folds])


#: How the models of a fold are fitted (see the module docstring).
FOLD_FITS = ("refit", "one-step")


def cross_validate(design, model: Model, y: np.ndarray, offset: np.ndarray, folds: Folds,
                   fit_options=None, fold_fits: str = "one-step", start=None,
                   full_fits: dict | None = None, baselines: list | None = None,
                   nuisance: tuple[str, ...] = (), predictions: list | None = None) -> ModelCV:
    """Score one model by k-fold cross-validation.

    Parameters
    ----------
    design : encodex.design.Design
        Design holding (at least) the model's terms, on the environment's bins.
    model : tuple of str
        Variables of the model (empty: the baseline: mean-rate, or nuisance-only).
    y : ndarray of int, shape (n_rows,)
        Spike counts.
    offset : ndarray, shape (n_rows,)
        Log exposure per bin (log bin width in seconds).
    folds : Folds
        Fold membership shared by every model of the cell.
    fold_fits : {"one-step", "refit"}
        "one-step" (default): the model is fitted once to all bins (smoothness by LAML) and
        each fold's model is one Newton step from it with the fold's bins removed
        (:func:`encodex.fit.refit_folds`); the held-out bins then influence their fold's
        model through the smoothing parameters and the starting point. "refit": every fold's model is
        fitted to its training bins, smoothness selected by LAML on those bins only.
    start : PoissonFit, optional
        Warm start for the all-bins fit of "one-step" (e.g. the parent model's fit).
    full_fits : dict, optional
        Where "one-step" stores the all-bins fit of the model (keyed by model), for warm starts
        and as the final fit.
    baselines : list of ndarray, optional
        Held-out expected counts of the baseline model for each fold, against which the
        model is scored: the mean-rate model (:func:`mean_rate_baselines`, the default), or
        the nuisance-only model (:func:`nuisance_baselines`).
    nuisance : tuple of str
        Terms of the design added to the model (e.g. the slow drift,
        :data:`encodex.design.DRIFT_TERM`); with ``model=()`` the nuisance-only model is
        fitted. They are not part of the model's name.
    predictions : list, optional
        Filled with the held-out expected counts of each fold.

    Returns
    -------
    ModelCV
    """
    from encodex.fit import fit_poisson, refit_folds

    if fold_fits not in FOLD_FITS:
        raise SettingsError(f"fold_fits must be one of {FOLD_FITS} (got {fold_fits!r})")
    terms = tuple(model) + tuple(nuisance)
    sub = design.subset(terms) if terms else None
    per_fold: list[HeldOutScore] = []
    pooled_parts = []
    previous = None
    bad = 0
    reasons: list[str] = []
    fold_models = None
    if sub is not None and fold_fits == "one-step":
        full = fit_poisson(sub, y, offset, lambdas=None, start=start, options=fit_options)
        if full_fits is not None:
            full_fits[tuple(model)] = full
        # Scores need the fold models' predictions only, not their covariances.
        fold_models, fold_predictions = refit_folds(sub, y, offset, full, folds.fold, folds.k,
                                                    options=fit_options, heldout=True,
                                                    covariances=False)
        if not full.converged:
            bad += 1
            reasons.append(full.reason)
    if baselines is None:
        baselines = (nuisance_baselines(design, nuisance, y, offset, folds, fit_options,
                                        fold_fits) if nuisance and model
                     else mean_rate_baselines(y, offset, folds))
    heldout = np.full(len(y), np.nan)
    for k, (train, test) in enumerate(folds.splits()):
        mu0 = baselines[k]
        if sub is None:
            mu = mu0
        else:
            if fold_models is not None:
                fit = fold_models[k]
            else:
                fit = fit_poisson(sub, y, offset, lambdas=None, rows=train, start=previous,
                                  options=fit_options)
                previous = fit
            if not fit.converged:
                bad += 1
                reasons.append(fit.reason)
            mu = (fold_predictions[k] if fold_models is not None
                  else fit.predict(sub, rows=test, offset=offset))
        if predictions is not None:
            predictions.append(mu)
        per_fold.append(heldout_score(y[test], mu, mu0))
        pooled_parts.append((y[test], mu, mu0))
        heldout[test] = mu
    return ModelCV(tuple(model), tuple(per_fold), pool_scores(pooled_parts), bad,
                   tuple(dict.fromkeys(reasons)), heldout)


def mean_rate_baselines(y: np.ndarray, offset: np.ndarray, folds: Folds) -> list[np.ndarray]:
    """Held-out expected counts of the mean-rate model (rate from the training bins), per fold."""
    return [mean_rate_counts(y[train], offset[train], offset[test])
            for train, test in folds.splits()]


def nuisance_baselines(design, nuisance: tuple[str, ...], y: np.ndarray, offset: np.ndarray,
                       folds: Folds, fit_options=None, fold_fits: str = "one-step",
                       full_fits: dict | None = None) -> list[np.ndarray]:
    """Held-out expected counts of the nuisance-only model (e.g. drift only), per fold.

    The model is cross-validated like any other (same folds, same ``fold_fits``); its
    all-bins fit is stored in ``full_fits[()]`` with "one-step".
    """
    preds: list[np.ndarray] = []
    cross_validate(design, (), y, offset, folds, fit_options, fold_fits, full_fits=full_fits,
                   baselines=mean_rate_baselines(y, offset, folds), nuisance=nuisance,
                   predictions=preds)
    return preds


def _baseline_cv(y: np.ndarray, folds: Folds, baselines: list[np.ndarray]) -> ModelCV:
    """Scores of the baseline model against itself (all zero), without another fit."""
    parts = [(y[test], mu, mu) for (_, test), mu in zip(folds.splits(), baselines)]
    heldout = np.full(len(y), np.nan)
    for (_, test), mu in zip(folds.splits(), baselines):
        heldout[test] = mu
    return ModelCV((), tuple(heldout_score(*p) for p in parts), pool_scores(parts),
                   heldout=heldout)


@dataclass(frozen=True)
class CellAnalysis:
    """Everything learnt about one cell in one environment.

    Attributes
    ----------
    selection : Selection
        The nested comparison (label, path, p-value, gains, ambiguity).
    models : dict
        Cross-validated scores of every model scored, keyed by model.
    final_fit : PoissonFit or None
        The chosen model refitted on all bins (None for "none").
    shuffle_p : float
        Empirical p-value of the held-out gain against circular shifts (NaN when off).
    shuffle_null : ndarray
        Mean held-out bits per spike of the tested model on each shifted spike train.
    notes : tuple of str
        Warnings worth a line in the table (fits that did not converge).
    goodness : GoodnessOfFit or None
        Goodness of fit of the chosen model (the baseline model for "none") on its held-out
        predictions (:mod:`encodex.compare.goodness`); None when not computed.
    baseline_fit : PoissonFit or None
        The nuisance-only model (e.g. drift only) fitted on all bins, when there are
        nuisance terms ("one-step"; refitted for plotting with "refit").
    """

    selection: Selection
    models: dict
    final_fit: object | None
    shuffle_p: float = float("nan")
    shuffle_null: np.ndarray = field(default_factory=lambda: np.empty(0))
    notes: tuple[str, ...] = ()
    goodness: object | None = None
    baseline_fit: object | None = None

    @property
    def label(self) -> str:
        return self.selection.label


def warm_start_fits(model: Model, full_fits: dict) -> tuple | None:
    """The all-bins fit to start a model from: its largest already-fitted sub-model.

    That is the forward path's parent (intercept, its terms and their smoothing parameters);
    the model's new terms start from zero coefficients and the generic smoothing parameters.
    The criterion of the smoothness selection (LAML) can have more than one local optimum, so
    the start can change the optimum reached, not only the path to it. Starting a new term
    from an earlier fit that held it (e.g. the first step's single-variable fit, where the
    term had absorbed another variable's tuning) was tried: on the labels study's 1,794 cells
    it saved no CPU (1565 s with it, 1559 s without) and changed one label, a 5 Hz place
    cell labelled position+distance, its position+distance fit at a rougher optimum with a
    lower LAML (-21962.39 against -21961.95) whose held-out gain, 0.0007 bits per spike
    against 0.00005, came from smoothing chosen on all bins.
    """
    parents = [m for m in full_fits if set(m) < set(model)]
    return (full_fits[max(parents, key=len)],) if parents else None


class ModelScorer:
    """Cross-validated per-fold scores of the models of one cell, each model fitted once.

    Calling the scorer with a model (tuple of variables) returns its per-fold held-out bits
    per spike against the cell's baseline model (the mean-rate model, or the nuisance-only
    model when ``nuisance`` is given); it is the ``score`` function of
    :func:`encodex.compare.selection.select_variables`. Several selection rules can share one
    scorer: a model scored for one rule is not fitted again for the next.

    Attributes
    ----------
    cvs : dict
        :class:`ModelCV` of every model scored so far.
    full_fits : dict
        All-bins fits by model ("one-step"), used as warm starts; ``()`` is the
        nuisance-only fit.
    baselines : list of ndarray
        Held-out expected counts of the baseline model per fold.
    """

    def __init__(self, design, y: np.ndarray, offset: np.ndarray, folds: Folds,
                 fit_options=None, fold_fits: str = "one-step",
                 nuisance: tuple[str, ...] = ()):
        self.design, self.y, self.offset, self.folds = design, np.asarray(y), offset, folds
        self.fit_options, self.fold_fits, self.nuisance = fit_options, fold_fits, tuple(nuisance)
        self.cvs: dict[Model, ModelCV] = {}
        self.full_fits: dict = {}
        if self.nuisance:
            self.baselines = nuisance_baselines(design, self.nuisance, self.y, offset, folds,
                                                fit_options, fold_fits, self.full_fits)
        else:
            self.baselines = mean_rate_baselines(self.y, offset, folds)

    def __call__(self, model: Model) -> np.ndarray:
        model = tuple(model)
        if model not in self.cvs:
            self.cvs[model] = self._cross_validate(model)
        return self.cvs[model].bits_per_spike

    def _cross_validate(self, model: Model) -> ModelCV:
        if not model:
            return _baseline_cv(self.y, self.folds, self.baselines)
        start = warm_start_fits(model, self.full_fits)
        return cross_validate(self.design, model, self.y, self.offset, self.folds,
                              self.fit_options, self.fold_fits, start=start,
                              full_fits=self.full_fits, baselines=self.baselines,
                              nuisance=self.nuisance)


def fold_spikes(y: np.ndarray, folds: Folds) -> np.ndarray:
    """Spikes held out in each fold, shape (k,): the step test's fold weights."""
    y = np.asarray(y, dtype=float)
    inside = folds.fold >= 0
    return np.bincount(folds.fold[inside], weights=y[inside], minlength=folds.k)[:folds.k]


@single_threaded
def analyse_cell(design, y: np.ndarray, offset: np.ndarray, folds: Folds,
                 variables, alpha: float = 0.05, exhaustive: bool = False,
                 shuffles: int = 0, min_shift_bins: int = 0,
                 rng: np.random.Generator | None = None, fit_options=None,
                 refit: bool = True, correction: str = "signflip",
                 min_step_gain: float = MIN_STEP_GAIN,
                 fold_fits: str = "one-step", nuisance: tuple[str, ...] = (),
                 goodness: bool = True,
                 goodness_rng: np.random.Generator | None = None) -> CellAnalysis:
    """Choose the variables one cell carries and score every model tried.

    Parameters
    ----------
    design : encodex.design.Design
        Design with every available variable, on the environment's usable bins.
    y : ndarray of int, shape (n_rows,)
        The cell's spike counts in those bins.
    offset : ndarray, shape (n_rows,)
        Log bin width (s) per bin.
    folds : Folds
        Cross-validation folds (contiguous chunks; shared by every model).
    variables : sequence of str
        Variables to consider.
    alpha : float
        Level of the test of each added variable (see ``correction``).
    exhaustive : bool
        Score every subset (same decision rule).
    correction : {"signflip", "signflip-t", "bonferroni", "none"}
        Step test of forward selection (see
        :func:`encodex.compare.selection.select_variables`).
    min_step_gain : float
        Effect-size floor of later steps, a fraction of the current model's held-out
        information (:data:`encodex.compare.selection.MIN_STEP_GAIN`; 0: off).
    shuffles : int
        Circular shifts of the spike train for the empirical null of the held-out gain of
        the chosen model (of the best single-variable model for "none"); 0 disables.
    min_shift_bins : int
        Smallest shift, in bins.
    rng : numpy Generator
        Stream for the shifts (derive it from seed, unit and environment).
    fold_fits : {"refit", "one-step"}
        How each fold's model is fitted; see :func:`cross_validate`.
    refit : bool
        Refit the chosen model on all bins for plotting.
    nuisance : tuple of str
        Terms of the design in every model, the baseline included (e.g. the slow drift,
        :data:`encodex.design.DRIFT_TERM`): the baseline is then the nuisance-only model and
        every score, gain and p-value is relative to it.
    goodness : bool
        Check the fit of the chosen model on its held-out predictions (time-rescaling KS
        test, dispersion, short-lag history; :func:`encodex.compare.goodness.goodness_of_fit`,
        bin width ``exp(offset)``).
    goodness_rng : numpy Generator
        Stream for the within-bin spike positions of the time-rescaling check (derive it
        from seed, unit and environment).

    Returns
    -------
    CellAnalysis
    """
    y = np.asarray(y)
    nuisance = tuple(nuisance)
    score = ModelScorer(design, y, offset, folds, fit_options, fold_fits, nuisance)
    cvs, full_fits = score.cvs, score.full_fits
    selection = select_variables(variables, score, alpha=alpha, exhaustive=exhaustive,
                                 correction=correction, min_step_gain=min_step_gain,
                                 fold_weights=fold_spikes(y, folds))
    notes = []
    n_bad = sum(cv.n_not_converged for cv in cvs.values())
    if n_bad:
        n_fits = sum(len(cv.folds) for m, cv in cvs.items() if m)
        first = next(r for cv in cvs.values() for r in cv.reasons)
        notes.append(f"{n_bad} of {n_fits} fold fits did not converge ({first})")

    final = None
    if refit and selection.chosen:
        from encodex.fit import fit_poisson

        final = full_fits.get(tuple(selection.chosen))
        if final is None:
            final = fit_poisson(design.subset(tuple(selection.chosen) + nuisance), y, offset,
                                lambdas=None, options=fit_options)
        if not final.converged:
            notes.append(f"final fit did not converge ({final.reason})")
    baseline_fit = None
    if refit and nuisance and not selection.chosen:
        from encodex.fit import fit_poisson

        baseline_fit = full_fits.get(())
        if baseline_fit is None:
            baseline_fit = fit_poisson(design.subset(nuisance), y, offset, lambdas=None,
                                       options=fit_options)

    shuffle_p = float("nan")
    null = np.empty(0)
    if shuffles > 0:
        tested = selection.chosen or (selection.steps[0].best if selection.steps else ())
        if tested:
            null = shuffle_null(design, tested, y, offset, folds, shuffles, min_shift_bins,
                                rng if rng is not None else np.random.default_rng(0),
                                fit_options, fold_fits, nuisance)
            observed = float(np.mean(cvs[tested].bits_per_spike))
            shuffle_p = float((1 + np.count_nonzero(null >= observed)) / (1 + shuffles))
    fit_check = None
    if goodness:
        from encodex.compare.goodness import goodness_of_fit

        chosen = tuple(selection.chosen)
        mu = cvs[chosen].heldout if chosen in cvs else None
        if mu is not None and np.all(np.isfinite(mu)):
            fit_check = goodness_of_fit(
                y, mu, float(np.exp(np.median(offset))),
                goodness_rng if goodness_rng is not None else np.random.default_rng(0))
    return CellAnalysis(selection, dict(cvs), final, shuffle_p, null, tuple(notes),
                        goodness=fit_check, baseline_fit=baseline_fit)


def shuffle_null(design, model: Model, y, offset, folds: Folds, n: int, min_shift_bins: int,
                 rng: np.random.Generator, fit_options=None,
                 fold_fits: str = "one-step", nuisance: tuple[str, ...] = ()) -> np.ndarray:
    """Mean held-out bits per spike of ``model`` on ``n`` circularly shifted spike trains.

    Each shift moves the spike train against behaviour by a uniform random number of bins in
    ``[min_shift_bins, n_rows - min_shift_bins]`` (wrapping around), which keeps the spike
    train's own temporal structure and destroys its relation to behaviour. The same folds and
    the same fitting procedure as for the real data are used (nuisance terms included, so the
    score is against the nuisance-only model of the shifted train).
    """
    n_rows = len(y)
    if n_rows <= 2 * min_shift_bins:
        raise SettingsError(
            f"the minimum shift ({min_shift_bins} bins) is more than half of the "
            f"{n_rows} usable bins; lower the minimum shift"
        )
    shifts = rng.integers(min_shift_bins, n_rows - min_shift_bins + 1, size=n)
    out = np.empty(n)
    for i, s in enumerate(shifts):
        cv = cross_validate(design, model, np.roll(y, int(s)), offset, folds, fit_options,
                            fold_fits, nuisance=nuisance)
        out[i] = float(np.mean(cv.bits_per_spike))
    return out


def model_rows(models: dict) -> list[dict]:
    """Rows of ``models.csv`` (without unit and environment) for every model and fold."""
    from encodex.compare.selection import model_sort_key

    rows = []
    for m in sorted(models, key=model_sort_key):
        cv = models[m]
        for f, s in enumerate(cv.folds):
            rows.append({
                "model": label(m),
                "fold": f,
                "n_spikes_test": s.n_spikes,
                "loglik_test": s.loglik,
                "bits_per_spike": s.bits_per_spike,
                "pseudo_r2": s.pseudo_r2,
                "deviance_explained": s.deviance_explained,
            })
    return rows
