"""Tests of study files: schema, defaults, and errors that name the key and the line."""

from __future__ import annotations

import pytest

from bayesgeo.study.schema import SCHEMA
from bayesgeo.study.settings import parse_study, read_study, study_line
from bayesgeo.common.validate import InputError

MINIMAL = """\
title = "t"

[data]
path = "points.csv"
units = "mg/kg"

[model]
covariance = ["matern32", "exponential"]
transform = "log"
"""


@pytest.fixture
def study_dir(tmp_path):
    (tmp_path / "points.csv").write_text("x,y,v\n0,0,1\n1,0,2\n")
    return tmp_path


def _parse(text, folder):
    return parse_study(text, path=folder / "study.toml")


def test_defaults_and_relative_paths(study_dir):
    """Paths resolve against the study file's folder; explore inherits the model's transform and trend
    (our own documented rule, docs/study_file.md); every schema key has a value."""
    st = _parse(MINIMAL, study_dir)
    assert st["data"]["path"] == study_dir / "points.csv"
    assert st.families == ["matern32", "exponential"]
    assert st["explore"]["transform"] == "log" and st["explore"]["trend"] == 0
    assert st.out_dir == study_dir / "study-run"
    for table, keys in SCHEMA.items():
        assert set(keys) <= set(st[table]), table
    assert st["sampler"]["seed"] == 1 and st["sampler"]["chains"] == 4


def test_single_family_string(study_dir):
    """A single family may be written as a string (TOML strings and arrays, toml.io v1.0.0)."""
    st = _parse(MINIMAL.replace('["matern32", "exponential"]', '"gaussian"'), study_dir)
    assert st.families == ["gaussian"]


@pytest.mark.parametrize("extra, table, key, line, msg", [
    ("[sampler]\ndraws = \"many\"\n", "sampler", "draws", 12, "expected an integer"),
    ("[sampler]\nchains = 2\nbogus = 1\n", "sampler", "bogus", 13, "unknown key"),
    ("[model.priors]\nrange_below = [10.0]\n", "model.priors", "range_below", 12, "two numbers"),
    ("[model.priors]\nrange_below = [10.0, 1.5]\n", "model.priors", "range_below", 12, "probability"),
    ("[prediction]\nthresholds = [\"high\"]\n", "prediction", "thresholds", 12, "list of numbers"),
    ("[explore]\nestimator = \"median\"\n", "explore", "estimator", 12, "not one of"),
    ("[sampler]\ntarget_accept = 1.2\n", "sampler", "target_accept", 12, "in (0, 1)"),
    ("[output]\noverwrite = \"yes\"\n", "output", "overwrite", 12, "true or false"),
])
def test_errors_name_key_and_line(study_dir, extra, table, key, line, msg):
    """Unknown keys and wrong types are InputErrors naming the file, line, table and key (issue 8
    requirement; TOML types as in toml.io v1.0.0)."""
    text = MINIMAL + "\n" + extra
    with pytest.raises(InputError) as err:
        _parse(text, study_dir)
    s = str(err.value)
    assert f"line {line}: [{table}] {key}" in s and msg in s
    assert "\n" not in s
    assert text.splitlines()[line - 1].lstrip().startswith(key)


def test_unknown_table_and_top_level_key(study_dir):
    """An unknown table is named with its line and the accepted tables are listed."""
    with pytest.raises(InputError, match=r"line 11: \[model\] prior: unknown table; accepted: .*priors"):
        _parse(MINIMAL + "\n[model.prior]\nrange = [1, 0.05]\n", study_dir)
    with pytest.raises(InputError, match=r"line 1: colour: unknown key; accepted: .*data.*sampler"):
        _parse("colour = 1\n" + MINIMAL, study_dir)


@pytest.mark.parametrize("table, old, new", [("explore", "max_lag", "lag_limit"),
                                              ("model.priors", "range", "range_below"),
                                              ("model.priors", "sd", "sd_above"),
                                              ("model.priors", "nugget", "nugget_above")])
def test_renamed_key_names_the_new_key(study_dir, table, old, new):
    """A study file written with a key of an earlier version gets one line naming the file, line, the
    old key and the new one (common practice for renamed settings: fail loudly, say the new name)."""
    value = "100.0" if old == "max_lag" else "[1.0, 0.05]"
    with pytest.raises(InputError, match=rf"line 12: \[{table}\] {old}: renamed; write {new} instead$"):
        _parse(MINIMAL + f"\n[{table}]\n{old} = {value}\n", study_dir)


def test_inline_table_line(study_dir):
    """A key of an inline sub-table is located at its parent key's line."""
    text = MINIMAL + "nugget = true\npriors = {range_below = [1.0, 0.05], sd_above = \"x\"}\n"
    with pytest.raises(InputError, match=r"line 11: \[model.priors\] sd_above"):
        _parse(text, study_dir)


def test_value_checks(study_dir):
    """Cross-key checks: matern needs nu; model covariates must be read from the data; data must exist."""
    with pytest.raises(InputError, match="needs nu"):
        _parse(MINIMAL.replace('"exponential"]', '"matern"]'), study_dir)
    with pytest.raises(InputError, match=r"\[model\] covariates: depth not listed"):
        _parse(MINIMAL + 'covariates = ["depth"]\n', study_dir)
    with pytest.raises(InputError, match=r"line 4: \[data\] path: .*no such file"):
        _parse(MINIMAL.replace("points.csv", "missing.csv"), study_dir)
    with pytest.raises(InputError, match="required"):
        _parse("[data]\nunits = \"m\"\n", study_dir)
    with pytest.raises(InputError, match="not valid TOML"):
        _parse("[data\n", study_dir)
    with pytest.raises(InputError, match="not one of single, hierarchical, independent, complete"):
        _parse(MINIMAL + 'pooling = "partial"\n', study_dir)


def test_read_study_file(study_dir):
    """read_study reads the file as UTF-8 and keeps its text verbatim for the manifest."""
    path = study_dir / "s.toml"
    path.write_text(MINIMAL + "# Matérn note\n", encoding="utf-8")
    st = read_study(path)
    assert st.text.endswith("# Matérn note\n")
    assert st.to_dict()["data"]["path"] == str(study_dir / "points.csv")
    with pytest.raises(InputError, match="no such study file"):
        read_study(study_dir / "nope.toml")


def test_study_line_headers():
    """study_line finds table headers and keys (with spaces around dots and quotes)."""
    text = 'a = 1\n[ model ]\n"trend" = 2\n[model.priors]\nrange_below = [1, 0.1]\n'
    assert study_line(text, "model") == 2
    assert study_line(text, "model", "trend") == 3
    assert study_line(text, "model.priors", "range_below") == 5
    assert study_line(text, "model", "nope") is None


def test_approx_reaches_the_fit_command(study_dir):
    """[model] approx / neighbours become the fit stage's --approx / --neighbours; neighbours with
    the dense likelihood is refused, naming the key."""
    from bayesgeo.study.runner import stage_commands

    st = _parse(MINIMAL + 'approx = "nn"\nneighbours = 25\n', study_dir)
    fit = stage_commands(st, study_dir / "run")["fit:matern32"]
    assert fit[fit.index("--approx") + 1] == "nn" and fit[fit.index("--neighbours") + 1] == "25"
    with pytest.raises(InputError, match="neighbours"):
        _parse(MINIMAL + 'approx = "dense"\nneighbours = 25\n', study_dir)


SITES = MINIMAL.replace('units = "mg/kg"', 'units = "mg/kg"\nsite = "parcel"')


def test_several_site_pooling_defaults_and_errors(study_dir):
    """A site column makes a several-site study, hierarchical by default (our documented rule,
    docs/study_file.md); a several-site pooling without a site column, 'single' with one, the nn
    nugget prior with several sites are refused naming the key and its line; the nn likelihood
    reaches the several-site fit command (per-site blocks, docs/hierarchical.md)."""
    st = _parse(SITES, study_dir)
    assert st["model"]["pooling"] == "hierarchical" and st.several_sites
    assert _parse(MINIMAL, study_dir)["model"]["pooling"] == "single"
    assert not _parse(MINIMAL, study_dir).several_sites
    for pooling in ("independent", "complete"):
        assert _parse(SITES + f'pooling = "{pooling}"\n', study_dir)["model"]["pooling"] == pooling
    with pytest.raises(InputError, match=r"line 10: \[model\] pooling: pooling 'complete' needs several sites"):
        _parse(MINIMAL + 'pooling = "complete"\n', study_dir)
    with pytest.raises(InputError, match=r"line 11: \[model\] pooling: pooling 'single' fits one site"):
        _parse(SITES + 'pooling = "single"\n', study_dir)
    from bayesgeo.study.runner import stage_commands

    st = _parse(SITES + 'approx = "nn"\nneighbours = 15\n', study_dir)
    fit = stage_commands(st, study_dir / "run", sites=["A", "B"])["fit:matern32"]
    assert fit[fit.index("--approx") + 1] == "nn" and fit[fit.index("--neighbours") + 1] == "15"
    assert fit[fit.index("--pooling") + 1] == "hierarchical"
    with pytest.raises(InputError, match=r"line 13: \[model.priors\] nugget_above: .*nugget fraction"):
        _parse(SITES + '\n[model.priors]\nnugget_above = [0.5, 0.05]\n', study_dir)


def test_areas_list_and_table(study_dir):
    """[prediction] area takes one area, a list or a table {site = area} (TOML inline tables and arrays,
    toml.io v1.0.0); several areas need a several-site study; every rectangle is checked."""
    (study_dir / "poly.csv").write_text("x,y\n0,0\n1,0\n1,1\n")
    one = _parse(MINIMAL + '\n[prediction]\narea = [0, 0, 1, 1]\n', study_dir)
    assert one["prediction"]["area"] == [0.0, 0.0, 1.0, 1.0]
    st = _parse(SITES + '\n[prediction]\narea = [[0, 0, 1, 1], "poly.csv"]\n', study_dir)
    assert st["prediction"]["area"] == [[0.0, 0.0, 1.0, 1.0], study_dir / "poly.csv"]
    st = _parse(SITES + '\n[prediction]\narea = {a-yard = "poly.csv", b-pit = [2, 2, 3, 3]}\n', study_dir)
    assert st["prediction"]["area"] == {"a-yard": study_dir / "poly.csv", "b-pit": [2.0, 2.0, 3.0, 3.0]}
    assert st.to_dict()["prediction"]["area"]["a-yard"] == str(study_dir / "poly.csv")
    with pytest.raises(InputError, match=r"line 12: \[prediction\] area: a single-site study averages over one"):
        _parse(MINIMAL + '\n[prediction]\narea = [[0, 0, 1, 1], [2, 2, 3, 3]]\n', study_dir)
    with pytest.raises(InputError, match=r"line 13: \[prediction\] area: expected xmin < xmax"):
        _parse(SITES + '\n[prediction]\narea = [[0, 0, 1, 1], [3, 2, 2, 3]]\n', study_dir)
    with pytest.raises(InputError, match=r"\[prediction\] area: .*missing.csv: no such file"):
        _parse(SITES + '\n[prediction]\narea = {a-yard = "missing.csv"}\n', study_dir)


@pytest.mark.parametrize("extra, table, key, line, msg", [
    ("[sampler]\nchains = 99999999999999999999\n", "sampler", "chains", 12, "expected an integer from 1 to 64"),
    ("[sampler]\nseed = 1180591620717411303424\n", "sampler", "seed", 12, "from 0 to 9223372036854775807"),
    ("[sampler]\nseed = -1\n", "sampler", "seed", 12, "expected an integer from 0 to"),
    ("[sampler]\ndraws = 0\n", "sampler", "draws", 12, "expected an integer from 10 to"),
    ("[sampler]\ntune = -5\n", "sampler", "tune", 12, "expected an integer from 0 to"),
    ("[sampler]\ntarget_accept = nan\n", "sampler", "target_accept", 12, r"in \(0, 1\)"),
    ("[explore]\nbins = 0\n", "explore", "bins", 12, "expected an integer from 2 to"),
    ("[explore]\npermutations = 10000000000\n", "explore", "permutations", 12, "from 0 to 100000"),
    ("[explore]\nlag_limit = inf\n", "explore", "lag_limit", 12, "expected a finite number > 0, got inf"),
    ("[explore]\ntrend = 7\n", "explore", "trend", 12, "expected an integer from 0 to 3"),
    ("[check]\nreplicates = 100000000000\n", "check", "replicates", 12, "from 10 to 100000"),
    ("[prediction]\ndraws = 0\n", "prediction", "draws", 12, "positive integer or \"all\""),
    ("[prediction]\ndraws = 99999999999999\n", "prediction", "draws", 12, "from 1 to"),
    ("[prediction]\ncell = -inf\n", "prediction", "cell", 12, "expected a finite number > 0"),
    ("[prediction]\nmargin = nan\n", "prediction", "margin", 12, "expected a finite number >= 0"),
    ("[prediction]\nthresholds = [1.0, inf]\n", "prediction", "thresholds", 12, "expected a finite number, got inf"),
    ("[prediction]\narea = [0, 0, inf, 5]\n", "prediction", "area", 12, "expected a finite number, got inf"),
    ("[model.priors]\nrange_below = [-1.0, 0.05]\n", "model.priors", "range_below", 12, "value .first number.: expected a finite"),
    ("[model.priors]\nsd_above = [1.0, nan]\n", "model.priors", "sd_above", 12, r"probability .second number.: .*\(0, 1\)"),
    ("[model.priors]\nrange_below = [1e400, 0.05]\n", "model.priors", "range_below", 12, "got inf"),
])
def test_numeric_settings_bounded(study_dir, extra, table, key, line, msg):
    """Every number in a study file is checked where the file is read, with the bounds the command
    line uses (bayesgeo.common.validate.INT_LIMITS/FLOAT_LIMITS), so none fails mid-run: huge integers (which
    TOML 1.0 limits to 64 bits but Python's tomllib accepts), negatives, zero, and the TOML float
    values nan and inf (toml.io v1.0.0, "Float"). The message names file, line, table and key."""
    text = MINIMAL + "\n" + extra
    with pytest.raises(InputError, match=msg) as err:
        _parse(text, study_dir)
    s = str(err.value)
    assert f"study.toml, line {line}: [{table}] {key}: " in s
    assert "\n" not in s


def test_max_draws_below_draws_refused_when_read(study_dir):
    """[sampler] max_draws below draws is refused where the file is read (one line naming file, line,
    table and key), not when the fit starts after the exploration."""
    with pytest.raises(InputError, match=r"study.toml, line 13: \[sampler\] max_draws: expected at least draws "
                                         r"\(1000\), got 500$"):
        _parse(MINIMAL + "\n[sampler]\ndraws = 1000\nmax_draws = 500\n", study_dir)
    assert _parse(MINIMAL + "\n[sampler]\ndraws = 1000\nmax_draws = 1000\n", study_dir) is not None


def test_model_neighbours_and_nu_bounded(study_dir):
    """[model] neighbours and nu are bounded like --neighbours and --nu (nu in (0, 50], the
    registry's range for the general Matérn family)."""
    with pytest.raises(InputError, match=r"line 11: \[model\] neighbours: expected an integer from 1 to 200, got 0"):
        _parse(MINIMAL + 'approx = "nn"\nneighbours = 0\n', study_dir)
    text = MINIMAL.replace('"exponential"]', '"matern"]') + "nu = 1e9\n"
    with pytest.raises(InputError, match=r"line 10: \[model\] nu: expected a number in \(0, 50\], got 1000000000.0"):
        _parse(text, study_dir)
