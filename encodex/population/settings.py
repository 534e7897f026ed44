"""Settings of a population run, their validation and their fingerprint.

Every setting that can change a result is in :class:`RunSettings` and in its hash; the
options that only change how the work is executed (number of jobs, cluster address, progress
bar) are not, so a run may be resumed with a different ``--jobs``.
"""

from __future__ import annotations

import hashlib
import json
import math
import numbers
from dataclasses import asdict, dataclass, fields

from encodex.defaults import (CORRECTIONS, DEFAULT_CHUNKS_PER_FOLD, DEFAULT_FOLDS, KNOT_PLACEMENTS,
                              MIN_STEP_GAIN)
from encodex.errors import SettingsError
from encodex.variables import VARIABLES, canonical_order


@dataclass(frozen=True)
class RunSettings:
    """Everything that determines the results of a run.

    Attributes
    ----------
    variables : tuple of str or None
        Variables to consider (canonical order); None: every variable available in each
        environment (the five built-ins, plus ``phase`` and user-defined variables when the
        session has them).
    folds : int
        Number of cross-validation folds (default 20; why:
        :data:`encodex.defaults.DEFAULT_FOLDS`).
    chunks_per_fold : int
        Contiguous chunks of time per fold (default 3; see :mod:`encodex.compare.folds`).
    seed : int
        Seed of every random stream (folds, shuffles); streams are derived from
        (seed, environment[, unit]) so results do not depend on the order of the work.
    alpha : float
        Level of the test of each added variable (false-label rate of untuned cells).
    exhaustive : bool
        Score every subset of the variables (same decision rule as forward selection).
    correction : str
        Step test of forward selection (:mod:`encodex.compare.selection`): "signflip"
        (default), an exact sign-flip max-statistic test of the pooled improvements of
        the step's candidates (clipped fold-wise gains weighted by held-out spikes) at
        alpha; "signflip-t": the same with studentised means;
        "bonferroni": one-sided Wilcoxon test of the best of m candidates at alpha / m;
        "none": Wilcoxon at alpha.
    shuffles : int
        Number of circular shifts of each spike train for the empirical null (0: off).
    min_shift_s : float
        Smallest circular shift in seconds.
    min_spikes : int
        Cells with fewer spikes in an environment get status "too few spikes".
    bin_size : float or None
        Time bin in seconds used to build the session from a file (None: the reader's
        default); ignored when a ready session is given.
    basis_sizes : tuple of (str, int) pairs
        Number of basis functions per variable (planar: per axis), overriding the defaults.
    knots : str
        "quantile" (default): the interior knots of distance and time since trial start sit
        at quantiles of their values in the environment
        (:data:`encodex.design.bases.QUANTILE_KNOT_VARIABLES`); "even": evenly spaced knots
        for every variable (the only placement before this setting existed).
    ratemap_bin_m : float
        Side of the spatial bins of the occupancy map saved per unit, in metres.
    fold_fits : str
        "one-step" (default): each model is fitted once to all bins (smoothness by LAML) and
        every fold takes one Newton step from it on the objective of its training bins;
        the held-out bins reach a fold's model only through that starting point (a
        second-order effect) and through the smoothing parameters.
        ``reference_checks/test_one_step_folds.py`` bounds the difference from exact refits.
        "refit": each fold's models are fitted to its training bins with their own
        smoothness selection (strict, about four times slower). See
        :func:`encodex.compare.cell.cross_validate`.
    gram_precision : str
        "single" (default): the Hessian pieces X'WX are formed from float32 chunks summed in
        float64 (1.5x faster X'WX, half its memory; 1.3x less CPU per cell with the same
        labels, benchmarks/bench_drift_cost.py, benchmarks/RESULTS.md); gradients,
        objectives and scores stay float64, so every fit at given smoothing converges to the
        same optimum.
        ``reference_checks/test_single_precision_gram.py`` bounds the effect on
        coefficients, scores and labels (scores agree to about 1e-5 bits per spike, not exactly:
        the smoothing parameters move with the Hessian's rounding). "double": float64
        throughout (the engine API's default, :func:`encodex.design.build_design`).
    drift : bool
        True (default): every model, the baseline included, holds a smooth of time on the
        environment's clock (:mod:`encodex.design.drift`), so the baseline is the drift-only
        model and gains and bits per spike are relative to it; False: the baseline is the
        mean-rate model.
    min_step_gain : float
        Effect-size floor of forward steps after the first: the added variable must raise
        the held-out information by at least this fraction of the current model's (default
        0.01; 0 switches it off; :mod:`encodex.compare.selection`).
    """

    variables: tuple[str, ...] | None = None
    folds: int = DEFAULT_FOLDS
    chunks_per_fold: int = DEFAULT_CHUNKS_PER_FOLD
    seed: int = 0
    alpha: float = 0.05
    exhaustive: bool = False
    correction: str = "signflip"
    shuffles: int = 0
    min_shift_s: float = 20.0
    min_spikes: int = 100
    bin_size: float | None = None
    basis_sizes: tuple[tuple[str, int], ...] = ()
    knots: str = "quantile"
    ratemap_bin_m: float = 0.05
    fold_fits: str = "one-step"
    gram_precision: str = "single"
    drift: bool = True
    min_step_gain: float = MIN_STEP_GAIN

    def __post_init__(self):
        if self.variables is not None:
            vs = tuple(self.variables)
            if not vs:
                raise SettingsError("no variables given; name at least one, e.g. --variables position")
            # Built-ins, phase or user-defined variables of the session: names are checked
            # against the session when the run starts.
            bad = [v for v in vs if not (isinstance(v, str) and v.isidentifier())]
            if bad:
                raise SettingsError(
                    f"unknown variable(s) {bad}; choose from {', '.join(VARIABLES)} or a "
                    "variable of the session"
                )
            if len(set(vs)) != len(vs):
                raise SettingsError(f"variable listed twice in {list(vs)}; list each once")
            object.__setattr__(self, "variables", canonical_order(vs))
        _int_at_least("folds", self.folds, 2, f"--folds {DEFAULT_FOLDS}")
        _int_at_least("chunks_per_fold", self.chunks_per_fold, 1, "3")
        _int_at_least("seed", self.seed, 0, "--seed 0")
        _int_at_least("shuffles", self.shuffles, 0, "--shuffles 0 (off) or e.g. 200")
        _int_at_least("min_spikes", self.min_spikes, 1, "100")
        if not (isinstance(self.alpha, (int, float)) and 0 < self.alpha < 1):
            raise SettingsError(f"alpha must be between 0 and 1 (got {self.alpha}); use 0.05")
        if not (isinstance(self.min_step_gain, (int, float)) and 0 <= self.min_step_gain < 1):
            raise SettingsError(f"min_step_gain must be in [0, 1) (got {self.min_step_gain}); "
                                f"use --min-step-gain {MIN_STEP_GAIN} (0 switches it off)")
        if self.correction not in CORRECTIONS:
            raise SettingsError(f"correction must be one of {', '.join(CORRECTIONS)} (got "
                                f"{self.correction!r}); use --correction signflip")
        if self.fold_fits not in ("refit", "one-step"):
            raise SettingsError(f"fold_fits must be 'refit' or 'one-step' (got "
                                f"{self.fold_fits!r}); use --fold-fits refit")
        if self.knots not in KNOT_PLACEMENTS:
            raise SettingsError(f"knots must be one of {', '.join(KNOT_PLACEMENTS)} (got "
                                f"{self.knots!r}); use --knots {KNOT_PLACEMENTS[0]}")
        if self.gram_precision not in ("single", "double"):
            raise SettingsError(f"gram_precision must be 'single' or 'double' (got "
                                f"{self.gram_precision!r}); use --gram-precision single")
        if not isinstance(self.drift, bool):
            raise SettingsError(f"drift must be True or False (got {self.drift!r})")
        if not (math.isfinite(self.min_shift_s) and self.min_shift_s >= 0):
            raise SettingsError(f"min_shift_s must be >= 0 seconds (got {self.min_shift_s})")
        if self.bin_size is not None and not (
            math.isfinite(self.bin_size) and 0 < self.bin_size <= 1.0
        ):
            raise SettingsError(
                f"bin size must be in (0, 1] seconds (got {self.bin_size}); use --bin-size 0.02"
            )
        if not (math.isfinite(self.ratemap_bin_m) and self.ratemap_bin_m > 0):
            raise SettingsError(f"ratemap_bin_m must be > 0 metres (got {self.ratemap_bin_m})")
        sizes = tuple(sorted((str(k), int(v)) for k, v in dict(self.basis_sizes).items()))
        for k, v in sizes:
            if v < 4:
                raise SettingsError(f"basis size of '{k}' must be at least 4 (got {v})")
        object.__setattr__(self, "basis_sizes", sizes)
        for name in ("folds", "chunks_per_fold", "seed", "shuffles", "min_spikes"):
            object.__setattr__(self, name, int(getattr(self, name)))
        object.__setattr__(self, "alpha", float(self.alpha))
        object.__setattr__(self, "min_shift_s", float(self.min_shift_s))

    def to_dict(self) -> dict:
        """Plain JSON-ready dictionary of the settings."""
        d = asdict(self)
        d["variables"] = list(self.variables) if self.variables is not None else None
        d["basis_sizes"] = {k: v for k, v in self.basis_sizes}
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "RunSettings":
        """Inverse of :meth:`to_dict`; unknown keys raise :class:`SettingsError`."""
        names = {f.name for f in fields(cls)}
        unknown = set(d) - names
        if unknown:
            raise SettingsError(f"unknown setting(s) {sorted(unknown)}; known: {sorted(names)}")
        d = dict(d)
        if d.get("variables") is not None:
            d["variables"] = tuple(d["variables"])
        if "basis_sizes" in d:
            d["basis_sizes"] = tuple(dict(d["basis_sizes"]).items())
        return cls(**d)

    def fingerprint(self) -> str:
        """SHA-256 of the canonical JSON of the settings (first 16 hex digits)."""
        return stable_hash(self.to_dict())


def stable_hash(obj) -> str:
    """Hash of a JSON-serialisable object, independent of key order and process."""
    text = json.dumps(obj, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _int_at_least(name, value, lo, fix):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < lo:
        raise SettingsError(f"{name} must be an integer >= {lo} (got {value!r}); use {fix}")
