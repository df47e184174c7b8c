"""The safety net of the reliability suite: a guard against touching paths outside the sandbox,
a memory cap and a time limit. Imported by tests/test_reliability.py and by the child process that
runs a case in isolation (``python tests/_reliability_guard.py ROOT ARGV_JSON``)."""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import sys
import tempfile
from pathlib import Path

REAL_HOME = Path(os.path.expanduser("~")).resolve()
CASE_MEMORY = 4 << 30  # bytes a case may add to the process's data segment (a runaway allocation is a defect)


class CaseTimeout(BaseException):
    """Raised by the alarm; a BaseException so that no ``except Exception`` in the program eats it."""


class GuardTripped(BaseException):
    """The program tried to create, move or delete a path outside the sandbox that must never be touched."""


def _ancestors(p: Path) -> set[Path]:
    return set(p.parents)


@contextlib.contextmanager
def guard(root: Path):
    """Refuse mkdir/rename/replace/remove/rmdir/rmtree of ``/``, its children, the real home folder,
    its visible children and the sandbox's ancestors (and new entries directly inside them, except in
    the system temporary folder, where libraries keep caches)."""
    root = root.resolve()
    anc = _ancestors(root)
    tmp = Path(tempfile.gettempdir()).resolve()

    def dangerous(path) -> bool:
        try:
            p = Path(os.path.abspath(os.fspath(path)))
        except TypeError:
            return False
        if p == root or root in p.parents:
            return False
        if p == Path("/") or p.parent == Path("/") or p in anc or p == REAL_HOME:
            return True
        if p.parent == REAL_HOME and not p.name.startswith("."):
            return True
        return p.parent in anc and p.parent != tmp

    def wrap(fn, nargs=1):
        def guarded(*args, **kw):
            if kw.get("dir_fd") is None and kw.get("src_dir_fd") is None:
                for a in args[:nargs]:
                    if dangerous(a):
                        raise GuardTripped(f"{fn.__name__}({a!r}) outside the sandbox")
            return fn(*args, **kw)

        return guarded

    saved = {(os, n): getattr(os, n) for n in ("mkdir", "rmdir", "remove", "unlink", "rename", "replace")}
    saved[(shutil, "rmtree")] = shutil.rmtree
    try:
        for (mod, n), fn in saved.items():
            setattr(mod, n, wrap(fn, 2 if n in ("rename", "replace") else 1))
        yield
    finally:
        for (mod, n), fn in saved.items():
            setattr(mod, n, fn)


def vm_data() -> int | None:
    try:
        with open("/proc/self/status") as fh:
            for ln in fh:
                if ln.startswith("VmData:"):
                    return int(ln.split()[1]) * 1024
    except OSError:
        return None
    return None


@contextlib.contextmanager
def memory_cap(extra: int = CASE_MEMORY):
    """Cap the process's data segment (RLIMIT_DATA) at its current size plus ``extra`` while a case
    runs, so that a runaway allocation raises MemoryError instead of exhausting a shared machine."""
    import resource

    used = vm_data()
    if used is None:
        yield
        return
    soft, hard = resource.getrlimit(resource.RLIMIT_DATA)
    cap = used + extra if hard == resource.RLIM_INFINITY else min(used + extra, hard)
    resource.setrlimit(resource.RLIMIT_DATA, (cap, hard))
    try:
        yield
    finally:
        resource.setrlimit(resource.RLIMIT_DATA, (soft, hard))


@contextlib.contextmanager
def alarm(seconds: float):
    def fire(signum, frame):
        raise CaseTimeout(f"still running after {seconds} s")

    old = signal.signal(signal.SIGALRM, fire)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)



def child_main(root: str, argv_json: str, seconds: str) -> int:
    """Run ``bayesgeo.cli.main(argv)`` under the guard, the memory cap and the time limit; an
    escaping exception prints its traceback (the parent looks for it) and gives status 1."""
    from bayesgeo.cli import main

    with guard(Path(root)), memory_cap(), alarm(float(seconds)):
        try:
            return int(main(json.loads(argv_json)) or 0)
        except SystemExit as exc:
            return exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)


if __name__ == "__main__":
    sys.exit(child_main(*sys.argv[1:4]))
