"""Keep freed memory in the worker's heap instead of returning it to the OS at every free.

A cell's analysis allocates and frees bins-long arrays (1.4 MB each at 60 minutes of 20 ms
bins) thousands of times. glibc's ``malloc`` serves blocks above its mmap threshold with a
fresh ``mmap`` and unmaps them on ``free``; every new array then costs a page fault per 4 KB
page. By default glibc raises the threshold to the size of the largest block freed (up to
32 MiB), so after the first cell such arrays are reused from the heap. Setting any malloc
tunable (dask's workers are started with ``MALLOC_TRIM_THRESHOLD_=65536``) switches that
adjustment off and leaves the threshold at 128 KB: measured on 10 cells of 30 minutes with
two dask workers, 0.3-0.7 million page faults and 1-2.6 s of system time per cell, 1.5x the
CPU of the same cells in joblib's workers (``benchmarks/RESULTS.md``, "dask workers and
glibc's allocator").

:func:`keep_freed_memory` fixes both thresholds with ``mallopt`` in the worker itself, so
it holds whatever the worker's environment says; :func:`heap_settings_plugin` applies it
to every worker of a dask cluster, present and future.
"""

from __future__ import annotations

import ctypes
import ctypes.util

#: Blocks below this many bytes come from the heap (glibc's largest dynamic value, 32 MiB).
MMAP_THRESHOLD = 32 * 2**20

#: Free memory at the top of the heap is returned to the OS only above this many bytes.
TRIM_THRESHOLD = 128 * 2**20

# mallopt parameter numbers of glibc's <malloc.h>.
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3


def keep_freed_memory() -> bool:
    """Set glibc's mmap and trim thresholds of this process (see the module docstring).

    Returns
    -------
    bool
        True when both were set; False where the C library is not glibc (macOS, musl,
        Windows), whose allocators are left as they are.
    """
    name = ctypes.util.find_library("c")
    if not name:
        return False
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
        libc.gnu_get_libc_version  # noqa: B018  (present in glibc only)
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    return bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)
                and mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD))


def heap_settings_plugin():
    """A dask ``WorkerPlugin`` that calls :func:`keep_freed_memory` on every worker."""
    from distributed.diagnostics.plugin import WorkerPlugin

    class HeapSettingsPlugin(WorkerPlugin):
        name = "encodex-heap-settings"

        def setup(self, worker):
            keep_freed_memory()

    return HeapSettingsPlugin()
