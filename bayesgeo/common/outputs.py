"""Output folders and files: the one place that creates, replaces and adds to outputs.

Rules (docs/outputs.md):

- Every folder bayesgeo writes holds a marker, ``.bayesgeo-output.json``, naming the run (id,
  command, time, version) and every file it wrote with its SHA-256.
- ``overwrite`` replaces only a folder whose marker accounts for everything in it, unchanged. It
  never replaces ``/``, the home folder, the current folder or one of its parents, a folder that
  holds an input of the run, a symbolic link, or anything holding files bayesgeo did not write.
- Creating an output is exclusive: a run holds a lock (``.NAME.lock`` beside the output, an
  ``flock`` the kernel drops if the process dies) from its first check to the final rename; a
  second run for the same output stops with :class:`~bayesgeo.common.validate.InputError`.
- Outputs are assembled under ``.NAME.*.part`` and renamed into place; parts left by killed runs
  are removed when the next run for the same output starts.
- Stages that add to a folder (:func:`add_to_folder`) never replace a file without ``overwrite``,
  and then only one the marker records unchanged; the marker is updated with what they wrote.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import fcntl
import json
import os
import re
import shutil
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path

from bayesgeo.common.validate import InputError
from bayesgeo.common.markers import (_COMMAND, _LOCK_HEAD, _PART_TAG, MARKER, _file_table, _foreign, _is_debris,
                                     _names, _umask,
                                     _walk, _write_marker, check_replaceable, read_marker, set_command, sha256_file)

__all__ = ["MARKER", "set_command", "claim", "release_all", "scope", "new_folder", "new_files", "add_to_folder",
           "check_replaceable", "check_addable", "read_marker", "part_file", "sha256_file"]

_HELD: dict[Path, int] = {}  # resolved output path -> open lock descriptor

# ---------------------------------------------------------------- targets

def _place(option: str, path: Path) -> str:
    return f"{option} {path}" if option else str(path)


def _is_within(inner: Path, outer: Path) -> bool:
    return inner == outer or outer in inner.parents


def _check_target(path: Path, inputs: Iterable[str | Path], option: str) -> Path:
    """The resolved ``path``; refuse places that must never be an output."""
    if str(path).strip() == "":
        raise InputError(f"{option}: an empty path; name an output")
    real = path.resolve()
    home = Path.home().resolve()
    cwd = Path.cwd().resolve()
    if real == Path(real.anchor):
        raise InputError(f"{_place(option, path)}: is the root folder; choose a new folder for the output")
    if _is_within(home, real):
        raise InputError(f"{_place(option, path)}: is the home folder or contains it; choose a new folder for the output")
    if _is_within(cwd, real):
        raise InputError(f"{_place(option, path)}: is the current folder or contains it; choose a new folder "
                         "for the output")
    for anc in real.parents:  # the nearest existing ancestor must be a folder
        if anc.exists():
            if not anc.is_dir():
                raise InputError(f"{_place(option, path)}: {anc} is a file, not a folder; choose another output")
            break
    for inp in inputs:
        if inp is None:
            continue
        r = Path(inp).resolve()
        if _is_within(r, real):
            what = "is" if r == real else "contains"
            raise InputError(f"{_place(option, path)}: {what} the input {inp}; outputs never replace inputs; "
                             "choose another output")
    return real


# ---------------------------------------------------------------- locks

def _lock_file(real: Path) -> Path:
    return real.parent / f".{real.name}.lock"


def _acquire(real: Path, option: str, shown: Path, *, wait: bool = False) -> int:
    lock = _lock_file(real)
    lock.parent.mkdir(parents=True, exist_ok=True)
    while True:
        fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o666 & ~_umask())
        try:
            fcntl.flock(fd, fcntl.LOCK_EX if wait else fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            try:
                holder = os.pread(fd, 200, 0).decode(errors="replace").split("\n")[1]
            except (OSError, IndexError):
                holder = "another run"
            os.close(fd)
            raise InputError(f"{_place(option, shown)}: another bayesgeo run ({holder}) is writing this output; "
                             "wait for it to finish or choose another output") from None
        try:  # the file may have been unlinked by its previous holder between open and flock
            same = os.path.samestat(os.fstat(fd), os.stat(lock))
        except FileNotFoundError:
            same = False
        if same:
            break
        os.close(fd)
    os.ftruncate(fd, 0)
    stamp = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    os.pwrite(fd, f"{_LOCK_HEAD}\npid {os.getpid()}, started {stamp}\n".encode(), 0)
    return fd


def _clean_stale(real: Path) -> None:
    """Remove what killed runs for ``real`` left beside it (we hold its lock, so none is live)."""
    parent = real.parent
    if not parent.is_dir():
        return
    old = re.compile(re.escape(f".{real.name}.old-") + r"\d+$")
    for entry in parent.iterdir():
        if entry.name.startswith(f".{real.name}.") and _is_debris(entry):
            if entry.is_dir():
                shutil.rmtree(entry, ignore_errors=True)
            else:
                entry.unlink(missing_ok=True)
        elif old.match(entry.name) and entry.is_dir() and not entry.is_symlink() and read_marker(entry) is not None:
            shutil.rmtree(entry, ignore_errors=True)


def claim(path: str | Path, *, overwrite: bool = False, inputs: Iterable[str | Path] = (),
          option: str = "--out", kind: str = "folder") -> Path:
    """Check that ``path`` may be written and hold it for this process until :func:`release_all`.

    Call it before long work so that a refusal comes first. Holding is idempotent.

    Raises
    ------
    InputError
        ``path`` exists without ``overwrite``; ``path`` must never be an output (see module
        docstring); it holds files bayesgeo did not write; another run holds it.
    """
    path = Path(path)
    real = _check_target(path, inputs, option)
    if real in _HELD:
        return path
    fd = _acquire(real, option, path)
    _HELD[real] = fd
    try:
        _clean_stale(real)
        if path.exists() or path.is_symlink():
            if not overwrite:
                how = "pass --overwrite" if option.startswith("--") or not option else "set overwrite = true"
                raise InputError(f"{path}: already exists; choose another output or {how}")
            if kind == "folder":
                check_replaceable(path)
            elif kind == "file" and (path.is_dir() or path.is_symlink()):
                raise InputError(f"{path}: is a folder or link, not a file bayesgeo wrote; choose another output")
    except BaseException:
        _release(real)
        raise
    return path


def _release(real: Path) -> None:
    fd = _HELD.pop(real, None)
    if fd is None:
        return
    with contextlib.suppress(OSError):
        os.unlink(_lock_file(real))
    os.close(fd)


def release_all() -> None:
    """Drop every output this process holds."""
    for real in list(_HELD):
        _release(real)


@contextlib.contextmanager
def scope() -> Iterator[None]:
    """Release, on leaving, every output claimed inside (a command ends; a study stage ends)."""
    before = set(_HELD)
    try:
        yield
    finally:
        for real in list(_HELD):
            if real not in before:
                _release(real)


# ---------------------------------------------------------------- writing

def part_file(path: Path) -> Path:
    """A new empty temporary file ``.NAME.XXXXXXXX.part`` beside ``path``, with the usual permissions."""
    fd, t = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    Path(t).chmod(0o666 & ~_umask())  # mkstemp makes 0600
    return Path(t)


def _part_dir(real: Path) -> Path:
    tmp = Path(tempfile.mkdtemp(prefix=f".{real.name}.", suffix=".part", dir=real.parent))
    tmp.chmod(0o777 & ~_umask())  # mkdtemp makes 0700
    (tmp / _PART_TAG).write_text(f"pid {os.getpid()}\n")
    return tmp


def _swap_in(tmp: Path, path: Path) -> None:
    """Rename the finished ``tmp`` to ``path``; a previous ``path`` (already checked) goes last."""
    old = None
    if path.exists() or path.is_symlink():
        old = path.with_name(f".{path.name}.old-{os.getpid()}")
        os.replace(path, old)
    os.replace(tmp, path)
    if old is not None:
        if old.is_dir() and not old.is_symlink():
            shutil.rmtree(old, ignore_errors=True)
        else:
            old.unlink(missing_ok=True)


@contextlib.contextmanager
def new_folder(path: str | Path, *, overwrite: bool = False, inputs: Iterable[str | Path] = (),
               option: str = "--out") -> Iterator[Path]:
    """Yield a temporary folder; on success it gets a marker and becomes ``path`` in one rename.

    See :func:`claim` for what is refused. A crash leaves the previous ``path`` (if any) intact.
    """
    path = Path(path)
    claim(path, overwrite=overwrite, inputs=inputs, option=option)
    real = path.resolve()
    tmp = _part_dir(real)
    try:
        yield tmp
        (tmp / _PART_TAG).unlink()
        _write_marker(tmp, _file_table(tmp))
        if path.exists() or path.is_symlink():  # again: something may have appeared while we worked
            if not overwrite:
                raise InputError(f"{path}: appeared while this run worked; nothing was written; "
                                 "choose another output")
            check_replaceable(path)
        _swap_in(tmp, path)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
        _release(real)


@contextlib.contextmanager
def new_files(paths: Iterable[str | Path], *, overwrite: bool = False, inputs: Iterable[str | Path] = (),
              record: str | Path | None = None, option: str = "--out") -> Iterator[list[Path]]:
    """Standalone output files, all or none: yield temporary paths, moved into place on success.

    ``record`` names one of ``paths``, a JSON object file to which a ``"bayesgeo_output"`` entry
    (the SHA-256 of the other files) is added; with ``overwrite`` an existing file is replaced only
    when the existing record vouches for it unchanged.
    """
    paths = [Path(p) for p in paths]
    record = Path(record) if record is not None else None
    for p in paths:
        claim(p, overwrite=overwrite, inputs=inputs, option=option, kind="file")
    try:
        if overwrite and any(p.exists() for p in paths):
            _check_record(paths, record)
        tmps = [part_file(p.resolve()) for p in paths]
        try:
            yield tmps
            if record is not None:
                k = paths.index(record)
                obj = json.loads(tmps[k].read_text(encoding="utf-8"))
                obj["bayesgeo_output"] = {"command": " ".join(_COMMAND), "files": {
                    p.name: sha256_file(t) for p, t in zip(paths, tmps) if p != record}}
                tmps[k].write_text(json.dumps(obj, indent=2) + "\n", encoding="utf-8")
            for p, t in zip(paths, tmps):
                os.replace(t, p)
        finally:
            for t in tmps:
                t.unlink(missing_ok=True)
    finally:
        for p in paths:
            _release(p.resolve())


def _check_record(paths: list[Path], record: Path | None) -> None:
    existing = [p for p in paths if p.exists()]
    rec = None
    if record is not None and record.is_file():
        with contextlib.suppress(OSError, ValueError):
            rec = json.loads(record.read_text(encoding="utf-8")).get("bayesgeo_output")
    files = rec.get("files", {}) if isinstance(rec, dict) else None
    for p in existing:
        if p == record and files is not None:
            continue
        if files is None or p.name not in files or sha256_file(p) != files[p.name]:
            raise InputError(f"{p}: not recorded as written by bayesgeo (or changed since); it is never "
                             "replaced; choose another output")


def check_addable(folder: str | Path, name: str, *, overwrite: bool = False, option: str = "--overwrite") -> Path:
    """Raise :class:`InputError` unless ``folder/name`` may be written by a stage adding to ``folder``.

    A new name is always addable. An existing one needs ``overwrite`` and a marker in ``folder``
    that records it (every file below it, for a folder) unchanged.
    """
    folder = Path(folder)
    target = folder / name
    if not (target.exists() or target.is_symlink()):
        return target
    if not overwrite:
        raise InputError(f"{target}: already exists; pass {option} to replace it")
    marker = read_marker(folder)
    if marker is None:
        raise InputError(f"{target}: {folder} has no {MARKER}, so bayesgeo cannot tell that it wrote "
                         f"{name}; it is not replaced; move it away first")
    extra, changed = _foreign(folder, marker, under=name)
    if extra or changed or target.is_symlink():
        raise InputError(f"{target}: holds files bayesgeo did not write or that were changed since "
                         f"({_names(extra + changed) or name}); it is not replaced; move it away first")
    return target


@contextlib.contextmanager
def add_to_folder(folder: str | Path, name: str, *, overwrite: bool = False, kind: str = "file",
                  option: str = "--overwrite") -> Iterator[Path]:
    """Yield a temporary file (``kind="file"``) or folder (``"dir"``) that becomes ``folder/name``.

    What may be replaced is decided by :func:`check_addable`; the folder's marker then records
    what was written. A folder without a marker (written by an older bayesgeo) takes new files
    but never has one replaced.
    """
    folder = Path(folder)
    target = folder / name
    real = target.resolve()
    claim(target, overwrite=True, option="", kind="none")
    try:
        check_addable(folder, name, overwrite=overwrite, option=option)
        if kind == "dir":
            tmp = _part_dir(real)
        else:
            tmp = part_file(real)
        try:
            yield tmp
            if kind == "dir":
                (tmp / _PART_TAG).unlink()
            _swap_in(tmp, target)
        finally:
            if tmp.is_dir():
                shutil.rmtree(tmp, ignore_errors=True)
            else:
                tmp.unlink(missing_ok=True)
        if read_marker(folder) is not None:
            _update_marker(folder, name)
    finally:
        _release(real)


def _update_marker(folder: Path, name: str) -> None:
    """Re-record ``folder/name`` in the folder's marker (under a short lock on the marker)."""
    fd = _acquire((folder / MARKER).resolve(), "", folder, wait=True)
    try:
        marker = read_marker(folder)
        if marker is None:
            return
        files = {k: v for k, v in marker["files"].items() if k != name and not k.startswith(name + "/")}
        target = folder / name
        if target.is_dir():
            files.update({f"{name}/{rel}": sha256_file(p) for rel, p in _walk(target)})
        else:
            files[name] = sha256_file(target)
        marker.setdefault("additions", []).append(
            {"path": name, "command": " ".join(_COMMAND),
             "time": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")})
        _write_marker(folder, files, run=marker)
    finally:
        with contextlib.suppress(OSError):
            os.unlink(_lock_file((folder / MARKER).resolve()))
        os.close(fd)
