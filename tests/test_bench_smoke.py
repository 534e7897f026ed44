"""Smoke run of the solver benchmark: the peers solve the same objective as encodex.

This is a correctness check of ``benchmarks/bench_solver.py --quick`` (5 min of simulated
data), not a timing: it asserts that the script's JSON line parses, that statsmodels and glum,
set up as in ``benchmarks/_peers.py``, land on encodex's coefficients (relative 1e-5), and that
every solution is a stationary point of encodex's objective. A wrong rescaling of a peer's
objective (e.g. glum's alpha off by the number of bins, or statsmodels' penalty weight off by
two) moves its coefficients far beyond these tolerances.
"""

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = ROOT / "benchmarks" / "bench_solver.py"


@pytest.fixture(scope="module")
def quick_run():
    proc = subprocess.run([sys.executable, str(SCRIPT), "--quick"], cwd=ROOT,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc


def test_quick_run_prints_one_json_line_then_a_table(quick_run):
    lines = quick_run.stdout.splitlines()
    res = json.loads(lines[0])
    assert res["benchmark"] == "solver" and res["quick"] is True
    assert not any(line.lstrip().startswith("{") for line in lines[1:])
    assert "| glum |" in quick_run.stdout and "| statsmodels |" in quick_run.stdout


def test_peers_agree_with_encodex_on_the_same_objective(quick_run):
    res = json.loads(quick_run.stdout.splitlines()[0])
    p = res["problem"]
    # Issue-2 design: 1 + 99 + 11 + 7 + 9 + 9 constrained coefficients.
    assert p["n_coef"] == 136 and p["n_basis_columns"] == 141
    assert p["n_bins"] == 14999 and p["n_spikes"] > 100
    assert p["penalty_root_rel_error"] < 1e-12
    assert res["encodex"]["converged"] and res["encodex_laml"]["converged"]
    assert set(res["peers"]) == {"statsmodels", "glum"}
    f = res["encodex"]["objective"]
    for name, r in res["peers"].items():
        assert r["max_rel_coef_diff"] < 1e-5, (name, r["max_rel_coef_diff"])
        assert r["max_abs_log_rate_diff"] < 1e-5, (name, r["max_abs_log_rate_diff"])
        # Same optimum: objective values equal to 1e-10 relative, gradients near zero
        # (a spike count of order 400 makes an unconverged gradient of order 1).
        assert abs(r["objective_minus_encodex"]) < 1e-10 * abs(f), name
        assert r["max_abs_gradient"] < 1e-3, (name, r["max_abs_gradient"])
        assert r["seconds"] > 0 and r["ratio_to_encodex"] > 0
    assert res["encodex"]["max_abs_gradient"] < 1e-3


def test_bad_repeats_is_a_one_line_error_with_exit_code_2():
    proc = subprocess.run([sys.executable, str(SCRIPT), "--repeats", "0"], cwd=ROOT,
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2
    assert proc.stderr.strip().count("\n") == 0 and "--repeats" in proc.stderr
