"""Tests of ``bayesgeo validate`` (simulation-based calibration from the command line).

The default-suite test runs the whole machinery on a tiny case (one model compilation, three
replicates); the quick mode itself, whose coverage must fall inside binomial bounds, runs in the
default suite too, so CI checks calibration on every submission (38 s on the idle 2-core test
machine, most of it compiling the model).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from bayesgeo.cli import main
from bayesgeo.calibration.ranks import binomial_bounds


def _run(capsys, argv):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_validate_machinery_small(tmp_path, capsys):
    """End to end on 3 replicates: one JSON object on stdout, ranks within 0..L, coverage counts
    within 0..N, an HTML page with embedded figures and the regulatory cautions (common practice
    for outputs that feed contamination decisions), and the same ranks for the same seed in a
    second run (ranks are integers, so equality is exact)."""
    argv = ["validate", "--kind", "single", "--covariance", "exponential", "--replicates", "3", "--points", "12",
            "--draws", "60", "--tune", "80", "--quick", "--seed", "5", "--json"]
    code, out, _ = _run(capsys, argv + ["--out", str(tmp_path / "a")])
    assert code in (0, 1)
    rep = json.loads(out)
    assert out.count("\n") == 1
    assert {"ok", "runs", "cautions", "layout", "seconds", "mode"} <= set(rep)
    run = rep["runs"][0]
    L = run["ranks_of"]
    ranks = np.array(run["ranks"])
    assert ranks.shape == (3, 4) and ranks.min() >= 0 and ranks.max() <= L
    assert run["quantity_order"] == ["practical_range", "partial_sill", "nugget", "intercept"]
    for q in run["quantities"].values():
        for c in q["coverage"].values():
            assert 0 <= c["count"] <= 3 and c["of"] == 3
    assert len(run["verdicts"]) == 3 and set(run["verdicts"]) <= {"pass", "warn", "fail"}
    # per-replicate convergence figures (Vehtari et al. 2021: R-hat >= 1 up to rounding, ESS > 0;
    # a "fail" verdict names the checks that failed)
    diag = run["fit_diagnostics"]
    assert all(r > 0.99 for r in diag["rhat_max"]) and all(e > 0 for e in diag["ess_min"])
    assert all(d >= 0 for d in diag["divergences"])
    for verdict, failed in zip(run["verdicts"], diag["failed_checks"]):
        assert (verdict == "fail") == bool(failed), (verdict, failed)
    # chains continue while R-hat or ESS fails: looks at 60, 120, 240 draws (4 x --draws, bayesgeo.fitting.looks)
    assert set(diag["draws"]) <= {60, 120, 240}
    assert sum(run["draws_kept"].values()) == 3
    assert sum(run["failed_checks"].values()) >= run["verdicts"].count("fail")
    page = (tmp_path / "a" / "validation.html").read_text()
    assert "data:image/png;base64," in page and "licensed professional" in page
    assert ("Checks failed most often" in page) == ("fail" in run["verdicts"])
    saved = json.loads((tmp_path / "a" / "validation.json").read_text())
    assert saved["runs"][0]["ranks"] == run["ranks"]
    # same seed, same ranks (the compiled model is reused within this process, so this is cheap)
    code2, out2, _ = _run(capsys, argv + ["--out", str(tmp_path / "b")])
    assert code2 == code and json.loads(out2)["runs"][0]["ranks"] == run["ranks"]


def test_validate_refuses_bad_input(tmp_path, capsys, write_csv, grid_rows):
    """--study with --data, an existing output folder and too few replicates exit 2 with one line
    on stderr (the package's convention for bad input)."""
    csv = write_csv(grid_rows)
    code, _, err = _run(capsys, ["validate", "--study", "s.toml", "--data", str(csv), "--out", str(tmp_path / "o")])
    assert code == 2 and "--study and --data" in err and err.count("\n") == 1
    (tmp_path / "exists").mkdir()
    code, _, err = _run(capsys, ["validate", "--out", str(tmp_path / "exists")])
    assert code == 2 and "--overwrite" in err
    code, _, err = _run(capsys, ["validate", "--replicates", "1", "--out", str(tmp_path / "p")])
    assert code == 2 and "--replicates" in err


def test_quick_mode_coverage_within_binomial_bounds(tmp_path, capsys):
    """Quick mode (28 points, 25 replicates, 2 x 200 draws): the number of replicates whose
    central 50% and 90% intervals cover the true practical range, partial sill, nugget and
    intercept lies inside the central 99.9% interval of Binomial(25, 0.5) = [5, 20] and
    Binomial(25, 0.9) = [17, 25] (scipy.stats.binom quantiles; a calibrated model fails one such
    check in 1,000 by chance), and no rank histogram is rejected at the 0.1% level
    (scipy.stats.chisquare; Talts et al. 2018)."""
    code, out, _ = _run(capsys, ["validate", "--quick", "--seed", "3", "--json", "--out", str(tmp_path / "q")])
    rep = json.loads(out)
    assert binomial_bounds(25, 0.5) == (5, 20) and binomial_bounds(25, 0.9) == (17, 25)
    run = rep["runs"][0]
    assert run["replicates"] == 25
    for name, q in run["quantities"].items():
        for level, c in q["coverage"].items():
            assert c["bounds"][0] <= c["count"] <= c["bounds"][1], (name, level, c)
        assert q["uniform_ok"], (name, q["uniformity"])
    assert code == 0 and rep["ok"]


def test_validate_reads_the_layout_from_a_study_file(tmp_path):
    """--study reads the data through the study loader (bayesgeo.study.settings.read_study): the layout is
    the study's data and its covariance family and nugget choice are used (behaviour check)."""
    from types import SimpleNamespace

    from bayesgeo.cli.validate import _template

    rows = "".join(f"{i * 7 % 31},{i * 3},{i % 4 + 1}\n" for i in range(12))
    (tmp_path / "p.csv").write_text("x,y,conc\n" + rows)
    (tmp_path / "s.toml").write_text('[data]\npath = "p.csv"\nvalue = "conc"\ncoords = "xy"\n'
                                     '[model]\ncovariance = "exponential"\nnugget = false\n')
    ds, study = _template(SimpleNamespace(study=str(tmp_path / "s.toml"), data=None))
    assert ds.sizes["obs"] == 12
    assert np.allclose(ds["x"].values, [i * 7 % 31 for i in range(12)])
    assert study.families == ["exponential"] and study["model"]["nugget"] is False


@pytest.mark.parametrize("option, value, pattern", [
    ("--replicates", "99999999999999999999", r"argument --replicates: expected an integer from 2 to 10000"),
    ("--points", "3", r"argument --points: expected an integer from 8 to 100000, got 3"),
    ("--workers", "0", r"argument --workers: expected an integer from 1 to 256, got 0"),
    ("--draws", "-1", r"argument --draws: expected an integer from 1 to 1000000, got -1"),
    ("--seed", str(2**70), r"argument --seed: expected an integer from 0 to 9223372036854775807"),
    ("--nu", "0", r"argument --nu: expected a number in \(0, 50\], got '0'"),
])
def test_option_values_bounded(tmp_path, capsys, option, value, pattern):
    """validate's numeric options are checked where they enter: exit 2, one line, no output folder."""
    from _cli_helpers import assert_refused

    assert_refused(capsys, ["validate", option, value, "--out", tmp_path / "v"], "validate", pattern,
                   absent=[tmp_path / "v"])
