"""Compare the labels of two recordings: two ``encodex fit`` folders, cells matched by a table.

Environments are often recorded on different days or in different sessions, each fitted into
its own folder, with units matched across them by the lab's own method. This module puts one
environment of folder A beside one environment of folder B and runs the comparison of
:mod:`encodex.report.environments` on them, unchanged:

- cells matched by the matching table (CSV: unit in A, unit in B; identical ids when no
  table is given) and classified in both: the paired tests (McNemar per variable, Wilcoxon
  signed-rank on gains, label transitions, active/silent cells, stability of the response
  curves);
- cells without a partner in the other recording: the unpaired tests (Fisher or chi-square
  per variable, Mann-Whitney U on gains), a separate family with its own Benjamini-Hochberg
  correction;
- provenance of each folder (path, input, data fingerprint, versions, finish time, settings).

Response curves of matched cells are compared in each environment's own coordinates:
positions are expressed as fractions of each arena's tracked extent (0 to 1 along x and y),
so arenas of different size or with a different tracking origin are compared point for point;
other variables keep their units (angles in radians, speed in m/s, distance in m, time in s).

Folders fitted with settings that change what a label means (bin width, variables, folds,
test, level, correction, fold fits, basis sizes, spike threshold) are refused with one line
naming the difference.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from encodex.errors import FileFormatError, InputError, OutputError, SettingsError
from encodex.report.environments import EnvironmentComparison, compare_environments
from encodex.report.load import CLASSIFIED_STATUS, RunFolder, load_run, setting

__all__ = [
    "RecordingComparison",
    "compare_recordings",
    "read_matching",
    "check_compatible",
    "own_coordinates",
    "provenance",
    "write_recording_comparison",
    "COMPATIBLE_SETTINGS",
]

#: Settings that must agree between folders (name in run.json -> words for the message).
COMPATIBLE_SETTINGS = {
    "bin_size_s": "bin size (s)",
    "variables": "variables",
    "folds": "number of folds",
    "chunks_per_fold": "chunks per fold",
    "alpha": "alpha of the test",
    "correction": "multiple-candidate correction",
    "exhaustive": "search (exhaustive or forward)",
    "fold_fits": "fold fits",
    "basis_sizes": "basis sizes",
    "min_spikes": "minimum spikes",
    "drift": "slow-drift term",
    "min_step_gain": "effect-size floor of later steps",
}

#: What a setting missing from an older run.json meant (it did not exist then).
_BEFORE_SETTING = {"drift": False, "min_step_gain": 0.0}

#: Column names accepted for the matching table (first two columns otherwise).
_MATCH_COLUMNS = ("unit_a", "unit_b")


@dataclass(frozen=True)
class RecordingComparison:
    """Comparison of one environment of recording A with one of recording B.

    Attributes
    ----------
    a, b : str
        Names of the two sides (``<folder>.<environment>`` unless given).
    paired : EnvironmentComparison or None
        Paired tests on the matched cells classified in both (None when none is).
    unpaired : EnvironmentComparison or None
        Unpaired tests on the cells without a partner (None when every cell has one).
    matching : DataFrame
        ``unit_a, unit_b, status_a, status_b, label_a, label_b`` of every matched pair.
    unmatched : DataFrame
        ``side, unit, status, label`` of cells without a partner.
    provenance : dict
        ``{"a": ..., "b": ...}``: folder, environment, input, data fingerprint, versions,
        finish time and settings of each side; ``matching`` says where the pairs came from.
    coordinates : str
        "own" (positions as fractions of each arena) or "shared" (metres as recorded).
    notes : tuple of str
    """

    a: str
    b: str
    paired: EnvironmentComparison | None
    unpaired: EnvironmentComparison | None
    matching: pd.DataFrame
    unmatched: pd.DataFrame
    provenance: dict
    coordinates: str = "own"
    notes: tuple[str, ...] = field(default_factory=tuple)

    @property
    def comparisons(self) -> list[EnvironmentComparison]:
        """The comparisons made (paired first)."""
        return [c for c in (self.paired, self.unpaired) if c is not None]


def own_coordinates(arrays: dict | None) -> dict | None:
    """Unit arrays with positions expressed as fractions of the arena's tracked extent.

    The extent is that of the occupancy map (``ratemap__edges_x``, ``ratemap__edges_y``),
    else the range of the fitted grid. Other variables are returned unchanged.
    """
    if arrays is None or "position__grid_x" not in arrays:
        return arrays
    out = dict(arrays)
    for axis in ("x", "y"):
        grid = np.asarray(arrays[f"position__grid_{axis}"], float)
        edges = arrays.get(f"ratemap__edges_{axis}")
        lo, hi = ((float(edges[0]), float(edges[-1])) if edges is not None and len(edges) > 1
                  else (float(grid.min()), float(grid.max())))
        if hi > lo:
            out[f"position__grid_{axis}"] = (grid - lo) / (hi - lo)
            if edges is not None:
                out[f"ratemap__edges_{axis}"] = (np.asarray(edges, float) - lo) / (hi - lo)
    return out


class _PairedView(RunFolder):
    """Two recordings seen as one fit folder with two environments (names ``a`` and ``b``).

    Unit ids of B are replaced by their partner's id in A (matched cells) so that the
    comparison of environments pairs them; unit arrays are read from the folder each row
    came from.
    """

    def __init__(self, cells: pd.DataFrame, run: dict, sources: dict, coordinates: str):
        super().__init__(path=Path("."), cells=cells,
                         models=pd.DataFrame(columns=["unit", "environment", "model"]), run=run)
        object.__setattr__(self, "_sources", sources)
        object.__setattr__(self, "_coordinates", coordinates)

    def unit_arrays(self, environment: str, unit: str):
        folder, env, original = self._sources[(environment, unit)]
        arrays = folder.unit_arrays(env, original)
        return own_coordinates(arrays) if self._coordinates == "own" else arrays


def _env_variables(run: RunFolder, env: str):
    info = run.run.get("environments", {}) if isinstance(run.run, dict) else {}
    v = info.get(env, {}).get("variables") if isinstance(info.get(env), dict) else None
    return tuple(v) if v is not None else run.tested_variables


def _setting_value(run: RunFolder, env: str, key: str):
    if key == "bin_size_s":
        s = run.run.get("session", {}) if isinstance(run.run, dict) else {}
        b = s.get("bin_size_s") if isinstance(s, dict) else None
        b = setting(run.run, "bin_size") if b is None else b
        return None if b is None else round(float(b), 9)
    if key == "variables":
        return _env_variables(run, env)
    v = setting(run.run, key)
    if v is None and key in _BEFORE_SETTING:
        v = _BEFORE_SETTING[key]
    if key == "basis_sizes" and isinstance(v, dict):
        return tuple(sorted((str(k), v[k]) for k in v))
    if isinstance(v, list):
        return tuple(tuple(x) if isinstance(x, list) else x for x in v)
    return v


def check_compatible(run_a: RunFolder, env_a: str, run_b: RunFolder, env_b: str,
                     names: tuple[str, str] = ("A", "B")) -> None:
    """Refuse folders fitted with settings under which their labels mean different things.

    Raises
    ------
    SettingsError
        One line naming the first setting that differs and both values.
    """
    for key, words in COMPATIBLE_SETTINGS.items():
        va, vb = _setting_value(run_a, env_a, key), _setting_value(run_b, env_b, key)
        if va != vb:
            def show(v):
                return ",".join(map(str, v)) if isinstance(v, tuple) else str(v)
            raise SettingsError(
                f"the folders were fitted with different {words}: {show(va)} in {names[0]} "
                f"({run_a.path}) and {show(vb)} in {names[1]} ({run_b.path}); fit both with "
                f"the same settings to compare them"
            )


def read_matching(path, units_a, units_b) -> pd.DataFrame:
    """Read a matching table: one row per matched cell, unit in A then unit in B.

    The columns may be named ``unit_a, unit_b``; otherwise the first two columns are used.
    Ids are read as text. Every id must exist in its folder and appear at most once.

    Returns
    -------
    DataFrame
        ``unit_a, unit_b``.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"matching table {path} does not exist; give a CSV file with columns "
                         f"unit_a,unit_b")
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise FileFormatError(f"{path} is not a readable CSV file ({exc}); write one row per "
                              f"matched cell: unit_a,unit_b") from None
    return checked_matching(df, units_a, units_b, path.name)


def checked_matching(df: pd.DataFrame, units_a, units_b, what: str = "the matching table"):
    """Columns ``unit_a, unit_b`` of a matching frame, ids checked against both folders.

    Columns named ``unit_a, unit_b`` are used, otherwise the first two columns.
    """
    if df.shape[1] < 2:
        raise InputError(f"{what} needs two columns (unit in A, unit in B); it has "
                         f"{df.shape[1]}")
    cols = list(_MATCH_COLUMNS) if set(_MATCH_COLUMNS) <= set(df.columns) else list(df.columns[:2])
    m = df[cols].astype(str).copy()
    m.columns = list(_MATCH_COLUMNS)
    m = m.apply(lambda s: s.str.strip())
    m = m[(m["unit_a"] != "") | (m["unit_b"] != "")]
    for col, known, side in (("unit_a", set(units_a), "A"), ("unit_b", set(units_b), "B")):
        unknown = [u for u in m[col] if u not in known]
        if unknown:
            raise InputError(f"{what} names unit(s) {unknown[:3]} that are not in folder "
                             f"{side}; check the columns (unit in A, unit in B)")
        dup = m[col][m[col].duplicated()]
        if len(dup):
            raise InputError(f"unit {dup.iloc[0]} appears twice in column {col} of {what}; a "
                             f"cell can be matched to one cell only")
    return m.reset_index(drop=True)


def provenance(run: RunFolder, environment: str) -> dict:
    """Where one side of a comparison comes from (all read from its ``run.json``)."""
    r = run.run if isinstance(run.run, dict) else {}
    return {
        "folder": str(Path(run.path).resolve()),
        "environment": environment,
        "input": r.get("input"),
        "data_fingerprint": r.get("data_fingerprint"),
        "encodex_version": (r.get("versions") or {}).get("encodex"),
        "finished_utc": (r.get("timings") or {}).get("finished_utc"),
        "settings": r.get("settings"),
        "n_cells": int((run.cells["environment"] == environment).sum()),
    }


def _pick_environment(run: RunFolder, env: str | None, side: str) -> str:
    envs = run.environments
    if env is None:
        if len(envs) != 1:
            raise SettingsError(f"folder {side} ({run.path}) has environments "
                                f"{', '.join(envs)}; name the one to compare (--environments)")
        return envs[0]
    if env not in envs:
        raise SettingsError(f"environment {env!r} is not in folder {side} ({run.path}); "
                            f"choose from {', '.join(envs)}")
    return env


def _side(run: RunFolder, env: str) -> pd.DataFrame:
    c = run.cells[run.cells["environment"] == env].copy()
    if c["unit"].duplicated().any():
        raise FileFormatError(f"unit {c.loc[c['unit'].duplicated(), 'unit'].iloc[0]} appears "
                              f"twice in environment {env} of {run.path}/cells.csv; re-run "
                              f"`encodex fit`")
    return c.set_index("unit", drop=False)


def compare_recordings(run_a, run_b, environment_a: str | None = None,
                       environment_b: str | None = None, matching=None,
                       names: tuple[str, str] | None = None, alpha: float | None = None,
                       coordinates: str = "own", level: float = 0.95) -> RecordingComparison:
    """Compare the labels of one environment in folder A with one in folder B.

    Parameters
    ----------
    run_a, run_b : RunFolder, str or Path
        Output folders of ``encodex fit`` (read with :func:`encodex.report.load.load_run`).
    environment_a, environment_b : str, optional
        Environment of each folder; needed when a folder holds several.
    matching : str, Path or DataFrame, optional
        Matching table (CSV path, or a frame with ``unit_a, unit_b``); default: units with
        identical ids are matched.
    names : (str, str), optional
        Names of the two sides in tables and figures (default ``<folder>.<environment>``).
    alpha : float, optional
        False discovery rate of the BH corrections (default: the runs' alpha).
    coordinates : {"own", "shared"}
        Response curves compared in each arena's own coordinates (fractions of its tracked
        extent) or in the recorded metres.
    level : float
        Confidence level of the intervals.

    Returns
    -------
    RecordingComparison

    References
    ----------
    As :mod:`encodex.report.environments` (McNemar 1947; Newcombe 1998; Wilcoxon 1945;
    Benjamini & Hochberg 1995).
    """
    if coordinates not in ("own", "shared"):
        raise SettingsError(f"coordinates must be 'own' or 'shared' (got {coordinates!r})")
    run_a = run_a if isinstance(run_a, RunFolder) else load_run(run_a)
    run_b = run_b if isinstance(run_b, RunFolder) else load_run(run_b)
    env_a = _pick_environment(run_a, environment_a, "A")
    env_b = _pick_environment(run_b, environment_b, "B")
    if Path(run_a.path).resolve() == Path(run_b.path).resolve() and env_a == env_b:
        raise SettingsError(f"both sides are environment {env_a} of {run_a.path}; give two "
                            f"different folders (or two environments with --environments)")
    if names is None:
        na, nb = (f"{Path(r.path).resolve().name}.{e}" for r, e in ((run_a, env_a),
                                                                  (run_b, env_b)))
        names = (na, nb) if na != nb else (f"A.{na}", f"B.{nb}")
    a, b = (str(n) for n in names)
    if a == b:
        raise SettingsError(f"the two sides need different names (both {a!r}); use --names")
    check_compatible(run_a, env_a, run_b, env_b, (a, b))
    ca, cb = _side(run_a, env_a), _side(run_b, env_b)
    if matching is None:
        pairs = pd.DataFrame({"unit_a": [u for u in ca.index if u in cb.index]})
        pairs["unit_b"] = pairs["unit_a"]
        source = "identical unit ids"
    elif isinstance(matching, pd.DataFrame):
        pairs = checked_matching(matching, ca.index, cb.index)
        source = "table given from Python"
    else:
        pairs = read_matching(matching, ca.index, cb.index)
        source = str(Path(matching).resolve())
    pairs = pairs.assign(status_a=ca.loc[pairs["unit_a"], "status"].to_numpy(),
                         status_b=cb.loc[pairs["unit_b"], "status"].to_numpy(),
                         label_a=ca.loc[pairs["unit_a"], "variables"].to_numpy(),
                         label_b=cb.loc[pairs["unit_b"], "variables"].to_numpy())
    lone_a = ca[~ca.index.isin(set(pairs["unit_a"]))]
    lone_b = cb[~cb.index.isin(set(pairs["unit_b"]))]
    unmatched = pd.DataFrame(
        [{"side": a, "unit": u, "status": r["status"], "label": r["variables"]}
         for u, r in lone_a.iterrows()]
        + [{"side": b, "unit": u, "status": r["status"], "label": r["variables"]}
           for u, r in lone_b.iterrows()], columns=["side", "unit", "status", "label"])
    run_info = {"settings": dict(run_a.run.get("settings", {}))}
    if alpha is None:
        alpha = run_a.alpha

    # Paired view: B's matched units take their partner's id (prefixed so ids of A and B
    # never collide by accident).
    rows, sources = [], {}
    for ua, ub in zip(pairs["unit_a"], pairs["unit_b"]):
        key = f"{ua} | {ub}"
        rows += [ca.loc[ua].to_dict() | {"unit": key, "environment": a},
                 cb.loc[ub].to_dict() | {"unit": key, "environment": b}]
        sources[(a, key)] = (run_a, env_a, ua)
        sources[(b, key)] = (run_b, env_b, ub)
    both = pairs[(pairs["status_a"] == CLASSIFIED_STATUS)
                 & (pairs["status_b"] == CLASSIFIED_STATUS)]
    notes = [f"{len(pairs)} cells matched ({source}); {len(both)} of them classified in both "
             f"{a} and {b}; {len(lone_a)} cells of {a} and {len(lone_b)} of {b} without a "
             f"partner."]
    paired = None
    if len(both):
        view = _PairedView(pd.DataFrame(rows), run_info, sources, coordinates)
        paired = compare_environments(view, a, b, paired=True, alpha=alpha, level=level)
        paired = replace(paired, notes=tuple(n.replace("(matched by unit id)",
                                                       f"(matched by {source})")
                                             for n in paired.notes))
    unpaired = None
    lone = ([r.to_dict() | {"environment": a, "unit": f"A:{u}"} for u, r in lone_a.iterrows()]
            + [r.to_dict() | {"environment": b, "unit": f"B:{u}"} for u, r in lone_b.iterrows()])
    n_lone_a = int((lone_a["status"] == CLASSIFIED_STATUS).sum())
    n_lone_b = int((lone_b["status"] == CLASSIFIED_STATUS).sum())
    if n_lone_a and n_lone_b:
        view = _PairedView(pd.DataFrame(lone), run_info, {}, coordinates)
        unpaired = compare_environments(view, a, b, paired=False, alpha=alpha, level=level)
        notes.append("Cells without a partner are compared as independent samples, a family "
                     "of tests separate from the paired one (each with its own "
                     "Benjamini-Hochberg correction).")
    elif n_lone_a or n_lone_b:
        notes.append("Cells without a partner are classified on one side only; no unpaired "
                     "test is possible.")
    if paired is None and unpaired is None:
        raise SettingsError(f"no cell of {a} and {b} can be compared: no matched cell is "
                            f"classified in both and no unmatched cells on both sides; check "
                            f"the matching table (unit in A, unit in B)")
    if coordinates == "own":
        notes.append("Response curves of matched cells are compared in each arena's own "
                     "coordinates (position as a fraction of the tracked extent along x and "
                     "y); other variables in their units.")
    prov = {"a": provenance(run_a, env_a) | {"name": a},
            "b": provenance(run_b, env_b) | {"name": b},
            "matching": source, "coordinates": coordinates,
            "compatible_settings": list(COMPATIBLE_SETTINGS)}
    return RecordingComparison(a, b, paired, unpaired, pairs, unmatched, prov, coordinates,
                               tuple(notes))


def write_recording_comparison(cmp: RecordingComparison, out_dir) -> list[Path]:
    """Write the comparison: paired CSVs and summary in ``out_dir``, the unpaired ones in
    ``out_dir/unmatched``, ``matching.csv``, ``unmatched.csv`` and ``recordings.json``."""
    from encodex.report.environments import write_comparison
    from encodex.report.tables import write_texts

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create {out} ({exc.strerror}); choose a writable folder")
    written = []
    if cmp.paired is not None:
        written += write_comparison(cmp.paired, out)
    if cmp.unpaired is not None:
        written += write_comparison(cmp.unpaired, out / "unmatched")
    written += write_texts(out, {
        "matching.csv": cmp.matching.to_csv(index=False),
        "unmatched.csv": cmp.unmatched.to_csv(index=False),
        "recordings.json": json.dumps({**cmp.provenance, "notes": list(cmp.notes)}, indent=2,
                                      default=str),
    })
    return written
