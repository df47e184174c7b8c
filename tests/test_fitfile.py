"""Damaged or foreign saved fits: one line naming the file and what is wrong, from every command.

The fits are built without sampling (tests/test_loo.py: make_fit, make_site_fit, draws scattered
around known values in the layout bayesgeo.fitting.posterior.fit and bayesgeo.fitting.hierarchical.fit_sites save)
and then damaged the ways a user's files get damaged: an attribute cut short, an edited setting,
a group or variable lost, a file truncated by a full disk, a NetCDF from another program, NaN or
infinite draws.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr
from _cli_helpers import assert_refused, snapshot
from test_loo import make_fit, make_site_fit, simulated, simulated_sites

from bayesgeo.fitting.fitfile import check_fit, read_fit
from bayesgeo.fitting.fitted import Fit
from bayesgeo.common.validate import InputError


def _save(tree, folder):
    folder.mkdir(parents=True)
    tree.to_netcdf(folder / "posterior.nc", engine="netcdf4")
    return folder


def _with(tree, group, ds):
    out = tree.copy()
    out[group] = xr.DataTree(ds)
    return out


def _settings(tree, edit):
    out = tree.copy()
    s = json.loads(out.attrs["settings"])
    edit(s)
    out.attrs["settings"] = json.dumps(s)
    return out


def _poison(tree, group, name, index, value):
    ds = tree[group].to_dataset()
    v = ds[name].values.copy()
    v[index] = value
    ds[name] = (ds[name].dims, v)
    return _with(tree, group, ds)


@pytest.fixture(scope="module")
def good():
    return make_fit(simulated(30, seed=3), ndraw=40, seed=1)


@pytest.fixture(scope="module")
def good_sites():
    return make_site_fit(simulated_sites((12, 14, 10), seed=41), ndraw=30, seed=1)


def _damaged(name, good):
    """Damage classes of a single-site fit: (tree, pattern the message must match)."""
    const = good["constant_data"].to_dataset()
    post = good["posterior"].to_dataset()
    cases = {
        "settings cut short": (lambda t: t.attrs.update(settings=t.attrs["settings"][:40]) or t,
                               r"the 'settings' attribute is not valid JSON \(Unterminated string.*\): the file is "
                               r"damaged \(cut short or edited\)"),
        "settings not a table": (lambda t: t.attrs.update(settings="[1, 2]") or t,
                                 r"the 'settings' attribute holds no 'model' table: not a bayesgeo fit"),
        "no settings": (lambda t: t.attrs.pop("settings") and t, r"no 'settings' attribute: not a bayesgeo fit"),
        "unknown family": (lambda t: _settings(t, lambda s: s["model"].update(covariance="wavy")),
                           r"the settings name covariance family 'wavy', which this version does not know \(known: "
                           r"exponential, matern32"),
        "matern nu out of range": (lambda t: _settings(t, lambda s: s["model"].update(covariance="matern", nu=-1)),
                                   r"covariance family 'matern' with nu = -1.0, which this version does not know"),
        "unknown transform": (lambda t: _settings(t, lambda s: s["model"].update(transform="sqrt")),
                              r"the settings name transform 'sqrt'; known: none, log"),
        "model key missing": (lambda t: _settings(t, lambda s: s["model"].pop("terms")),
                              r"the model settings cannot be decoded \(missing 'terms'\)"),
        "unknown format": (lambda t: _settings(t, lambda s: s.update(format="someone else's fit")),
                           r"settings of format \"someone else's fit\""),
        "constant_data shorter": (lambda t: _with(t, "constant_data", const.isel(obs=slice(0, 20))),
                                  r"sizes disagree: observed_data holds 30 values, constant_data 20 locations and 20 "
                                  r"design rows, the settings record 30 points"),
        "no constant_data": (lambda t: (t.__delitem__("constant_data"), t)[1],
                             r"no 'constant_data' group: not a complete bayesgeo fit"),
        "posterior variable lost": (lambda t: _with(t, "posterior", post.drop_vars("sd_z")),
                                    r"posterior lacks sd_z: not a complete bayesgeo fit"),
        "design columns": (lambda t: _with(t, "constant_data", const.assign(design=(("obs", "t2"),
                                                                                    np.ones((30, 2))))),
                           r"the design has \(2,\) columns but the settings name 1 trend terms"),
        "NaN draw": (lambda t: _poison(t, "posterior", "sd_z", (0, 3), np.nan),
                     r"posterior variable sd_z holds 1 non-finite draw\(s\) \(NaN or infinite\) of 80"),
        "infinite draw": (lambda t: _poison(t, "posterior", "practical_range_z", (1, 5), np.inf),
                          r"posterior variable practical_range_z holds 1 non-finite draw"),
        "NaN observed value": (lambda t: _poison(t, "observed_data", "value", 2, np.nan),
                               r"observed_data variable value holds 1 non-finite value"),
        "infinite coordinate": (lambda t: _poison(t, "constant_data", "x", 0, -np.inf),
                                r"constant_data variable x holds 1 non-finite value"),
        "standardisation NaN": (lambda t: _settings(t, lambda s: s["model"].update(value_sd=float("nan"))),
                                r"the settings record value_sd = nan, expected a finite number > 0"),
        "diagnostics cut short": (lambda t: t.attrs.update(diagnostics='{"verdict": "pa') or t,
                                  r"the 'diagnostics' attribute is not valid JSON \(Unterminated string"),
        "approximation not a table": (lambda t: t.attrs.update(approximation="[0.5]") or t,
                                      r"the 'approximation' attribute holds list where a table is expected"),
    }
    make, pattern = cases[name]
    return make(good.copy()), pattern


DAMAGE = ["settings cut short", "settings not a table", "no settings", "unknown family", "matern nu out of range",
          "unknown transform", "model key missing", "unknown format", "constant_data shorter", "no constant_data",
          "posterior variable lost", "design columns", "NaN draw", "infinite draw", "NaN observed value",
          "infinite coordinate", "standardisation NaN", "diagnostics cut short", "approximation not a table"]


def test_good_fits_pass(tmp_path, good, good_sites):
    """The undamaged fits pass the check and load (the check refuses only what is wrong)."""
    assert check_fit(good) is good and check_fit(good_sites) is good_sites
    assert Fit.read(_save(good, tmp_path / "a")).tree["posterior"]["sd_z"].shape == (2, 40)


@pytest.mark.parametrize("damage", DAMAGE)
def test_damaged_fit_refused_naming_the_file(tmp_path, good, damage):
    """Every damage class raises one InputError line that starts with the file's path."""
    tree, pattern = _damaged(damage, good)
    folder = _save(tree, tmp_path / "fit")
    with pytest.raises(InputError, match=pattern) as err:
        read_fit(folder)
    assert str(err.value).startswith(f"{folder / 'posterior.nc'}: ") and "\n" not in str(err.value)


@pytest.mark.parametrize("command", ["map", "variogram-check", "check", "compare"])
@pytest.mark.parametrize("damage", ["settings cut short", "unknown family", "constant_data shorter", "NaN draw",
                                    "diagnostics cut short"])
def test_every_command_refuses_damaged_fits(tmp_path, capsys, good, command, damage):
    """map, variogram-check, check and compare all refuse a damaged fit with exit 2 and one stderr line
    naming the file (no JSONDecodeError, ValueError or all-NaN output with exit 0, as before), and
    write nothing into the fit folder."""
    tree, pattern = _damaged(damage, good)
    folder = _save(tree, tmp_path / "fit")
    other = _save(good, tmp_path / "other")
    argv = {"map": ["map", folder, "--draws", "10", "--allow-unconverged"],
            "variogram-check": ["variogram-check", folder, "--replicates", "5"],
            "check": ["check", folder, "--no-figures"],
            "compare": ["compare", other, folder]}[command]
    before = snapshot(folder)
    line = assert_refused(capsys, argv, command, pattern, inputs=[folder, other])
    assert str(folder / "posterior.nc") in line
    assert snapshot(folder) == before and sorted(p.name for p in folder.iterdir()) == ["posterior.nc"]


def test_truncated_and_foreign_files(tmp_path, capsys, good):
    """A posterior.nc cut in half (a full disk, an interrupted copy), a text file and a NetCDF written
    by another program are refused with one line naming the file."""
    full = _save(good, tmp_path / "full") / "posterior.nc"
    cut = tmp_path / "cut"
    cut.mkdir()
    data = full.read_bytes()
    (cut / "posterior.nc").write_bytes(data[: len(data) // 2])
    text = tmp_path / "text"
    text.mkdir()
    (text / "posterior.nc").write_text("not a NetCDF file\n")
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    xr.Dataset({"depth": ("z", np.arange(4.0))}).to_netcdf(foreign / "posterior.nc", engine="netcdf4")
    for folder, pattern in ((cut, r"cannot be read as a NetCDF fit \(.*HDF error"),
                            (text, r"cannot be read as a NetCDF fit \(.*Unknown file format"),
                            (foreign, r"no 'settings' attribute: not a bayesgeo fit")):
        line = assert_refused(capsys, ["map", folder], "map", pattern, inputs=[folder])
        assert str(folder / "posterior.nc") in line
    assert_refused(capsys, ["check", foreign], "check", r"foreign/posterior.nc: no 'posterior' group",
                   inputs=[foreign])


@pytest.mark.parametrize("damage, pattern", [
    ("settings cut short", r"the 'settings' attribute is not valid JSON"),
    ("unknown family", r"covariance family 'wavy', which this version does not know"),
    ("site labels", r"the site labels of the data \(s0, s1, s2\) differ from the sites the settings record \(s0, s1, s9\)"),
    ("points per site", r"points per site differ from the settings \(s0: 12 against 13; s2: 10 against 9\)"),
    ("NaN population draw", r"posterior variable population_range_z holds 1 non-finite draw"),
])
def test_damaged_several_site_fit(tmp_path, capsys, good_sites, damage, pattern):
    """Several-site fits get the same checks plus their site bookkeeping; map --site refuses them with
    one line naming the file instead of a JSONDecodeError or ValueError traceback."""
    t = good_sites.copy()
    if damage == "settings cut short":
        t.attrs["settings"] = t.attrs["settings"][:-10]
    elif damage == "unknown family":
        t = _settings(t, lambda s: s["model"].update(covariance="wavy"))
    elif damage == "site labels":
        t = _settings(t, lambda s: s["model"].update(sites=["s0", "s1", "s9"]))
    elif damage == "points per site":
        t = _settings(t, lambda s: s["model"].update(n=[13, 14, 9]))
    else:
        t = _poison(t, "posterior", "population_range_z", (0, 0), np.nan)
    folder = _save(t, tmp_path / "fit")
    assert_refused(capsys, ["map", folder, "--site", "s0", "--allow-unconverged"], "map", pattern, inputs=[folder])
