"""A methods paragraph generated from ``run.json``, with a citation for every method.

The paragraph states the exact settings of the run (bin width, bases, penalties, folds, test,
alpha, thresholds); settings that ``run.json`` does not record are said to be unrecorded
rather than guessed.
"""

from __future__ import annotations

from encodex.report.load import setting
from encodex.report.wording import label_caveat
from encodex.variables import VARIABLES

__all__ = ["REFERENCES", "methods_paragraph", "methods_markdown"]

#: Citations used in the paragraph, keyed by a short tag.
REFERENCES: dict[str, str] = {
    "mccullagh1989": "McCullagh, P. & Nelder, J. A. (1989). Generalized Linear Models, 2nd ed. "
                     "Chapman & Hall.",
    "eilers1996": "Eilers, P. H. C. & Marx, B. D. (1996). Flexible smoothing with B-splines and "
                  "penalties. Statistical Science 11:89-121.",
    "wood2011": "Wood, S. N. (2011). Fast stable restricted maximum likelihood and marginal "
                "likelihood estimation of semiparametric generalized linear models. J. R. Stat. "
                "Soc. B 73:3-36.",
    "bickel1975": "Bickel, P. J. (1975). One-step Huber estimates in the linear model. J. Am. "
                  "Stat. Assoc. 70:428-434.",
    "hardcastle2017": "Hardcastle, K., Maheswaranathan, N., Ganguli, S. & Giocomo, L. M. (2017). "
                      "A multiplexed, heterogeneous, and adaptive code for navigation in medial "
                      "entorhinal cortex. Neuron 94:375-387.",
    "wilcoxon1945": "Wilcoxon, F. (1945). Individual comparisons by ranking methods. Biometrics "
                    "Bulletin 1:80-83.",
    "skaggs1993": "Skaggs, W. E., McNaughton, B. L., Gothard, K. M. & Markus, E. J. (1993). An "
                  "information-theoretic approach to deciphering the hippocampal code. Advances "
                  "in Neural Information Processing Systems 5:1030-1037.",
    "wilson1927": "Wilson, E. B. (1927). Probable inference, the law of succession, and "
                  "statistical inference. J. Am. Stat. Assoc. 22:209-212.",
    "newcombe1998": "Newcombe, R. G. (1998). Two-sided confidence intervals for the single "
                    "proportion: comparison of seven methods. Statistics in Medicine 17:857-872.",
    "newcombe1998b": "Newcombe, R. G. (1998). Improved confidence intervals for the difference "
                     "between binomial proportions based on paired data. Statistics in Medicine "
                     "17:2635-2650.",
    "mcnemar1947": "McNemar, Q. (1947). Note on the sampling error of the difference between "
                   "correlated proportions or percentages. Psychometrika 12:153-157.",
    "agresti2013": "Agresti, A. (2013). Categorical Data Analysis, 3rd ed. Wiley.",
    "bh1995": "Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate: a "
              "practical and powerful approach to multiple testing. J. R. Stat. Soc. B "
              "57:289-300.",
    "brown2002": "Brown, E. N., Barbieri, R., Ventura, V., Kass, R. E. & Frank, L. M. (2002). "
                 "The time-rescaling theorem and its application to neural spike train data "
                 "analysis. Neural Computation 14:325-346.",
    "haslinger2010": "Haslinger, R., Pipa, G. & Brown, E. (2010). Discrete time rescaling "
                     "theorem: determining goodness of fit for discrete time statistical models "
                     "of neural spiking. Neural Computation 22:2477-2506.",
    "rubel2022": "Rübel, O. et al. (2022). The Neurodata Without Borders ecosystem for "
                 "neurophysiological data science. eLife 11:e78362.",
}


def _fmt(x, unit: str = "", missing: str = "not recorded") -> str:
    if x is None:
        return missing
    if isinstance(x, float):
        return f"{x:g}{unit}"
    return f"{x}{unit}"


def methods_paragraph(run: dict, with_references: bool = True) -> str:
    """Plain-text methods paragraph for a manuscript, built from a run's ``run.json``.

    Parameters
    ----------
    run : dict
        Contents of ``run.json``.
    with_references : bool
        Append the reference list.

    Returns
    -------
    str
        Paragraph (and references) ready to paste.
    """
    get = lambda k, d=None: setting(run, k, d)  # noqa: E731
    bin_size = get("bin_size")
    if bin_size is None and isinstance(run.get("session"), dict):
        # the reader's default width is recorded with the session, not in the settings
        bin_size = run["session"].get("bin_size_s")
    folds = get("folds")
    chunks = get("chunks_per_fold")
    alpha = get("alpha", 0.05)
    min_spikes = get("min_spikes")
    variables = get("variables")
    exhaustive = bool(get("exhaustive", False))
    correction = get("correction")
    shuffles = int(get("shuffles", 0) or 0)
    min_shift = get("min_shift_s")
    sizes = get("basis_sizes") or {}
    seed = get("seed")
    ratemap_bin = get("ratemap_bin_m")
    versions = run.get("versions", {}) if isinstance(run.get("versions"), dict) else {}

    if variables:
        var_text = ", ".join(variables)
    else:
        var_text = ("every variable available in each environment (position, heading, speed, "
                    "distance and time since trial start)")
    try:
        from encodex.design.bases import DEFAULT_SIZES
    except ImportError:  # design stage absent: state only what run.json records
        DEFAULT_SIZES = {}
    all_sizes = {**DEFAULT_SIZES, **(sizes if isinstance(sizes, dict) else {})}
    shown = [v for v in (variables or VARIABLES) if v in all_sizes]
    if shown:
        size_text = "; numbers of basis functions: " + ", ".join(
            f"{v} {all_sizes[v]} x {all_sizes[v]}" if v == "position" else f"{v} {all_sizes[v]}"
            for v in shown)
    else:
        size_text = ""
    bin_text = (f"{bin_size * 1000:g} ms" if isinstance(bin_size, (int, float))
                else "the reader's default width" if bin_size is None else str(bin_size))
    chunk_text = (f", each fold made of {chunks} contiguous chunks of the session" if chunks
                  else ", folds made of contiguous chunks of the session")
    parts = [
        f"Spike counts were binned in {bin_text} time bins and each cell was modelled in each "
        f"environment as a Poisson generalised linear model with a log link (McCullagh & "
        f"Nelder 1989). The candidate variables were {var_text}. Each variable entered through "
        f"a penalised B-spline basis (P-splines; Eilers & Marx 1996): cubic B-splines with a "
        f"second-order difference penalty, periodic for heading, a tensor-product basis for "
        f"position{size_text}, each term constrained to sum to zero over the data. Smoothing "
        f"parameters were chosen by maximising the Laplace approximate marginal likelihood "
        f"(Wood 2011) " + (
            "once per cell and model on all bins of the environment; each fold's model was "
            "then one Newton step from that fit with the fold's bins removed (a one-step "
            "estimator, Bickel 1975)." if get("fold_fits") == "one-step" else
            "on the training data of each fold only."),
        f"Models were scored by "
        f"{(str(folds) + '-fold') if folds else 'k-fold (k not recorded)'} "
        f"cross-validation{chunk_text}, so that "
        f"temporally autocorrelated bins are not split between training and test sets; folds "
        f"were fixed by the seed ({_fmt(seed)}) and shared by all models of a cell. The score "
        f"on each held-out fold was the log-likelihood gain over a mean-rate model fitted on "
        f"the training folds, in bits per spike.",
        ("Every subset of the variables was scored (exhaustive search) and chosen by the same "
         "rule as forward selection: " if exhaustive else
         "Variables were selected by forward search (Hardcastle et al. 2017): "
         ) + (
            f"starting from the mean-rate model, the variable that most improved the mean "
            f"held-out score was kept only if the improvement across folds was significant by "
            f"a one-sided Wilcoxon signed-rank test (Wilcoxon 1945) at alpha = {_fmt(alpha)}"
            + (f", Bonferroni-corrected for the number m of candidate variables of the step "
               f"(tested at alpha / m, so that an untuned cell is labelled at a rate of at "
               f"most alpha)" if correction == "bonferroni" else
               " without correction for the number of candidates" if correction == "none"
               else "")
            + "; a cell whose best model did not beat the mean-rate model was labelled "
              "\"none\"."
        ),
        f"Cells with fewer than {_fmt(min_spikes)} spikes in an environment were not classified "
        f"(status \"too few spikes\").",
    ]
    if shuffles:
        parts.append(
            f"As a control, each spike train was circularly shifted against behaviour "
            f"{shuffles} times (shifts of at least {_fmt(min_shift, ' s')}) to obtain an "
            f"empirical null distribution of the cell's gain and an empirical p-value.")
    methods = run.get("methods") if isinstance(run.get("methods"), dict) else {}
    if methods.get("goodness_of_fit"):  # stated by the fit stage (encodex.compare.goodness)
        parts.append(str(methods["goodness_of_fit"]))
    parts.append(
        f"Proportions of cells are reported with 95% Wilson score intervals (Wilson 1927; "
        f"Newcombe 1998). Between environments, presence of each variable in the same cells was "
        f"compared with McNemar's test (McNemar 1947), in its exact binomial form when fewer "
        f"than 25 cells were discordant (Agresti 2013), with Newcombe's interval for paired "
        f"differences (Newcombe 1998b); paired held-out gains with the Wilcoxon signed-rank "
        f"test; unmatched populations with Fisher's exact or chi-square tests; all tests of a "
        f"comparison were corrected by the Benjamini-Hochberg procedure (Benjamini & Hochberg "
        f"1995). Occupancy-normalised rate maps"
        + (f" ({ratemap_bin * 100:g} cm bins)" if isinstance(ratemap_bin, (int, float)) else "")
        + " and Skaggs spatial information in bits per spike (Skaggs et al. 1993) are given "
        "alongside the model. " + label_caveat(float(alpha if alpha is not None else 0.05)))
    ver = versions.get("encodex")
    parts.append(
        f"Analyses used encodex{(' ' + str(ver)) if ver else ''} with recordings in the "
        f"Neurodata Without Borders format (Rübel et al. 2022).")
    text = " ".join(parts)
    if with_references:
        text += "\n\nReferences\n" + "\n".join(f"- {r}" for r in REFERENCES.values())
    return text


def methods_markdown(run: dict) -> str:
    """The methods paragraph as Markdown with a heading and reference list."""
    body = methods_paragraph(run, with_references=False)
    refs = "\n".join(f"- {r}" for r in REFERENCES.values())
    return f"## Methods\n\n{body}\n\n### References\n\n{refs}\n"
