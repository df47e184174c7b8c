"""Output folders: atomic, exclusive, marked, and never replacing what bayesgeo did not write.

The rules under test are the project's own (docs/outputs.md); the outside facts they rest on are
named where used: SHA-256 digests are compared with Python's hashlib (FIPS 180-4), and an
``flock`` lock is dropped by the kernel when its holder dies (flock(2), Linux manual).
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from bayesgeo.common import outputs
from bayesgeo.common.io import write_json, write_text
from bayesgeo.common.outputs import MARKER, add_to_folder, check_addable, claim, new_files, new_folder, read_marker
from bayesgeo.common.validate import InputError


@pytest.fixture(autouse=True)
def _release():
    yield
    outputs.release_all()


def _tree(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _made(folder: Path, files: dict[str, str]) -> Path:
    with new_folder(folder) as tmp:
        for name, text in files.items():
            (tmp / name).parent.mkdir(parents=True, exist_ok=True)
            (tmp / name).write_text(text)
    return folder


def test_file_refused_then_overwritten(tmp_path):
    """An existing file is refused unless overwrite is asked, and an atomic write leaves no temporary file (behaviour check)."""
    p = write_text(tmp_path / "a.txt", "one")
    with pytest.raises(InputError, match=r"a\.txt: already exists; .* --overwrite"):
        write_text(p, "two")
    write_text(p, "two", overwrite=True)
    assert p.read_text() == "two"
    assert [f.name for f in tmp_path.iterdir()] == ["a.txt"]  # no temporary left behind


def test_marker_lists_every_file_with_its_sha256(tmp_path):
    """The marker names every file written with its SHA-256, equal to hashlib's digest (FIPS 180-4)."""
    out = _made(tmp_path / "run", {"a.txt": "alpha", "sub/b.txt": "beta"})
    marker = read_marker(out)
    assert marker["files"] == {"a.txt": hashlib.sha256(b"alpha").hexdigest(),
                               "sub/b.txt": hashlib.sha256(b"beta").hexdigest()}
    assert len(marker["run_id"]) == 32 and marker["command"] and marker["created"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]  # no lock or part left


def test_dir_crash_leaves_old_output(tmp_path):
    """A crash while writing a replacement folder leaves the previous output intact (atomic rename, behaviour check)."""
    out = _made(tmp_path / "run", {"x": "old"})
    with pytest.raises(RuntimeError):
        with new_folder(out, overwrite=True) as tmp:
            (tmp / "x").write_text("new")
            raise RuntimeError("crash mid-way")
    assert (out / "x").read_text() == "old"
    assert sorted(f.name for f in tmp_path.iterdir()) == ["run"]


def test_permissions_follow_umask(tmp_path):
    """Outputs get the usual permissions (umask), not mkstemp's 0600 / mkdtemp's 0700 (POSIX umask semantics)."""
    old = os.umask(0o022)
    try:
        f = write_json(tmp_path / "a.json", {"a": 1})
        _made(tmp_path / "d", {"y": "y"})
    finally:
        os.umask(old)
    assert f.stat().st_mode & 0o777 == 0o644
    assert (tmp_path / "d").stat().st_mode & 0o777 == 0o755


def test_overwrite_replaces_only_what_bayesgeo_wrote(tmp_path):
    """--overwrite replaces a marked folder; a foreign file, a changed file or a missing marker stops it,
    and the folder is left byte-identical (the output rules of docs/outputs.md)."""
    out = _made(tmp_path / "run", {"a.txt": "alpha"})
    with new_folder(out, overwrite=True) as tmp:
        (tmp / "a.txt").write_text("second")
    assert (out / "a.txt").read_text() == "second"

    (out / "notes.txt").write_text("my field notes")
    before = _tree(out)
    with pytest.raises(InputError, match=r"holds files bayesgeo did not write \(notes\.txt\)"):
        with new_folder(out, overwrite=True) as tmp:
            pass
    assert _tree(out) == before
    (out / "notes.txt").unlink()

    (out / "a.txt").write_text("edited by hand")
    with pytest.raises(InputError, match=r"changed since bayesgeo wrote them \(a\.txt\)"):
        claim(out, overwrite=True)
    (out / MARKER).unlink()
    with pytest.raises(InputError, match=r"is not a folder bayesgeo wrote"):
        claim(out, overwrite=True)
    assert (out / "a.txt").read_text() == "edited by hand"


def test_empty_folder_and_new_folder_are_fine(tmp_path):
    """An empty existing folder loses nothing when replaced; a missing one is created (behaviour check)."""
    (tmp_path / "empty").mkdir()
    with pytest.raises(InputError, match="already exists"):
        claim(tmp_path / "empty")
    with new_folder(tmp_path / "empty", overwrite=True) as tmp:
        (tmp / "z").write_text("z")
    assert (tmp_path / "empty" / "z").read_text() == "z"


@pytest.mark.parametrize("target, why", [
    (".", "is the current folder or contains it"),
    ("..", "folder or contains it"),  # the parent of the current folder (here it holds HOME too)
    ("/", "is the root folder"),
    ("~", "is the home folder or contains it"),
])
def test_places_never_replaced(tmp_path, monkeypatch, target, why):
    """'.', '..', '/' and the home folder are refused with or without --overwrite (common practice: a
    tool never deletes the folder it runs in or a user's home)."""
    work = tmp_path / "work"
    work.mkdir()
    (work / "data.csv").write_text("x,y,v\n")
    monkeypatch.chdir(work)
    (tmp_path / "home").mkdir()
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    path = Path(os.path.expanduser(target))
    for ow in (False, True):
        with pytest.raises(InputError, match=why):
            claim(path, overwrite=ow)
    assert (work / "data.csv").read_text() == "x,y,v\n"


def test_folder_holding_the_input_or_the_input_itself_is_refused(tmp_path):
    """An output that is, or contains, an input of the run is refused even when it carries a marker
    (outputs never replace inputs)."""
    out = _made(tmp_path / "sub", {"a.txt": "a"})
    data = out / "data.csv"
    data.write_text("x,y,v\n1,2,3\n")
    with pytest.raises(InputError, match=r"--out .*sub: contains the input .*data\.csv"):
        claim(out, overwrite=True, inputs=[data])
    with pytest.raises(InputError, match=r"--out .*data\.csv: is the input"):
        claim(data, overwrite=True, inputs=[data])
    assert data.read_text() == "x,y,v\n1,2,3\n"


def test_symlink_is_never_replaced(tmp_path):
    """A symbolic link named as the output is refused: replacing it could reach a folder elsewhere (behaviour check)."""
    real = _made(tmp_path / "real", {"a": "a"})
    (tmp_path / "link").symlink_to(real)
    with pytest.raises(InputError, match="symbolic link"):
        claim(tmp_path / "link", overwrite=True)


_HOLDER = textwrap.dedent("""
    import sys, time
    from bayesgeo.common.outputs import new_folder
    with new_folder(sys.argv[1]) as tmp:
        (tmp / "half").write_text("half")
        print("holding", flush=True)
        time.sleep(60)
""")


def _hold(out: Path) -> subprocess.Popen:
    proc = subprocess.Popen([sys.executable, "-c", _HOLDER, str(out)], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "holding"
    return proc


def test_second_run_for_the_same_output_is_refused_and_a_killed_run_is_cleaned(tmp_path):
    """While one run writes an output a second is refused; after SIGKILL the kernel drops the flock
    (flock(2)) and the next run removes the killed run's part folder before writing."""
    out = tmp_path / "run"
    proc = _hold(out)
    try:
        with pytest.raises(InputError, match=r"another bayesgeo run \(pid \d+, started .*\) is writing"):
            claim(out)
        parts = [p.name for p in tmp_path.iterdir() if p.name.endswith(".part")]
        assert len(parts) == 1
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    assert not out.exists()
    with new_folder(out) as tmp:
        (tmp / "whole").write_text("whole")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]
    assert sorted(p.name for p in out.iterdir()) == [MARKER, "whole"]


def test_racing_runs_one_wins(tmp_path):
    """Two processes started together for one output: exactly one writes it, the other is refused (behaviour check)."""
    code = textwrap.dedent("""
        import sys, time
        from bayesgeo.common.outputs import new_folder
        from bayesgeo.common.validate import InputError
        try:
            with new_folder(sys.argv[1]) as tmp:
                time.sleep(1.5)
                (tmp / "who").write_text(sys.argv[2])
        except InputError as err:
            print("refused", err)
            sys.exit(2)
    """)
    out = tmp_path / "run"
    procs = [subprocess.Popen([sys.executable, "-c", code, str(out), str(k)], stdout=subprocess.PIPE, text=True)
             for k in range(2)]
    codes = sorted(p.wait() for p in procs)
    assert codes == [0, 2]
    assert (out / "who").read_text() in {"0", "1"}


def test_add_to_folder_keeps_earlier_results(tmp_path):
    """Adding to a fit folder: an earlier result is kept without overwrite, replaced with it only when
    the marker vouches for it, and the marker records the new file (hashlib SHA-256)."""
    out = _made(tmp_path / "fit", {"posterior.nc": "p"})
    with add_to_folder(out, "diagnostics", kind="dir") as tmp:
        (tmp / "d.json").write_text("first")
    assert read_marker(out)["files"]["diagnostics/d.json"] == hashlib.sha256(b"first").hexdigest()
    with pytest.raises(InputError, match=r"diagnostics: already exists; pass --overwrite"):
        check_addable(out, "diagnostics")
    with add_to_folder(out, "diagnostics", overwrite=True, kind="dir") as tmp:
        (tmp / "d.json").write_text("second")
    assert (out / "diagnostics" / "d.json").read_text() == "second"
    marker = read_marker(out)
    assert marker["files"]["diagnostics/d.json"] == hashlib.sha256(b"second").hexdigest()
    assert [a["path"] for a in marker["additions"]] == ["diagnostics", "diagnostics"]

    (out / "diagnostics" / "mine.png").write_bytes(b"user figure")
    with pytest.raises(InputError, match=r"did not write or that were changed since \(diagnostics/mine\.png\)"):
        check_addable(out, "diagnostics", overwrite=True)
    (out / "diagnostics" / "mine.png").unlink()
    claim(out, overwrite=True)  # after additions the whole folder is still bayesgeo's


def test_addition_in_a_folder_without_marker(tmp_path):
    """A folder bayesgeo cannot vouch for (no marker) takes new files but never has one replaced (behaviour check)."""
    legacy = tmp_path / "old_fit"
    legacy.mkdir()
    (legacy / "predictions.nc").write_bytes(b"old")
    with pytest.raises(InputError, match="has no .bayesgeo-output.json"):
        check_addable(legacy, "predictions.nc", overwrite=True)
    with add_to_folder(legacy, "new.csv") as tmp:
        tmp.write_text("n")
    assert (legacy / "new.csv").read_text() == "n" and not (legacy / MARKER).exists()


def test_nested_folders_are_vouched_for_by_their_own_marker(tmp_path):
    """A run folder holding fit folders stays replaceable after a stage adds to an inner folder (behaviour check)."""
    run = tmp_path / "run"
    with new_folder(run) as tmp:
        with new_folder(tmp / "fit") as inner:
            (inner / "posterior.nc").write_text("p")
        (tmp / "report.html").write_text("r")
    assert "fit/posterior.nc" not in read_marker(run)["files"]
    with add_to_folder(run / "fit", "map.png") as tmp:
        tmp.write_text("m")
    claim(run, overwrite=True)
    outputs.release_all()
    (run / "fit" / "stray.txt").write_text("s")
    with pytest.raises(InputError, match=r"fit: holds files bayesgeo did not write \(stray\.txt\)"):
        claim(run, overwrite=True)


def test_new_files_replace_only_recorded_files(tmp_path):
    """Standalone files (the demo CSV and its truth file) are written together; overwrite replaces them
    only while the truth file's SHA-256 record matches the CSV (hashlib)."""
    csv, truth = tmp_path / "d.csv", tmp_path / "d.truth.json"
    with new_files([csv, truth], record=truth) as (t1, t2):
        t1.write_text("a,b\n")
        t2.write_text(json.dumps({"seed": 1}))
    rec = json.loads(truth.read_text())
    assert rec["seed"] == 1 and rec["bayesgeo_output"]["files"] == {"d.csv": hashlib.sha256(b"a,b\n").hexdigest()}
    with new_files([csv, truth], overwrite=True, record=truth) as (t1, t2):
        t1.write_text("a,b\n1,2\n")
        t2.write_text(json.dumps({"seed": 2}))
    csv.write_text("a,b\nmy own edits\n")
    with pytest.raises(InputError, match=r"d\.csv: not recorded as written by bayesgeo \(or changed since\)"):
        with new_files([csv, truth], overwrite=True, record=truth):
            pass
    assert csv.read_text() == "a,b\nmy own edits\n"
    (tmp_path / "dir.csv").mkdir()
    with pytest.raises(InputError, match="is a folder or link"):
        claim(tmp_path / "dir.csv", overwrite=True, kind="file")


def test_stale_parts_of_other_outputs_and_user_files_survive(tmp_path):
    """Cleaning removes only parts of the output being written, tagged as bayesgeo's; a user's file
    with a similar name stays (behaviour check)."""
    (tmp_path / ".run.abc12345.part").mkdir()
    (tmp_path / ".run.abc12345.part" / ".bayesgeo-part").write_text("pid 1\n")
    (tmp_path / ".other.abc12345.part").mkdir()
    (tmp_path / ".other.abc12345.part" / ".bayesgeo-part").write_text("pid 1\n")
    (tmp_path / ".run.mine.part").mkdir()
    (tmp_path / ".run.mine.part" / "notes.txt").write_text("keep")
    claim(tmp_path / "run")
    names = sorted(p.name for p in tmp_path.iterdir() if not p.name.endswith(".lock"))
    assert names == [".other.abc12345.part", ".run.mine.part"]


def test_scope_releases_only_its_own_claims(tmp_path):
    """A stage run inside a study releases what it claimed and keeps the study's own claim (behaviour check)."""
    claim(tmp_path / "run")
    with outputs.scope():
        claim(tmp_path / "stage")
        assert (tmp_path / ".stage.lock").exists()
    assert not (tmp_path / ".stage.lock").exists() and (tmp_path / ".run.lock").exists()


def test_output_below_a_file_is_refused(tmp_path):
    """An output path below an existing file (data.csv/sub) is refused with one line, not an OSError (behaviour check)."""
    (tmp_path / "data.csv").write_text("x\n")
    with pytest.raises(InputError, match=r"data\.csv is a file, not a folder"):
        claim(tmp_path / "data.csv" / "sub")
