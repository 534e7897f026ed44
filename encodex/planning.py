"""Planning how long to record: detection probability of each variable against recording length.

Before an experiment a lab asks how many minutes make a cell of a given tuning strength
likely to be labelled; after it, a reviewer asks whether "none" means untuned. Both are
answered by simulation on the user's own behaviour: cells tuned to one variable at a stated
strength (:func:`encodex.simulate.binned_counts`, the tuning shapes of the built-in
simulator with their log gain multiplied by ``strength``), firing at the rates of the user's
units (or stated rates), are placed on the first ``m`` minutes of the recorded trajectory and
labelled exactly as a run with the given settings labels a unit
(:func:`encodex.population.work.analyse_unit`). The share of cells whose label includes the
variable estimates the detection probability, with a Wilson 95% interval (Wilson 1927,
J. Am. Stat. Assoc. 22:209) for the Monte-Carlo error.

Limits (stated in the output): the tuning shapes are the simulator's (a Gaussian place field,
a von Mises heading curve, a log-linear speed ramp, Gaussian bumps in distance and time since
trial start), cells are Poisson given their rate, and lengths longer than the recording
repeat its trajectory from the start (flagged ``repeated``).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from encodex.defaults import CORRECTIONS
from encodex.errors import InputError, SettingsError

#: Detection probability for which the minutes are reported.
TARGET = 0.8


@dataclass(frozen=True)
class PlanSpec:
    """What to simulate.

    Attributes
    ----------
    environment : str
        Environment whose trajectory is used.
    variables : tuple of str
        Variables to test, one tuned cell type per variable.
    minutes : tuple of float
        Recording lengths, minutes.
    strength : float
        Tuning strength (1: the built-in simulator's cells; 0.5: half their log gain).
    rates_hz : tuple of float
        Mean rates of the simulated cells, used in turn.
    n_cells : int
        Simulated cells per variable and length.
    seed : int
        Seed of the simulated spikes and tuning parameters.
    """

    environment: str
    variables: tuple[str, ...]
    minutes: tuple[float, ...]
    strength: float
    rates_hz: tuple[float, ...]
    n_cells: int
    seed: int = 0

    def __post_init__(self):
        if not self.variables:
            raise SettingsError("no variable to plan for; name at least one")
        if not self.minutes or min(self.minutes) <= 0:
            raise SettingsError(f"minutes must be positive (got {list(self.minutes)}); "
                                "e.g. --minutes 5,10,20,30")
        if not self.strength > 0:
            raise SettingsError(f"strength must be > 0 (got {self.strength}); e.g. 0.5")
        if not self.rates_hz or min(self.rates_hz) <= 0:
            raise SettingsError(f"rates must be > 0 Hz (got {list(self.rates_hz)})")
        if self.n_cells < 1:
            raise SettingsError(f"cells must be at least 1 (got {self.n_cells})")


def unit_rates(session, environment: str, min_rate_hz: float = 0.05) -> tuple[float, ...]:
    """Mean rates (Hz) of the session's units in an environment (usable bins), above a floor."""
    k = session.environments.index(environment)
    rows = np.flatnonzero(np.asarray(session.valid) & (np.asarray(session.environment) == k))
    if rows.size == 0 or session.n_units == 0:
        return ()
    duration = rows.size * session.bin_size
    totals = np.asarray(session.counts[rows, :].sum(axis=0)).ravel() / duration
    return tuple(float(r) for r in np.sort(totals) if r >= min_rate_hz)


def _trajectory(session, environment: str, variables, n_rows: int):
    """Covariates and clock of the first ``n_rows`` usable bins (repeated if too few)."""
    k = session.environments.index(environment)
    env = np.asarray(session.environment)
    rows = np.flatnonzero(np.asarray(session.valid) & (env == k))
    if rows.size < 2:
        raise InputError(f"environment '{environment}' has no usable bins to simulate on")
    time = np.asarray(session.time, dtype=float)
    clock = time[rows] - time[np.flatnonzero(env == k)[0]]
    repeated = n_rows > rows.size
    take = np.arange(n_rows) % rows.size
    span = clock[-1] + session.bin_size
    # A repeated trajectory continues on the clock: lap j is shifted by j recording lengths.
    clock = clock[take] + (np.arange(n_rows) // rows.size) * span
    names = set(variables) | ({"position"} & set(session.covariates))
    cov = {v: np.ascontiguousarray(np.asarray(session.covariates[v])[rows][take])
           for v in names}
    return cov, clock, repeated


def _length_work(session, spec: PlanSpec, settings, minutes: float):
    """The environment work of one recording length, as a run would build it."""
    from encodex.compare.folds import chunked_folds
    from encodex.population.settings import stable_hash
    from encodex.population.work import PURPOSE_FOLDS, EnvironmentWork, stream

    n_rows = int(round(minutes * 60.0 / session.bin_size))
    cov, clock, repeated = _trajectory(session, spec.environment, spec.variables, n_rows)
    if n_rows < 10 * settings.folds * settings.chunks_per_fold:
        raise SettingsError(f"{minutes:g} minutes give only {n_rows} bins, too few for "
                            f"{settings.folds} folds; plan for longer recordings")
    fold = chunked_folds(n_rows, settings.folds, settings.chunks_per_fold,
                         stream(settings.seed, spec.environment, None, PURPOSE_FOLDS)).fold
    kinds = tuple(sorted((v, k) for v, k in (getattr(session, "kinds", {}) or {}).items()
                         if v in spec.variables))
    token = stable_hash(["plan", spec.environment, minutes, settings.to_dict(),
                         int(session.n_bins)])
    work = EnvironmentWork(spec.environment, token, cov, tuple(spec.variables),
                           float(session.bin_size), fold, settings.folds, settings.basis_sizes,
                           kinds, None, None, "", gram_precision=settings.gram_precision,
                           clock=clock if settings.drift else None, knots=settings.knots)
    return work, clock, repeated


def _simulate_one(work, clock, spec: PlanSpec, settings, variable: str, i: int) -> str:
    from threadpoolctl import threadpool_limits

    from encodex.population.work import analyse_unit
    from encodex.simulate import binned_counts

    minutes_key = int(round(len(clock) * work.bin_size))
    rng = np.random.default_rng(np.random.SeedSequence(
        entropy=spec.seed, spawn_key=(minutes_key, spec.variables.index(variable), i)))
    rate = spec.rates_hz[i % len(spec.rates_hz)]
    with threadpool_limits(limits=1):
        y = binned_counts(work.covariates, clock, work.bin_size, (variable,), rng,
                          strength=spec.strength, mean_rate_hz=rate)
    out = analyse_unit(work, f"sim_{variable}_{i}", y, settings)
    cell = out.record["cell"]
    return cell["variables"] if cell["status"] == "ok" else ""


def detection_table(session, spec: PlanSpec, settings=None, jobs: int = 1) -> pd.DataFrame:
    """Detection probability per variable and recording length, by simulation.

    Parameters
    ----------
    session : encodex.session.Session
        The user's session (its trajectory and bin size are used; its spikes only through
        ``spec.rates_hz``).
    spec : PlanSpec
        Variables, lengths (minutes), strength, rates and number of simulated cells.
    settings : RunSettings, optional
        Settings of the run to plan for (default: the defaults).
    jobs : int
        Worker processes.

    Returns
    -------
    DataFrame
        One row per variable and length: ``variable, minutes, n_cells, detected,
        probability, ci_low, ci_high`` (Wilson 95%), ``exact`` (share labelled with the
        variable alone), ``not_labelled`` (cells under the run's spike minimum), and
        ``repeated`` (the length exceeds the recording: trajectory repeated).
    """
    from joblib import Parallel, delayed

    from encodex.population.settings import RunSettings
    from encodex.report.tables import wilson_interval

    settings = settings or RunSettings()
    if spec.environment not in session.environments:
        raise InputError(f"no environment '{spec.environment}'; this session has "
                         f"{', '.join(session.environments)}")
    missing = [v for v in spec.variables
               if v not in session.available_variables(spec.environment)]
    if missing:
        raise InputError(f"variable(s) {missing} are not available in '{spec.environment}'; "
                         f"choose from {', '.join(session.available_variables(spec.environment))}")
    rows = []
    for minutes in spec.minutes:
        work, clock, repeated = _length_work(session, spec, settings, minutes)
        tasks = [(v, i) for v in spec.variables for i in range(spec.n_cells)]
        labels = Parallel(n_jobs=jobs)(delayed(_simulate_one)(work, clock, spec, settings, v, i)
                                       for v, i in tasks)
        for v in spec.variables:
            got = [lab for (w, _), lab in zip(tasks, labels) if w == v]
            hits = sum(v in lab.split("+") for lab in got)
            lo, hi = wilson_interval(hits, len(got))
            rows.append({"variable": v, "minutes": float(minutes), "n_cells": len(got),
                         "detected": hits, "probability": hits / len(got),
                         "ci_low": lo, "ci_high": hi,
                         "exact": sum(lab == v for lab in got) / len(got),
                         "not_labelled": sum(lab == "" for lab in got),
                         "repeated": bool(repeated)})
    return pd.DataFrame(rows)


def minutes_for(table: pd.DataFrame, target: float = TARGET, column: str = "probability"
                ) -> dict[str, float]:
    """Minutes at which each variable's detection first reaches ``target``.

    Linear interpolation between the two simulated lengths that bracket the target; NaN when
    no simulated length reaches it. Use ``column="ci_low"`` for the length at which the lower
    95% bound reaches it (a conservative answer).
    """
    out = {}
    for v, t in table.groupby("variable", sort=False):
        t = t.sort_values("minutes")
        m, p = t["minutes"].to_numpy(), t[column].to_numpy()
        above = np.flatnonzero(p >= target)
        if above.size == 0:
            out[v] = float("nan")
        elif above[0] == 0:
            out[v] = float(m[0])
        else:
            j = above[0]
            out[v] = float(m[j - 1] + (target - p[j - 1]) * (m[j] - m[j - 1]) / (p[j] - p[j - 1]))
    return out


def plot_detection(table: pd.DataFrame, path, title: str = "") -> None:
    """Detection probability against minutes per variable, with 95% bands and the 80% line."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    for j, (v, t) in enumerate(table.groupby("variable", sort=False)):
        t = t.sort_values("minutes")
        col = f"C{j}"
        ax.plot(t["minutes"], t["probability"], "-", color=col)
        own = ~t["repeated"].to_numpy(dtype=bool)
        ax.plot(t["minutes"][own], t["probability"][own], "o", color=col, label=v)
        # Lengths beyond the recording (trajectory repeated): open markers.
        ax.plot(t["minutes"][~own], t["probability"][~own], "o", mfc="white", color=col)
        ax.fill_between(t["minutes"], t["ci_low"], t["ci_high"], color=col, alpha=0.15)
    ax.axhline(TARGET, color="k", lw=0.8, ls="--")
    ax.set_xlabel("recording length in the environment (min)")
    ax.set_ylabel("probability the variable is in the label")
    ax.set_ylim(0, 1.02)
    ax.legend(fontsize=8, loc="lower right")
    if table["repeated"].any():
        title += "\nopen markers: longer than the recording (its trajectory repeated)"
    ax.set_title(title, fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


# --- command line ---------------------------------------------------------------------------
def register_planning_command(subparsers) -> None:
    """Register ``encodex plan``."""
    from encodex.cli import _count, _positive_int, _variables

    p = subparsers.add_parser(
        "plan",
        help="how many minutes make a cell of a given tuning strength likely to be labelled",
        description=(
            "Simulate cells tuned to each variable on the recording's own trajectory, at the "
            "firing rates of its units (or --rates), label them as 'encodex fit' would, and "
            "report the detection probability per variable against recording length with "
            "95% intervals, the minutes giving 80%, and a plot."),
    )
    p.add_argument("input", metavar="INPUT", help="NWB file (.nwb) or npz bundle (.npz)")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (created)")
    p.add_argument("--environment", default=None, metavar="NAME",
                   help="environment whose trajectory is used (default: the first)")
    p.add_argument("--variables", type=_variables, default=None, metavar="LIST",
                   help="variables to plan for (default: all available)")
    p.add_argument("--minutes", type=_numbers, default=(5.0, 10.0, 20.0, 30.0), metavar="LIST",
                   help="recording lengths in minutes (default 5,10,20,30)")
    p.add_argument("--strength", type=float, default=0.5, metavar="X",
                   help="tuning strength, 1 = the built-in simulator's cells (default 0.5)")
    p.add_argument("--rates", type=_numbers, default=None, metavar="LIST",
                   help="mean rates of the simulated cells in Hz (default: the units' own)")
    p.add_argument("--cells", type=_positive_int, default=20, metavar="N",
                   help="simulated cells per variable and length (default 20)")
    p.add_argument("--seed", type=_count, default=0, metavar="S")
    p.add_argument("--no-drift", dest="drift", action="store_false",
                   help="plan for runs without the slow-drift term")
    p.add_argument("--correction", choices=CORRECTIONS,
                   default=CORRECTIONS[0], help="step test of the runs planned for")
    p.add_argument("--jobs", type=_positive_int, default=1, metavar="N")
    p.set_defaults(func=_run_plan)


def _numbers(text: str) -> tuple[float, ...]:
    import argparse

    try:
        vals = tuple(float(s) for s in text.split(",") if s.strip())
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated numbers, got {text!r}"
                                         ) from None
    if not vals or min(vals) <= 0:
        raise argparse.ArgumentTypeError(f"expected positive numbers, got {text!r}")
    return vals


def _run_plan(args) -> int:
    import json
    from pathlib import Path

    from encodex.population.settings import RunSettings
    from encodex.session import load_session

    session = load_session(args.input)
    env = args.environment or session.environments[0]
    if env not in session.environments:
        raise InputError(f"no environment '{env}'; this session has "
                         f"{', '.join(session.environments)}")
    rates = args.rates or unit_rates(session, env)
    if not rates:
        raise InputError(f"no unit fires in '{env}'; state the rates with --rates 0.5,2")
    variables = args.variables or session.available_variables(env)
    spec = PlanSpec(env, tuple(variables), tuple(sorted(args.minutes)), args.strength,
                    tuple(rates), args.cells, args.seed)
    settings = RunSettings(drift=args.drift, correction=args.correction, seed=args.seed)
    table = detection_table(session, spec, settings, jobs=args.jobs)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    table.to_csv(out / "detection.csv", index=False, float_format="%.4g")
    m80 = minutes_for(table)
    m80_low = minutes_for(table, column="ci_low")
    (out / "detection.json").write_text(json.dumps({
        "spec": {**spec.__dict__, "variables": list(spec.variables),
                 "minutes": list(spec.minutes), "rates_hz": list(spec.rates_hz)},
        "settings": settings.to_dict(), "minutes_for_80pct": m80,
        "minutes_for_80pct_lower_bound": m80_low, "limits": __doc__.split("Limits")[1].strip(),
    }, indent=2, default=float))
    plot_detection(table, out / "detection.png",
                   f"{env}: cells at {args.strength:g}x tuning, {len(rates)} rate(s) "
                   f"{min(rates):.2g}-{max(rates):.2g} Hz, {args.cells} per point")
    print(f"detection probability by simulation ({args.cells} cells per point, Wilson 95%):")
    for _, r in table.iterrows():
        flag = " (trajectory repeated)" if r["repeated"] else ""
        print(f"  {r['variable']:<10s} {r['minutes']:>5g} min  {r['probability']:.2f} "
              f"[{r['ci_low']:.2f}, {r['ci_high']:.2f}]{flag}")
    for v in spec.variables:
        txt = "not reached" if np.isnan(m80[v]) else f"{m80[v]:.0f} min"
        print(f"  80% detection of {v}: {txt}")
    print(f"written to {out}/ (detection.csv, detection.json, detection.png)")
    return 0
