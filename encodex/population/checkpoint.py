"""Checkpoints of a population run: atomic per-unit files and the settings manifest.

Each finished (environment, unit) is written at once to ``units/<environment>/<unit>.npz`` by
writing a temporary file in the same folder and renaming it (``os.replace`` is atomic on
POSIX and Windows), so a run killed at any moment leaves either the whole file or none. The
file holds only numeric and string arrays (never pickles); the cell's table rows are stored in
it as a JSON string, so that rerunning the command rebuilds the tables without recomputing.

``checkpoint.json`` at the top of the folder records the settings and a fingerprint of the
input data when the run starts; a later run with other settings or data is refused
(:class:`~encodex.errors.CheckpointMismatchError`) instead of mixing results.
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


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file and a rename."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix="." + path.name + ".", suffix=".tmp", dir=path.parent)
        try:
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


def open_checkpoint(out: Path, settings: dict, data_fingerprint: str) -> bool:
    """Create or check the manifest of the output folder.

    Returns
    -------
    bool
        True when an earlier run with the same settings and data exists (resuming).

    Raises
    ------
    CheckpointMismatchError
        When the folder holds results of other settings or other input data.
    """
    out = Path(out)
    manifest = out / MANIFEST
    wanted = {"format": FORMAT, "settings": settings, "data_fingerprint": data_fingerprint}
    if out.exists() and not out.is_dir():
        raise OutputError(f"--out {out} is a file, not a folder; choose a new or empty folder")
    if manifest.exists():
        try:
            have = json.loads(manifest.read_text())
        except (OSError, ValueError) as exc:
            raise CheckpointMismatchError(
                f"{manifest} is unreadable ({exc}); delete the folder {out} or choose another --out"
            ) from exc
        if have.get("data_fingerprint") != data_fingerprint:
            raise CheckpointMismatchError(
                f"{out} holds results of a different input recording; choose another --out "
                "folder, or delete it to start over"
            )
        old = have.get("settings", {})
        diff = [
            f"{k}: {old.get(k)!r} -> {settings.get(k)!r}"
            for k in sorted(set(old) | set(settings))
            if old.get(k) != settings.get(k)
        ]
        if diff or have.get("format") != FORMAT:
            raise CheckpointMismatchError(
                f"{out} holds results computed with other settings ({'; '.join(diff) or 'format'}); "
                "rerun with the same settings to resume, or choose another --out folder"
            )
        remove_stale_temporaries(out)
        return True
    # A run killed while writing its manifest leaves only that temporary file behind.
    remove_stale_temporaries(out)
    if out.exists() and any(out.iterdir()):
        stray = sorted(p.name for p in out.iterdir())[:3]
        raise CheckpointMismatchError(
            f"{out} is not empty ({', '.join(stray)}...) and holds no encodex checkpoint; "
            "choose an empty or new --out folder"
        )
    atomic_write_text(manifest, json.dumps(wanted, indent=2, sort_keys=True))
    return False


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
