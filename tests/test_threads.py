"""encodex's entry points run their kernels on one BLAS thread and restore the caller's pools."""

import numpy as np
import pytest
from threadpoolctl import threadpool_info, threadpool_limits

from encodex.design import IntervalBasis, build_design
from encodex.errors import SettingsError
from encodex.fit import fit_poisson
from encodex.fit.solver import PenalisedPoissonNewton
from encodex.threads import kernel_threads, set_kernel_threads, single_threaded


def blas_threads() -> set:
    return {i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"}


def small_problem(seed=0, n=3000):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 1, n)
    design = build_design({"speed": x}, {"speed": IntervalBasis(8, (0.0, 1.0))})
    y = rng.poisson(0.2 * np.exp(np.sin(2 * np.pi * x)))
    return design, y


def test_fit_runs_on_one_thread_and_restores_the_callers_pools(monkeypatch):
    seen = []
    original = PenalisedPoissonNewton.gram

    def spy(self, mu):
        seen.append(blas_threads())
        return original(self, mu)

    monkeypatch.setattr(PenalisedPoissonNewton, "gram", spy)
    design, y = small_problem()
    with threadpool_limits(limits=2):
        before = blas_threads()
        fit = fit_poisson(design, y, np.log(0.02))
        after = blas_threads()
    assert fit.converged
    assert before == {2}
    assert seen and all(s == {1} for s in seen)
    assert after == before


def test_nested_calls_keep_the_limit_until_the_outermost_returns():
    inner_seen = []

    @single_threaded
    def inner():
        inner_seen.append(blas_threads())

    @single_threaded
    def outer():
        inner()
        # The inner call returned: the limit must still hold for the rest of the outer one.
        inner_seen.append(blas_threads())

    with threadpool_limits(limits=2):
        outer()
        assert blas_threads() == {2}
    assert inner_seen == [{1}, {1}]


def test_limit_can_be_switched_off_and_validated():
    @single_threaded
    def probe():
        return blas_threads()

    assert kernel_threads() == 1
    previous = set_kernel_threads(None)
    try:
        with threadpool_limits(limits=2):
            assert probe() == {2}
    finally:
        set_kernel_threads(previous)
    assert kernel_threads() == 1
    for bad in (0, -1, 1.5, True, "2"):
        with pytest.raises(SettingsError, match="kernel threads"):
            set_kernel_threads(bad)


def test_results_do_not_depend_on_the_thread_setting():
    design, y = small_problem(seed=3)
    a = fit_poisson(design, y, np.log(0.02))
    previous = set_kernel_threads(None)
    try:
        with threadpool_limits(limits=2):
            b = fit_poisson(design, y, np.log(0.02))
    finally:
        set_kernel_threads(previous)
    np.testing.assert_allclose(a.theta, b.theta, rtol=1e-8, atol=1e-10)
