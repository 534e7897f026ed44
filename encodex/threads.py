"""Keep the numerical kernels on one thread, whoever calls them.

The matrices of one cell are small (X'WX of ~140 columns built from chunks of 4,096 rows, a
Cholesky of 136 x 136): a BLAS thread pool costs more in wake-ups and contention than it
gives, and on a busy machine (a notebook beside other work, or the workers of a population
run) it makes a fit several times slower. The command line's workers limit BLAS to one
thread already; :func:`single_threaded` does the same for the public entry points called from
Python (``fit_poisson``, ``refit_folds`` and everything built on them: ``SpikeGLM``,
``analyse_cell``, ``run_population`` in the calling process).

The limit is applied once, at the outermost decorated call: nested calls (``analyse_cell`` ->
``fit_poisson`` -> ...) only move a counter. It is restored on return, so the caller's own
numpy keeps its thread pool. ``set_kernel_threads(None)`` switches the
limit off (measured by ``benchmarks/bench_threads.py``).
"""

from __future__ import annotations

import functools
import threading

from encodex.errors import SettingsError

#: BLAS/OpenMP threads used inside encodex's entry points (None: leave the pools as they are).
_LIMIT: list = [1]
_LOCK = threading.Lock()
#: Decorated calls in progress (all threads) and the limiter to undo when the last returns.
_ACTIVE: dict = {"depth": 0}
_CONTROLLER: list = []


def set_kernel_threads(n: int | None) -> int | None:
    """Set how many BLAS threads encodex's kernels may use; returns the previous setting.

    Parameters
    ----------
    n : int or None
        Threads for BLAS and OpenMP inside encodex's entry points (default 1). ``None``
        leaves the libraries' thread pools as they are (OpenBLAS then uses every core).
    """
    if n is not None and (isinstance(n, bool) or not isinstance(n, int) or n < 1):
        raise SettingsError(f"kernel threads must be a whole number >= 1 or None; got {n!r}")
    previous = _LIMIT[0]
    _LIMIT[0] = n
    return previous


def kernel_threads() -> int | None:
    """The current setting of :func:`set_kernel_threads`."""
    return _LIMIT[0]


def _controller():
    # Built on first use, after numpy and scipy have loaded their BLAS libraries: a controller
    # only knows the libraries loaded when it was made. Reusing it costs ~15 us per limit
    # against ~0.8 ms for a fresh ``threadpool_limits`` (which scans every loaded library).
    if not _CONTROLLER:
        from threadpoolctl import ThreadpoolController

        import scipy.linalg  # noqa: F401  (loads scipy's BLAS so that the controller sees it)

        _CONTROLLER.append(ThreadpoolController())
    return _CONTROLLER[0]


def single_threaded(func):
    """Decorator: run ``func`` with BLAS limited to :func:`kernel_threads` threads.

    Re-entrant: BLAS thread pools are process-wide, so the first decorated call in progress
    (in any Python thread) sets the limit and the last one to return restores the caller's
    pools; nested calls only move a counter.
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        if _LIMIT[0] is None:
            return func(*args, **kwargs)
        _enter()
        try:
            return func(*args, **kwargs)
        finally:
            _leave()

    return wrapper


def _enter() -> None:
    with _LOCK:
        if _ACTIVE["depth"] == 0:
            _ACTIVE["limiter"] = _controller().limit(limits=_LIMIT[0])
        _ACTIVE["depth"] += 1


def _leave() -> None:
    with _LOCK:
        _ACTIVE["depth"] -= 1
        if _ACTIVE["depth"] == 0:
            _ACTIVE.pop("limiter").restore_original_limits()
