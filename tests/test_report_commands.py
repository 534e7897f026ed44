"""The table, compare and report subcommands, driven through argparse as the CLI does."""

import argparse

import pandas as pd
import pytest

from encodex.errors import InputError, SettingsError
from encodex.report.commands import register_report_commands
from encodex.report.testing import write_example_run


def _run(argv):
    parser = argparse.ArgumentParser(prog="encodex")
    register_report_commands(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return args.func(args)


@pytest.fixture()
def fit_dir(tmp_path):
    return write_example_run(tmp_path / "fit")


def test_table_command(fit_dir, capsys):
    assert _run(["table", str(fit_dir)]) == 0
    out = capsys.readouterr().out
    assert "| arena_a | position | 5 / 11 |" in out
    assert "statistical statement at alpha = 0.05" in out
    for name in ("table_labels.csv", "table_variables.tex", "table_excluded.md", "methods.md"):
        assert (fit_dir / "tables" / name).exists()
    assert "Wilson 1927" in (fit_dir / "tables" / "methods.md").read_text()


def test_compare_command_paired_and_unpaired(fit_dir, capsys):
    assert _run(["compare", str(fit_dir), "--between", "arena_a", "arena_b"]) == 0
    out = capsys.readouterr().out
    assert "Paired comparison of 10 cells" in out
    assert "McNemar exact" in out and "Wilcoxon signed-rank" in out
    assert "2 cell(s) active in one environment and silent in the other" in out
    stem = fit_dir / "compare" / "compare_arena_a_vs_arena_b"
    tr = pd.read_csv(f"{stem}_transitions.csv", index_col=0)
    assert tr.to_numpy().sum() == 10
    assert stem.with_suffix(".png").exists() and stem.with_suffix(".pdf").exists()
    assert _run(["compare", str(fit_dir), "--between", "arena_a", "arena_b", "--unpaired",
                 "--out", str(fit_dir / "c2")]) == 0
    out = capsys.readouterr().out
    assert "Unpaired comparison" in out and "Fisher exact" in out


def test_report_command(fit_dir, capsys):
    assert _run(["report", str(fit_dir), "--max-cells", "1", "--cell", "u01", "arena_a"]) == 0
    out = capsys.readouterr().out
    assert "report: " in out and str((fit_dir / "report.html").resolve()) in out
    figs = fit_dir / "figures"
    for stem in ("population", "compare_arena_a_vs_arena_b", "cell_arena_a_u01"):
        assert (figs / f"{stem}.png").exists() and (figs / f"{stem}.pdf").exists()


def test_bad_input_raises_specific_errors(tmp_path, fit_dir):
    with pytest.raises(InputError, match="not a folder"):
        _run(["table", str(tmp_path / "missing")])
    with pytest.raises(SettingsError, match="choose from arena_a, arena_b"):
        _run(["compare", str(fit_dir), "--between", "arena_a", "attic"])
    with pytest.raises(SettingsError, match="two different environments"):
        _run(["compare", str(fit_dir), "--between", "arena_a", "arena_a"])
    with pytest.raises(SettingsError, match="level"):
        _run(["table", str(fit_dir), "--level", "95"])
