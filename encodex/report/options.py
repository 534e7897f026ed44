"""Pieces of the command line shared by several subcommands.

Value types for argparse (each refuses a bad value with a message naming the expected unit),
and the options that mean the same thing in every command: ``--jobs N`` (worker processes,
all cores by default) and ``--out DIR``. Subcommands use these helpers so that one idea has
one spelling, one default and one help text everywhere.
"""

from __future__ import annotations

import argparse
import os

__all__ = ["whole_number", "positive_number", "non_negative_number", "name_equals_count",
           "available_cores", "add_jobs_option", "resolve_jobs", "add_results_argument",
           "RESULTS"]

#: Name of the positional argument naming an `encodex fit` output folder.
RESULTS = "RESULTS"


def whole_number(minimum: int):
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


def positive_number(what: str):
    """argparse type: a positive number of ``what`` (e.g. "seconds")."""
    def parse(text: str) -> float:
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {what} as a number, got {text!r}") from None
        if not v > 0 or v == float("inf"):
            raise argparse.ArgumentTypeError(f"expected a positive number of {what}, got {v}")
        return v
    return parse


def non_negative_number(what: str):
    """argparse type: a finite number of ``what`` that is zero or more."""
    def parse(text: str) -> float:
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {what} as a number, got {text!r}") from None
        if not 0 <= v < float("inf"):
            raise argparse.ArgumentTypeError(f"expected a number of {what} >= 0, got {v}")
        return v
    return parse


def name_equals_count(text: str) -> tuple[str, int]:
    """argparse type: ``NAME=N`` with an identifier and a whole number (e.g. ``speed=8``)."""
    name, sep, value = str(text).partition("=")
    name = name.strip()
    try:
        n = int(value)
    except ValueError:
        n = None
    if not sep or not name.isidentifier() or n is None:
        raise argparse.ArgumentTypeError(f"expected NAME=N such as speed=8, got {text!r}")
    return name, n


def available_cores() -> int:
    """CPU cores this process may run on (its affinity mask where the system has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def add_jobs_option(parser) -> None:
    """``--jobs N``: worker processes; by default every core this process may use."""
    parser.add_argument("--jobs", type=whole_number(1), default=None, metavar="N",
                        help=f"worker processes (default: all cores, {available_cores()} "
                             "here; the number used is printed); results do not depend on it")


def resolve_jobs(jobs: int | None) -> int:
    """The number of worker processes ``--jobs`` asks for (None: all cores)."""
    return available_cores() if jobs is None else int(jobs)


def add_results_argument(parser) -> None:
    """The positional ``RESULTS``: the output folder of ``encodex fit`` (its ``--out``)."""
    parser.add_argument("dir", metavar=RESULTS,
                        help="results folder written by `encodex fit ... --out RESULTS`")
