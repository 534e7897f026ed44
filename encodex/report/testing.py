"""Write small folders in the layout of ``encodex fit`` output, for testing the report stage.

The folder follows the contract in DEVELOPERS.md column by column, so the report stage can be
tested without running a fit. The numbers are drawn from a fixed seed; the labels are given.
"""

from __future__ import annotations

import json
import zlib
from pathlib import Path

import numpy as np
import pandas as pd

from encodex.report.load import CELL_COLUMNS, MODEL_COLUMNS
from encodex.variables import VARIABLES, label, parse_label

__all__ = ["write_example_run"]

#: Default labels of the example: unit -> {environment: label or None for "too few spikes"}.
DEFAULT_LABELS: dict[str, dict[str, str | None]] = {
    "u01": {"arena_a": "position", "arena_b": "position"},
    "u02": {"arena_a": "position", "arena_b": "none"},
    "u03": {"arena_a": "heading", "arena_b": "heading"},
    "u04": {"arena_a": "position+speed", "arena_b": "position+speed"},
    "u05": {"arena_a": "speed", "arena_b": "speed"},
    "u06": {"arena_a": "none", "arena_b": "position"},
    "u07": {"arena_a": "none", "arena_b": "none"},
    "u08": {"arena_a": "position+heading", "arena_b": "heading"},
    "u09": {"arena_a": None, "arena_b": "time"},
    "u10": {"arena_a": "distance", "arena_b": None},
    "u11": {"arena_a": "position", "arena_b": "position"},
    "u12": {"arena_a": "none", "arena_b": "speed"},
}


def _curve(var: str, rng: np.random.Generator, shift: float = 0.0) -> dict[str, np.ndarray]:
    if var == "position":
        gx = np.linspace(0.025, 0.975, 20)
        gy = np.linspace(0.025, 0.975, 20)
        cx, cy = rng.uniform(0.3, 0.7, 2)
        xx, yy = np.meshgrid(gx, gy)
        lg = 1.5 * np.exp(-((xx - cx - shift) ** 2 + (yy - cy) ** 2) / (2 * 0.1**2)) - 0.3
        return {"position__grid_x": gx, "position__grid_y": gy, "position__log_modulation": lg,
                "position__se": np.full_like(lg, 0.1), "position__baseline_hz": np.asarray(1.5)}
    if var == "heading":
        g = np.linspace(0, 2 * np.pi, 36, endpoint=False)
        mu = rng.uniform(0, 2 * np.pi) + shift
        lg = np.cos(g - mu)
    else:
        hi = {"speed": 0.5, "distance": 2.0, "time": 10.0}.get(var, 1.0)
        g = np.linspace(0, hi, 30)
        lg = np.linspace(-0.5, 0.5, 30) * (1 + shift)
    return {f"{var}__grid": g, f"{var}__log_modulation": lg, f"{var}__se": np.full_like(g, 0.08),
            f"{var}__baseline_hz": np.asarray(2.0)}


def write_example_run(
    path: str | Path,
    labels: dict[str, dict[str, str | None]] | None = None,
    seed: int = 0,
    folds: int = 5,
    alpha: float = 0.05,
) -> Path:
    """Write ``cells.csv``, ``models.csv``, ``run.json`` and ``units/`` into ``path``.

    Parameters
    ----------
    path : str or Path
        Folder to create.
    labels : dict, optional
        unit -> {environment: label}; a label of None makes a "too few spikes" cell.
    seed : int
        Seed of the random gains, rates and curves.
    folds : int
        Folds per model in ``models.csv``.
    alpha : float
        Significance level written to ``run.json``.

    Returns
    -------
    Path
        The folder.
    """
    path = Path(path)
    path.mkdir(parents=True, exist_ok=True)
    labels = DEFAULT_LABELS if labels is None else labels
    rng = np.random.default_rng(seed)
    cells, models = [], []
    for unit, per_env in labels.items():
        for env_i, (env, lab) in enumerate(per_env.items()):
            row = {c: np.nan for c in CELL_COLUMNS}
            row.update(unit=unit, environment=env, ambiguous_with="", reason="")
            if lab is None:
                row.update(n_spikes=int(rng.integers(5, 90)), status="too few spikes",
                           reason="fewer than 100 spikes", variables="none",
                           mean_rate_hz=0.02)
                cells.append(row)
                continue
            vs = parse_label(lab)
            gains = {v: (float(rng.uniform(0.05, 0.6)) if v in vs else 0.0) for v in VARIABLES}
            total = sum(gains.values()) if vs else float(rng.normal(0, 0.002))
            row.update(n_spikes=int(rng.integers(800, 5000)), status="ok", variables=lab,
                       mean_rate_hz=float(rng.uniform(0.5, 4.0)), bits_per_spike=total,
                       p_value=float(rng.uniform(0, 0.01)) if vs else float(rng.uniform(0.1, 1)),
                       shuffle_p=np.nan)
            for v in VARIABLES:
                row[f"gain_{v}"] = gains[v]
            cells.append(row)
            # models scored: the mean-rate model, each single variable, the chosen one
            scored = {"none": 0.0}
            for v in VARIABLES:
                scored[v] = gains[v] if v in vs else -0.01
            scored[label(vs)] = total
            for model, mean_gain in scored.items():
                for f in range(folds):
                    bps = mean_gain + float(rng.normal(0, 0.02))
                    models.append({"unit": unit, "environment": env, "model": model,
                                   "fold": f, "n_spikes_test": int(row["n_spikes"] // folds),
                                   "loglik_test": -1000.0 + 50 * bps,
                                   "bits_per_spike": bps, "pseudo_r2": 0.1 * bps,
                                   "deviance_explained": 0.2 * bps})
            arrays: dict[str, np.ndarray] = {}
            for v in vs:
                arrays.update(_curve(v, np.random.default_rng(zlib.crc32(f"{unit}/{v}".encode())),
                                     shift=0.05 * env_i))
            edges = np.linspace(0, 1, 21)
            occ = rng.uniform(0.5, 3.0, (20, 20))
            centre = rng.uniform(0.3, 0.7, 2)
            xx, yy = np.meshgrid(edges[:-1] + 0.025, edges[:-1] + 0.025)
            rate = row["mean_rate_hz"] * (
                0.3 + 3 * np.exp(-((xx - centre[0]) ** 2 + (yy - centre[1]) ** 2) / 0.02)
                if "position" in vs else np.ones_like(xx))
            arrays.update(ratemap__occupancy_s=occ, ratemap__spikes=rng.poisson(rate * occ),
                          ratemap__edges_x=edges, ratemap__edges_y=edges)
            d = path / "units" / env
            d.mkdir(parents=True, exist_ok=True)
            np.savez(d / f"{unit}.npz", **arrays)
    pd.DataFrame(cells, columns=list(CELL_COLUMNS)).to_csv(path / "cells.csv", index=False)
    pd.DataFrame(models, columns=list(MODEL_COLUMNS)).to_csv(path / "models.csv", index=False)
    envs = list(dict.fromkeys(e for per_env in labels.values() for e in per_env))
    run = {
        "settings": {"bin_size": 0.02, "folds": folds, "seed": seed, "alpha": alpha,
                     "variables": list(VARIABLES), "min_spikes": 100, "exhaustive": False,
                     "shuffles": 0},
        "versions": {"encodex": "0.1.0"},
        "input": "example.nwb",
        "session": {"bin_size_s": 0.02, "environments": envs,
                    "summary": {"heading_source": "compass", "settings": {
                        "speed_smoothing_s": 0.2, "velocity_smoothing_s": 0.1, "max_gap_s": 0.5,
                        "heading_speed_threshold": 0.03}, "masked_bins": {"tracking_gap": 10}}},
        "environments": {e: {"variables": list(VARIABLES), "unavailable": {}} for e in envs},
        "timings": {"total_s": 1.0},
        "masked_bins": {"no position": 10},
        "dropped_spikes": 0,
    }
    (path / "run.json").write_text(json.dumps(run, indent=2))
    return path
