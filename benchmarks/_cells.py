"""Running a simulation study's cells in worker processes (shared by the study scripts).

Each study script defines ``run_cell(spec) -> dict`` and keeps a per-trajectory cache in its
module; the workers must import the script as a module (not as ``__main__``) so that the
cache lives in the worker and is reused across its cells.
"""

from __future__ import annotations

import importlib
import json
import os
import sys


def import_worker(module: str, name: str = "run_cell"):
    """``module.name`` imported from this folder, importable by joblib's workers too."""
    here = os.path.dirname(os.path.abspath(__file__))
    os.environ["PYTHONPATH"] = os.pathsep.join(
        [here] + [x for x in os.environ.get("PYTHONPATH", "").split(os.pathsep) if x])
    if here not in sys.path:
        sys.path.insert(0, here)
    return getattr(importlib.import_module(module), name)


def run_cells(worker, specs, jobs: int, cells_out: str | None = None,
              batch_size: int = 2) -> list[dict]:
    """Every spec through ``worker`` on ``jobs`` processes, in completion order.

    With ``cells_out`` each result is appended to that JSON-lines file as it finishes, so a
    run cut short keeps what it computed.
    """
    from joblib import Parallel, delayed

    cells = []
    fh = open(cells_out, "w") if cells_out else None
    try:
        for c in Parallel(n_jobs=jobs, batch_size=batch_size,
                          return_as="generator_unordered")(delayed(worker)(s) for s in specs):
            cells.append(c)
            if fh:
                fh.write(json.dumps(c) + "\n")
                fh.flush()
    finally:
        if fh:
            fh.close()
    return cells


def box_environment(n_cells: int, minutes: float, seed: int, name: str = "bench"):
    """A simulated one-environment session ready for ``analyse_unit``, run defaults.

    The built-in cell types in the environment "box", 20 ms bins, every variable. Returns
    ``(session, truth, rows, env, settings)``: ``rows`` are the environment's usable bins
    (``session.unit_counts(u)[rows]`` are a cell's counts there), ``env`` its work (design
    built), ``settings`` the default ``RunSettings``.
    """
    import numpy as np

    from encodex.population.run import _environment_work
    from encodex.population.settings import RunSettings
    from encodex.population.work import environment_design
    from encodex.session import build_session
    from encodex.simulate import simulate_recording

    rec, truth = simulate_recording(seed=seed, n_cells=n_cells, duration_s=minutes * 60.0,
                                    environments=("box",))
    session = build_session(rec, bin_size=0.02)
    rows = np.flatnonzero(np.asarray(session.valid) & (np.asarray(session.environment) == 0))
    settings = RunSettings()
    env, _ = _environment_work(session, "box", settings, name)
    environment_design(env)
    return session, truth, rows, env, settings
