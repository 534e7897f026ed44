"""What a population run says to its user: the session before fitting, the counts after.

Pure functions returning text; ``encodex fit`` prints them on standard output (its progress
bar goes to standard error), and ``run_population(..., echo=print)`` does the same from
Python.
"""

from __future__ import annotations

import shlex
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["session_summary", "closing_summary", "next_commands", "MASK_REASONS"]

#: Why a bin is masked, in words, per reason of ``Session.summary["masked_bins"]``.
MASK_REASONS = {
    "outside_tracking": "before the first or after the last position sample",
    "tracking_gap": "inside a tracking gap longer than {max_gap_s:g} s (--max-gap)",
    "heading_undefined": "heading unknown (no compass and slower than "
                         "{heading_speed_threshold:g} m/s)",
    "outside_trials": "between trials",
    "distance_after_gap": "distance run unknown: after a masked tracking gap in the same trial",
    "outside_epochs": "outside every environment's epoch",
    "below_min_speed": "slower than {min_speed} m/s (--min-speed)",
    "phase_unknown": "rhythm phase unknown (edges of the LFP)",
    "extra_unknown": "a user variable unknown",
}


def _pct(n: int, total: int) -> str:
    return f"{100.0 * n / total:.1f}%" if total else "-"


def _mask_lines(summary: dict, n_bins: int) -> list[str]:
    masked = dict(summary.get("masked_bins", {}))
    total = int(masked.pop("total", 0))
    lines = [f"masked bins: {total:,} of {n_bins:,} ({_pct(total, n_bins)}); "
             "by reason (a bin may have several):"]
    settings = dict(summary.get("settings", {}))
    for reason, n in sorted(masked.items(), key=lambda kv: -kv[1]):
        if not n:
            continue
        try:
            words = MASK_REASONS.get(reason, reason).format(**settings)
        except (KeyError, ValueError, IndexError):  # a setting missing from an older session
            words = reason
        lines.append(f"  {reason:<20s} {n:>9,} ({_pct(n, n_bins):>6s})  {words}")
    return lines


def _environment_lines(session, env_info: dict) -> list[str]:
    env = np.asarray(session.environment)
    width = max([len("environment")] + [len(e) for e in session.environments])
    lines = [f"{'environment':<{width}s}  recorded  usable    variables fitted; not fitted (why)"]
    for k, name in enumerate(session.environments):
        info = env_info.get(name, {})
        recorded = float(np.sum(env == k) * session.bin_size)
        used = float(info.get("duration_s", 0.0))
        fitted = ", ".join(info.get("variables", [])) or "(none)"
        dropped = "; ".join(f"{v}: {why}" for v, why in info.get("unavailable", {}).items())
        lines.append(f"{name:<{width}s}  {_duration(recorded):>8s}  {_duration(used):>8s}  "
                     f"{fitted}" + (f"; not fitted: {dropped}" if dropped else ""))
    return lines


def _duration(seconds: float) -> str:
    return f"{seconds / 60:.1f} min" if seconds >= 600 else f"{seconds:.0f} s"


def _object_lines(summary: dict) -> list[str]:
    objects = dict(summary.get("objects", {}))
    source = objects.pop("source", "the input")
    roles = {k: v for k, v in objects.items()
             if not k.endswith("_note") and k != "dropped_empty_units"}
    if summary.get("heading_source") == "movement direction":
        roles["heading"] = "movement direction (no compass series in the file)"
    width = max([len(k) for k in roles] + [0])
    return [f"origin: {source}" + ("; objects used:" if roles else "")] + [
        f"  {k:<{width}s}  {v}" for k, v in roles.items()]


def session_summary(session, env_info: dict, to_fit: int, from_checkpoint: int,
                    jobs: int | None = None, out: Path | None = None,
                    source: str | None = None) -> str:
    """Text describing the session as it will be fitted.

    Parameters
    ----------
    session : encodex.session.Session
        The binned session.
    env_info : dict
        Per environment: ``duration_s`` (usable time, s), ``variables`` (fitted),
        ``unavailable`` (variable -> reason), as written in ``run.json["environments"]``.
    to_fit, from_checkpoint : int
        Cells (unit x environment) to compute, and read back from an earlier run.
    jobs : int, optional
        Worker processes.
    out : Path, optional
        Output folder.
    source : str, optional
        The input as the user named it (file path).

    Returns
    -------
    str
        Several lines, without a trailing newline.
    """
    s = dict(session.summary)
    n_env = len(session.environments)
    name = f"session {source}" if source else "session"
    head = (f"{name}: {session.n_units} units, {n_env} environment{'s' * (n_env != 1)}, "
            f"{s.get('n_trials', 0)} trials, bins of {session.bin_size * 1000:g} ms")
    lines = [head] + ["  " + ln for ln in _object_lines(s)]
    lines += ["  " + ln for ln in _environment_lines(session, env_info)]
    lines += ["  " + ln for ln in _mask_lines(s, int(session.n_bins))]
    dropped = int(dict(s.get("dropped_spikes", {})).get("total", 0) or 0)
    if dropped:
        lines.append(f"  spikes outside the tracked time, not counted: {dropped:,}")
    empty = list(s.get("units_without_spikes_in_grid", []))
    if empty:
        lines.append(f"  units without a spike in the tracked time: {', '.join(empty[:10])}"
                     + (" ..." if len(empty) > 10 else ""))
    total = to_fit + from_checkpoint
    work = (f"cells to fit: {to_fit} of {total} ({session.n_units} units x {n_env} "
            "environments)")
    if from_checkpoint:
        work += f"; {from_checkpoint} already in {out} (resuming)"
    if jobs is not None:
        work += f"; {jobs} worker process{'es' * (jobs != 1)}"
    lines.append(work)
    return "\n".join(lines)


def next_commands(out: Path, environments) -> list[str]:
    """The commands a user runs next on a results folder, with real names filled in."""
    r = shlex.quote(str(out))
    cmds = [f"encodex table {r}"]
    envs = list(environments)
    if len(envs) >= 2:
        cmds.append(f"encodex compare {r} --between {shlex.quote(envs[0])} "
                    f"{shlex.quote(envs[1])}")
    cmds.append(f"encodex report {r}")
    return cmds


def closing_summary(cells: pd.DataFrame, out: Path | None, environments) -> str:
    """Counts of units per label and environment, then the next commands.

    Parameters
    ----------
    cells : DataFrame
        ``cells.csv`` of the run (one row per unit and environment).
    out : Path or None
        Output folder (None: no next commands).
    environments : sequence of str
        Environment names, in the session's order.

    Returns
    -------
    str
    """
    envs = [str(e) for e in environments]
    n_units = cells["unit"].nunique()
    lab = cells["variables"].where(cells["status"] == "ok",
                                   "[" + cells["status"].astype(str) + "]")
    lab = lab.replace("", "[not labelled]").fillna("[not labelled]")
    table = pd.crosstab(lab, cells["environment"]).reindex(columns=envs, fill_value=0)
    ok = table.index.str.startswith("[")
    order = list(table[~ok].sum(axis=1).sort_values(ascending=False, kind="stable").index)
    order += sorted(table.index[ok])
    table = table.loc[order]
    width = max([len("units per label")] + [len(str(i)) + 2 for i in table.index])
    cols = [max(len(e), 6) for e in envs]
    lines = [f"{len(cells)} cells ({n_units} units x {len(envs)} environment"
             f"{'s' * (len(envs) != 1)})" + (f" written to {out}" if out is not None else "")]
    lines.append(f"{'units per label':<{width}s}" + "".join(f"  {e:>{c}s}"
                                                          for e, c in zip(envs, cols)))
    for name, row in table.iterrows():
        lines.append(f"  {name:<{width - 2}s}" + "".join(f"  {int(row[e]):>{c}d}"
                                                         for e, c in zip(envs, cols)))
    labelled = (cells["status"] == "ok").groupby(cells["environment"]).sum()
    lines.append(f"  {'labelled':<{width - 2}s}" + "".join(
        f"  {int(labelled.get(e, 0)):>{c}d}" for e, c in zip(envs, cols)))
    if out is not None:
        lines.append("next:")
        lines += [f"  {c}" for c in next_commands(out, envs)]
    return "\n".join(lines)
