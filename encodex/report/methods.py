"""The methods paragraph, built sentence by sentence from what a run actually did.

Each sentence belongs to one setting (or one group of settings) and is produced by a small
builder registered under that setting's name in :data:`SENTENCES`; a builder reads
``run.json`` (settings, reading options, the session summary, the variables each environment
analysed) and the table options, and returns ``None`` when its setting did not apply to the
run. Features add their own sentence with :func:`register_sentence`, without touching the
others. Only references cited by the sentences of the run are listed.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import PurePath

from encodex.compare.selection import CLIP_MEDIANS, n_sign_vectors, smallest_p
from encodex.report.load import setting
from encodex.report.wording import label_caveat
from encodex.variables import KINDS, canonical_order

__all__ = ["REFERENCES", "Sentence", "MethodsInput", "SENTENCES", "register_sentence",
           "methods_sentences", "methods_paragraph", "methods_markdown"]

#: Citations, keyed by the short form used in the text.
REFERENCES: dict[str, str] = {
    "Rübel et al. 2022": "Rübel, O. et al. (2022). The Neurodata Without Borders ecosystem for "
                         "neurophysiological data science. eLife 11:e78362.",
    "McCullagh & Nelder 1989": "McCullagh, P. & Nelder, J. A. (1989). Generalized Linear "
                               "Models, 2nd ed. Chapman & Hall.",
    "Eilers & Marx 1996": "Eilers, P. H. C. & Marx, B. D. (1996). Flexible smoothing with "
                          "B-splines and penalties. Statistical Science 11:89-121.",
    "Wood 2011": "Wood, S. N. (2011). Fast stable restricted maximum likelihood and marginal "
                 "likelihood estimation of semiparametric generalized linear models. J. R. "
                 "Stat. Soc. B 73:3-36.",
    "Gu 1992": "Gu, C. (1992). Cross-validating non-Gaussian data. J. Comput. Graph. Stat. "
               "1:169-179.",
    "Wood 2004": "Wood, S. N. (2004). Stable and efficient multiple smoothing parameter "
                 "estimation for generalized additive models. J. Am. Stat. Assoc. 99:673-686.",
    "Wood & Fasiolo 2017": "Wood, S. N. & Fasiolo, M. (2017). A generalized Fellner-Schall "
                           "method for smoothing parameter optimization with application to "
                           "Tweedie location, scale and shape models. Biometrics 73:1071-1081.",
    "Wood 2017": "Wood, S. N. (2017). Generalized Additive Models: An Introduction with R, 2nd "
                 "ed. CRC Press.",
    "Marra & Wood 2012": "Marra, G. & Wood, S. N. (2012). Coverage properties of confidence "
                         "intervals for generalized additive model components. Scand. J. "
                         "Stat. 39:53-74.",
    "Friedman 2001": "Friedman, J. H. (2001). Greedy function approximation: a gradient "
                     "boosting machine. Annals of Statistics 29:1189-1232.",
    "Bickel 1975": "Bickel, P. J. (1975). One-step Huber estimates in the linear model. J. Am. "
                   "Stat. Assoc. 70:428-434.",
    "Hardcastle et al. 2017": "Hardcastle, K., Maheswaranathan, N., Ganguli, S. & Giocomo, "
                              "L. M. (2017). A multiplexed, heterogeneous, and adaptive code "
                              "for navigation in medial entorhinal cortex. Neuron 94:375-387.",
    "Wilcoxon 1945": "Wilcoxon, F. (1945). Individual comparisons by ranking methods. "
                     "Biometrics Bulletin 1:80-83.",
    "Hastie & Tibshirani 1990": "Hastie, T. & Tibshirani, R. (1990). Generalized Additive "
                                "Models. Chapman & Hall.",
    "Skaggs et al. 1993": "Skaggs, W. E., McNaughton, B. L., Gothard, K. M. & Markus, E. J. "
                          "(1993). An information-theoretic approach to deciphering the "
                          "hippocampal code. Advances in Neural Information Processing "
                          "Systems 5:1030-1037.",
    "Treves & Panzeri 1995": "Treves, A. & Panzeri, S. (1995). The upward bias in measures of "
                             "information derived from limited data samples. Neural "
                             "Computation 7:399-407.",
    "Brown et al. 2002": "Brown, E. N., Barbieri, R., Ventura, V., Kass, R. E. & Frank, L. M. "
                         "(2002). The time-rescaling theorem and its application to neural "
                         "spike train data analysis. Neural Computation 14:325-346.",
    "Haslinger et al. 2010": "Haslinger, R., Pipa, G. & Brown, E. (2010). Discrete time "
                             "rescaling theorem: determining goodness of fit for discrete time "
                             "statistical models of neural spiking. Neural Computation "
                             "22:2477-2506.",
    "Huber 1964": "Huber, P. J. (1964). Robust estimation of a location parameter. Annals "
                  "of Mathematical Statistics 35, 73-101.",
    "Westfall & Young 1993": "Westfall, P. H. & Young, S. S. (1993). Resampling-Based "
                             "Multiple Testing: Examples and Methods for p-Value Adjustment. "
                             "Wiley.",
    # Cited from memory (title, journal, volume and article number).
    "Phipson & Smyth 2010": "Phipson, B. & Smyth, G. K. (2010). Permutation p-values should "
                            "never be zero: calculating exact p-values when permutations are "
                            "randomly drawn. Statistical Applications in Genetics and "
                            "Molecular Biology 9:39.",
    "Wilson 1927": "Wilson, E. B. (1927). Probable inference, the law of succession, and "
                   "statistical inference. J. Am. Stat. Assoc. 22:209-212.",
    "Newcombe 1998a": "Newcombe, R. G. (1998a). Two-sided confidence intervals for the single "
                      "proportion: comparison of seven methods. Statistics in Medicine "
                      "17:857-872.",
    "Newcombe 1998b": "Newcombe, R. G. (1998b). Interval estimation for the difference between "
                      "independent proportions: comparison of eleven methods. Statistics in "
                      "Medicine 17:873-890.",
    "Newcombe 1998c": "Newcombe, R. G. (1998c). Improved confidence intervals for the "
                      "difference between binomial proportions based on paired data. "
                      "Statistics in Medicine 17:2635-2650.",
    "McNemar 1947": "McNemar, Q. (1947). Note on the sampling error of the difference between "
                    "correlated proportions or percentages. Psychometrika 12:153-157.",
    "Agresti 2013": "Agresti, A. (2013). Categorical Data Analysis, 3rd ed. Wiley.",
    "Benjamini & Hochberg 1995": "Benjamini, Y. & Hochberg, Y. (1995). Controlling the false "
                                 "discovery rate: a practical and powerful approach to "
                                 "multiple testing. J. R. Stat. Soc. B 57:289-300.",
    "Gustafsson 1996": "Gustafsson, F. (1996). Determining the initial states in "
                       "forward-backward filtering. IEEE Transactions on Signal Processing "
                       "44:988-992.",
    "Oppenheim & Schafer 2010": "Oppenheim, A. V. & Schafer, R. W. (2010). Discrete-Time "
                                "Signal Processing, 3rd ed. Pearson.",
}


@dataclass(frozen=True)
class Sentence:
    """One sentence (or two closely tied ones) of the paragraph and the works it cites."""

    text: str
    cites: tuple[str, ...] = ()


@dataclass(frozen=True)
class MethodsInput:
    """What the sentences are built from: ``run.json`` and the options of the tables.

    Attributes
    ----------
    run : dict
        Contents of ``run.json``.
    level : float
        Confidence level of the intervals in the tables (``encodex table --level``).
    """

    run: dict
    level: float = 0.95

    def get(self, key, default=None):
        return setting(self.run, key, default)

    @property
    def summary(self) -> dict:
        s = self.run.get("session", {}) if isinstance(self.run.get("session"), dict) else {}
        return s.get("summary", {}) if isinstance(s.get("summary"), dict) else {}

    @property
    def session_settings(self) -> dict:
        s = self.summary.get("settings", {})
        return s if isinstance(s, dict) else {}

    @property
    def environments(self) -> dict:
        e = self.run.get("environments", {})
        return e if isinstance(e, dict) else {}

    @property
    def analysed(self) -> tuple[str, ...]:
        """Variables analysed in at least one environment (canonical order)."""
        if self.environments:
            return canonical_order({v for e in self.environments.values()
                                    for v in e.get("variables", [])})
        return tuple(self.get("variables") or ())

    @property
    def load_options(self) -> dict:
        lo = self.run.get("load_options", {})
        return lo if isinstance(lo, dict) else {}

    @property
    def kinds(self) -> dict:
        extra = self.summary.get("extra_variables", {}) or {}
        return {v: (extra.get(v, {}) or {}).get("kind", KINDS.get(v, "interval"))
                for v in self.analysed}


Builder = Callable[[MethodsInput], "Sentence | None"]
#: Sentence builders in paragraph order, keyed by the setting they describe.
SENTENCES: dict[str, Builder] = {}


def register_sentence(key: str, builder: Builder | None = None, after: str | None = None):
    """Add (or replace) the sentence of setting ``key``; usable as a decorator.

    Parameters
    ----------
    key : str
        Setting (or group of settings) the sentence states.
    builder : callable, optional
        ``builder(MethodsInput) -> Sentence | None`` (None: the setting did not apply).
    after : str, optional
        Key of the sentence this one follows (default: at the end).
    """
    def add(fn: Builder) -> Builder:
        items = [(k, v) for k, v in SENTENCES.items() if k != key]
        pos = len(items) if after is None else [k for k, _ in items].index(after) + 1
        items.insert(pos, (key, fn))
        SENTENCES.clear()
        SENTENCES.update(items)
        return fn

    return add(builder) if builder is not None else add


def _join(names) -> str:
    names = list(names)
    if len(names) <= 1:
        return "".join(names)
    return ", ".join(names[:-1]) + " and " + names[-1]


def _num(x) -> str:
    return f"{x:g}" if isinstance(x, (int, float)) else str(x)


_NAMES = {"distance": "distance run since the trial began", "time": "time since the trial "
          "began", "position": "position", "heading": "heading", "speed": "running speed",
          "phase": "rhythm phase"}

# ----------------------------------------------------------------------------- the sentences


@register_sentence("input")
def _input(m: MethodsInput):
    src = str(m.run.get("input", ""))
    version = (m.run.get("versions") or {}).get("encodex")
    tool = f"encodex{' ' + str(version) if version else ''}"
    if src.lower().endswith(".nwb"):
        return Sentence(f"Recordings were read from a Neurodata Without Borders (NWB) file "
                        f"(Rübel et al. 2022) and analysed with {tool}.", ("Rübel et al. 2022",))
    if src.lower().endswith(".npz"):
        return Sentence(f"Recordings were read from an array bundle ({PurePath(src).suffix} "
                        f"file of spike times, tracking and epochs) and analysed with {tool}.")
    return Sentence(f"Data were passed to {tool} as a binned session built in Python.")


@register_sentence("bin_size")
def _bins(m: MethodsInput):
    b = m.get("bin_size") or (m.run.get("session") or {}).get("bin_size_s")
    if b is None:
        return None
    return Sentence(f"Spike counts were binned in {b * 1000:g} ms time bins.")


@register_sentence("tracking")
def _tracking(m: MethodsInput):
    s = m.session_settings
    gap = s.get("max_gap_s")
    if gap is None:
        return None
    masked = (m.summary.get("masked_bins") or {}).get("tracking_gap")
    text = (f"Tracked positions were interpolated linearly to the bin centres; tracking gaps "
            f"up to {_num(gap)} s were bridged and bins inside longer gaps were excluded")
    text += f" ({masked} bins)." if isinstance(masked, int) else "."
    return Sentence(text)


@register_sentence("track")
def _track(m: MethodsInput):
    t = m.summary.get("track")
    if not isinstance(t, dict):
        return None
    circular = t.get("shape") == "circular"
    length = t.get("length_m")
    size = f" of {_num(length)} m" if isinstance(length, (int, float)) else ""
    text = (f"Position was the distance along a {'circular' if circular else 'linear'} "
            f"track{size}, in metres, modelled with a "
            + ("periodic cubic P-spline basis with the track length as period"
               if circular else "cubic P-spline basis on its observed range"))
    if t.get("path"):
        text += "; 2-D tracking was projected onto the nearest point of the track's path"
    text += "."
    st = m.session_settings
    if "direction" in m.analysed:
        ds = st.get("direction_speed")
        below = f", with no direction below {_num(ds)} m/s" if ds is not None else ""
        text += (f" Running direction was the sign of the velocity along the track{below}; it "
                 f"entered as a factor-by-curve term s d(x) beside the shared position curve "
                 f"f(x), with the same basis and penalty, was offered only together with or "
                 f"after position, and was kept only if it improved held-out prediction over "
                 f"position alone by the step test.")
    if t.get("trials_from") == "laps":
        text += (f" Laps served as trials ({t.get('n_laps')} laps): traversals between the "
                 f"ends of a linear track, passes of the origin on a circular one, or "
                 f"stretches between resets of a virtual position.")
    source = str(t.get("speed_source", ""))
    if source.startswith("distance run"):
        text += (f" Speed and distance came from the cumulative distance run on the "
                 f"treadmill or ball ({source[len('distance run'):].strip(' ()')}), not from "
                 f"the virtual position.")
    js = st.get("jump_speed")
    if js is not None:
        text += (f" Jumps of the position faster than {_num(js)} m/s (lap resets, teleports; "
                 f"{t.get('n_jumps', 0)} in this recording) never contributed to speed or "
                 f"distance, and the bin of each jump was excluded.")
    return Sentence(text, ("Eilers & Marx 1996",))


@register_sentence("speed")
def _speed(m: MethodsInput):
    sd = m.session_settings.get("speed_smoothing_s")
    if sd is None or not ({"speed", "distance", "heading"} & set(m.analysed)):
        return None
    vs = m.session_settings.get("velocity_smoothing_s")
    if vs is None or not sd:
        # one stage: runs before two-stage speed, a track, or no smoothing of the norm
        vsd = sd if vs is None else vs
        text = (f"Running speed was the norm of the velocity (central differences of "
                f"position) smoothed with a Gaussian kernel of {_num(vsd)} s standard "
                f"deviation")
    else:
        first = (f"the velocity (central differences of position) smoothed with a Gaussian "
                 f"kernel of {_num(vs)} s standard deviation" if vs
                 else "the velocity (central differences of position)")
        text = (f"Running speed was the norm of {first}; that norm was then smoothed with a "
                f"Gaussian kernel of {_num(sd)} s standard deviation (two stages, so that "
                f"turns, most of them at the walls, do not read as slowing down)")
    ms = m.session_settings.get("min_speed")
    if ms is not None:
        text += f"; bins slower than {_num(ms)} m/s were excluded"
    return Sentence(text + ".")


@register_sentence("heading")
def _heading(m: MethodsInput):
    if "heading" not in m.analysed:
        return None
    src = m.summary.get("heading_source")
    thr = m.session_settings.get("heading_speed_threshold")
    if src == "compass":
        return Sentence("Heading was the head direction recorded in the file, interpolated on "
                        "the circle.")
    if src == "movement direction":
        return Sentence(f"No head direction was recorded, so heading was the direction of the "
                        f"smoothed velocity; bins slower than {_num(thr)} m/s, where it is "
                        f"undefined, were excluded.")
    return Sentence("The source of heading is not recorded in run.json.")


@register_sentence("trials")
def _trials(m: MethodsInput):
    used = {"distance", "time"} & set(m.analysed)
    if not used:
        return None
    return Sentence("Distance was the path length integrated from speed since the start of the "
                    "bin's trial and time the seconds since that start; bins outside trials, "
                    "and bins of a trial after a masked tracking gap (where the path run is "
                    "unknown), were excluded.")


@register_sentence("lfp")
def _lfp(m: MethodsInput):
    if not m.load_options.get("lfp") and "phase" not in m.analysed:
        return None
    ph = m.summary.get("phase", {}) or {}
    band = ph.get("band_hz") or m.load_options.get("phase_band") or m.session_settings.get(
        "phase_band")
    order = ph.get("order")
    band_t = f"{_num(band[0])}-{_num(band[1])} Hz" if band else "a band not recorded"
    return Sentence(
        f"Rhythm phase was obtained from the local field potential ({m.load_options.get('lfp', 'LFP')}, "
        f"channel {m.load_options.get('lfp_channel', 0)}): the trace was band-pass filtered "
        f"({band_t}, Butterworth order {order if order else 'not recorded'}, applied forwards "
        f"and backwards for zero phase; Gustafsson 1996) and the phase taken as the angle of "
        f"the analytic signal from the Hilbert transform (Oppenheim & Schafer 2010; 0 at the "
        f"peak, pi at the trough), interpolated along the circle to each bin centre; the edges "
        f"of each recorded stretch, where the filter is unreliable, were excluded.", ("Gustafsson 1996", "Oppenheim & Schafer 2010"))


@register_sentence("user_variables")
def _user(m: MethodsInput):
    extra = m.summary.get("extra_variables") or {}
    paths = m.load_options.get("extra") or {}
    names = [v for v in canonical_order(extra) if v in m.analysed] if extra else []
    if not names:
        return None
    parts = []
    for v in names:
        where = f" (from {paths[v]})" if isinstance(paths, dict) and v in paths else ""
        parts.append(f"{v}{where}, {extra[v].get('kind', 'interval')}")
    return Sentence(f"User-defined variables were resampled onto the bin centres (on the "
                    f"circle when circular), bins where they were unknown being excluded: "
                    f"{'; '.join(parts)}.")


@register_sentence("variables")
def _variables(m: MethodsInput):
    envs = m.environments
    if not envs:
        vs = m.analysed
        return Sentence(f"The candidate variables were {_join(_NAMES.get(v, v) for v in vs)}."
                        if vs else "The candidate variables are not recorded in run.json.")
    groups: dict[tuple, list[str]] = {}
    for name, e in envs.items():
        groups.setdefault(tuple(e.get("variables", [])), []).append(name)
    texts = []
    for vs, names in groups.items():
        where = (f"in {_join(names)}" if len(envs) > 1 else "")
        what = _join(_NAMES.get(v, v) for v in vs) if vs else "none (environment not analysed)"
        texts.append(f"{what}{(' ' + where) if where else ''}")
    text = "The candidate variables were " + "; ".join(texts) + "."
    missing = {}
    for name, e in envs.items():
        for v, why in (e.get("unavailable") or {}).items():
            missing.setdefault((v, str(why)), []).append(name)
    if missing:
        text += " Not analysed: " + "; ".join(
            f"{v} in {_join(n)} ({why})" for (v, why), n in missing.items()) + "."
    return Sentence(text)


@register_sentence("model")
def _model(m: MethodsInput):
    return Sentence("Each cell was modelled separately in each environment as a Poisson "
                    "generalised linear model with a log link and the bin width as exposure "
                    "(McCullagh & Nelder 1989), each candidate variable entering as a smooth "
                    "additive term.", ("McCullagh & Nelder 1989",))


@register_sentence("basis_sizes")
def _bases(m: MethodsInput):
    try:
        from encodex.design.bases import DEFAULT_SIZES
    except ImportError:  # pragma: no cover - design stage always present in a package
        DEFAULT_SIZES = {}
    sizes = {**DEFAULT_SIZES, **(m.get("basis_sizes") or {})}
    kinds = dict(m.kinds)
    track = m.summary.get("track")
    if isinstance(track, dict):  # position along a track: a 1-D term
        kinds["position"] = "circular" if track.get("shape") == "circular" else "interval"
    parts = []
    for v in m.analysed:
        n = sizes.get(v, sizes.get("position") if v == "direction" else None)
        k = kinds.get(v, "interval")
        if v == "direction":
            parts.append(f"direction: a difference curve over track position with the "
                         f"position term's basis ({n} functions), multiplied by the running "
                         f"direction (+1 or -1) and not centred")
        elif k == "planar":
            parts.append(f"{v}: tensor product of two cubic B-spline bases ({n} x {n} "
                         f"functions, one penalty per axis)")
        elif k == "circular":
            parts.append(f"{v}: periodic cubic B-splines ({n} functions)")
        else:
            parts.append(f"{v}: cubic B-splines ({n} functions)")
    if not parts:
        return None
    extent = (" (for position, the tracked extent on each axis)"
              if "position" in m.analysed and not isinstance(track, dict) else "")
    try:
        from encodex.design.bases import QUANTILE_KNOT_VARIABLES
    except ImportError:  # pragma: no cover - design stage always present in a package
        QUANTILE_KNOT_VARIABLES = ()
    # Runs written before the knots setting existed had evenly spaced knots throughout.
    clocks = [v for v in m.analysed if v in QUANTILE_KNOT_VARIABLES
              and kinds.get(v, "interval") == "interval"]
    if m.get("knots", "even") == "quantile" and clocks:
        which = " and ".join(clocks)
        placement = (f"; the interior knots of {which} (since trial start, restarting at every "
                     "trial) sat at equally spaced quantiles of the observed values, blended "
                     "one part in ten with even spacing, so that they are densest early in "
                     "trials where most bins lie; all other knots were evenly spaced")
    else:
        placement = "; knots were evenly spaced"
    return Sentence(
        "Terms were penalised regression splines (P-splines; Eilers & Marx 1996) with a "
        "second-order difference penalty: " + "; ".join(parts) + ". The knots of each term "
        f"spanned the range of the variable observed in the environment's usable bins{extent}"
        f"{placement}, and each term was constrained to sum to zero over those bins (Wood "
        "2017, sec. 5.4).", ("Eilers & Marx 1996", "Wood 2017"))


@register_sentence("drift")
def _drift(m: MethodsInput):
    if not m.get("drift", False):
        return None
    return Sentence(
        "To keep slow changes of the firing rate over the session from being read as tuning "
        "to behaviour that also changed over the session, every model, the baseline "
        "included, held a smooth term of time on the environment's own clock (cubic "
        "P-spline with one basis function per 5 minutes of environment plus three, 4 to 12, "
        "second-order difference penalty, smoothness selected with the other terms); "
        "held-out scores, gains and p-values are therefore relative to the drift-only "
        "model.", ("Eilers & Marx 1996",))


@register_sentence("fold_fits")
def _smoothness(m: MethodsInput):
    text = ("Smoothing parameters were chosen by maximising the Laplace-approximate "
            "restricted marginal likelihood (a REML-type criterion, unpenalised effects "
            "integrated out; Wood 2011): a performance iteration (each round's working model's "
            "criterion maximised by Newton steps; Gu 1992; Wood 2004) gave the start and "
            "Newton steps on the log smoothing parameters, with the "
            "exact gradient including the dependence of the Poisson weights on them (Wood "
            "2011), reached the optimum")
    cites = ("Wood 2011", "Gu 1992", "Wood 2004")
    ff = m.get("fold_fits")
    if ff == "one-step":
        text += (", once per cell and model on all bins of the environment; each fold's model "
                 "was then one Newton step from that fit with the fold's bins removed (a "
                 "one-step estimator; Bickel 1975), so held-out bins influenced the smoothing "
                 "parameters and the starting point of their fold's model.")
        cites += ("Bickel 1975",)
    elif ff == "refit":
        text += " separately for each fold and model on the training bins only."
    else:
        text += "."
    return Sentence(text, cites)


@register_sentence("gram_precision")
def _gram_precision(m: MethodsInput):
    if m.get("gram_precision") != "single":
        return None
    return Sentence(
        "The Hessian pieces of the Newton iterations were accumulated from single-precision "
        "blocks summed in double precision; gradients and likelihoods were computed in double "
        "precision, so the fits at given smoothing reach the optima of the exact objective "
        "(the selected smoothing parameters move with the rounding by about 1e-5 on the log "
        "scale).", ())


@register_sentence("responses")
def _responses(m: MethodsInput):
    return Sentence(
        "Response curves were plotted in Hz as partial-dependence rates (Friedman 2001): the "
        "chosen model's rate with a term at a given value, averaged over the other terms as "
        "they occurred in the environment, with pointwise 95% Bayesian credible bands from the "
        "posterior covariance of the coefficients (Marra & Wood 2012), which leave out the "
        "uncertainty of the baseline rate.", ("Friedman 2001", "Marra & Wood 2012"))


@register_sentence("folds")
def _folds(m: MethodsInput):
    k, c, seed = m.get("folds"), m.get("chunks_per_fold"), m.get("seed")
    if not k:
        return Sentence("The number of cross-validation folds is not recorded in run.json.")
    chunks = (f"{c} contiguous chunks of time per fold ({k * c} chunks dealt to folds at "
              f"random from seed {seed})" if c else "contiguous chunks of time")
    boundary = (f"bins on either side of the {k * c - 1} chunk boundaries fall in different "
                f"folds, so temporal autocorrelation links training and test bins there" if c
                else "bins on either side of a chunk boundary fall in different folds, so "
                     "temporal autocorrelation links training and test bins there")
    return Sentence(f"Models were scored by {k}-fold cross-validation with {chunks}; all "
                    f"models of a cell shared the folds. Chunks keep most held-out bins away "
                    f"from training bins, but {boundary}.")


@register_sentence("score")
def _score(m: MethodsInput):
    base = ("the drift-only model (the slow-drift term alone) fitted on the training folds"
            if m.get("drift", False) else "a mean-rate model fitted on the training folds")
    return Sentence(
        "The score of a model on a held-out fold was its log-likelihood minus that of "
        f"{base}, in bits per held-out spike. The "
        "information of the chosen model (cells.csv bits_per_spike) pools all held-out bins "
        "(summed gain over summed spikes), whereas the contribution of a variable "
        "(gain_<variable>) is the fold-averaged difference in score between the chosen model "
        "and the model without it (or, for a variable not chosen, with it added), the "
        "average the selection test works on; the two aggregations weight folds "
        "differently and need not agree.")


@register_sentence("alpha")
def _selection(m: MethodsInput):
    alpha = m.get("alpha", 0.05)
    k = m.get("folds")
    corr = m.get("correction", "bonferroni")
    exhaustive = bool(m.get("exhaustive", False))
    head = ("Every subset of the candidate variables was scored, and the label was chosen by "
            "the forward rule" if exhaustive else
            "Variables were selected by forward search (Hardcastle et al. 2017)")
    start = "drift-only" if m.get("drift", False) else "mean-rate"
    text = (f"{head}: starting from the {start} model, the candidate that most improved the "
            f"mean held-out score was added only if its improvement over the current model "
            f"across folds was significant ")
    cites = ("Hardcastle et al. 2017",)
    if corr in ("signflip", "signflip-t"):
        what = ("pooled improvement in bits per spike (each fold's improvement clipped at "
                f"{CLIP_MEDIANS:g} times the candidate's median absolute improvement, a "
                "Huber-type bound that sign flips leave unchanged so that the test stays "
                "exact, Huber 1964, then weighted by the spikes held out in the fold)"
                if corr == "signflip" else
                "studentised mean fold-wise improvement")
        exact = bool(k) and n_sign_vectors(int(k)) == 2 ** int(k)
        how = ("enumerated by flipping" if exact or not k else
               f"estimated from the observed and {n_sign_vectors(int(k)) - 1:,} random sign "
               f"vectors (fixed seed; the observed one counted, Phipson & Smyth 2010), "
               f"flipping")
        text += (f"by an exact sign-flip randomisation test at alpha = {_num(alpha)}: the "
                 f"statistic was, among the step's candidates, the largest {what}, and its "
                 f"null distribution was {how} the signs of the folds' differences for all "
                 f"candidates together, so that the p-value is adjusted for the number of "
                 f"candidates while keeping their correlation (max-statistic; Westfall & "
                 f"Young 1993)")
        cites += ("Westfall & Young 1993",) + (("Huber 1964",) if corr == "signflip" else ())
        cites += (() if exact or not k else ("Phipson & Smyth 2010",))
    elif corr == "bonferroni":
        text += (f"by a one-sided Wilcoxon signed-rank test (Wilcoxon 1945) at level alpha / m "
                 f"with alpha = {_num(alpha)} and m the number of candidates of the step "
                 f"(Bonferroni)")
        cites += ("Wilcoxon 1945",)
    else:
        text += (f"by a one-sided Wilcoxon signed-rank test (Wilcoxon 1945) at level alpha = "
                 f"{_num(alpha)} without correction for the number of candidates")
        cites += ("Wilcoxon 1945",)
    low = m.run.get("methods", {}).get("smallest_p") if isinstance(m.run.get("methods"),
                                                                    dict) else None
    if low is None and k:
        low = smallest_p(corr, int(k))
    floor = m.get("min_step_gain", 0.0) or 0.0
    if floor:
        text += (f". Every step after the first was also required to raise the mean held-out "
                 f"score by at least {_num(100 * floor)}% of the current model's, so that a "
                 f"variable correlated with the carried ones is not added for the small "
                 f"remainder left when their tuning is not fitted exactly, which long "
                 f"recordings make significant")
    text += (". A cell whose first step failed was labelled \"none\"; with "
             f"{k} folds the smallest attainable p-value is {low:.3g}."
             if k else ". A cell whose first step failed was labelled \"none\".")
    return Sentence(text, cites)


@register_sentence("min_spikes")
def _min_spikes(m: MethodsInput):
    n = m.get("min_spikes")
    if n is None:
        return None
    return Sentence(f"Cells with fewer than {n} spikes in an environment were not labelled "
                    f"there (status \"too few spikes\"); they are counted separately from "
                    f"cells labelled \"none\" and from environments without analysable "
                    f"variables.")


@register_sentence("shuffles")
def _shuffles(m: MethodsInput):
    n = int(m.get("shuffles", 0) or 0)
    if not n:
        return None
    return Sentence(f"As a control, each spike train was circularly shifted against behaviour "
                    f"{n} times (shifts of at least {_num(m.get('min_shift_s'))} s) and the "
                    f"tested model refitted and scored on each, giving an empirical p-value "
                    f"(1 + shifts scoring at least the observed) / (1 + {n}).")


@register_sentence("concurvity")
def _concurvity(m: MethodsInput):
    if len(m.analysed) < 2:
        return None
    try:
        from encodex.compare.concurvity import DEFAULT_MEASURE, DEFAULT_THRESHOLD
    except ImportError:  # pragma: no cover
        return None
    how = ("the mean squared canonical correlation between the chosen term's basis space "
           "and the other's over the environment's bins"
           if DEFAULT_MEASURE in ("mean", "average") else
           "the largest squared canonical correlation between the chosen term's basis space "
           "and the other's")
    return Sentence(
        f"A chosen variable was flagged as not separable from another candidate, or from a "
        f"combination of two others (ambiguous_with, e.g. distance against "
        f"position+direction), when their concurvity (Hastie & Tibshirani 1990; Wood 2017), "
        f"computed from the design alone as {how}, reached {_num(DEFAULT_THRESHOLD)}; the "
        f"flag does not depend on the spikes.", ("Hastie & Tibshirani 1990", "Wood 2017"))


@register_sentence("goodness_of_fit")
def _goodness(m: MethodsInput):
    methods = m.run.get("methods") if isinstance(m.run.get("methods"), dict) else {}
    text = methods.get("goodness_of_fit")
    if not text:  # a folder written before the fit stage stated its checks
        return None
    return Sentence(str(text), ("Brown et al. 2002", "Haslinger et al. 2010"))


@register_sentence("ratemap_bin_m")
def _ratemaps(m: MethodsInput):
    if "position" not in m.analysed:
        return None
    from encodex.classic import MIN_OCCUPANCY_S

    b = m.get("ratemap_bin_m")
    size = f"{b * 100:g} cm" if isinstance(b, (int, float)) else "square"
    return Sentence(
        f"Beside the model, occupancy-normalised rate maps (spikes / time per {size} spatial "
        f"bin, unsmoothed, bins visited for less than {_num(MIN_OCCUPANCY_S)} s left out) and "
        f"Skaggs spatial information in bits per spike (Skaggs et al. 1993) are reported; the "
        f"value shown is bias-corrected by subtracting the first-order bias (B - 1) / (2 N "
        f"ln 2) of B used bins and N spikes (Treves & Panzeri 1995), and the plug-in value "
        f"is given beside it.", ("Skaggs et al. 1993", "Treves & Panzeri 1995"))


@register_sentence("level")
def _tables(m: MethodsInput):
    pct = f"{m.level * 100:g}%"
    return Sentence(f"Proportions of cells are given among the labelled cells of each "
                    f"environment with {pct} Wilson score intervals (Wilson 1927; Newcombe "
                    f"1998a).", ("Wilson 1927", "Newcombe 1998a"))


@register_sentence("environments")
def _compare(m: MethodsInput):
    envs = (m.run.get("session") or {}).get("environments") or list(m.environments)
    if len(envs) < 2:
        return None
    return Sentence(
        "Between environments, the presence of each variable in the same cells was compared "
        "with McNemar's test (McNemar 1947), in its exact binomial form when fewer than 25 "
        "cells were discordant (Agresti 2013), with Newcombe's interval for a paired "
        "difference (Newcombe 1998c), and paired held-out information with the Wilcoxon "
        "signed-rank test; unmatched populations were compared with Fisher's exact or "
        "chi-square tests, Newcombe's interval for independent proportions (Newcombe 1998b) "
        "and the Mann-Whitney U test; all tests of one comparison were corrected together by "
        "the Benjamini-Hochberg procedure (Benjamini & Hochberg 1995).",
        ("McNemar 1947", "Agresti 2013", "Newcombe 1998c", "Newcombe 1998b",
         "Benjamini & Hochberg 1995"))


@register_sentence("caveat")
def _caveat(m: MethodsInput):
    return Sentence(label_caveat(float(m.get("alpha", 0.05) or 0.05)))


# ----------------------------------------------------------------------------- assembly

def methods_sentences(run: dict, level: float = 0.95) -> list[tuple[str, Sentence]]:
    """The sentences of a run, each with the key of the setting it states."""
    m = MethodsInput(run, level)
    out = []
    for key, build in SENTENCES.items():
        s = build(m)
        if s is not None:
            out.append((key, s))
    return out


def _cited(sentences) -> list[str]:
    seen = []
    for _, s in sentences:
        for c in s.cites:
            if c not in seen:
                seen.append(c)
    # single authors before their joint papers: "Wood 2017" before "Wood & Fasiolo 2017"
    return sorted(seen, key=lambda c: c.replace("&", "~"))


def methods_paragraph(run: dict, with_references: bool = True, level: float = 0.95) -> str:
    """Plain-text methods paragraph for a manuscript, built from a run's ``run.json``.

    Parameters
    ----------
    run : dict
        Contents of ``run.json``.
    with_references : bool
        Append the list of the works cited.
    level : float
        Confidence level of the intervals of the tables (``encodex table --level``).

    Returns
    -------
    str
        Paragraph (and references) ready to paste.
    """
    sentences = methods_sentences(run, level)
    text = " ".join(s.text for _, s in sentences)
    if with_references:
        text += "\n\nReferences\n" + "\n".join(f"- {REFERENCES[c]}" for c in _cited(sentences))
    return text


def methods_references(run: dict, level: float = 0.95) -> list[str]:
    """Full references of the works the run's paragraph cites, alphabetical."""
    return [REFERENCES[c] for c in _cited(methods_sentences(run, level))]


def methods_markdown(run: dict, level: float = 0.95) -> str:
    """The methods paragraph as Markdown with a heading and reference list."""
    body = methods_paragraph(run, with_references=False, level=level)
    refs = "\n".join(f"- {r}" for r in methods_references(run, level))
    return f"## Methods\n\n{body}\n\n### References\n\n{refs}\n"
