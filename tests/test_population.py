"""Population runs: output folder contract, determinism across jobs, checkpoints, dask."""

import json

import numpy as np
import pandas as pd
import pytest

from encodex.errors import CheckpointMismatchError, SettingsError
from encodex.population import CELL_COLUMNS, MODEL_COLUMNS, RunInterrupted, run_population
from encodex.population import run as run_module
from encodex.session import build_session
from encodex.simulate import simulate_recording

# Small and fast: two environments, six cells, 0.1 s bins, two variables, 6 folds (the
# fewest with which a variable can pass alpha 0.05 / 2 candidates: 2**-6 < 0.025).
SETTINGS = dict(variables=("heading", "speed"), folds=6, chunks_per_fold=2, seed=3)


@pytest.fixture(scope="module")
def session():
    rec, truth = simulate_recording(seed=11, n_cells=6, duration_s=240.0,
                                    environments=("arena", "annex"))
    return build_session(rec, bin_size=0.1)


@pytest.fixture(scope="module")
def first_run(session, tmp_path_factory):
    out = tmp_path_factory.mktemp("run") / "out"
    return run_population(session, out, jobs=1, **SETTINGS)


def test_output_folder_contract(first_run, session):
    out = first_run.out
    cells = pd.read_csv(out / "cells.csv", dtype={"unit": str, "environment": str})
    models = pd.read_csv(out / "models.csv", dtype={"unit": str, "environment": str})
    assert tuple(cells.columns[:16]) == CELL_COLUMNS[:16]
    assert tuple(models.columns) == MODEL_COLUMNS
    assert len(cells) == 2 * session.n_units
    # one row per unit and environment, in session order
    assert list(cells["environment"]) == ["arena"] * 6 + ["annex"] * 6
    assert list(cells["unit"]) == list(session.unit_ids) * 2
    ok = cells[cells["status"] == "ok"]
    assert set(ok["variables"]) <= {"none", "heading", "speed", "heading+speed"}
    # every model x fold kept; the chosen model's pooled score appears in cells.csv
    for (_, c) in ok.iterrows():
        m = models[(models["unit"] == c["unit"]) & (models["environment"] == c["environment"])]
        assert set(m["fold"]) == set(range(6))
        assert "none" in set(m["model"]) and c["variables"] in set(m["model"])
        assert len(m) == 6 * m["model"].nunique()
    # the simulated population holds heading and speed cells: some must be labelled
    assert (ok["variables"] != "none").sum() >= 2
    # ambiguous_with is the concurvity flag of the chosen variables on the environment's bins
    from encodex.compare.concurvity import ambiguous_pairs
    from encodex.design import build_design, default_bases

    for env in ("arena", "annex"):
        k = session.environments.index(env)
        rows = session.valid & (session.environment == k)
        cov = {v: np.asarray(session.covariates[v])[rows] for v in ("heading", "speed")}
        design = build_design(cov, default_bases(cov))
        for (_, c) in ok[(ok["environment"] == env) & (ok["variables"] != "none")].iterrows():
            flags = ambiguous_pairs(design, c["variables"].split("+"))
            want = sorted({v for vs in flags.values() for v in vs})
            got = c["ambiguous_with"]
            assert (got.split(";") if isinstance(got, str) and got else []) == want
    # non-labelled cells still have a row with a reason
    for (_, c) in cells[cells["status"] != "ok"].iterrows():
        assert c["reason"]
    run = json.loads((out / "run.json").read_text())
    assert "not proof" in run["statement"]
    assert run["settings"]["folds"] == 6 and run["settings"]["seed"] == 3
    assert run["versions"]["numpy"] == np.__version__
    assert run["session"]["masked_bins"] == json.loads(json.dumps(session.summary["masked_bins"]))
    assert run["session"]["dropped_spikes"] == json.loads(
        json.dumps(session.summary["dropped_spikes"]))
    assert sum(run["session"]["masked_bins"].values()) > 0  # the simulator has tracking gaps
    assert "not proof" in (out / "README.txt").read_text()
    # unit files: plain arrays only, response curves of the chosen model, occupancy map
    for (_, c) in ok.iterrows():
        f = out / "units" / c["environment"] / f"{c['unit']}.npz"
        with np.load(f, allow_pickle=False) as z:
            keys = set(z.files)
            assert {"ratemap__occupancy_s", "ratemap__spikes", "ratemap__edges_x",
                    "ratemap__edges_y"} <= keys
            assert z["ratemap__spikes"].sum() <= c["n_spikes"]
            for v in c["variables"].split("+") if c["variables"] != "none" else []:
                assert z[f"{v}__log_modulation"].shape == z[f"{v}__grid"].shape == z[f"{v}__se"].shape


def test_python_result_matches_files(first_run):
    import encodex

    assert encodex.run_population is run_population
    cells = pd.read_csv(first_run.out / "cells.csv", dtype={"unit": str, "environment": str},
                        keep_default_na=False, na_values=[""])
    assert list(cells["unit"]) == list(first_run.cells["unit"])
    assert np.allclose(cells["bits_per_spike"].astype(float),
                       first_run.cells["bits_per_spike"].astype(float), equal_nan=True)
    labelled = [k for k in first_run.fits]
    for key in labelled:
        fit = first_run.fits[key]
        env, unit = key
        lab = first_run.label(unit, env)
        assert set(fit.names) == set(lab.split("+")) | {"drift"}  # drift is on by default


def test_results_identical_whatever_jobs(first_run, session, tmp_path):
    other = run_population(session, tmp_path / "j2", jobs=2, **SETTINGS)
    a = (first_run.out / "cells.csv").read_text()
    b = (other.out / "cells.csv").read_text()
    assert a == b
    assert (first_run.out / "models.csv").read_text() == (other.out / "models.csv").read_text()


def test_resume_skips_finished_units_and_refuses_other_settings(first_run, session, tmp_path):
    import shutil

    out = tmp_path / "copy"
    shutil.copytree(first_run.out, out)
    (out / "units" / "annex" / "c002.npz").unlink()
    (out / "cells.csv").unlink()
    again = run_population(session, out, jobs=1, **SETTINGS)
    assert again.run["execution"]["units_computed"] == 1
    assert again.run["execution"]["units_from_checkpoint"] == 11
    assert (out / "cells.csv").read_text() == (first_run.out / "cells.csv").read_text()
    # Fits of units read back from the checkpoint are refitted on demand, identically.
    for key in again.fits:
        a, b = again.fits[key], first_run.fits[key]
        assert a.names == b.names
        assert np.allclose(a.theta, b.theta, rtol=1e-8, atol=1e-10)
    with pytest.raises(CheckpointMismatchError, match="folds: 6 -> 7"):
        run_population(session, out, jobs=1, **{**SETTINGS, "folds": 7})
    other = session.replace(counts=session.counts * 2)
    with pytest.raises(CheckpointMismatchError, match="different input"):
        run_population(other, out, jobs=1, **SETTINGS)


def test_interrupt_saves_finished_units_and_says_how_to_resume(session, tmp_path, monkeypatch):
    real = run_module.analyse_unit
    calls = {"n": 0}

    def flaky(*a, **k):
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt
        return real(*a, **k)

    monkeypatch.setattr(run_module, "analyse_unit", flaky)
    out = tmp_path / "int"
    with pytest.raises(RunInterrupted, match="run the same command again to resume") as e:
        run_population(session, out, jobs=1, **SETTINGS)
    assert "2 of 12" in e.value.message
    assert len(list((out / "units").rglob("*.npz"))) == 2
    monkeypatch.setattr(run_module, "analyse_unit", real)
    done = run_population(session, out, jobs=1, **SETTINGS)
    assert done.run["execution"]["units_computed"] == 10


def test_too_few_spikes_never_labelled(session):
    r = run_population(session, None, min_spikes=10**6, **SETTINGS)
    assert set(r.cells["status"]) == {"too few spikes"}
    assert set(r.cells["variables"]) == {""}
    assert r.models.empty and len(r.fits) == 0


def test_bad_settings_are_one_line_errors(session):
    with pytest.raises(SettingsError, match="unknown variable"):
        run_population(session, None, variables=("place",))
    with pytest.raises(SettingsError, match="jobs"):
        run_population(session, None, jobs=0)
    with pytest.raises(SettingsError, match="unknown setting"):
        run_population(session, None, fold=3)
    with pytest.raises(SettingsError, match="use --knots quantile"):
        run_population(session, None, knots="uneven")
    # 5 folds cannot give p < 0.05 / 2: refused instead of labelling every cell "none"
    with pytest.raises(SettingsError, match="use --folds 6 or more"):
        run_population(session, None, **{**SETTINGS, "folds": 5, "correction": "bonferroni"})
    # the sign-flip test reaches 2^-5 <= 0.05 with 5 folds, not 2^-4 with 4
    with pytest.raises(SettingsError, match="use --folds 5 or more"):
        run_population(session, None, **{**SETTINGS, "folds": 4, "correction": "signflip"})


def test_dask_local_cluster_gives_same_results(first_run, session):
    r = run_population(session, None, jobs=2, cluster="local", **SETTINGS)
    pd.testing.assert_frame_equal(r.cells, first_run.cells)
    pd.testing.assert_frame_equal(r.models, first_run.models)


def test_user_defined_circular_variable_is_analysed_and_labelled(session):
    # A cell tuned to a user-defined circular variable (an invented "cue angle") that no
    # built-in variable explains: it must be labelled with that variable, after the built-ins
    # in label order, with its own gain column.
    import scipy.sparse as sp

    rng = np.random.default_rng(9)
    cue = np.mod(np.cumsum(rng.normal(0, 0.2, session.n_bins)), 2 * np.pi)
    s2 = session.with_variable("cue", cue, kind="circular")
    y = rng.poisson(0.1 * 3.0 * np.exp(1.5 * np.cos(cue - 1.0)) / np.i0(1.5))
    s2 = s2.replace(counts=sp.csc_array(sp.hstack([s2.counts, sp.csc_array(y[:, None])])),
                    unit_ids=tuple(s2.unit_ids) + ("cue_cell",))
    r = run_population(s2, None, units=["cue_cell"], **{**SETTINGS,
                                                         "variables": ("speed", "cue")})
    assert set(r.cells["variables"]) == {"cue"}
    assert "gain_cue" in r.cells.columns and (r.cells["gain_cue"] > 0.05).all()
    fit = r.fits[("arena", "cue_cell")]
    assert fit.names == ("cue", "drift")
    with pytest.raises(SettingsError, match="unknown variable"):
        run_population(s2, None, variables=("cue", "tone"))


def test_goodness_of_fit_columns_and_ks_curve(first_run):
    from encodex.compare.goodness import GOODNESS_COLUMNS

    out = first_run.out
    cells = pd.read_csv(out / "cells.csv", dtype={"unit": str, "environment": str})
    assert set(GOODNESS_COLUMNS) <= set(cells.columns)
    ok = cells[cells["status"] == "ok"]
    assert ok["ks_distance"].notna().all() and (ok["ks_intervals"] > 0).all()
    assert set(ok["ks_within_band"].astype(str)) <= {"True", "False"}
    assert (cells.loc[cells["status"] != "ok", "ks_distance"].isna()).all()
    u, e = ok["unit"].iloc[0], ok["environment"].iloc[0]
    with np.load(out / "units" / e / f"{u}.npz") as z:
        uni, res = z["goodness__ks_uniform"], z["goodness__ks_rescaled"]
        assert uni.shape == res.shape and uni.size > 10
        assert np.all(np.diff(res) >= 0) and 0 <= res[0] and res[-1] <= 1
        # the curve's largest gap is (up to thinning) the KS distance in cells.csv
        d = float(ok["ks_distance"].iloc[0])
        assert np.max(np.abs(res - uni)) <= d + 1e-9
        assert np.max(np.abs(res - uni)) >= d - 2.0 / uni.size - 1.0 / ok["ks_intervals"].iloc[0]
