"""NWB round trip: what encodex writes is what pynwb reads, and what encodex reads back.

Source: the reference reader is pynwb itself (``pynwb.NWBHDF5IO``, NWB 2.x schema: Position and
CompassDirection containers of SpatialSeries, the Units table with a ragged ``spike_times``
column, TimeIntervals for trials and epochs); the file checker is nwbinspector
(``nwbinspector.inspect_nwbfile``), the NWB community's best-practice checker.
"""

import numpy as np
from pynwb import NWBHDF5IO

from encodex.io import read_nwb, write_nwb
from encodex.session import build_session
from encodex.simulate import simulate_recording


def _sim():
    return simulate_recording(seed=4, n_cells=8, duration_s=40.0, trial_duration_s=(10, 20),
                              break_s=5.0)[0]


def test_pynwb_reads_what_encodex_wrote(tmp_path):
    rec = _sim()
    path = write_nwb(rec, tmp_path / "sim.nwb", spike_time_resolution_s=1 / 30000)
    with NWBHDF5IO(str(path), "r") as io:
        f = io.read()
        pos = f.processing["behavior"]["Position"]["position"]
        assert pos.unit == "meters"
        t = pos.starting_time + np.arange(pos.data.shape[0]) / pos.rate
        np.testing.assert_allclose(t, rec.timestamps, rtol=0, atol=1e-9)
        np.testing.assert_array_equal(np.isnan(pos.data[:]), np.isnan(rec.position))
        np.testing.assert_array_equal(pos.data[:][~np.isnan(pos.data[:])],
                                      rec.position[~np.isnan(rec.position)])
        hd = f.processing["behavior"]["CompassDirection"]["heading"]
        assert hd.unit == "radians"
        np.testing.assert_array_equal(np.nan_to_num(hd.data[:], nan=-1),
                                      np.nan_to_num(rec.heading, nan=-1))
        units = f.units.to_dataframe()
        assert list(units["unit_name"]) == list(rec.unit_ids)
        for st, ref in zip(units["spike_times"], rec.spike_times):
            np.testing.assert_array_equal(st, ref)
        assert f.units.resolution == 1 / 30000
        tr = f.trials.to_dataframe()
        np.testing.assert_array_equal(tr[["start_time", "stop_time"]].to_numpy(), rec.trials)
        ep = f.epochs.to_dataframe()
        assert list(ep["environment"]) == [e[2] for e in rec.epochs]
        assert [list(x) for x in ep["tags"]] == [[e[2]] for e in rec.epochs]
        np.testing.assert_array_equal(ep["start_time"], [e[0] for e in rec.epochs])


def test_encodex_round_trip_preserves_everything(tmp_path):
    rec = _sim()
    back = read_nwb(write_nwb(rec, tmp_path / "sim.nwb"))
    np.testing.assert_allclose(back.timestamps, rec.timestamps, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(back.position, rec.position)
    np.testing.assert_array_equal(back.heading, rec.heading)
    assert back.unit_ids == rec.unit_ids
    for a, b in zip(back.spike_times, rec.spike_times):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(back.trials, rec.trials)
    assert back.epochs == rec.epochs
    s0, s1 = build_session(rec), build_session(back)
    assert (s0.counts != s1.counts).nnz == 0
    np.testing.assert_array_equal(s0.valid, s1.valid)
    for k in s0.covariates:
        np.testing.assert_allclose(s1.covariates[k], s0.covariates[k], rtol=1e-9, atol=1e-12)


def test_irregular_timestamps_are_written_as_timestamps(tmp_path):
    rec = _sim()
    jitter = rec.timestamps + np.random.default_rng(0).uniform(0, 0.004, rec.timestamps.size)
    from encodex.io import make_recording

    rec2 = make_recording(jitter, rec.position, rec.spikes, heading=rec.heading)
    path = write_nwb(rec2, tmp_path / "irregular.nwb")
    with NWBHDF5IO(str(path), "r") as io:
        pos = io.read().processing["behavior"]["Position"]["position"]
        np.testing.assert_array_equal(pos.timestamps[:], jitter)
    np.testing.assert_array_equal(read_nwb(path).timestamps, jitter)


def test_simulated_file_passes_nwbinspector(tmp_path):
    from nwbinspector import Importance, inspect_nwbfile

    path = write_nwb(_sim(), tmp_path / "sim.nwb", spike_time_resolution_s=1 / 30000)
    found = list(inspect_nwbfile(nwbfile_path=str(path)))
    assert [m for m in found if m.importance == Importance.CRITICAL] == []
    assert [m for m in found if m.importance == Importance.BEST_PRACTICE_VIOLATION] == []
