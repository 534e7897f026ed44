"""The ``encodex`` command line (also ``python -m encodex``).

``encodex fit INPUT --out DIR`` decides which behavioural variables each unit carries and
writes the output folder described in DEVELOPERS.md. The report stage adds its own
subcommands through :func:`encodex.report.commands.register_report_commands`.

Any :class:`~encodex.errors.EncodexError` (bad input file, bad option, checkpoint mismatch)
is printed as one line on standard error and exits with code 2. Ctrl-C exits with code 130
after saying how to resume.
"""

from __future__ import annotations

import argparse
import sys

from encodex.errors import EncodexError, SettingsError
from encodex.variables import VARIABLES


class _Parser(argparse.ArgumentParser):
    """Argument parser whose errors are one line and exit code 2."""

    def error(self, message):  # noqa: D401 - argparse API
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _whole_number(minimum: int):
    """argparse type: a whole number of at least ``minimum``."""
    def parse(text: str) -> int:
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if v < minimum:
            raise argparse.ArgumentTypeError(f"expected a number >= {minimum}, got {v}")
        return v
    return parse


def _positive_number(what: str):
    """argparse type: a positive number of ``what`` (e.g. "seconds")."""
    def parse(text: str) -> float:
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {what} as a number, got {text!r}") from None
        if not v > 0:
            raise argparse.ArgumentTypeError(f"expected a positive number of {what}, got {v}")
        return v
    return parse


_positive_int = _whole_number(1)
_count = _whole_number(0)
_seconds = _positive_number("seconds")
_hertz = _positive_number("Hz")


def _load_options(args) -> dict:
    """Reading options of ``encodex fit`` for rhythm phase and user-defined variables."""
    from encodex.io import parse_extra_option

    opts: dict = {}
    if args.drop_empty_units:
        opts["drop_empty_units"] = True
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
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (created)")
    p.add_argument("--jobs", type=_positive_int, default=1, metavar="N",
                   help="worker processes (default 1); results do not depend on it")
    p.add_argument("--folds", type=_positive_int, default=10, metavar="K",
                   help="cross-validation folds of contiguous chunks of time (default 10)")
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
                   help="level of the one-sided Wilcoxon test of each variable (default 0.05)")
    p.add_argument("--correction", choices=("bonferroni", "none"), default="bonferroni",
                   help="test the best of m candidates of a step at alpha/m (bonferroni, "
                        "default: untuned cells labelled at most at rate alpha) or at alpha")
    p.add_argument("--fold-fits", choices=("one-step", "refit"), default="one-step",
                   help="one-step (default): one fit per model to all bins, smoothness by "
                        "LAML, then one Newton step per fold without its bins; refit: each "
                        "fold's models fitted to its training bins with their own smoothness "
                        "selection (strict: held-out bins never touch the smoothing; about 4x "
                        "slower)")
    p.add_argument("--gram-precision", choices=("single", "double"), default="single",
                   help="arithmetic of the Hessian pieces X'WX: single (default; float32 "
                        "chunks summed in float64: X'WX 1.5x faster, same optima) or double")
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
    p.add_argument("--cluster", default=None, metavar="ADDRESS",
                   help="run on a dask.distributed scheduler (tcp://host:8786), or 'local' "
                        "for a LocalCluster of --jobs workers")
    p.add_argument("--no-progress", action="store_true", help="hide the progress bar")
    p.set_defaults(func=_run_fit)


def _run_fit(args) -> int:
    from encodex.population import run_population

    settings = dict(folds=args.folds, seed=args.seed, exhaustive=args.exhaustive,
                    shuffles=args.shuffles, min_shift_s=args.min_shift, alpha=args.alpha,
                    correction=args.correction, fold_fits=args.fold_fits,
                    min_spikes=args.min_spikes, gram_precision=args.gram_precision)
    if args.bin_size is not None:
        settings["bin_size"] = args.bin_size
    if args.variables is not None:
        settings["variables"] = args.variables
    result = run_population(args.input, args.out, jobs=args.jobs, cluster=args.cluster,
                            progress=not args.no_progress, load_options=_load_options(args),
                            **settings)
    cells = result.cells
    ok = cells[cells["status"] == "ok"]
    counts = ok["variables"].value_counts()
    print(f"{len(cells)} cells ({len(ok)} labelled) written to {result.out}")
    for lab, n in counts.items():
        print(f"  {lab:<28s} {n}")
    other = cells[cells["status"] != "ok"]["status"].value_counts()
    for status, n in other.items():
        print(f"  [{status}] {n}")
    dropped = (result.run.get("session", {}).get("summary", {}).get("objects", {})
               .get("dropped_empty_units"))
    if dropped:
        print(f"  units without any spike, left out (--drop-empty-units): {dropped}")
    return 0


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
        print(f"encodex: error: {' '.join(str(exc).split())}", file=sys.stderr)
        return 2


__all__ = ["build_parser", "main", "add_fit_command", "SettingsError"]
