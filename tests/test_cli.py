"""Tests of the command-line entry point (bayesgeo.cli.main): exit statuses and a closed stdout."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from bayesgeo.cli import EXIT_INPUT, EXIT_PIPE, main

ROOT = Path(__file__).resolve().parents[1]


def _env():
    env = dict(os.environ, PYTHONPATH=str(ROOT), OPENBLAS_NUM_THREADS="1", MPLBACKEND="Agg")
    return env


def test_closed_stdout_ends_quietly(tmp_path):
    """A reader that closes the pipe before the command writes (``bayesgeo ... | head -0``) gets no
    BrokenPipeError traceback: the command ends quietly with status 141 (128 + SIGPIPE, what a shell
    reports for a program ended by SIGPIPE), following the Python documentation's "Note on SIGPIPE"
    (module signal). A real OS pipe is used, its read end closed before the child prints."""
    proc = subprocess.Popen([sys.executable, "-m", "bayesgeo", "demo-data", "--out", str(tmp_path / "d.csv")],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=_env(), cwd=tmp_path)
    proc.stdout.close()  # the child is still importing: its first write meets a closed pipe
    err = proc.stderr.read().decode()
    code = proc.wait(timeout=120)
    assert "Traceback" not in err and "BrokenPipe" not in err and "Exception ignored" not in err, err
    assert err == ""
    assert code == EXIT_PIPE
    assert (tmp_path / "d.csv").is_file()  # the work itself was done


def test_closed_stdout_with_json(tmp_path):
    """The same with --json (one object flushed at the end)."""
    proc = subprocess.Popen([sys.executable, "-m", "bayesgeo", "demo-data", "--json", "--out", str(tmp_path / "d.csv")],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=_env(), cwd=tmp_path)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == EXIT_PIPE and err == "", err


def test_refused_option_returns_status(capsys):
    """main() returns the status of a refused option (2) instead of raising SystemExit, and the one
    stderr line names the command and the option."""
    assert main(["demo-data", "--out", "x.csv", "--seed", "-1"]) == EXIT_INPUT
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("bayesgeo demo-data: error: argument --seed: expected an integer")
    assert main(["--version"]) == 0


def test_unexpected_failure_is_one_line(capsys, monkeypatch):
    """The last line of defence: an exception no check foresaw ends with status 1 and one stderr line
    naming the command and the exception, not a traceback; BAYESGEO_DEBUG=1 re-raises it for a developer.
    A machine problem (OSError such as a full disk) is reported as an error, not as a bug."""
    import pytest

    import bayesgeo.cli.demo_data as dd

    def broken(args):
        raise RuntimeError("something\nunforeseen")

    monkeypatch.setattr(dd, "run", broken)
    monkeypatch.delenv("BAYESGEO_DEBUG", raising=False)
    assert main(["demo-data", "--out", "x.csv"]) == 1
    err = capsys.readouterr().err.splitlines()
    assert err == ["bayesgeo demo-data: internal error: RuntimeError: something unforeseen (a bug in bayesgeo: "
                   "please report it with the command line; BAYESGEO_DEBUG=1 shows the traceback)"]

    def full(args):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(dd, "run", full)
    assert main(["demo-data", "--out", "x.csv"]) == 1
    assert capsys.readouterr().err == "bayesgeo demo-data: error: OSError: [Errno 28] No space left on device\n"
    monkeypatch.setenv("BAYESGEO_DEBUG", "1")
    with pytest.raises(OSError):
        main(["demo-data", "--out", "x.csv"])


@pytest.mark.parametrize("argv, place", [
    ([], "name a command"),
    (["explore", "data.csv", "--value", ""], "--value: an empty value"),
    (["explore", " "], "DATA: an empty value"),
    (["explore", "data.csv", "--out", ""], "--out: an empty value"),
])
def test_no_command_and_empty_values_refused(tmp_path, capsys, monkeypatch, argv, place):
    """No command, or an empty string for an option (which would otherwise mean 'detect' or 'the current
    folder'), gives exit 2 and one stderr line naming the option (the CLI contract)."""
    monkeypatch.chdir(tmp_path)
    (tmp_path / "data.csv").write_text("x,y,v\n1,2,3\n")
    assert main(argv) == 2
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and place in lines[0] and captured.out == ""
    assert (tmp_path / "data.csv").read_text() == "x,y,v\n1,2,3\n"
