"""Atomic outputs: never half-written, never silently overwritten, ordinary permissions."""

from __future__ import annotations

import os

import pytest

from bayesgeo.io import atomic_dir, write_json, write_text
from bayesgeo.validate import InputError


def test_file_refused_then_overwritten(tmp_path):
    """An existing output is refused unless overwrite is asked, and an atomic write leaves no temporary file (behaviour check)."""
    p = write_text(tmp_path / "a.txt", "one")
    with pytest.raises(InputError, match=r"a\.txt: already exists; .* --overwrite"):
        write_text(p, "two")
    write_text(p, "two", overwrite=True)
    assert p.read_text() == "two"
    assert [f.name for f in tmp_path.iterdir()] == ["a.txt"]  # no temporary left behind


def test_dir_crash_leaves_old_output(tmp_path):
    """A crash while writing a replacement folder leaves the previous output intact (atomic rename, behaviour check)."""
    out = tmp_path / "run"
    with atomic_dir(out) as tmp:
        (tmp / "x").write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_dir(out, overwrite=True) as tmp:
            (tmp / "x").write_text("new")
            raise RuntimeError("crash mid-way")
    assert (out / "x").read_text() == "old"
    assert sorted(f.name for f in tmp_path.iterdir()) == ["run"]


def test_permissions_follow_umask(tmp_path):
    """Outputs get the usual permissions (umask), not mkstemp's 0600 / mkdtemp's 0700."""
    old = os.umask(0o022)
    try:
        f = write_json(tmp_path / "a.json", {"a": 1})
        with atomic_dir(tmp_path / "d") as tmp:
            (tmp / "y").write_text("y")
    finally:
        os.umask(old)
    assert f.stat().st_mode & 0o777 == 0o644
    assert (tmp_path / "d").stat().st_mode & 0o777 == 0o755
