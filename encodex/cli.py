"""The ``encodex`` command line (also ``python -m encodex``).

``encodex fit INPUT --out DIR`` decides which behavioural variables each unit carries and
writes the output folder described in DEVELOPERS.md. The report stage adds its own
subcommands through :func:`encodex.report.commands.register_report_commands`.

Any :class:`~encodex.errors.EncodexError` (bad input file, bad option, checkpoint mismatch)
is printed as one line on standard error starting ``encodex: error: `` and exits with code 2,
as argparse errors do. Ctrl-C exits with code 130 after saying how to resume; a closed pipe
on standard output (``encodex table R | head``) exits 141 without a word. Standard output
carries the run's account (session summary, counts, next commands); standard error the
progress bar, warnings and errors.
"""

from __future__ import annotations

import argparse
import sys

from encodex.defaults import (CORRECTIONS, DEFAULT_CHUNKS_PER_FOLD, DEFAULT_FOLDS, KNOT_PLACEMENTS,
                              MIN_STEP_GAIN)
from encodex.errors import EncodexError, SettingsError
from encodex.report.options import (add_jobs_option, name_equals_count, non_negative_number,
                                    positive_number, resolve_jobs, whole_number)
from encodex.variables import VARIABLES


#: Start of every error line of the command line (bad option, bad input, refused folder).
ERROR_PREFIX = "encodex: error: "


class _Parser(argparse.ArgumentParser):
    """Argument parser whose errors are one line and exit code 2."""

    def error(self, message):  # noqa: D401 - argparse API
        self.exit(2, f"{ERROR_PREFIX}{message} (see {self.prog} --help)\n")


_positive_int = whole_number(1)
_count = whole_number(0)
_seconds = positive_number("seconds")
_hertz = positive_number("Hz")


def _load_options(args) -> dict:
    """Reading options of ``encodex fit`` for rhythm phase and user-defined variables."""
    from encodex.io import parse_extra_option

    opts: dict = {}
    if args.drop_empty_units:
        opts["drop_empty_units"] = True
    for name, option in (("min_speed", "min_speed"), ("speed_smoothing_s", "speed_smoothing"),
                         ("velocity_smoothing_s", "velocity_smoothing"), ("max_gap_s", "max_gap")):
        if getattr(args, option) is not None:
            opts[name] = getattr(args, option)
    paths = {role: getattr(args, f"nwb_{role}") for role in _NWB_OBJECTS
             if getattr(args, f"nwb_{role}") is not None}
    if paths:
        if not str(args.input).lower().endswith(".nwb"):
            raise SettingsError(f"--nwb-{next(iter(paths))} names an object inside an NWB "
                                "file; the input is not an .nwb file, drop the option")
        opts["object_paths"] = paths
    if args.lfp is not None:
        opts["lfp"] = args.lfp
        opts["lfp_channel"] = args.lfp_channel
    if args.band is not None:
        if args.lfp is None:
            raise SettingsError("--band sets the rhythm's pass band and needs --lfp OBJECT_PATH")
        low, high = args.band
        if not low < high:
            raise SettingsError(f"--band LOW HIGH needs LOW < HIGH (got {low:g} {high:g})")
        opts["phase_band"] = (low, high)
    if args.variable:
        extra, kinds = {}, {}
        for text in args.variable:
            name, path, kind = parse_extra_option(text)
            if name in extra:
                raise SettingsError(f"--variable {name} is given twice; use one per name")
            extra[name] = path
            if kind is not None:
                kinds[name] = kind
        opts["extra"] = extra
        if kinds:
            opts["extra_kinds"] = kinds
    opts.update(_track_options(args))
    return opts


def _track_options(args) -> dict:
    """Reading options of a track session (JSON-ready: recorded in run.json)."""
    opts: dict = {}
    if args.track is not None:
        opts["track"] = args.track
    if args.track_length is not None:
        opts["track_length_m"] = args.track_length
    if args.track_path is not None:
        try:
            pts = [[float(v) for v in p.split(",")] for p in args.track_path]
        except ValueError:
            pts = [[]]
        if len(pts) < 2 or any(len(p) != 2 for p in pts):
            raise SettingsError("--track-path needs two or more X,Y points in metres, e.g. "
                                "--track-path 0,0 1.5,0")
        opts["track_path"] = pts
    if args.run_distance is not None:
        opts["run_distance"] = args.run_distance
    if args.direction_speed is not None:
        opts["direction_speed"] = args.direction_speed
    if args.laps:
        opts["lap_trials"] = True
    return opts


def _variables(text: str) -> tuple[str, ...]:
    names = tuple(s.strip() for s in text.split(",") if s.strip())
    # phase and user-defined variables are checked against the session when the run starts
    bad = [n for n in names if not n.isidentifier()]
    if not names or bad:
        raise argparse.ArgumentTypeError(
            f"unknown variable(s) {', '.join(bad) or '(none given)'}; use a comma-separated "
            f"list such as {','.join(VARIABLES)}"
        )
    return names


def add_fit_command(subparsers) -> None:
    """Register ``encodex fit``."""
    p = subparsers.add_parser(
        "fit",
        help="decide which variables each unit carries (cross-validated model comparison)",
        description=(
            "Fit penalised Poisson GLMs to every unit of a recording and decide, by "
            "cross-validated nested model comparison, which behavioural variables each unit "
            "carries in each environment. Writes cells.csv, models.csv, run.json and "
            "units/<environment>/<unit>.npz in --out. Running the same command again resumes."
        ),
    )
    p.add_argument("input", metavar="INPUT", help="NWB file (.nwb) or npz bundle (.npz)")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="results folder (created; the RESULTS of table, compare, report)")
    add_jobs_option(p)
    p.add_argument("--folds", type=_positive_int, default=DEFAULT_FOLDS, metavar="K",
                   help=f"cross-validation folds of contiguous chunks of time (default "
                        f"{DEFAULT_FOLDS})")
    p.add_argument("--seed", type=_count, default=0, metavar="S",
                   help="seed of folds and shuffles (default 0)")
    p.add_argument("--bin-size", type=_seconds, default=None, metavar="SECONDS",
                   help="time bin in seconds (default: 0.02)")
    p.add_argument("--variables", type=_variables, default=None, metavar="LIST",
                   help=f"comma-separated subset of {','.join(VARIABLES)} (default: all "
                        "available)")
    p.add_argument("--exhaustive", action="store_true",
                   help="score every subset of the variables (same decision rule)")
    p.add_argument("--shuffles", type=_count, default=0, metavar="N",
                   help="circular shifts of each spike train for an empirical p-value "
                        "(default 0: off)")
    p.add_argument("--min-shift", type=_seconds, default=20.0, metavar="SECONDS",
                   help="smallest circular shift in seconds (default 20)")
    p.add_argument("--alpha", type=float, default=0.05, metavar="A",
                   help="level of the test of each added variable (default 0.05)")
    p.add_argument("--correction", choices=CORRECTIONS,
                   default=CORRECTIONS[0],
                   help="step test: signflip (default; exact sign-flip test of the largest "
                        "pooled improvement among the candidates: fold-wise gains clipped at "
                        "3x their median, weighted by held-out spikes; at alpha), "
                        "signflip-t (the same with studentised means), bonferroni (Wilcoxon at "
                        "alpha/m for m candidates) or none (Wilcoxon at alpha)")
    p.add_argument("--fold-fits", choices=("one-step", "refit"), default="one-step",
                   help="one-step (default): one fit per model to all bins, smoothness by "
                        "LAML, then one Newton step per fold without its bins; refit: each "
                        "fold's models fitted to its training bins with their own smoothness "
                        "selection (strict: held-out bins never touch the smoothing; about 4x "
                        "slower)")
    p.add_argument("--gram-precision", choices=("single", "double"), default="single",
                   help="arithmetic of the Hessian pieces X'WX: single (default; float32 "
                        "chunks summed in float64, about 1.5x faster X'WX, gradients and "
                        "likelihoods in float64) or double (float64 throughout; scores agree "
                        "with single to about 1e-5 bits per spike)")
    p.add_argument("--no-drift", dest="drift", action="store_false",
                   help="leave out the slow-drift term (a smooth of time on the environment's "
                        "clock in every model, on by default); the baseline is then the "
                        "mean-rate model")
    p.add_argument("--min-step-gain", type=float, default=MIN_STEP_GAIN, metavar="F",
                   help="a variable added after the first must raise the held-out information "
                        f"by at least this fraction of the current model's (default "
                        f"{MIN_STEP_GAIN:g}; 0: off)")
    p.add_argument("--min-spikes", type=_positive_int, default=100, metavar="N",
                   help="cells with fewer spikes in an environment are not labelled "
                        "(default 100)")
    p.add_argument("--drop-empty-units", action="store_true",
                   help="leave out units without any spike (listed in run.json and on screen) "
                        "instead of stopping with an error")
    p.add_argument("--lfp", default=None, metavar="OBJECT_PATH",
                   help="LFP ElectricalSeries in the NWB file (e.g. processing/ecephys/LFP/lfp);"
                        " its band-passed Hilbert phase becomes the variable 'phase'")
    p.add_argument("--lfp-channel", type=_count, default=0, metavar="N",
                   help="channel (column) of the --lfp series (default 0)")
    p.add_argument("--band", type=_hertz, nargs=2, default=None, metavar=("LOW", "HIGH"),
                   help="pass band of the rhythm in Hz (default 6 10, theta)")
    p.add_argument("--variable", action="append", default=[], metavar="NAME=OBJECT_PATH[:KIND]",
                   help="user-defined variable from a TimeSeries in the NWB file, KIND interval "
                        "or circular (radians); repeatable")
    p.add_argument("--track", choices=("linear", "circular"), default=None,
                   help="the position is along a track (a one-column position series is read "
                        "as a linear track unless its reference frame or this says circular)")
    p.add_argument("--track-length", type=positive_number("metres"), default=None,
                   metavar="METRES", help="length of the track (a circular track's period)")
    p.add_argument("--track-path", nargs="+", default=None, metavar="X,Y",
                   help="project 2-D tracking onto this polyline of the track (metres)")
    p.add_argument("--run-distance", default=None, metavar="OBJECT_PATH",
                   help="cumulative distance run on the ball or treadmill (metres) in a "
                        "virtual environment (default: processing/behavior/run_distance "
                        "when the file has it)")
    p.add_argument("--direction-speed", type=positive_number("m/s"), default=None,
                   metavar="M_PER_S", help="track speed below which the running direction "
                   "is none (default 0.05)")
    p.add_argument("--laps", action="store_true",
                   help="on a track, laps are the trials even when the file has trials")
    p.add_argument("--cluster", default=None, metavar="ADDRESS",
                   help="run on a dask.distributed scheduler (tcp://host:8786), or 'local' "
                        "for a LocalCluster of --jobs workers")
    p.add_argument("--no-progress", action="store_true", help="hide the progress bar")
    _add_folder_options(p)
    _add_tracking_options(p)
    _add_nwb_object_options(p)
    _add_model_size_options(p)
    p.set_defaults(func=_run_fit)


def _add_folder_options(p) -> None:
    """What to do with earlier results in --out."""
    p.add_argument("--overwrite", action="store_true",
                   help="delete the results already in --out (a folder written by encodex "
                        "fit) and start over, instead of resuming or refusing")


def _add_tracking_options(p) -> None:
    """How the tracking becomes covariates (encodex.session.build_session)."""
    from encodex.session import (DEFAULT_MAX_GAP_S, DEFAULT_SPEED_SMOOTHING_S,
                                 DEFAULT_VELOCITY_SMOOTHING_S)

    g = p.add_argument_group("tracking")
    g.add_argument("--min-speed", type=non_negative_number("m/s"), default=None,
                   metavar="M_PER_S",
                   help="leave out bins slower than this running speed in m/s (default: keep "
                        "all)")
    g.add_argument("--speed-smoothing", type=non_negative_number("seconds"), default=None,
                   metavar="SECONDS",
                   help="s.d. of the Gaussian smoothing of speed (on a track: of velocity) in "
                        f"seconds (default {DEFAULT_SPEED_SMOOTHING_S:g}; 0: none)")
    g.add_argument("--velocity-smoothing", type=non_negative_number("seconds"), default=None,
                   metavar="SECONDS",
                   help="open field: s.d. of the Gaussian smoothing of velocity before its norm "
                        f"is taken, in seconds (default {DEFAULT_VELOCITY_SMOOTHING_S:g}; 0: "
                        "none)")
    g.add_argument("--max-gap", type=non_negative_number("seconds"), default=None,
                   metavar="SECONDS",
                   help="longest tracking gap bridged by interpolation in seconds; bins in "
                        f"longer gaps are left out (default {DEFAULT_MAX_GAP_S:g})")


#: NWB roles that can be named on the command line, with an example path.
_NWB_OBJECTS = {
    "position": "processing/behavior/Position/position",
    "heading": "processing/behavior/CompassDirection/heading",
    "units": "units",
    "trials": "intervals/trials",
    "epochs": "intervals/epochs",
}


def _add_nwb_object_options(p) -> None:
    """Paths of objects inside an NWB file, when the default search picks the wrong one."""
    g = p.add_argument_group("objects of the NWB file (default: found by the conventions of "
                             "docs/data_conventions.md)")
    for role, example in _NWB_OBJECTS.items():
        g.add_argument(f"--nwb-{role}", default=None, metavar="OBJECT_PATH",
                       help=f"{role} object, e.g. {example}")


def _add_model_size_options(p) -> None:
    from encodex.design.bases import DEFAULT_SIZES

    g = p.add_argument_group("model size and folds")
    g.add_argument("--basis-size", type=name_equals_count, action="append", default=[],
                   metavar="VARIABLE=N",
                   help="basis functions of a variable (position: per axis), e.g. speed=8; "
                        "repeatable (defaults: " + ", ".join(
                            f"{k} {v}" for k, v in DEFAULT_SIZES.items()) + ")")
    g.add_argument("--knots", choices=KNOT_PLACEMENTS, default=KNOT_PLACEMENTS[0],
                   help="knot placement: quantile (default; the knots of distance and time "
                        "since trial start sit at quantiles of their values, dense early in "
                        "trials where most bins lie) or even (evenly spaced for every variable)")
    g.add_argument("--chunks-per-fold", type=_positive_int, default=DEFAULT_CHUNKS_PER_FOLD,
                   metavar="N", help=f"contiguous chunks of time per fold (default "
                                     f"{DEFAULT_CHUNKS_PER_FOLD})")


def _run_fit(args) -> int:
    from encodex.population import run_population
    from encodex.population.summary import closing_summary

    settings = dict(folds=args.folds, seed=args.seed, exhaustive=args.exhaustive,
                    shuffles=args.shuffles, min_shift_s=args.min_shift, alpha=args.alpha,
                    correction=args.correction, fold_fits=args.fold_fits,
                    min_spikes=args.min_spikes, gram_precision=args.gram_precision,
                    min_step_gain=args.min_step_gain,
                    drift=args.drift)
    if args.bin_size is not None:
        settings["bin_size"] = args.bin_size
    if args.variables is not None:
        settings["variables"] = args.variables
    settings["chunks_per_fold"] = args.chunks_per_fold
    settings["knots"] = args.knots
    if args.basis_size:
        sizes = dict(args.basis_size)
        if len(sizes) != len(args.basis_size):
            raise SettingsError("--basis-size names a variable twice; give each once")
        settings["basis_sizes"] = sizes
    load_options = _load_options(args)
    jobs = resolve_jobs(args.jobs)
    # Progress on standard error; the session summary and the counts on standard output.
    if sys.stderr.isatty():  # a long NWB read would otherwise be silent
        print(f"encodex fit: reading {args.input}", file=sys.stderr, flush=True)
    result = run_population(args.input, args.out, jobs=jobs, cluster=args.cluster,
                            progress=not args.no_progress, load_options=load_options,
                            overwrite=args.overwrite, echo=_say, **settings)
    _say(closing_summary(result.cells, result.out, result.run["session"]["environments"]))
    dropped = (result.run.get("session", {}).get("summary", {}).get("objects", {})
               .get("dropped_empty_units"))
    if dropped:
        _say(f"units without any spike, left out (--drop-empty-units): {dropped}")
    return 0


def _say(text: str) -> None:
    """A line of the run's account, on standard output (flushed: it may be a log file)."""
    print(text, flush=True)


def build_parser() -> argparse.ArgumentParser:
    """The full ``encodex`` parser (fit plus the report stage's commands)."""
    parser = _Parser(prog="encodex",
                     description="Which behavioural variables does each neuron carry?")
    from encodex import __version__

    parser.add_argument("--version", action="version", version=f"encodex {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    add_fit_command(sub)
    from encodex.report.commands import register_report_commands

    register_report_commands(sub)
    __import__("encodex.planning").planning.register_planning_command(sub)
    return parser


def main(argv=None) -> int:
    """Entry point; returns the exit code (0 ok, 2 bad input or option, 130 interrupted)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt as exc:
        # encodex.population.RunInterrupted carries how to resume; a bare Ctrl-C does not.
        print(f"encodex: {getattr(exc, 'message', 'interrupted')}", file=sys.stderr)
        return 130
    except EncodexError as exc:
        print(f"{ERROR_PREFIX}{' '.join(str(exc).split())}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        # The reader of standard output has gone (`encodex table R | head`): what was
        # wanted was read, every file is written. Say nothing more and exit as a program
        # stopped by SIGPIPE does in a shell (128 + 13).
        _silence_stdout()
        return 141


def _silence_stdout() -> None:
    """Point standard output at /dev/null so that Python's final flush cannot fail again."""
    import os

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):  # no real file behind stdout (tests)
        pass


__all__ = ["build_parser", "main", "add_fit_command", "SettingsError"]
