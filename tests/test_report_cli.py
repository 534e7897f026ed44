"""The report subcommands through the real command line: exit codes and one-line errors."""

from encodex.cli import main
from encodex.report.testing import write_example_run


def test_report_subcommands_exit_codes(tmp_path, capsys):
    d = write_example_run(tmp_path / "fit")
    assert main(["table", str(d)]) == 0
    assert (d / "tables" / "table_labels.tex").exists()
    capsys.readouterr()
    assert main(["compare", str(d), "--between", "arena_a", "hall"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "choose from arena_a, arena_b" in err
    assert main(["table", str(tmp_path / "absent")]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("encodex: error:") and "not a folder" in err
    assert "Traceback" not in err
    assert main(["demo", "--out", str(tmp_path / "demo"), "--cells", "0"]) == 2
    assert "--cells must be at least 1" in capsys.readouterr().err
