"""SpikeGLM behaves as a scikit-learn estimator and predicts held-out spikes."""

import numpy as np
import pandas as pd
import pytest
from sklearn.base import clone
from sklearn.model_selection import KFold, cross_val_score

from encodex.compare.estimator import SpikeGLM
from encodex.errors import InputError


def _data(n=6000, seed=0):
    rng = np.random.default_rng(seed)
    heading = rng.uniform(0, 2 * np.pi, n)
    speed = rng.gamma(2.0, 0.08, n)
    rate = 3.0 * np.exp(1.0 * np.cos(heading - 1.0)) / np.i0(1.0)  # Hz, mean 3 Hz
    y = rng.poisson(rate * 0.05)
    X = pd.DataFrame({"heading": heading, "speed": speed})
    return X, y, rate


def test_sklearn_protocol_and_cross_val_score():
    X, y, rate = _data()
    est = SpikeGLM(variables=("heading",), bin_size=0.05)
    assert est.get_params()["variables"] == ("heading",)
    c = clone(est).set_params(basis_sizes={"heading": 8})
    assert c.basis_sizes == {"heading": 8} and est.basis_sizes is None
    scores = cross_val_score(est, X, y, cv=KFold(5))
    # The true tuning carries information: held-out gain clearly positive on every fold.
    assert np.all(scores > 0.05)
    # An untuned variable gives no held-out gain (near zero, possibly slightly negative).
    null = cross_val_score(SpikeGLM(variables=("speed",), bin_size=0.05), X, y, cv=KFold(5))
    assert np.all(null < 0.02) and null.mean() < scores.mean() / 5


def test_predict_recovers_rate_and_uses_training_constraint():
    X, y, rate = _data(n=20000)
    est = SpikeGLM(variables=("heading",), bin_size=0.05).fit(X[:15000], y[:15000])
    mu = est.predict(X[15000:])
    # Rate recovered within 15% over the held-out bins (20,000 bins, ~3000 spikes).
    rel = np.abs(mu / 0.05 - rate[15000:]) / rate[15000:]
    assert np.median(rel) < 0.15
    # Predicting a single row gives the same value as within a batch (no re-centring).
    one = est.predict(X.iloc[15000:15001])
    assert one[0] == pytest.approx(mu[0], rel=1e-12)
    arr = est.predict(X[["heading"]].to_numpy()[15000:])
    assert np.allclose(arr, mu)


def test_bad_features_are_clear_errors():
    X, y, _ = _data(n=500)
    with pytest.raises(InputError, match="lacks column"):
        SpikeGLM(variables=("position",)).fit(X, y)
    with pytest.raises(InputError, match="spike counts"):
        SpikeGLM(variables=("heading",)).fit(X, y - 0.5)
