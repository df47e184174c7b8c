"""The example scripts run, their numbers make sense, and the docs name every command, option and study key."""

from __future__ import annotations

import os
import runpy
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"


def _run(script: str, *args: str, timeout: int = 900) -> subprocess.CompletedProcess:
    env = {**os.environ, "BAYESGEO_EXAMPLE_QUICK": "1", "MPLBACKEND": "Agg", "OPENBLAS_NUM_THREADS": "1"}
    return subprocess.run([sys.executable, str(EXAMPLES / script), *args], capture_output=True, text=True,
                          env=env, timeout=timeout, check=False, cwd=ROOT)


def test_nn_example_error_shrinks():
    """Vecchia's approximation becomes exact with all previous points as neighbours (Vecchia 1988; Guinness
    2018), and the error with m = 20 is far below that with m = 3 (the pattern in FACTS.md [run])."""
    errors = runpy.run_path(str(EXAMPLES / "nn_likelihood.py"))["main"]()
    ms = sorted(errors)
    assert abs(errors[ms[-1]]) < 1e-6
    assert abs(errors[20]) < 0.2 * abs(errors[3])


def test_explore_example(tmp_path):
    """The exploration example writes its figures; its WLS practical ranges fall inside the demo's
    population of ranges (log-normal around 150 m with sd 0.3 on the log scale, bayesgeo/data/demo.py truth):
    within 3 population sds, a loose check because one parcel's estimate is noisy."""
    import math

    res = _run("explore_demo.py", str(tmp_path))
    assert res.returncode == 0, res.stderr[-2000:]
    assert (tmp_path / "semivariogram.png").is_file() and (tmp_path / "correlogram.png").is_file()
    line = [ln for ln in res.stdout.splitlines() if "WLS practical range" in ln][0]
    values = [float(v.split(":")[1]) for v in line.split("{")[1].rstrip("}").split(",")]
    for v in values:
        assert abs(math.log(v) - math.log(150.0)) < 3 * 0.30 + 0.5


def test_cli_reference_names_every_option():
    """docs/cli.md names every command and every option of the argparse parsers (argparse is the source)."""
    import argparse

    from bayesgeo.cli import COMMANDS, _build_parser

    text = (ROOT / "docs" / "cli.md").read_text(encoding="utf-8")
    parser = _build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    missing = []
    for name in COMMANDS:
        if f"## bayesgeo {name}\n" not in text:
            missing.append(name)
        for action in sub.choices[name]._actions:
            if action.help == argparse.SUPPRESS:  # hidden: an old option name that only says its new name
                continue
            for opt in action.option_strings:
                if opt not in ("-h", "--help") and f"`{opt}`" not in text.split(f"## bayesgeo {name}\n")[-1].split("\n## ")[0]:
                    missing.append(f"{name} {opt}")
    assert missing == [], f"regenerate with: python examples/make_cli_reference.py ({missing})"


def test_study_reference_names_every_key():
    """docs/study_file.md documents every table and key of the schema."""
    from bayesgeo.study.schema import SCHEMA

    text = (ROOT / "docs" / "study_file.md").read_text(encoding="utf-8")
    for table, keys in SCHEMA.items():
        if table:
            assert f"### [{table}]" in text
        for key in keys:
            assert f"| `{key}` |" in text, (table, key)


def test_audit_table_lists_every_test():
    """docs/validation_references.md has a row for every test function, with its docstring (the tests'
    syntax trees, read with Python's ast module, are the source)."""
    sys.path.insert(0, str(EXAMPLES))
    try:
        from make_validation_references import collect
    finally:
        sys.path.remove(str(EXAMPLES))
    text = (ROOT / "docs" / "validation_references.md").read_text(encoding="utf-8")
    rows = collect(ROOT / "tests")
    assert len(rows) > 300
    missing = [f"{r['file']}::{r['test']}" for r in rows
               if f"| {r['file']} | `{r['test']}" not in text or (r["doc"] and r["doc"][:40].replace("|", "\\|") not in text)]
    assert missing == [], f"regenerate with: python examples/make_validation_references.py ({missing[:5]})"


@pytest.mark.slow
def test_fit_check_map_example(tmp_path):
    """The fit-check-map example runs end to end with quick settings and writes maps."""
    res = _run("fit_check_map.py", str(tmp_path))
    assert res.returncode == 0, res.stderr[-3000:]
    assert (tmp_path / "mean.png").is_file() and (tmp_path / "diagnostics").is_dir()


def test_plume_anisotropy_example(tmp_path):
    """The directional example runs with quick settings, writes its maps and recovers the invented plume's
    direction (60 degrees) within 30 degrees with a ratio interval above 1 (one seed; a smoke check)."""
    res = _run("plume_anisotropy.py", str(tmp_path))
    assert res.returncode == 0, res.stderr[-3000:]
    assert (tmp_path / "mean.png").is_file()
    lines = {ln.split(":")[0]: ln for ln in res.stdout.splitlines() if ln.startswith("anisotropy_")}
    angle = float(lines["anisotropy_angle"].split()[1])
    ratio_low = float(lines["anisotropy_ratio"].split("interval")[1].split()[0])
    assert abs((angle - 60.0 + 90.0) % 180.0 - 90.0) < 30.0 and ratio_low > 1.0


@pytest.mark.slow
def test_hierarchical_example(tmp_path):
    """The several-site example runs with quick settings and prints a population block."""
    res = _run("hierarchical_demo.py", str(tmp_path))
    assert res.returncode == 0, res.stderr[-3000:]
    assert "population" in res.stdout


@pytest.mark.slow
def test_study_example(tmp_path):
    """The study example writes a run folder with the report and the manifest."""
    res = _run("run_study.py", str(tmp_path / "run"))
    assert res.returncode in (0, 3), res.stderr[-3000:]
    assert (tmp_path / "run" / "report.html").is_file() and (tmp_path / "run" / "manifest.json").is_file()
