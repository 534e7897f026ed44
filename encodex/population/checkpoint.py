"""Checkpoints of a population run: atomic per-unit files and the settings manifest.

Each finished (environment, unit) is written at once to ``units/<environment>/<unit>.npz`` by
writing a temporary file in the same folder and renaming it (``os.replace`` is atomic on
POSIX and Windows), so a run killed at any moment leaves either the whole file or none. The
file holds only numeric and string arrays (never pickles); the cell's table rows are stored in
it as a JSON string, so that rerunning the command rebuilds the tables without recomputing.

``checkpoint.json`` at the top of the folder records the settings and a fingerprint of the
input data when the run starts (after every setting has been checked); a later run with other
settings or data is refused (:class:`~encodex.errors.CheckpointMismatchError`) instead of
mixing results, unless no unit was finished (then the manifest is replaced) or the run asks
to overwrite. Files get the mode the umask gives, as ordinary writes do.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import tempfile
import zipfile
import zlib
from pathlib import Path

import numpy as np

from encodex.errors import CheckpointMismatchError, OutputError

MANIFEST = "checkpoint.json"
FORMAT = "encodex-run-checkpoint/1"
RECORD_KEY = "record__json"
#: Longest unit or environment name used as it is in a file name (characters).
MAX_NAME = 100


def safe_name(name: str) -> str:
    """File-system-safe name for a unit id or environment name.

    Characters other than letters, digits, ``-``, ``_`` and ``.`` become ``_``; when that
    changes the name, a short hash of the original is appended so that two ids never share a
    file. Names longer than :data:`MAX_NAME` characters are cut there and get the hash too
    (file systems refuse names beyond 255 bytes).
    """
    name = str(name)
    clean = re.sub(r"[^A-Za-z0-9._-]", "_", name).strip(".") or "_"
    if clean != name or len(clean) > MAX_NAME:
        clean = clean[:MAX_NAME] + "-" + hashlib.sha256(name.encode()).hexdigest()[:8]
    return clean


def unit_path(out: Path, environment: str, unit: str) -> Path:
    """Path of the per-unit file of ``unit`` in ``environment``."""
    return Path(out) / "units" / safe_name(environment) / (safe_name(unit) + ".npz")


def _umask() -> int:
    """The process's file-creation mask (read by setting it and putting it back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file and a rename.

    The file gets the mode a plain ``open(path, "w")`` would give (0666 less the umask):
    ``tempfile.mkstemp`` creates 0600, which would hide results from the rest of a lab.
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix="." + path.name + ".", suffix=".tmp", dir=path.parent)
        try:
            if hasattr(os, "fchmod"):
                os.fchmod(fd, 0o666 & ~_umask())
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, path)
        except BaseException:
            if os.path.exists(tmp):
                os.unlink(tmp)
            raise
    except OSError as exc:
        raise OutputError(f"cannot write {path}: {exc.strerror or exc}; check the --out folder "
                          "is writable and the disk has space") from exc


def atomic_write_text(path: Path, text: str) -> None:
    """Write text (UTF-8) atomically."""
    atomic_write_bytes(path, text.encode("utf-8"))


def write_unit_file(path: Path, arrays: dict[str, np.ndarray], record: dict) -> None:
    """Write one unit's arrays and its JSON record atomically as an npz (no pickles)."""
    import io

    payload = {k: np.asarray(v) for k, v in arrays.items()}
    for k, v in payload.items():
        if v.dtype == object:
            raise OutputError(f"array '{k}' has object dtype and would need pickling")
    payload[RECORD_KEY] = np.asarray(json.dumps(record, sort_keys=True, allow_nan=True))
    buf = io.BytesIO()
    np.savez_compressed(buf, **payload)
    atomic_write_bytes(path, buf.getvalue())


def read_unit_record(path: Path) -> dict | None:
    """The JSON record of a finished unit file, or None if the file is missing or unreadable.

    A damaged file (truncated copy, disk trouble: not a zip archive, a member that fails to
    decompress or its CRC check) counts as missing, so the unit is computed again and the
    file replaced. Every member is read for that check, not only the record.
    """
    try:
        with np.load(path, allow_pickle=False) as z:
            for k in z.files:
                z[k]
            return json.loads(str(z[RECORD_KEY]))
    except (OSError, KeyError, ValueError, EOFError, zipfile.BadZipFile, zlib.error):
        return None


def read_unit_arrays(path: Path) -> dict[str, np.ndarray]:
    """Every array of a unit file except the record."""
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files if k != RECORD_KEY}


def open_checkpoint(out: Path, settings: dict, data_fingerprint: str,
                    overwrite: bool = False) -> bool:
    """Create or check the manifest of the output folder.

    Call it only once every setting and the input have been validated: it is the first
    thing a run writes.

    Parameters
    ----------
    out : Path
        Output folder (created when missing).
    settings : dict
        Every setting that changes a result.
    data_fingerprint : str
        Fingerprint of the input session.
    overwrite : bool
        Delete the contents of a folder that holds an encodex checkpoint and start over
        (``--overwrite``). A folder without a checkpoint is never deleted.

    Returns
    -------
    bool
        True when an earlier run with the same settings and data exists (resuming).

    Raises
    ------
    CheckpointMismatchError
        When the folder holds finished units of other settings or other input data, or
        files that are not an encodex run.
    """
    out = Path(out)
    manifest = out / MANIFEST
    wanted = {"format": FORMAT, "settings": settings, "data_fingerprint": data_fingerprint}
    if out.exists() and not out.is_dir():
        raise OutputError(f"--out {out} is a file, not a folder; choose a new or empty folder")
    if manifest.exists():
        if overwrite:
            clear_folder(out)
        else:
            problem = _mismatch(_read_manifest(manifest), wanted)
            if problem is None:
                remove_stale_temporaries(out)
                return True
            if finished_unit_files(out):
                raise CheckpointMismatchError(
                    f"{out} holds results {problem}; rerun with the same settings to resume, "
                    "add --overwrite to replace them, or choose another --out folder")
            # An earlier run that finished no unit (refused, or stopped at once) left only
            # its manifest: nothing would be lost by replacing it.
            manifest.unlink()
    # A run killed while writing its manifest leaves only that temporary file behind.
    remove_stale_temporaries(out)
    if out.exists() and any(out.iterdir()):
        stray = sorted(p.name for p in out.iterdir())[:3]
        raise CheckpointMismatchError(
            f"{out} is not empty ({', '.join(stray)}...) and holds no encodex checkpoint, so "
            "encodex will neither write into it nor delete it; choose an empty or new --out "
            "folder"
        )
    atomic_write_text(manifest, json.dumps(wanted, indent=2, sort_keys=True))
    return False


def check_output_folder(out: Path, overwrite: bool = False) -> None:
    """Refuse, before any long reading, an ``--out`` that no run could write into.

    Raises
    ------
    OutputError
        ``out`` is a file.
    CheckpointMismatchError
        ``out`` is a non-empty folder without an encodex checkpoint (never written into nor
        deleted, with or without ``overwrite``).
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise OutputError(f"--out {out} is a file, not a folder; choose a new or empty folder")
    if out.is_dir() and not (out / MANIFEST).exists():
        entries = [p.name for p in out.iterdir()
                   if not (p.name.startswith(".") and p.name.endswith(".tmp"))]
        if entries:
            raise CheckpointMismatchError(
                f"{out} is not empty ({', '.join(sorted(entries)[:3])}...) and holds no "
                "encodex checkpoint, so encodex will neither write into it nor delete it"
                f"{' (even with --overwrite)' if overwrite else ''}; choose an empty or new "
                "--out folder")


def own_folder(out: Path, marker: str, params: dict) -> str:
    """Claim ``out`` for a command that owns its whole folder (``encodex demo``).

    The folder is marked by a JSON file ``marker`` holding ``params``. A new or empty folder
    is claimed; a folder marked with the same ``params`` is kept (work resumes); a folder
    marked with other ``params`` is emptied, since everything in it was written by the same
    command; any other non-empty folder is refused before anything is written.

    Returns
    -------
    str
        ``"new"``, ``"resumed"`` or ``"replaced: <what changed>"``.

    Raises
    ------
    CheckpointMismatchError
        ``out`` is non-empty and was not made by this command.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise OutputError(f"--out {out} is a file, not a folder; choose a new or empty folder")
    mark = out / marker
    state = "new"
    if mark.exists():
        old = _read_manifest(mark) or {}
        if old == params:
            return "resumed"
        changed = [f"{k} {old.get(k)!r} -> {params.get(k)!r}"
                   for k in sorted(set(old) | set(params)) if old.get(k) != params.get(k)]
        clear_folder(out)
        state = "replaced: " + ", ".join(changed)
    elif out.is_dir() and any(out.iterdir()):
        stray = sorted(p.name for p in out.iterdir())[:3]
        raise CheckpointMismatchError(
            f"{out} is not empty ({', '.join(stray)}...) and was not made by this command; "
            "choose a new or empty --out folder")
    atomic_write_text(mark, json.dumps(params, indent=2, sort_keys=True))
    return state


def _read_manifest(manifest: Path) -> dict | None:
    """The manifest's content, or None when it cannot be read."""
    try:
        have = json.loads(manifest.read_text())
    except (OSError, ValueError):
        return None
    return have if isinstance(have, dict) else None


def _mismatch(have: dict | None, wanted: dict) -> str | None:
    """Why a folder's manifest does not match this run ("of ..." phrase), or None."""
    if have is None:
        return "whose checkpoint.json is unreadable"
    if have.get("data_fingerprint") != wanted["data_fingerprint"]:
        return "of a different input recording"
    old, new = have.get("settings", {}), wanted["settings"]
    diff = [f"{k}: {old.get(k)!r} -> {new.get(k)!r}"
            for k in sorted(set(old) | set(new)) if old.get(k) != new.get(k)]
    if diff or have.get("format") != wanted["format"]:
        return f"computed with other settings ({'; '.join(diff) or 'format'})"
    return None


def finished_unit_files(out: Path) -> list[Path]:
    """Per-unit result files (``units/<environment>/<unit>.npz``) in an output folder."""
    units = Path(out) / "units"
    return sorted(units.glob("*/*.npz")) if units.is_dir() else []


def clear_folder(out: Path) -> None:
    """Delete everything inside ``out`` (kept itself); used by ``--overwrite``."""
    import shutil

    for p in Path(out).iterdir():
        try:
            if p.is_dir() and not p.is_symlink():
                shutil.rmtree(p)
            else:
                p.unlink()
        except OSError as exc:
            raise OutputError(f"cannot delete {p} to overwrite {out}: {exc.strerror or exc}; "
                              "delete the folder yourself or choose another --out") from exc


def remove_stale_temporaries(out: Path) -> list[Path]:
    """Delete temporary files that a killed run left in ``out`` and ``out/units/*``.

    :func:`atomic_write_bytes` names its temporary files ``.<name>.<random>.tmp``; a process
    killed (SIGKILL, power loss) between creating one and renaming it leaves it behind. They
    are never read, only removed, when the folder is opened again.

    Returns
    -------
    list of Path
        The files removed.
    """
    out = Path(out)
    if not out.is_dir():
        return []
    folders = [out, out / "units"]
    if (out / "units").is_dir():
        folders += [p for p in (out / "units").iterdir() if p.is_dir()]
    removed = []
    for folder in folders:
        if not folder.is_dir():
            continue
        for p in folder.iterdir():
            if p.name.startswith(".") and p.name.endswith(".tmp") and p.is_file():
                try:
                    p.unlink()
                except OSError as exc:
                    raise OutputError(f"cannot remove the stale temporary file {p}: "
                                      f"{exc.strerror or exc}; check the --out folder is "
                                      "writable") from exc
                removed.append(p)
    return removed


def data_fingerprint(arrays) -> str:
    """SHA-256 (16 hex digits) over a sequence of numpy arrays (content, dtype, shape)."""
    h = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(str((a.dtype.str, a.shape)).encode())
        h.update(a.tobytes())
    return h.hexdigest()[:16]
