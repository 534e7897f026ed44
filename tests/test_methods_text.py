"""The methods paragraph states what each run did: every sentence checked against run.json.

Seven real runs of small simulated sessions: NWB and npz input, a recording without trials,
rhythm phase from an LFP, a user variable, no multiple-comparison correction, two
environments; and the table option ``--level 0.9``.
"""

import dataclasses

import numpy as np
import pytest

from encodex.population.run import run_population
from encodex.report.methods import REFERENCES, methods_paragraph, methods_sentences
from encodex.session import build_session
from encodex.simulate import simulate_recording, simulate_to_files

LFP = "processing/ecephys/LFP/lfp"


def _fit(source, **kw):
    return run_population(source, **kw).run


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    d = tmp_path_factory.mktemp("methods")
    one = simulate_to_files(d / "one", seed=4, n_cells=2, duration_s=150.0,
                            environments=("room_a",))
    two = simulate_to_files(d / "two", seed=5, n_cells=2, duration_s=150.0)
    lfp = simulate_to_files(d / "lfp", seed=3, n_cells=1, duration_s=150.0,
                            environments=("room_a",), lfp_rate_hz=250.0, n_phase_cells=1)
    rec, _ = simulate_recording(seed=6, n_cells=2, duration_s=150.0, environments=("room_a",))
    no_trials = build_session(dataclasses.replace(rec, trials=np.zeros((0, 2))))
    session = build_session(rec)
    goal = np.hypot(*(np.asarray(session.covariates["position"]) - 0.5).T)
    user = session.with_variable("goal_distance", goal)
    return {
        "nwb": _fit(one["nwb"]),
        "npz": _fit(one["npz"], variables=("speed", "heading")),
        "two_env_refit": _fit(two["nwb"], variables=("position", "speed"), fold_fits="refit"),
        "no_trials": _fit(no_trials),
        "lfp": _fit(lfp["nwb"], variables=("phase",), folds=6,
                    load_options={"lfp": LFP, "phase_band": (6.0, 10.0)}),
        "user": _fit(user, variables=("speed", "goal_distance")),
        "no_correction": _fit(one["nwb"], variables=("speed", "heading"), correction="none",
                              alpha=0.01, min_step_gain=0.0, gram_precision="double"),
        "studentised": _fit(one["npz"], variables=("speed", "heading"),
                            correction="signflip-t"),
        "even_knots": _fit(one["npz"], variables=("distance", "time"), knots="even"),
    }


def _analysed(run):
    return {v for e in run["environments"].values() for v in e["variables"]}


def _check(run, level=0.95):
    """Check every sentence of the run's paragraph against its run.json."""
    s = dict((k, x.text) for k, x in methods_sentences(run, level))
    st, summ = run["settings"], run["session"]["summary"]
    analysed = _analysed(run)
    src = str(run["input"])
    # input: the file format actually read
    assert ("Neurodata Without Borders" in s["input"]) == src.endswith(".nwb")
    assert ("array bundle" in s["input"]) == src.endswith(".npz")
    assert f"encodex {run['versions']['encodex']}" in s["input"]
    assert f"{run['session']['bin_size_s'] * 1000:g} ms" in s["bin_size"]
    assert f"{summ['settings']['max_gap_s']:g} s" in s["tracking"]
    assert f"({summ['masked_bins']['tracking_gap']} bins)" in s["tracking"]
    # speed smoothing: stated whenever speed (or what is built from it) was analysed
    assert ("speed" in s) == bool({"speed", "heading", "distance"} & analysed)
    if "speed" in s:
        assert f"{summ['settings']['speed_smoothing_s']:g} s standard deviation" in s["speed"]
        vs = summ["settings"].get("velocity_smoothing_s")
        # two stages where the session made them (open field), one where it did not (track)
        assert ("two stages" in s["speed"]) == bool(vs and summ["settings"]["speed_smoothing_s"])
        if vs:
            assert f"{vs:g} s standard deviation" in s["speed"]
    assert ("heading" in s) == ("heading" in analysed)
    if "heading" in s:
        assert ("recorded in the file" in s["heading"]) == (summ["heading_source"] == "compass")
    assert ("trials" in s) == bool({"distance", "time"} & analysed)
    # rhythm phase: only with --lfp, with the band and the object read
    assert ("lfp" in s) == bool(run["load_options"].get("lfp"))
    if "lfp" in s:
        lo, hi = summ["phase"]["band_hz"]
        assert f"{lo:g}-{hi:g} Hz" in s["lfp"] and run["load_options"]["lfp"] in s["lfp"]
        assert f"order {summ['phase']['order']}" in s["lfp"]
    extra = summ.get("extra_variables") or {}
    assert ("user_variables" in s) == bool(extra)
    for name, info in extra.items():
        assert f"{name}, {info['kind']}" in s["user_variables"]
    # candidates: exactly the analysed variables; the others named as not analysed
    cand, _, missing = s["variables"].partition("Not analysed:")
    for v, label in (("position", "position"), ("heading", "heading"), ("speed", "speed"),
                     ("distance", "distance run"), ("time", "time since"), ("phase", "phase")):
        assert (label in cand) == (v in analysed), (v, cand)
    for e in run["environments"].values():
        for v in e["unavailable"]:
            assert f"{v} in " in missing
    # bases: one entry per analysed variable, the right kind
    for v in analysed:
        assert f"{v}: " in s["basis_sizes"]
    assert ("tensor product" in s["basis_sizes"]) == ("position" in analysed)
    assert ("periodic" in s["basis_sizes"]) == bool({"heading", "phase"} & analysed)
    assert "range of the variable observed" in s["basis_sizes"]
    # knot placement: quantiles for the trial clocks only when the run placed them so (runs
    # written before the setting existed have no "knots" and had even knots)
    clocks = sorted({"distance", "time"} & analysed)
    at_quantiles = st.get("knots", "even") == "quantile" and bool(clocks)
    assert ("equally spaced quantiles" in s["basis_sizes"]) == at_quantiles
    assert ("; knots were evenly spaced" in s["basis_sizes"]) == (not at_quantiles)
    if at_quantiles:
        clause = s["basis_sizes"].partition("interior knots of ")[2].partition(" (since")[0]
        assert clause == " and ".join(clocks)
    # smoothness: the criterion and the optimiser, and how folds were fitted
    assert "restricted marginal likelihood" in s["fold_fits"]
    assert "Gu 1992" in s["fold_fits"] and "Wood 2004" in s["fold_fits"]
    assert ("one Newton step" in s["fold_fits"]) == (st["fold_fits"] == "one-step")
    assert ("training bins only" in s["fold_fits"]) == (st["fold_fits"] == "refit")
    k, c = st["folds"], st["chunks_per_fold"]
    assert f"{k}-fold" in s["folds"] and f"{k * c - 1} chunk boundaries" in s["folds"]
    assert "not split" not in " ".join(s.values())
    assert f"alpha = {st['alpha']:g}" in s["alpha"]
    assert ("Bonferroni" in s["alpha"]) == (st["correction"] == "bonferroni")
    assert ("without correction" in s["alpha"]) == (st["correction"] == "none")
    floor = st.get("min_step_gain", 0.0)
    assert (f"at least {100 * floor:g}% of the current model's" in s["alpha"]) == (floor > 0)
    assert ("of the current model's" in s["alpha"]) == (floor > 0)
    # Smallest p: 2^-k for the Wilcoxon rules and for sign flips enumerated (k <= 16);
    # 1/65536 when 65,535 random sign vectors and the observed one are used.
    signflip = st["correction"] in ("signflip", "signflip-t")
    assert ("sign-flip" in s["alpha"]) == signflip
    assert ("studentised mean" in s["alpha"]) == (st["correction"] == "signflip-t")
    assert ("the largest pooled improvement in bits per spike (each fold's improvement "
            "clipped at 3 times" in s["alpha"]) == (st["correction"] == "signflip")
    assert ("weighted by the spikes held out" in s["alpha"]) == (st["correction"]
                                                                  == "signflip")
    sampled = signflip and k > 16
    low = 1 / 65536 if sampled else 2.0 ** -k
    assert run["methods"]["smallest_p"] == low
    assert f"smallest attainable p-value is {low:.3g}." in s["alpha"]
    assert ("65,535 random sign vectors" in s["alpha"]) == sampled
    assert ("Phipson & Smyth 2010" in s["alpha"]) == sampled
    assert f"fewer than {st['min_spikes']} spikes" in s["min_spikes"]
    # arithmetic of the Hessian pieces: said only when it was single precision
    assert ("gram_precision" in s) == (st.get("gram_precision") == "single")
    if "gram_precision" in s:
        assert "single-precision blocks summed in double precision" in s["gram_precision"]
    assert ("shuffles" in s) == bool(st["shuffles"])
    assert ("ratemap_bin_m" in s) == ("position" in analysed)
    if "ratemap_bin_m" in s:
        assert f"{st['ratemap_bin_m'] * 100:g} cm" in s["ratemap_bin_m"]
    assert f"{level * 100:g}% Wilson" in s["level"]
    assert ("environments" in s) == (len(run["session"]["environments"]) > 1)
    assert f"alpha = {st['alpha']:g}" in s["caveat"]
    # references: exactly the works cited in the text
    text = methods_paragraph(run, level=level)
    body, _, refs = text.partition("\n\nReferences\n")
    for short, full in REFERENCES.items():
        assert (short in body) == (full in refs), short
    return s


@pytest.mark.parametrize("name", ["nwb", "npz", "two_env_refit", "no_trials", "lfp", "user",
                                  "no_correction", "studentised", "even_knots"])
def test_every_sentence_matches_run_json(runs, name):
    _check(runs[name])
    if name == "lfp":  # the paragraph of a phase-only run, printed for reading with -s
        print(methods_paragraph(runs[name]))


def test_specific_runs_say_what_differs(runs):
    assert runs["nwb"]["input"].endswith(".nwb") and runs["npz"]["input"].endswith(".npz")
    assert "Neurodata Without Borders" in _check(runs["nwb"])["input"]
    npz = _check(runs["npz"])
    assert "Neurodata" not in methods_paragraph(runs["npz"])
    assert "tensor product" not in npz["basis_sizes"] and "position" not in npz["variables"]
    nt = _check(runs["no_trials"])
    assert "distance in room_a" in nt["variables"] and "time in room_a" in nt["variables"]
    assert "trials" not in dict(methods_sentences(runs["no_trials"]))
    assert "goal_distance" in _check(runs["user"])["user_variables"]
    assert "phase" in _check(runs["lfp"])["variables"]
    assert "environments" in _check(runs["two_env_refit"])


def test_knot_placement_follows_the_run(runs):
    quantile = _check(runs["nwb"])["basis_sizes"]
    assert "interior knots of distance and time (since trial start" in quantile
    assert "; knots were evenly spaced" in _check(runs["even_knots"])["basis_sizes"]
    legacy = {**runs["nwb"], "settings": {k: v for k, v in runs["nwb"]["settings"].items()
                                          if k != "knots"}}
    assert "; knots were evenly spaced" in _check(legacy)["basis_sizes"]


def test_table_level_reaches_the_paragraph(runs):
    s = _check(runs["nwb"], level=0.9)
    assert "90% Wilson" in s["level"]
    assert "95% Wilson" not in methods_paragraph(runs["nwb"], level=0.9)


def test_track_run_is_described_as_a_track_not_an_arena(tmp_path):
    # A shuttle track with a direction-dependent field: the paragraph must describe a 1-D
    # track position, the direction term and laps, never the arena's tensor-product basis.
    from encodex.simulate_track import simulate_track_recording

    rec, _ = simulate_track_recording("shuttle", n_cells=2, duration_s=200.0, seed=3)
    run = _fit(build_session(rec, bin_size=0.05), folds=5, chunks_per_fold=2)
    s = dict(methods_sentences(run))
    assert "linear track" in s["track"].text and "factor-by-curve" in s["track"].text
    assert "tensor product" not in s["basis_sizes"].text
    assert "direction: a difference curve over track position" in s["basis_sizes"].text
    assert "combination of two others" in s["concurvity"].text
    assert "mean squared canonical correlation" in s["concurvity"].text
