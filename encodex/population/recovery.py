"""Compare labels with the ground truth of a simulated population.

Used by the reference checks and the full-size benchmark of recovery and calibration; also
handy for users who validate their settings on :func:`encodex.simulate.simulate_recording`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from encodex.variables import VARIABLES, parse_label


def recovery_summary(cells: pd.DataFrame, truth: pd.DataFrame) -> dict:
    """Recovery, sensitivity and false labels of a run against the truth.

    Parameters
    ----------
    cells : DataFrame
        ``cells.csv`` of a run (``unit``, ``environment``, ``status``, ``variables``).
    truth : DataFrame
        Truth table of the simulator (``unit``, ``environment``, ``variables`` and, if
        present, ``silent``).

    Returns
    -------
    dict
        ``n_tuned`` (labelled cells whose truth is one or two variables), ``exact`` (fraction
        of them whose label equals the truth), ``sensitivity`` per variable (fraction of
        labelled cells carrying it whose label includes it), ``specificity_errors`` per
        variable (fraction of cells not carrying it whose label includes it), ``n_untuned``
        and ``false_label_rate`` (untuned, non-silent cells labelled with anything),
        ``not_labelled`` (cells with status other than "ok").
    """
    t = truth.copy()
    t["unit"] = t["unit"].astype(str)
    t["environment"] = t["environment"].astype(str)
    m = cells.merge(t, on=["unit", "environment"], suffixes=("", "_true"))
    if "silent" not in m:
        m["silent"] = False
    ok = m[m["status"] == "ok"]
    true_sets = [set(parse_label(x)) for x in ok["variables_true"]]
    got_sets = [set(parse_label(x)) for x in ok["variables"]]
    tuned = [i for i, s in enumerate(true_sets) if 1 <= len(s) <= 2]
    untuned = [i for i, (s, sil) in enumerate(zip(true_sets, ok["silent"]))
               if not s and not bool(sil)]
    exact = np.mean([true_sets[i] == got_sets[i] for i in tuned]) if tuned else np.nan
    sens, spec_err, n_per = {}, {}, {}
    for v in VARIABLES:
        carriers = [i for i in tuned if v in true_sets[i]]
        n_per[v] = len(carriers)
        sens[v] = float(np.mean([v in got_sets[i] for i in carriers])) if carriers else np.nan
        others = [i for i in range(len(true_sets)) if v not in true_sets[i]]
        spec_err[v] = float(np.mean([v in got_sets[i] for i in others])) if others else np.nan
    false = float(np.mean([bool(got_sets[i]) for i in untuned])) if untuned else np.nan
    mistakes = [
        {"unit": ok["unit"].iloc[i], "environment": ok["environment"].iloc[i],
         "truth": ok["variables_true"].iloc[i], "label": ok["variables"].iloc[i]}
        for i in tuned if true_sets[i] != got_sets[i]
    ]
    return {
        "n_cells": int(len(m)),
        "n_tuned": len(tuned),
        "exact": float(exact),
        "sensitivity": sens,
        "n_carriers": n_per,
        "false_inclusion": spec_err,
        "n_untuned": len(untuned),
        "false_label_rate": false,
        "not_labelled": int((m["status"] != "ok").sum()),
        "mistakes": mistakes,
    }
