"""Worker heap settings (encodex.population.allocator)."""

import os
import subprocess
import sys

import pytest

from encodex.population.allocator import heap_settings_plugin, keep_freed_memory

# Allocates and fills a 2 MB array 200 times and prints the minor page faults it took. With
# MALLOC_TRIM_THRESHOLD_ set (as dask sets it for its workers) glibc no longer raises its
# mmap threshold, so without the fix every array is a fresh mapping: 512 faults each.
PROBE = """
import resource, sys
import numpy as np
from encodex.population.allocator import keep_freed_memory
if sys.argv[1] == "fix":
    assert keep_freed_memory()
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(200):
    a = np.ones(262144)
    del a
print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
"""


def _glibc() -> bool:
    return sys.platform.startswith("linux") and os.confstr("CS_GNU_LIBC_VERSION") is not None


@pytest.mark.skipif(not _glibc(), reason="the settings apply to glibc's allocator only")
def test_keep_freed_memory_stops_page_faults_under_dask_malloc_settings():
    env = {**os.environ, "MALLOC_TRIM_THRESHOLD_": "65536"}
    faults = {}
    for mode in ("plain", "fix"):
        out = subprocess.run([sys.executable, "-c", PROBE, mode], env=env, check=True,
                             capture_output=True, text=True).stdout
        faults[mode] = int(out.split()[-1])
    # 200 arrays x 512 pages without the fix; a few hundred at most with it.
    assert faults["plain"] > 50_000
    assert faults["fix"] < faults["plain"] / 20


@pytest.mark.skipif(not _glibc(), reason="the settings apply to glibc's allocator only")
def test_keep_freed_memory_reports_success_on_glibc():
    assert keep_freed_memory() is True


def test_heap_settings_plugin_is_a_worker_plugin_that_pickles():
    import cloudpickle
    from distributed.diagnostics.plugin import WorkerPlugin

    plugin = heap_settings_plugin()
    assert isinstance(plugin, WorkerPlugin)
    assert plugin.name == "encodex-heap-settings"
    restored = cloudpickle.loads(cloudpickle.dumps(plugin))
    restored.setup(worker=None)      # calls keep_freed_memory; must not raise
