"""One-step fold refits against exact refits on a simulated population.

Source: ground-truth simulation (encodex.simulate) and the exact procedure itself: the
one-step mode (``fold_fits="one-step"``, encodex.fit.refit_folds) is an approximation whose
justification is the classical one-step estimator (Bickel 1975, JASA 70:428). Issue 6 asks
that the labels it gives match exact refits on a simulated population; this checks the labels
and the per-fold held-out scores. The exact mode here refits every fold with the all-bins
smoothing parameters, so the comparison isolates the one-step approximation.
"""

import numpy as np
import pytest

from encodex.compare.cell import analyse_cell, cross_validate
from encodex.compare.folds import chunked_folds
from encodex.design import build_design, default_bases
from encodex.fit import fit_poisson, poisson_loglik, refit_folds
from encodex.session import build_session
from encodex.simulate import simulate_recording


@pytest.fixture(scope="module")
def population():
    rec, truth = simulate_recording(seed=4, n_cells=10, duration_s=420.0,
                                    environments=("room_a",))
    session = build_session(rec, bin_size=0.1).restrict("room_a")
    variables = session.available_variables("room_a")
    cov = {v: session.covariates[v] for v in variables}
    design = build_design(cov, default_bases(cov))
    folds = chunked_folds(design.n_rows, k=10, chunks_per_fold=3, rng=0)
    return session, design, folds, variables, truth


def test_one_step_fold_scores_match_exact_refits(population):
    session, design, folds, variables, _ = population
    offset = np.full(design.n_rows, np.log(session.bin_size))
    diffs = []
    for i in range(0, session.counts.shape[1], 2):
        y = session.unit_counts(i)
        if y.sum() < 200:
            continue
        for model in (("position",), ("heading", "speed")):
            sub = design.subset(model)
            full = fit_poisson(sub, y, offset)
            one = refit_folds(sub, y, offset, full, folds.fold, folds.k)
            exact = refit_folds(sub, y, offset, full, folds.fold, folds.k, exact=True)
            for k in range(folds.k):
                rows = folds.test_rows(k)
                d = (poisson_loglik(y[rows], one[k].predict(sub, rows, offset))
                     - poisson_loglik(y[rows], exact[k].predict(sub, rows, offset)))
                diffs.append(abs(d) / max(y[rows].sum(), 1) / np.log(2))
    diffs = np.array(diffs)
    # Measured (seed 4, 7 min, 700-1,600 spikes per cell): the typical fold agrees to about
    # 1e-3 bits per spike; the worst are position folds whose three chunks hold the only
    # visits to part of the arena (removing them is not a small perturbation), up to 0.05.
    # Gains that decide labels here are 0.05-0.6 bits per spike.
    assert np.median(diffs) < 3e-3
    assert np.max(diffs) < 0.08


def test_one_step_labels_match_refit_labels(population):
    session, design, folds, variables, truth = population
    offset = np.full(design.n_rows, np.log(session.bin_size))
    same = 0
    n = 0
    for i in range(session.counts.shape[1]):
        y = session.unit_counts(i)
        if y.sum() < 100:
            continue
        n += 1
        a = analyse_cell(design, y, offset, folds, variables, fold_fits="one-step")
        b = analyse_cell(design, y, offset, folds, variables, fold_fits="refit")
        if a.label == b.label:
            same += 1
            continue
        # A disagreement must come from a step test near its level on both sides (the two
        # fold-fit modes give slightly different held-out scores, so a p-value at 0.046 with
        # one can be 0.067 with the other); a wrong one-step would scramble labels with
        # p-values far apart. Measured with two-stage speed (seed 4): one disagreement, the
        # first step of a weak position+speed cell, speed at p = 0.043 one-step and 0.143
        # refit (one-step's label, speed, nearer the truth); 0.055 / 0.079 with one-stage.
        # At 7 min and 0.1 s bins a tenth of the bins is not a small perturbation.
        steps = zip(a.selection.steps, b.selection.steps)
        sa, sb = next((x, y) for x, y in steps if x.accepted != y.accepted or x.best != y.best)
        assert sa.best == sb.best, (i, a.label, b.label)
        assert 0.02 <= min(sa.p_value, sb.p_value) <= 0.05 < max(sa.p_value, sb.p_value) <= 0.15
    assert n >= 8
    # Labels agree on at least 80% of cells (measured 8 of 10 with the clipped sign-flip test;
    # the two disagreements were p = 0.046 / 0.067 and 0.042 / 0.065, one-step exact both
    # times).
    assert same >= 0.8 * n
