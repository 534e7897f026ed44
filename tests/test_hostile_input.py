"""Hostile input, property-based: damaged recordings end in a result or a clear one-line error.

Hypothesis draws a combination of damages (NaN and infinite tracking, reversed or repeated
timestamps, zero-length recordings, silent units, every spike in one bin, duplicated spikes,
overlapping trials or trials outside the recording, odd epoch names, heading in degrees,
position in centimetres) and applies them to a small hand-made npz bundle. Reading it must
give a session or a specific :class:`encodex.errors.EncodexError`; ``encodex fit`` on it must
exit 0 with complete, finite tables, or exit 2 with one line on standard error - never a
traceback. The existing tests (tests/test_io_*.py, tests/test_cli_fit.py) check single
named cases; here the cases are combined at random.
"""

from __future__ import annotations

import contextlib
import io
import math
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from encodex.cli import main
from encodex.errors import EncodexError
from encodex.session import load_session

DURATION_S = 60.0
RATE_HZ = 20.0
FIT_ARGS = ["--variables", "heading,speed", "--folds", "6", "--bin-size", "0.1",
            "--min-spikes", "30", "--no-progress"]

DAMAGES = (
    "nan_position", "inf_position", "nan_timestamp", "reversed_timestamps",
    "repeated_timestamp", "zero_length", "one_sample", "silent_unit", "spikes_in_one_bin",
    "duplicated_spikes", "overlapping_trials", "trials_outside", "trial_partly_outside",
    "odd_epoch_names", "empty_epoch_name", "epoch_outside", "heading_degrees",
    "position_cm", "nan_heading", "spikes_outside", "inf_spike", "all_position_nan",
)


def _base(seed: int) -> dict:
    """A small valid recording as bundle arrays: 60 s at 20 Hz, three units, two trials."""
    rng = np.random.default_rng(seed)
    n = int(DURATION_S * RATE_HZ)
    t = np.arange(n) / RATE_HZ
    # A smooth random walk reflected into a 1 m box (metres).
    xy = 0.5 + np.cumsum(rng.normal(0, 0.01, (n, 2)), axis=0)
    xy = np.abs(np.mod(xy + 1.0, 2.0) - 1.0)
    heading = np.mod(np.cumsum(rng.normal(0, 0.1, n)), 2 * np.pi)
    trains = []
    for k in range(3):
        rate = 3.0 * np.exp(1.2 * np.cos(heading - k)) / np.i0(1.2)
        counts = rng.poisson(rate / RATE_HZ)
        trains.append(np.sort(np.repeat(t, counts) + rng.uniform(0, 1 / RATE_HZ,
                                                                  counts.sum())))
    return {
        "tracking_time": t, "position": xy, "heading": heading,
        "unit_ids": ["u0", "u1", "u2"], "trains": trains,
        "trials": [[1.0, 29.0], [30.0, 59.0]],
        "epochs": [(0.0, 30.0, "room"), (30.0, 60.0, "room")],
    }


def _damage(d: dict, name: str, data) -> None:
    """Apply one named damage in place; ``data`` draws the positions."""
    n = len(d["tracking_time"])
    idx = data.draw(st.integers(1, max(1, n - 2)), label=f"{name} index") if n > 2 else 0
    if name == "nan_position":
        stop = min(n, idx + data.draw(st.integers(1, 40)))
        d["position"][idx:stop] = np.nan
    elif name == "inf_position":
        d["position"][idx, data.draw(st.integers(0, 1))] = data.draw(
            st.sampled_from([np.inf, -np.inf]))
    elif name == "nan_timestamp" and n:
        d["tracking_time"][idx] = np.nan
    elif name == "reversed_timestamps" and n > 2:
        d["tracking_time"][[idx - 1, idx]] = d["tracking_time"][[idx, idx - 1]]
    elif name == "repeated_timestamp" and n > 2:
        d["tracking_time"][idx] = d["tracking_time"][idx - 1]
    elif name in ("zero_length", "one_sample"):
        keep = 0 if name == "zero_length" else 1
        for k in ("tracking_time", "position", "heading"):
            d[k] = d[k][:keep]
    elif name == "silent_unit":
        d["trains"][data.draw(st.integers(0, 2))] = np.zeros(0)
    elif name == "spikes_in_one_bin":
        t0 = data.draw(st.floats(0.0, DURATION_S - 0.2))
        d["trains"][data.draw(st.integers(0, 2))] = t0 + np.linspace(0, 0.01, 150)
    elif name == "duplicated_spikes":
        k = data.draw(st.integers(0, 2))
        d["trains"][k] = np.sort(np.concatenate([d["trains"][k], d["trains"][k]]))
    elif name == "overlapping_trials":
        d["trials"] = [[1.0, 31.0], [30.0, 59.0]]
    elif name == "trials_outside":
        d["trials"] = [[100.0, 120.0], [130.0, 150.0]]
    elif name == "trial_partly_outside":
        d["trials"] = [[-10.0, 20.0], [40.0, 90.0]]
    elif name == "odd_epoch_names":
        odd = data.draw(st.sampled_from(["../../evil", "a/b", "räume", "x y", ".hidden", ".."]))
        d["epochs"] = [(0.0, 30.0, odd), (30.0, 60.0, "room")]
    elif name == "empty_epoch_name":
        d["epochs"] = [(0.0, 30.0, " "), (30.0, 60.0, "room")]
    elif name == "epoch_outside":
        d["epochs"] = [(0.0, 60.0, "room"), (200.0, 260.0, "elsewhere")]
    elif name == "heading_degrees":
        d["heading"] = np.degrees(d["heading"])
    elif name == "position_cm":
        d["position"] = d["position"] * 100.0 * data.draw(st.sampled_from([1.0, 30.0]))
    elif name == "nan_heading":
        d["heading"][:] = np.nan
    elif name == "spikes_outside":
        d["trains"][0] = np.concatenate([[-5.0, -1.0], d["trains"][0], [70.0, 80.0]])
    elif name == "inf_spike":
        d["trains"][1] = np.concatenate([d["trains"][1], [np.inf]])
    elif name == "all_position_nan":
        d["position"][:] = np.nan


def _write(d: dict, path: Path) -> Path:
    trains = [np.asarray(s, dtype=float) for s in d["trains"]]
    arrays = dict(
        tracking_time=np.asarray(d["tracking_time"], float),
        position=np.asarray(d["position"], float),
        heading=np.asarray(d["heading"], float),
        unit_ids=np.array(d["unit_ids"], dtype=str),
        spike_times=np.concatenate(trains),
        spike_index=np.cumsum([s.size for s in trains]),
    )
    if d["trials"]:
        tr = np.asarray(d["trials"], float)
        arrays.update(trial_start=tr[:, 0], trial_stop=tr[:, 1])
    if d["epochs"]:
        # Adjacent epochs of the same environment are merged as a file would hold them.
        arrays.update(epoch_start=np.array([e[0] for e in d["epochs"]]),
                      epoch_stop=np.array([e[1] for e in d["epochs"]]),
                      epoch_environment=np.array([e[2] for e in d["epochs"]], dtype=str))
    np.savez(path, **arrays)
    return path


def _damaged(data, max_damages: int) -> dict:
    d = _base(data.draw(st.integers(0, 3), label="seed"))
    names = data.draw(st.lists(st.sampled_from(DAMAGES), min_size=1, max_size=max_damages,
                               unique=True), label="damages")
    for name in names:
        _damage(d, name, data)
    return d


def _one_line_error(exc: BaseException) -> None:
    assert isinstance(exc, EncodexError), f"{type(exc).__name__} is not an EncodexError: {exc}"
    msg = str(exc)
    assert msg.strip() and "\n" not in msg.strip(), msg
    assert "Traceback" not in msg


@settings(max_examples=40, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(st.data())
def test_reader_gives_session_or_specific_error(data):
    d = _damaged(data, 3)
    with tempfile.TemporaryDirectory() as tmp:
        path = _write(d, Path(tmp) / "damaged.npz")
        try:
            s = load_session(path, bin_size=0.1)
        except EncodexError as exc:
            _one_line_error(exc)
            return
    # A session was built: its usable bins hold only finite covariates in SI units.
    assert s.n_units == len(d["unit_ids"]) and s.unit_ids == tuple(d["unit_ids"])
    v = np.asarray(s.valid)
    for name in ("position", "speed", "heading"):
        assert np.isfinite(np.asarray(s.covariates[name])[v]).all(), name
    h = np.asarray(s.covariates["heading"])[v]
    assert ((h >= 0) & (h < 2 * np.pi)).all()
    pos = np.asarray(s.covariates["position"])[v]
    assert pos.size == 0 or np.ptp(pos, axis=0).max() <= 20.0
    assert s.counts.data.min(initial=0) >= 0
    total = sum(np.isfinite(np.asarray(t)).sum() for t in d["trains"])
    assert int(s.counts.sum()) + s.summary["dropped_spikes"]["total"] == total


def _fit(path: Path, out: Path) -> tuple[int, str]:
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = main(["fit", str(path), "--out", str(out), *FIT_ARGS])
    return code, err.getvalue()


def _check_output(out: Path, session) -> None:
    """Complete and finite tables: one row per unit and environment, reasons for the rest."""
    cells = pd.read_csv(out / "cells.csv", dtype={"unit": str, "environment": str},
                        keep_default_na=False, na_values=["", "nan", "NaN"])
    want = {(u, e) for e in session.environments for u in session.unit_ids}
    assert set(zip(cells["unit"], cells["environment"])) == want
    assert len(cells) == len(want)
    assert set(cells["status"]) <= {"ok", "too few spikes", "no variables", "too few bins",
                                    "error"}
    for _, c in cells.iterrows():
        assert np.isfinite(c["n_spikes"]) and c["n_spikes"] >= 0
        if c["status"] != "ok":
            assert isinstance(c["reason"], str) and c["reason"].strip(), dict(c)
            continue
        assert c["variables"], dict(c)
        for col in ("mean_rate_hz", "bits_per_spike", "p_value", "pseudo_r2",
                    "deviance_explained"):
            assert math.isfinite(float(c[col])), (col, dict(c))
        for var in ("heading", "speed"):
            assert math.isfinite(float(c[f"gain_{var}"])), (var, dict(c))
    models = pd.read_csv(out / "models.csv")
    for col in ("n_spikes_test", "loglik_test"):
        assert np.isfinite(models[col].to_numpy(float)).all(), col
    # Per-fold ratios are NaN only where the held-out fold has no spike (0 / 0 bits).
    bad = ~np.isfinite(models["bits_per_spike"].to_numpy(float))
    assert (models.loc[bad, "n_spikes_test"] == 0).all()


@settings(max_examples=8, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(st.data())
def test_fit_command_exits_0_with_complete_tables_or_2_with_one_line(data):
    d = _damaged(data, 2)
    with tempfile.TemporaryDirectory() as tmp:
        path = _write(d, Path(tmp) / "damaged.npz")
        try:
            session = load_session(path, bin_size=0.1)
        except EncodexError:
            session = None
        code, err = _fit(path, Path(tmp) / "out")
        if session is None:
            assert code == 2, err
        assert code in (0, 2), (code, err)
        if code == 2:
            lines = err.strip().splitlines()
            assert len(lines) == 1 and lines[0].startswith("encodex: error: "), err
            return
        assert "Traceback" not in err
        _check_output(Path(tmp) / "out", session)


@pytest.mark.parametrize("name", ["spikes_in_one_bin", "duplicated_spikes", "trials_outside",
                                  "odd_epoch_names", "spikes_outside"])
def test_damages_that_leave_usable_data_end_in_complete_tables(name, tmp_path):
    # Each of these damages leaves a recording that can be analysed: the run must finish
    # (not refuse), with a row for every unit.
    from hypothesis import find

    d = _base(0)

    class _Fixed:  # draws the smallest value of every strategy (deterministic)
        @staticmethod
        def draw(strategy, label=None):
            return find(strategy, lambda _: True)

    _damage(d, name, _Fixed())
    path = _write(d, tmp_path / "d.npz")
    session = load_session(path, bin_size=0.1)
    code, err = _fit(path, tmp_path / "out")
    assert code == 0, err
    _check_output(tmp_path / "out", session)


def test_not_nwb_and_corrupted_files_exit_2(tmp_path):
    from encodex.simulate import simulate_recording
    from encodex.io import write_bundle, write_nwb

    rec, _ = simulate_recording(seed=1, n_cells=2, duration_s=30.0, environments=("box",))
    nwb = write_nwb(rec, tmp_path / "good.nwb").read_bytes()
    npz = write_bundle(rec, tmp_path / "good.npz").read_bytes()
    rng = np.random.default_rng(0)
    cases = {
        "text.nwb": b"this is not NWB",
        "empty.nwb": b"",
        "empty.npz": b"",
        "cut.nwb": nwb[: len(nwb) // 3],
        "cut_late.nwb": nwb[: len(nwb) - 100],
        "cut.npz": npz[: len(npz) // 2],
        "zip_not_npz.npz": b"PK\x05\x06" + b"\x00" * 18,
    }
    # Flipped bytes in the middle of each file (a damaged download).
    for stem, blob in (("flip.nwb", nwb), ("flip.npz", npz)):
        b = bytearray(blob)
        at = rng.integers(len(b) // 4, 3 * len(b) // 4, 64)
        b[at[0]: at[0] + 4096] = rng.integers(0, 256, 4096, dtype=np.uint8).tobytes()
        cases[stem] = bytes(b)
    for name, blob in cases.items():
        p = tmp_path / name
        p.write_bytes(blob)
        code, err = _fit(p, tmp_path / f"out_{name}")
        lines = err.strip().splitlines()
        if name.startswith("flip") and code == 0:
            continue  # the damage may fall in unused bytes; a clean run is a correct result
        assert code == 2, (name, err)
        assert len(lines) == 1 and lines[0].startswith("encodex: error: "), (name, err)


def test_unwritable_output_folder_exits_2(tmp_path):
    d = _base(0)
    path = _write(d, tmp_path / "ok.npz")
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    # Runs as any user (root ignores permission bits): a file in the way of the folder.
    for out in (blocker, blocker / "sub", Path("/proc/encodex_out")):
        code, err = _fit(path, out)
        lines = err.strip().splitlines()
        assert code == 2, (out, err)
        assert len(lines) == 1 and lines[0].startswith("encodex: error: "), (out, err)
        assert str(out) in lines[0] or out.name in lines[0]
    assert blocker.read_text() == "not a folder"
