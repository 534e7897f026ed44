"""encodex: which behavioural variables does each recorded neuron carry?

Penalised Poisson GLMs with spline bases, fitted to each unit's spike counts, and
cross-validated nested model comparison to decide which of position, heading, speed,
travelled distance and elapsed time each cell carries.

The public API is re-exported here lazily (importing :mod:`encodex` stays cheap):

- :func:`run_population` - the whole analysis of a recording in one call;
- :class:`SpikeGLM` - scikit-learn-compatible single-cell model;
- :func:`select_variables`, :func:`analyse_cell` - the model comparison of one cell;
- :func:`load_session`, :func:`build_session`, :class:`Session` - sessions;
- :func:`simulate_recording`, :func:`simulate_track_recording` - ground-truth simulators
  (open arena; linear and circular tracks and virtual corridors);
- :class:`TrackLayout` - a linear or circular track (and its path in the room);
- :func:`build_design`, :func:`default_bases`, :func:`fit_poisson` - the engine;
- :func:`goodness_of_fit` - time-rescaling, dispersion and history checks of held-out
  predictions; :func:`compare_recordings` - two fit folders, cells matched by a table.
"""

from importlib import import_module

__version__ = "0.1.0"

_EXPORTS = {
    "run_population": "encodex.population",
    "PopulationResult": "encodex.population",
    "RunSettings": "encodex.population",
    "RunInterrupted": "encodex.population",
    "SpikeGLM": "encodex.compare.estimator",
    "select_variables": "encodex.compare",
    "analyse_cell": "encodex.compare",
    "chunked_folds": "encodex.compare",
    "load_session": "encodex.session",
    "build_session": "encodex.session",
    "Session": "encodex.session",
    "simulate_recording": "encodex.simulate",
    "simulate_track_recording": "encodex.simulate_track",
    "TrackLayout": "encodex.io.track",
    "build_design": "encodex.design",
    "default_bases": "encodex.design",
    "fit_poisson": "encodex.fit",
    "PoissonFit": "encodex.fit",
    "goodness_of_fit": "encodex.compare.goodness",
    "compare_recordings": "encodex.report.recordings",
    "label": "encodex.variables",
    "VARIABLES": "encodex.variables",
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name):
    if name in _EXPORTS:
        value = getattr(import_module(_EXPORTS[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'encodex' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_EXPORTS))
