"""Output markers: the record (``.bayesgeo-output.json``) of every folder bayesgeo writes, naming the run
and every file it wrote with its SHA-256, and the checks that decide what may be replaced.

The rules are those of :mod:`bayesgeo.common.outputs` (docs/outputs.md): ``overwrite`` replaces only a
folder whose marker accounts for everything in it, unchanged.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import re
import uuid
from collections.abc import Iterable, Iterator
from pathlib import Path

from bayesgeo.common.validate import InputError

__all__ = ["MARKER", "set_command", "sha256_file", "read_marker", "check_replaceable"]



MARKER = ".bayesgeo-output.json"
_FORMAT = "bayesgeo output folder"
_PART_TAG = ".bayesgeo-part"
_LOCK_HEAD = "bayesgeo lock"
_COMMAND = ["bayesgeo (Python API)"]


def set_command(argv: Iterable[str]) -> None:
    """Record the command line written into markers (the CLI calls this once per run)."""
    _COMMAND[:] = ["bayesgeo", *map(str, argv)]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def sha256_file(path: str | Path, *, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes (hex), read in chunks (FIPS 180-4, via :mod:`hashlib`)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()


_DEBRIS = re.compile(r"^\..+\.[A-Za-z0-9_]{6,12}\.part$")


def _is_debris(entry: Path) -> bool:
    """A temporary part a killed bayesgeo run left (a tagged folder, or a file named as ours)."""
    if entry.is_symlink() or not _DEBRIS.match(entry.name):
        return False
    return (entry / _PART_TAG).exists() or not any(entry.iterdir()) if entry.is_dir() else entry.is_file()


def _is_lock(path: Path) -> bool:
    if not (path.name.startswith(".") and path.name.endswith(".lock")):
        return False
    try:
        with path.open("rb") as fh:
            return fh.read(len(_LOCK_HEAD)) == _LOCK_HEAD.encode()
    except OSError:
        return False


# ---------------------------------------------------------------- markers

def read_marker(folder: str | Path) -> dict | None:
    """The marker of ``folder`` as a dict, or None when it has none (or an unreadable one)."""
    try:
        obj = json.loads((Path(folder) / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(obj, dict) or obj.get("format") != _FORMAT or not isinstance(obj.get("files"), dict):
        return None
    return obj


def _walk(folder: Path) -> Iterator[tuple[str, Path]]:
    """(relative path, path) of every file below ``folder`` that a marker must account for.

    Subfolders with a marker of their own are accounted for by it and skipped here; so are the
    marker itself and bayesgeo's lock files."""
    for entry in sorted(folder.iterdir()):
        if entry.name == MARKER or (entry.is_file() and _is_lock(entry)) or _is_debris(entry):
            continue
        if entry.is_dir() and not entry.is_symlink():
            if (entry / MARKER).exists():
                continue
            for rel, p in _walk(entry):
                yield f"{entry.name}/{rel}", p
        else:
            yield entry.name, entry


def _marked_subfolders(folder: Path) -> Iterator[Path]:
    """The subfolders :func:`_walk` skips: the outermost ones below ``folder`` with a marker of their own."""
    for entry in sorted(folder.iterdir()):
        if entry.is_dir() and not entry.is_symlink() and not _is_debris(entry):
            if (entry / MARKER).exists():
                yield entry
            else:
                yield from _marked_subfolders(entry)


def _file_table(folder: Path) -> dict[str, str]:
    return {rel: sha256_file(p) for rel, p in _walk(folder)}


def _write_marker(folder: Path, files: dict[str, str], *, run: dict | None = None) -> None:
    run = run or {}
    from bayesgeo import __version__

    obj = {
        "format": _FORMAT,
        "run_id": run.get("run_id", uuid.uuid4().hex),
        "command": run.get("command", " ".join(_COMMAND)),
        "created": run.get("created", _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")),
        "bayesgeo_version": run.get("bayesgeo_version", __version__),
        "note": "bayesgeo replaces or deletes this folder only while every file below is listed here unchanged",
        "files": dict(sorted(files.items())),
    }
    if run.get("additions"):
        obj["additions"] = run["additions"]
    tmp = folder / f"{MARKER}.part"
    tmp.write_text(json.dumps(obj, indent=1) + "\n", encoding="utf-8")
    os.replace(tmp, folder / MARKER)


def _foreign(folder: Path, marker: dict, under: str | None = None) -> tuple[list[str], list[str]]:
    """(files the marker does not list, listed files changed since) below ``folder`` (or its ``under``)."""
    listed = marker["files"]
    extra, changed = [], []
    root = folder / under if under else folder
    items = _walk(root) if root.is_dir() else [("", root)]
    for rel, p in items:
        key = "/".join(x for x in (under, rel) if x)
        if key not in listed:
            extra.append(key)
        elif sha256_file(p) != listed[key]:
            changed.append(key)
    return extra, changed


def _names(items: list[str]) -> str:
    return ", ".join(items[:3]) + (f" and {len(items) - 3} more" if len(items) > 3 else "")


def check_replaceable(path: str | Path) -> None:
    """Raise :class:`InputError` unless replacing the folder ``path`` loses nothing but bayesgeo's output.

    An empty folder is replaceable; otherwise ``path`` must hold a marker that lists every file
    below it with unchanged content (subfolders with markers of their own are checked by theirs).
    """
    path = Path(path)
    if path.is_symlink():
        raise InputError(f"{path}: is a symbolic link; bayesgeo replaces only folders it wrote itself; "
                         "choose another output")
    if not path.is_dir():
        raise InputError(f"{path}: is a file bayesgeo did not write as an output folder; choose another output")
    if not any(path.iterdir()):
        return
    marker = read_marker(path)
    if marker is None:
        raise InputError(f"{path}: is not a folder bayesgeo wrote (no {MARKER}); it is never replaced; "
                         "choose another output or move it away")
    extra, changed = _foreign(path, marker)
    if extra:
        raise InputError(f"{path}: holds files bayesgeo did not write ({_names(extra)}); move them out "
                         "or choose another output")
    if changed:
        raise InputError(f"{path}: files were changed since bayesgeo wrote them ({_names(changed)}); "
                         "they are not replaced; choose another output or move the folder away")
    for sub in _marked_subfolders(path):  # each checks its own nested folders in turn
        check_replaceable(sub)
