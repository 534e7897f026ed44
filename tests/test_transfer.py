"""What a population task carries: spike counts by their non-zero bins, fits without
bins-long arrays; and the check of the X'WX precision setting the workers receive."""

import pickle

import numpy as np
import pytest
from scipy import sparse

from encodex.design import IntervalBasis, build_design
from encodex.fit import fit_poisson
from encodex.population.work import SpikeColumn


def test_spike_column_round_trips_every_count_and_is_small():
    rng = np.random.default_rng(4)
    y = rng.poisson(0.08, size=(20_000, 3))
    y[17, 2] = 70_000                        # a count that needs 32 bits
    m = sparse.csc_array(y)
    for j in range(3):
        col = SpikeColumn.from_csc(m, j)
        back = col.toarray()
        assert back.dtype == np.int64
        np.testing.assert_array_equal(back, y[:, j])
    small = SpikeColumn.from_csc(m, 0)
    assert small.counts.dtype == np.uint8
    # ~8% of bins hold a spike: at least 5x fewer bytes than the int64 column.
    assert len(pickle.dumps(small)) * 5 < len(pickle.dumps(y[:, 0].copy()))


def test_spike_column_of_a_silent_unit_and_unsorted_storage():
    m = sparse.csc_array((np.array([2, 1]), np.array([9, 3]), np.array([0, 2, 2])),
                         shape=(12, 2))      # column 0 with rows stored out of order
    np.testing.assert_array_equal(SpikeColumn.from_csc(m, 0).toarray(),
                                  [0, 0, 0, 1, 0, 0, 0, 0, 0, 2, 0, 0])
    assert SpikeColumn.from_csc(m, 1).toarray().tolist() == [0] * 12


def test_fit_keeps_a_constant_offset_as_one_number():
    rng = np.random.default_rng(2)
    x = rng.uniform(0, 1, 4000)
    design = build_design({"speed": x}, {"speed": IntervalBasis(8, (0.0, 1.0))})
    y = rng.poisson(0.3 * np.exp(np.cos(3 * x)))
    full = np.full(x.size, np.log(0.02))
    fit = fit_poisson(design, y, full)
    assert isinstance(fit.offset, float) and fit.offset == np.log(0.02)
    np.testing.assert_allclose(fit.predict(design, rows=np.arange(10)),
                               np.exp(design.linear_predictor(fit.theta)[:10] + full[:10]))
    varying = full + 0.1 * np.sin(x)
    assert np.shape(fit_poisson(design, y, varying, lambdas=fit.lambdas).offset) == x.shape


def test_unknown_gram_precision_is_a_settings_error():
    from encodex.errors import SettingsError
    from encodex.population.settings import RunSettings

    with pytest.raises(SettingsError, match="gram_precision"):
        build_design({"speed": np.linspace(0, 1, 50)}, {"speed": IntervalBasis(6, (0.0, 1.0))},
                     gram_precision="half")
    with pytest.raises(SettingsError, match="--gram-precision single"):
        RunSettings(gram_precision="quad")
