"""Read the output folder of ``encodex fit`` exactly as the contract in DEVELOPERS.md states.

The folder holds ``cells.csv``, ``models.csv``, ``run.json`` and ``units/<env>/<unit>.npz``.
Nothing here fits anything; it only reads and checks.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from encodex.errors import FileFormatError, InputError
from encodex.variables import VARIABLES, parse_label

__all__ = [
    "CELL_COLUMNS",
    "MODEL_COLUMNS",
    "CLASSIFIED_STATUS",
    "RunFolder",
    "load_run",
    "classified",
    "carried",
]

CELL_COLUMNS: tuple[str, ...] = (
    "unit", "environment", "n_spikes", "mean_rate_hz", "status", "reason", "variables",
    "bits_per_spike", "p_value", "gain_position", "gain_heading", "gain_speed",
    "gain_distance", "gain_time", "shuffle_p", "ambiguous_with",
)
MODEL_COLUMNS: tuple[str, ...] = (
    "unit", "environment", "model", "fold", "n_spikes_test", "loglik_test", "bits_per_spike",
    "pseudo_r2", "deviance_explained",
)

#: Status of a cell whose label is a statistical statement (anything else is excluded and
#: listed by reason).
CLASSIFIED_STATUS = "ok"


@dataclass(frozen=True)
class RunFolder:
    """One ``encodex fit`` output folder, read into memory.

    Attributes
    ----------
    path : Path
        The folder.
    cells : DataFrame
        ``cells.csv`` (unit and environment as strings, label column ``variables``).
    models : DataFrame
        ``models.csv`` (one row per unit, environment, model and fold).
    run : dict
        ``run.json`` as written by the fit stage.
    """

    path: Path
    cells: pd.DataFrame
    models: pd.DataFrame
    run: dict

    @property
    def environments(self) -> tuple[str, ...]:
        """Environment names in order of first appearance in ``cells.csv``."""
        return tuple(pd.unique(self.cells["environment"]))

    @property
    def tested_variables(self) -> tuple[str, ...] | None:
        """Variables the run was restricted to (``--variables``), or None for all."""
        v = setting(self.run, "variables")
        if isinstance(v, str):
            v = [x.strip() for x in v.split(",") if x.strip()]
        return tuple(v) if v else None

    def analysed_variables(self, environment: str) -> tuple[str, ...]:
        """Variables analysed in an environment (run.json ``environments``), canonical order.

        Folders without that record fall back to the ``variables`` setting, then to every
        variable that appears in a label or a ``gain_<v>`` column with a value there.
        """
        envs = self.run.get("environments")
        if isinstance(envs, dict) and isinstance(envs.get(environment), dict) \
                and "variables" in envs[environment]:
            return tuple(envs[environment]["variables"])
        if self.tested_variables:
            return self.tested_variables
        from encodex.variables import canonical_order

        sub = self.cells[self.cells["environment"] == environment]
        seen = {v for lab in sub["variables"] for v in carried(lab)}
        seen |= {c[5:] for c in sub.columns if c.startswith("gain_")
                 and pd.to_numeric(sub[c], errors="coerce").notna().any()}
        return canonical_order(seen)

    def unavailable_variables(self, environment: str) -> dict[str, str]:
        """Variables not analysed in an environment with the reason (run.json), if recorded."""
        envs = self.run.get("environments")
        if isinstance(envs, dict) and isinstance(envs.get(environment), dict):
            return dict(envs[environment].get("unavailable") or {})
        return {}

    @property
    def alpha(self) -> float:
        """Significance level of the model comparison recorded in ``run.json`` (default 0.05)."""
        return float(setting(self.run, "alpha", 0.05))

    def unit_file(self, environment: str, unit: str) -> Path:
        """Path of ``units/<environment>/<unit>.npz``.

        Names that are not safe as file names are written by the fit stage in a sanitised
        form (``encodex.population.checkpoint.safe_name``); that form is tried second.
        """
        units = self.path / "units"
        plain = units / str(environment) / f"{unit}.npz"
        # Names with path separators or dot-only parts ("../x", "a/b", "..") would point at
        # another unit's file or outside the folder: only the sanitised form is used for them.
        try:
            if _plain_part(environment) and _plain_part(unit) and plain.exists():
                return plain
        except OSError:  # e.g. a name too long for the file system: only the safe form exists
            pass
        return units / file_name_part(environment) / f"{file_name_part(unit)}.npz"

    def unit_arrays(self, environment: str, unit: str) -> dict[str, np.ndarray] | None:
        """Arrays of ``units/<environment>/<unit>.npz`` or None when the file is absent."""
        f = self.unit_file(environment, unit)
        if not f.exists():
            return None
        try:
            with np.load(f, allow_pickle=False) as z:
                # the fit stage may add a JSON record; only arrays of the contract matter here
                return {_current_key(k): z[k] for k in z.files
                        if "__" in k and not k.startswith("record__")}
        except (ValueError, OSError) as exc:
            raise FileFormatError(
                f"{f} is not a readable npz file ({exc}); re-run `encodex fit` for this unit"
            ) from None


def _current_key(key: str) -> str:
    """Key of a unit array in today's naming: folders written before the rate factor had its
    own name stored it as ``<term>__log_gain`` (same numbers, natural log)."""
    return key[:-len("__log_gain")] + "__log_modulation" if key.endswith("__log_gain") else key


def _plain_part(name) -> bool:
    name = str(name)
    return bool(name) and "/" not in name and "\\" not in name and name.strip(".") != "" \
        and "\x00" not in name


def file_name_part(name) -> str:
    """A unit id or environment name made safe as (part of) a file name.

    The same rule as the fit stage's unit files (``encodex.population.checkpoint.safe_name``):
    letters, digits, ``.``, ``_`` and ``-`` are kept, anything else becomes ``_`` and a short
    hash of the original is appended, so that a name read from a shared results folder (e.g.
    ``"../../x"``) can never place a file outside the folder chosen for the output.
    """
    from encodex.population.checkpoint import safe_name

    return safe_name(str(name))


def comparison_stem(a, b) -> str:
    """File stem of the comparison of environments ``a`` and ``b``: ``compare_<a>_vs_<b>``."""
    return f"compare_{file_name_part(a)}_vs_{file_name_part(b)}"


def setting(run: dict, key: str, default=None):
    """Look a setting up in ``run.json``: under ``settings`` first, then at the top level.

    ``correction`` is read as the test that was run: runs written before the sign-flip test's
    statistic became the pooled clipped improvement recorded "signflip" for the studentised
    test, and say so in
    their methods (``methods.selection``); they read as "signflip-t".
    """
    value = _raw_setting(run, key, default)
    if key == "correction" and value == "signflip":
        methods = run.get("methods", {}) if isinstance(run, dict) else {}
        text = methods.get("selection", "") if isinstance(methods, dict) else ""
        if isinstance(text, str) and "studentised" in text:
            return "signflip-t"
    return value


def _raw_setting(run, key, default):
    settings = run.get("settings", {}) if isinstance(run, dict) else {}
    if isinstance(settings, dict) and key in settings:
        return settings[key]
    if isinstance(run, dict) and key in run:
        return run[key]
    return default


def _read_csv(path: Path, columns: tuple[str, ...], required: tuple[str, ...]) -> pd.DataFrame:
    if not path.exists():
        raise InputError(
            f"{path} is missing; point at a folder written by `encodex fit` (it holds "
            f"cells.csv, models.csv and run.json)"
        )
    try:
        df = pd.read_csv(path, dtype={"unit": str, "environment": str}, keep_default_na=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise FileFormatError(f"{path} is not a readable CSV file ({exc}); re-run `encodex fit`")
    missing = [c for c in required if c not in df.columns]
    if missing:
        raise FileFormatError(
            f"{path.name} lacks column(s) {', '.join(missing)}; it was not written by this "
            f"version of `encodex fit` - re-run the fit"
        )
    for c in columns:
        if c not in df.columns:
            df[c] = np.nan
    return df


def load_run(path: str | Path) -> RunFolder:
    """Read an ``encodex fit`` output folder.

    Parameters
    ----------
    path : str or Path
        Folder holding ``cells.csv``, ``models.csv`` and ``run.json``.

    Returns
    -------
    RunFolder

    Raises
    ------
    InputError
        The folder or one of its files is missing.
    FileFormatError
        A file is unreadable or lacks required columns.
    """
    path = Path(path)
    if not path.is_dir():
        raise InputError(f"{path} is not a folder; pass the --out folder of `encodex fit`")
    cells = _read_csv(
        path / "cells.csv", CELL_COLUMNS,
        ("unit", "environment", "n_spikes", "status", "variables", "bits_per_spike"),
    )
    # cells that were not labelled have an empty label, never "none" (a statement about a cell)
    cells["variables"] = cells["variables"].astype(object).fillna("").astype(str)
    cells["status"] = cells["status"].astype(object).fillna("").astype(str)
    cells["reason"] = cells["reason"].astype(object).fillna("").astype(str)
    models = _read_csv(
        path / "models.csv", MODEL_COLUMNS, ("unit", "environment", "model", "bits_per_spike")
    )
    models["model"] = models["model"].fillna("none").astype(str)
    run_file = path / "run.json"
    if not run_file.exists():
        raise InputError(f"{run_file} is missing; re-run `encodex fit` to write it")
    try:
        run = json.loads(run_file.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise FileFormatError(f"{run_file} is not valid JSON ({exc}); re-run `encodex fit`")
    if not isinstance(run, dict):
        raise FileFormatError(f"{run_file} must hold a JSON object; re-run `encodex fit`")
    return RunFolder(path=path, cells=cells, models=models, run=run)


def classified(cells: pd.DataFrame) -> pd.DataFrame:
    """Rows whose label is a statistical statement (status ``ok``)."""
    return cells[cells["status"] == CLASSIFIED_STATUS]


def carried(label: str) -> tuple[str, ...]:
    """Variables in a label, e.g. ``"position+speed"`` -> ``("position", "speed")``."""
    return parse_label(str(label))


def variables_in(cells: pd.DataFrame, tested=None) -> tuple[str, ...]:
    """Variables to tabulate, canonical order.

    The variables the run tested (``tested``, from run.json's ``variables`` setting; None:
    every built-in variable) plus any other variable that appears in a label.
    """
    from encodex.variables import canonical_order

    seen = set(VARIABLES if not tested else tested)
    for lab in cells["variables"]:
        seen.update(carried(lab))
    return canonical_order(seen)
