"""Rhythm phase: kernel, traces with gaps, bin grid, sessions with an LFP, NWB LFP reading."""

import numpy as np
import pytest

from encodex.errors import FileFormatError, InputError, SettingsError
from encodex.io import Signal, make_recording, read_recording, write_bundle, write_nwb
from encodex.io.bundle import read_bundle
from encodex.rhythm import band_phase, check_bin_size, lfp_phase, phase_on_bins
from encodex.session import build_session, load_session
from encodex.variables import VARIABLES


def _circ_err(a, b):
    return np.abs(np.angle(np.exp(1j * (np.asarray(a) - np.asarray(b)))))


def _sine(rate=500.0, dur=20.0, f=8.0, phi0=0.7, t0=0.0):
    t = t0 + np.arange(int(dur * rate)) / rate
    return t, np.cos(2 * np.pi * f * (t - t0) + phi0), np.mod(2 * np.pi * f * (t - t0) + phi0,
                                                               2 * np.pi)


def test_band_phase_is_in_range_and_follows_a_sinusoid():
    t, x, true = _sine()
    p = band_phase(x, 500.0)
    assert p.shape == x.shape
    assert np.all((p >= 0) & (p < 2 * np.pi))
    mid = (t > 1.0) & (t < t[-1] - 1.0)
    assert _circ_err(p[mid], true[mid]).max() < 0.02
    # a sinusoid outside the band is strongly attenuated, so its "phase" is not tracked:
    # check the kernel really filters (a wrong, unfiltered implementation would follow it)
    x2 = np.cos(2 * np.pi * 8.0 * t) + 5.0 * np.cos(2 * np.pi * 30.0 * t)
    p2 = band_phase(x2, 500.0)
    assert _circ_err(p2[mid], np.mod(2 * np.pi * 8.0 * t[mid], 2 * np.pi)).max() < 0.05


def test_band_phase_of_a_prime_length_trace_matches_a_padded_one():
    t, x, true = _sine(rate=499.0, dur=20.0)
    n = 9973  # prime: the FFT runs on a padded fast length
    p = band_phase(x[:n], 499.0)
    mid = (t[:n] > 2.0) & (t[:n] < t[n - 1] - 2.0)
    assert _circ_err(p[mid], true[:n][mid]).max() < 0.02


@pytest.mark.parametrize("band", [(0, 10), (10, 6), (6, 300), ("a", 3), (5,)])
def test_band_phase_refuses_bad_bands(band):
    with pytest.raises(SettingsError, match="band"):
        band_phase(np.zeros(5000), 500.0, band=band)


def test_band_phase_refuses_nan_short_and_multichannel():
    x = np.cos(np.arange(5000) / 10.0)
    x[100] = np.nan
    with pytest.raises(InputError, match="NaN"):
        band_phase(x, 500.0)
    with pytest.raises(InputError, match="shorter than two periods"):
        band_phase(np.ones(50), 500.0)
    with pytest.raises(InputError, match="one channel"):
        band_phase(np.ones((500, 2)), 500.0)
    with pytest.raises(SettingsError, match="order"):
        band_phase(np.cos(np.arange(5000) / 10.0), 500.0, order=0)


def test_lfp_phase_splits_at_gaps_and_marks_edges():
    t, x, true = _sine(rate=500.0, dur=20.0)
    keep = (t < 8.0) | (t >= 10.0)  # a 2 s hole in the trace
    x = x.copy()
    x[(t > 14.0) & (t < 14.01)] = np.nan  # a few NaN samples
    tt, pp = lfp_phase(t[keep], x[keep])
    edge = 6.0 / 6.0
    known = np.isfinite(pp)
    # unknown near every stretch edge, known well inside
    for a, b in [(0.0, 8.0), (10.0, 14.0), (14.01, 20.0)]:
        inner = (tt > a + edge + 0.01) & (tt < b - edge - 0.01)
        near = ((tt >= a) & (tt < a + edge - 0.01)) | ((tt > b - edge + 0.01) & (tt <= b))
        assert known[inner].all()
        assert not known[near].any()
    # a separator sample sits in the hole so that nothing bridges it
    assert np.any((tt > 8.0) & (tt < 10.0) & ~known)
    ok = known & (tt > 0)
    assert _circ_err(pp[ok], np.interp(tt[ok], t, np.unwrap(true)) % (2 * np.pi)).max() < 0.05


def test_lfp_phase_decimates_fast_traces():
    rate = 20000.0
    t = np.arange(int(6 * rate)) / rate
    rng = np.random.default_rng(0)
    x = np.cos(2 * np.pi * 7.0 * t) + 0.3 * rng.standard_normal(t.size)
    tt, pp = lfp_phase(t, x)
    assert tt.size < t.size / 10  # decimated
    ok = np.isfinite(pp)
    assert ok.sum() > 0.5 * tt.size
    assert _circ_err(pp[ok], 2 * np.pi * 7.0 * tt[ok]).max() < 0.1


def test_lfp_phase_checks_its_inputs():
    with pytest.raises(InputError, match="timestamps"):
        lfp_phase([0.0, 0.0, 1.0], [1.0, 2.0, 3.0])
    with pytest.raises(InputError, match="samples"):
        lfp_phase([0.0, 1.0], [1.0, 2.0, 3.0])
    with pytest.raises(SettingsError, match="band"):
        lfp_phase(np.arange(100) / 10.0, np.ones(100))  # 10 Hz sampling: theta above Nyquist


def test_phase_on_bins_takes_the_centre_phase_along_the_short_arc():
    # phase advancing 2*pi*8 rad/s sampled at 250 Hz; bins of 20 ms starting off the samples
    rate, f = 250.0, 8.0
    t = np.arange(0, 5, 1 / rate)
    p = np.mod(2 * np.pi * f * t, 2 * np.pi)
    t0, bs, n = 0.013, 0.02, 200
    out = phase_on_bins(t, p, t0, bs, n)
    centres = t0 + (np.arange(n) + 0.5) * bs
    assert _circ_err(out, 2 * np.pi * f * centres).max() < 1e-9
    # unknown samples make their neighbourhood unknown; outside the trace is unknown
    p2 = p.copy()
    p2[500] = np.nan
    out2 = phase_on_bins(t, p2, t0, bs, n + 100)
    centres_all = t0 + (np.arange(n + 100) + 0.5) * bs
    near = np.abs(centres_all - t[500]) < 1 / rate
    assert np.isnan(out2[near]).all() and near.any()
    assert np.isnan(out2[centres_all > t[-1]]).all()
    assert np.isfinite(out2[~near & (centres_all < t[-1])]).all()


def test_check_bin_size():
    check_bin_size(0.02, (6, 10))
    with pytest.raises(SettingsError, match="half a cycle"):
        check_bin_size(0.1, (6, 10))


# --------------------------------------------------------------------------- sessions


def _recording_with_lfp(f=8.0, rate=400.0, dur=40.0, lfp_span=None):
    ts = np.arange(0, dur, 0.02)
    pos = np.column_stack([0.5 + 0.3 * np.cos(ts / 5), 0.5 + 0.3 * np.sin(ts / 3)])
    a, b = lfp_span or (0.0, dur)
    tl = np.arange(a, b, 1 / rate)
    lfp = Signal(tl, 1e-4 * np.cos(2 * np.pi * f * tl), source="test lfp")
    spikes = {"u0": np.sort(np.random.default_rng(1).uniform(0, dur, 200))}
    return make_recording(ts, pos, spikes, lfp=lfp)


def test_build_session_adds_phase_and_masks_unknown_bins():
    rec = _recording_with_lfp(lfp_span=(5.0, 40.0))
    s = build_session(rec, bin_size=0.02)
    ph = np.asarray(s.covariates["phase"])
    t = s.time
    inner = (t > 5.0 + 1.1) & (t < 40.0 - 1.1)
    assert _circ_err(ph[inner], 2 * np.pi * 8.0 * t[inner]).max() < 0.02
    unknown = ~np.isfinite(ph)
    assert unknown[t < 5.0].all()
    assert s.summary["masked_bins"]["phase_unknown"] == int(unknown.sum())
    assert not (s.valid & unknown).any()
    assert s.available_variables(0) == VARIABLES[:3] + ("phase",)  # no trials here
    assert s.kinds["phase"] == "circular"
    assert s.summary["phase"]["band_hz"] == [6.0, 10.0]
    # the restricted session keeps phase
    r = s.restrict(0)
    assert "phase" in r.covariates and np.isfinite(r.covariates["phase"]).all()


def test_build_session_without_lfp_is_unchanged():
    rec = _recording_with_lfp()
    plain = make_recording(rec.timestamps, rec.position, rec.spikes)
    s = build_session(plain)
    assert "phase" not in s.covariates
    assert "phase_unknown" not in s.summary["masked_bins"]
    assert s.variable_kinds == {}


def test_build_session_refuses_bins_too_long_for_the_band():
    with pytest.raises(SettingsError, match="half a cycle"):
        build_session(_recording_with_lfp(), bin_size=0.1)


def test_phase_band_changes_the_rhythm_followed():
    rec = _recording_with_lfp(f=3.0)
    s = build_session(rec, phase_band=(2.0, 4.0))
    ph = np.asarray(s.covariates["phase"])
    ok = np.isfinite(ph)
    assert ok.mean() > 0.8  # 6 periods of 2 Hz (3 s) unknown at each end of 40 s
    assert _circ_err(ph[ok], 2 * np.pi * 3.0 * s.time[ok]).max() < 0.03


# --------------------------------------------------------------------------- NWB


def _nwb_with_ephys(path, rec, n_ch=3, where="acquisition", rate=400.0, dur=40.0):
    """NWB file with a multi-channel ElectricalSeries; channel 1 carries 8 Hz, others 3 Hz."""
    from pynwb import NWBHDF5IO
    from pynwb.ecephys import LFP, ElectricalSeries

    write_nwb(rec, path)
    with NWBHDF5IO(str(path), "a") as io:
        nwb = io.read()
        dev = nwb.create_device(name="probe")
        grp = nwb.create_electrode_group(name="g", description="g", location="CA1", device=dev)
        for _ in range(n_ch):
            nwb.add_electrode(group=grp, location="CA1")
        region = nwb.create_electrode_table_region(list(range(n_ch)), "all")
        t = np.arange(int(dur * rate)) / rate
        data = np.tile(np.cos(2 * np.pi * 3.0 * t)[:, None], (1, n_ch))
        data[:, 1] = np.cos(2 * np.pi * 8.0 * t)
        data = (data * 1e4).astype(np.int16)  # stored as integers with a conversion
        kw = dict(name="ElectricalSeries", data=data, electrodes=region, starting_time=0.0,
                  rate=rate, conversion=1e-8)
        if where == "acquisition":
            nwb.add_acquisition(ElectricalSeries(**kw))
        else:
            mod = nwb.create_processing_module("ecephys", "lfp")
            lfp = LFP(name="LFP")
            mod.add(lfp)
            lfp.create_electrical_series(**kw)
        io.write(nwb)
    return path


@pytest.fixture(scope="module")
def base_recording():
    rec = _recording_with_lfp()
    return make_recording(rec.timestamps, rec.position, rec.spikes)


@pytest.fixture(scope="module")
def ephys_files(tmp_path_factory, base_recording):
    d = tmp_path_factory.mktemp("ephys")
    return {where: _nwb_with_ephys(d / f"{where}.nwb", base_recording, where=where)
            for where in ("acquisition", "processing")}


@pytest.mark.parametrize("where,path", [
    ("acquisition", "acquisition/ElectricalSeries"),
    ("processing", "processing/ecephys/LFP"),
])
def test_read_lfp_channel_from_nwb(ephys_files, where, path):
    f = ephys_files[where]
    rec = read_recording(f, lfp=path, lfp_channel=1)
    assert rec.lfp is not None and rec.lfp.values.size == 16000
    assert np.allclose(rec.lfp.values.max(), 1e-4, rtol=1e-3)  # conversion applied (volts)
    assert "channel 1" in rec.provenance["lfp"]
    s = build_session(rec)
    ph = np.asarray(s.covariates["phase"])
    ok = np.isfinite(ph)
    # channel 1 (8 Hz) was read, not channel 0 (3 Hz, outside the band)
    assert _circ_err(ph[ok], 2 * np.pi * 8.0 * s.time[ok]).max() < 0.03


def test_load_session_passes_lfp_options(ephys_files):
    s = load_session(ephys_files["processing"], lfp="processing/ecephys/LFP/ElectricalSeries",
                     lfp_channel=1, phase_band=(7.0, 9.0))
    assert s.summary["settings"]["phase_band"] == [7.0, 9.0]
    assert s.summary["objects"]["lfp"].endswith("LFP/ElectricalSeries channel 1")


def test_read_lfp_errors(ephys_files):
    f = ephys_files["acquisition"]
    with pytest.raises(SettingsError, match="out of range.*3 channel"):
        read_recording(f, lfp="acquisition/ElectricalSeries", lfp_channel=3)
    with pytest.raises(FileFormatError, match="not an ElectricalSeries"):
        read_recording(f, lfp="processing/behavior/Position")
    with pytest.raises(FileFormatError, match="no object"):
        read_recording(f, lfp="acquisition/LFP")


def test_lfp_roundtrip_nwb_and_bundle(tmp_path, base_recording):
    rec = _recording_with_lfp(rate=250.0)
    p = write_nwb(rec, tmp_path / "r.nwb")
    back = read_recording(p, lfp="processing/ecephys/LFP")
    np.testing.assert_allclose(back.lfp.values, rec.lfp.values)
    np.testing.assert_allclose(back.lfp.times, rec.lfp.times, atol=1e-9)
    # without lfp= the LFP is not read
    assert read_recording(p).lfp is None
    b = write_bundle(rec, tmp_path / "r.npz")
    back = read_bundle(b)
    np.testing.assert_array_equal(back.lfp.values, rec.lfp.values)
    with pytest.raises(SettingsError, match="NWB"):
        read_recording(b, lfp="processing/ecephys/LFP")


def test_simulated_nwb_with_lfp_passes_nwbinspector(tmp_path):
    from nwbinspector import Importance, inspect_nwbfile

    from encodex.simulate import simulate_to_files

    paths = simulate_to_files(tmp_path, seed=3, n_cells=2, duration_s=20.0,
                              environments=("a",), lfp_rate_hz=250.0, n_phase_cells=1)
    found = [m for m in inspect_nwbfile(nwbfile_path=str(paths["nwb"]))
             if m.importance in (Importance.CRITICAL, Importance.PYNWB_VALIDATION)]
    assert found == [], [m.message for m in found]


def test_wide_band_series_is_decimated_while_read_in_chunks(tmp_path, base_recording,
                                                           monkeypatch):
    import encodex.io.nwb as nwb_mod

    rate = 20000.0
    f = _nwb_with_ephys(tmp_path / "raw.nwb", base_recording, n_ch=2, rate=rate, dur=30.0)
    monkeypatch.setattr(nwb_mod, "LFP_CHUNK_SAMPLES", 1 << 30)
    whole = read_recording(f, lfp="acquisition/ElectricalSeries", lfp_channel=1)
    monkeypatch.setattr(nwb_mod, "LFP_CHUNK_SAMPLES", 50_000)  # twelve chunks
    rec = read_recording(f, lfp="acquisition/ElectricalSeries", lfp_channel=1)
    assert rec.lfp.values.size == 30000  # 20 kHz -> 1 kHz
    assert rec.lfp.rate_hz == pytest.approx(1000.0)
    assert "decimated from 20000 Hz" in rec.provenance["lfp_note"]
    np.testing.assert_allclose(rec.lfp.values, whole.lfp.values, rtol=0, atol=1e-9)
    # the decimated trace is the 8 Hz channel, undistorted
    np.testing.assert_allclose(rec.lfp.values, 1e-4 * np.cos(2 * np.pi * 8.0 * rec.lfp.times),
                               atol=2e-7)
