"""``encodex compare DIR_A DIR_B [...]``: the command-line side of comparing recordings.

Each folder after the first is compared with the first (:func:`encodex.report.recordings.
compare_recordings`); results go to one sub-folder per pair plus one HTML page.
"""

from __future__ import annotations

from pathlib import Path

from encodex.errors import SettingsError

__all__ = ["add_recording_options", "run_compare_recordings"]


def add_recording_options(p) -> None:
    """Options of ``encodex compare`` used with two or more folders."""
    p.add_argument("--match", action="append", default=[], metavar="CSV",
                   help="matching table of units (columns: unit in the first folder, unit in "
                        "the other); one per later folder, in order (default: identical ids)")
    p.add_argument("--environments", nargs="+", metavar="ENV",
                   help="environment of each folder, in order (needed when a folder holds "
                        "several)")
    p.add_argument("--names", nargs="+", metavar="NAME",
                   help="name of each folder's side in tables and figures (default "
                        "<folder>.<environment>)")
    p.add_argument("--coordinates", choices=("own", "shared"), default="own",
                   help="compare response curves in each arena's own coordinates (own, "
                        "default: position as a fraction of the tracked extent) or in the "
                        "recorded metres (shared)")


def _per_folder(values, n: int, option: str, what: str) -> list:
    if not values:
        return [None] * n
    if len(values) != n:
        raise SettingsError(f"--{option} needs one {what} per folder ({n}), got {len(values)}")
    return list(values)


def run_compare_recordings(args, echo) -> int:
    """Handler of ``encodex compare`` with several folders; returns the exit code."""
    from encodex.report.commands import _headless

    _headless()
    from encodex.report.load import comparison_stem, load_run
    from encodex.report.recordings import compare_recordings, write_recording_comparison
    from encodex.report.recordings_html import write_recordings_report
    from encodex.report.tables import to_markdown

    if args.between:
        raise SettingsError("--between names two environments of one folder; with several "
                            "folders use --environments (one per folder)")
    if args.unpaired:
        raise SettingsError("--unpaired is for one folder; with several folders leave out "
                            "the matching table (--match) and use folders without shared ids")
    dirs = list(args.dir)
    envs = _per_folder(args.environments, len(dirs), "environments", "environment")
    names = _per_folder(args.names, len(dirs), "names", "name")
    if args.match and len(args.match) != len(dirs) - 1:
        raise SettingsError(f"--match needs one table per folder after the first "
                            f"({len(dirs) - 1}), got {len(args.match)}")
    matches = list(args.match) or [None] * (len(dirs) - 1)
    runs = [load_run(d) for d in dirs]
    out = Path(args.out) if args.out else runs[0].path / "compare_recordings"
    results, written = [], []
    for k in range(1, len(runs)):
        pair_names = None if names[0] is None else (names[0], names[k])
        cmp = compare_recordings(runs[0], runs[k], envs[0], envs[k], matching=matches[k - 1],
                                 names=pair_names, alpha=args.fdr,
                                 coordinates=args.coordinates)
        results.append(cmp)
        written += write_recording_comparison(cmp, out / comparison_stem(cmp.a, cmp.b))
        echo(f"{cmp.a} vs {cmp.b}")
        for note in cmp.notes:
            echo("  " + note)
        for part in cmp.comparisons:
            from encodex.report.environments import summary_frame

            echo("")
            echo(part.notes[0])
            echo(to_markdown(summary_frame(part)))
            g = part.gains.iloc[0]
            echo(f"Held-out gains: {g['test']}, median {part.a} "
                 f"{g['median_a_bits_per_spike']:.3f}, {part.b} "
                 f"{g['median_b_bits_per_spike']:.3f} bits/spike, p = {g['p_value']:.3g}")
            if not part.stability.empty:
                st = part.stability.groupby("variable")["correlation"].median()
                echo("Stability of matched response curves (median correlation): "
                     + ", ".join(f"{v} {r:.2f}" for v, r in st.items()))
        echo(results[-1].comparisons[0].caveat)
        echo("")
    page = write_recordings_report(results, out / "recordings_report.html")
    echo(f"wrote {len(written) + 1} files in {out}")
    echo(f"report: {page.resolve()}")
    return 0
