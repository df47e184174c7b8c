"""The case table of the reliability suite (tests/test_reliability.py, docs/reliability.md).

Each :class:`Case` is one class of bad input, bad option, damaged saved file, bad study file or
output-path hazard. The harness runs ``bayesgeo.cli.main(argv)`` inside a sandbox folder holding
the files the case's ``setup`` steps create, and checks the exit status, a single stderr line that
names the place (``places``: regular expressions, all required), no traceback, and that nothing
outside the paths in ``writes`` changed (nothing at all for exit status 2).

Run ``python tests/_reliability_cases.py`` to print the Markdown table kept in
docs/reliability.md (tests/test_reliability.py checks that the page matches).
"""

from __future__ import annotations

import json
import re
import shutil
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

HUGE = "99999999999999999999"  # > 2**64: no machine integer holds it
SEED70 = str(2**70)
EXPLORE = ("explore", "data.csv", "--value", "conc", "--permutations", "0", "--bins", "5", "--covariance", "exponential", "--out", "ex")
FIT = ("fit", "data.csv", "--covariance", "exponential", "--chains", "2", "--draws", "20", "--tune", "20",
       "--seed", "1", "--out", "fo")
CHECK = ("check", "fit", "--no-figures")
MAP = ("map", "fit", "--cell", "25", "--draws", "20", "--no-figures", "--allow-unconverged")
VGC = ("variogram-check", "fit", "--replicates", "10", "--bins", "5")
COMPARE = ("compare", "fit", "fit2")
DEMO_DATA = ("demo-data", "--out", "demo.csv")
VALIDATE = ("validate", "--quick", "--replicates", "2", "--out", "val")
RUN = ("run", "study.toml", "--json")  # --json: no progress lines on stderr
MARKER = ".bayesgeo-output.json"


GROUP_SOURCES = {
    "usage": "docs/cli.md (exit 2, one line); issue #15 (argparse usage errors in one line)",
    "option": "docs/cli.md (bad option: exit 2, one line naming it); issue #15 (integers bounded, no traceback)",
    "csv": "issue #15 intake rules; docs/cli.md (exit 2, one line naming file, row, column)",
    "damaged": "issue #15 (a damaged saved file: one line naming the file; NaN/inf draws: exit 2)",
    "study": "docs/study_file.md, Rules (one line naming the file, line, table and key; exit 2)",
    "output": "docs/outputs.md (output-folder rules of issue #15)",
}
UNCONVERGED = ("docs/cli.md (exit 3: failed convergence check); R-hat above 1.01 fails "
               "(Vehtari, Gelman, Simpson, Carpenter and Bürkner 2021)")


@dataclass(frozen=True)
class Case:
    """One reliability class.

    ``argv`` holds paths relative to the sandbox's working folder (or is a callable of the
    :class:`Box`); ``setup`` steps create the files; ``status`` is the expected exit status
    (a tuple lists the statuses the contract allows); ``places`` are regular expressions the
    stderr line must match (case-insensitive); ``usage_ok`` allows argparse's ``bayesgeo: error:``
    prefix; ``writes`` are the paths (relative to the working folder, glob patterns allowed) a
    successful run may create, change or delete; ``after`` runs extra checks on a success.
    """

    id: str
    group: str
    what: str
    argv: tuple | Callable
    setup: tuple = ()
    status: int | tuple = 2
    places: tuple = ()
    usage_ok: bool = False
    writes: tuple = ()
    after: Callable | None = None
    needs_fit: bool = False
    warn_ok: str = ""  # with status 0 allowed: a regex one stderr warning line must match
    home: bool = False  # HOME points into the sandbox (only for cases about the home folder)
    source: str = ""  # where the expectation comes from (default: the group's, GROUP_SOURCES)

    @property
    def src(self) -> str:
        return self.source or GROUP_SOURCES[self.group]

    @property
    def command(self) -> str:
        argv = self.argv if isinstance(self.argv, tuple) else ("?",)
        return argv[0] if argv else ""


@dataclass
class Box:
    """The sandbox of one case: ``root`` is snapshotted, ``cwd`` is the working folder."""

    root: Path
    cwd: Path
    home: Path
    fit_source: Path | None = None
    extra: dict = field(default_factory=dict)


# --- files ----------------------------------------------------------------------------------------

def good_rows(n: int = 30, seed: int = 3, x0: float = 0.0, y0: float = 0.0, side: float = 200.0):
    """n points in a square with a smooth value plus noise (an invented field, not real data)."""
    rng = np.random.default_rng(seed)
    xy = np.round(rng.random((n, 2)) * side, 1) + [x0, y0]
    v = 10 + np.sin(xy[:, 0] / 50) + np.cos(xy[:, 1] / 60) + 0.3 * rng.standard_normal(n)
    return [(float(a), float(b), round(float(c), 3)) for (a, b), c in zip(xy, v)]


def good_csv(n: int = 30, seed: int = 3) -> str:
    return "x,y,conc\n" + "".join(f"{a},{b},{c}\n" for a, b, c in good_rows(n, seed))


def sites_csv(labels=("north", "south", "mill"), n: int = 12) -> str:
    lines = ["x,y,parcel,conc"]
    for k, lab in enumerate(labels):
        for a, b, c in good_rows(n, seed=10 + k, x0=1000.0 * k):
            lines.append(f"{a},{b},{lab},{c}")
    return "\n".join(lines) + "\n"


def write(name: str, content: str | bytes) -> Callable:
    """A setup step writing ``content`` to ``name`` (relative to the working folder)."""

    def step(box: Box) -> None:
        p = box.cwd / name
        p.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, bytes):
            p.write_bytes(content)
        else:
            p.write_bytes(content.encode("utf-8"))

    step.__name__ = f"write({name})"
    return step


def mkdir(name: str) -> Callable:
    def step(box: Box) -> None:
        (box.cwd / name).mkdir(parents=True, exist_ok=True)

    return step


def symlink(name: str, target: str) -> Callable:
    def step(box: Box) -> None:
        (box.cwd / name).symlink_to(box.cwd / target, target_is_directory=True)

    return step


def run_first(*argv: str, ok=(0, 3)) -> Callable:
    """A setup step running ``bayesgeo argv`` (an earlier result the case must not destroy)."""

    def step(box: Box) -> None:
        import contextlib
        import io

        from bayesgeo.cli import main

        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()) as err:
            code = main(list(argv))
        assert code in ok, f"setup 'bayesgeo {' '.join(argv)}' exited {code}: {err.getvalue()}"

    return step


DATA = write("data.csv", good_csv())
DUP_X = "x,y,x,conc\n" + "".join(f"{a},{b},{a + 1},{c}\n" for a, b, c in good_rows())
SITES = write("sites.csv", sites_csv())


def rows_csv(rows, header="x,y,conc") -> str:
    return header + "\n" + "".join(",".join(str(c) for c in r) + "\n" for r in rows)


def with_cell(row: int, col: int, text: str, n: int = 30) -> str:
    """The good CSV with data row ``row`` (1-based, file row row+1), column ``col`` replaced."""
    rows = [list(r) for r in good_rows(n)]
    rows[row - 1][col] = text
    return rows_csv(rows)


# --- fit folders ----------------------------------------------------------------------------------

def fit_copy(name: str = "fit") -> Callable:
    def step(box: Box) -> None:
        assert box.fit_source is not None, "case needs the module's fit folder"
        shutil.copytree(box.fit_source, box.cwd / name, symlinks=True)

    step.__name__ = f"fit_copy({name})"
    return step


FIT_COPY = fit_copy("fit")
FIT2_COPY = fit_copy("fit2")


def _nc(box: Box, name: str = "fit") -> Path:
    return box.cwd / name / "posterior.nc"


def damage_bytes(how: str, name: str = "fit") -> Callable:
    def step(box: Box) -> None:
        p = _nc(box, name)
        raw = p.read_bytes()
        if how == "truncate":
            p.write_bytes(raw[: len(raw) // 2])
        elif how == "empty":
            p.write_bytes(b"")
        elif how == "random":
            p.write_bytes(np.random.default_rng(7).bytes(len(raw)))
        elif how == "directory":
            p.unlink()
            p.mkdir()
        elif how == "delete":
            p.unlink()
        else:  # pragma: no cover
            raise ValueError(how)

    step.__name__ = f"damage_bytes({how})"
    return step


def damage_tree(edit: Callable, name: str = "fit") -> Callable:
    """Read the fit's posterior.nc, apply ``edit(tree) -> tree`` and write it back (netCDF4)."""

    def step(box: Box) -> None:
        import xarray as xr

        p = _nc(box, name)
        with xr.open_datatree(p, engine="netcdf4") as h:
            tree = h.load()
        tree = edit(tree)
        p.unlink()
        tree.to_netcdf(p, engine="netcdf4")

    step.__name__ = f"damage_tree({getattr(edit, '__name__', 'edit')})"
    return step


def random_netcdf(box: Box) -> None:
    import xarray as xr

    p = _nc(box)
    p.unlink()
    xr.Dataset({"temperature": (("t",), np.arange(5.0))}).to_netcdf(p, engine="netcdf4")


def _settings_edit(fn):
    def edit(tree):
        s = json.loads(tree.attrs["settings"])
        tree.attrs["settings"] = fn(s)
        return tree

    return edit


def _cut_settings(tree):
    tree.attrs["settings"] = tree.attrs["settings"][: len(tree.attrs["settings"]) // 2]
    return tree


def _drop_settings(tree):
    del tree.attrs["settings"]
    tree.attrs.pop("diagnostics", None)
    return tree


def _unknown_family(s):
    s["model"]["covariance"] = "wavelet"
    return json.dumps(s)


def _settings_list(s):
    return json.dumps([1, 2, 3])


def _drop_group(group):
    def edit(tree):
        import xarray as xr

        d = {f"/{c}": tree[c].to_dataset() for c in tree.children if c != group}
        out = xr.DataTree.from_dict(d)
        out.attrs = dict(tree.attrs)
        return out

    edit.__name__ = f"drop_{group}"
    return edit


def _short_constant(tree):
    import xarray as xr

    d = {f"/{c}": tree[c].to_dataset() for c in tree.children}
    d["/constant_data"] = d["/constant_data"].isel(obs=slice(0, 10))
    out = xr.DataTree.from_dict(d)
    out.attrs = dict(tree.attrs)
    return out


def _posterior_values(fill):
    def edit(tree):
        import xarray as xr

        d = {f"/{c}": tree[c].to_dataset() for c in tree.children}
        post = d["/posterior"].copy(deep=True)
        for name in post.data_vars:
            a = post[name].values.astype(float)
            fill(a)
            post[name] = (post[name].dims, a)
        d["/posterior"] = post
        out = xr.DataTree.from_dict(d)
        out.attrs = dict(tree.attrs)
        return out

    return edit


def _nan_draws(a):
    a[:, 3] = np.nan  # draw 3 of every chain


def _inf_draws(a):
    a[0, 5] = np.inf


def _split_chains(a):
    a[1] = a[1] * 25.0 + 10.0  # chain 1 far from chain 0: R-hat >> 1.01 (Vehtari et al. 2021)


def _drop_posterior_var(tree):
    import xarray as xr

    d = {f"/{c}": tree[c].to_dataset() for c in tree.children}
    d["/posterior"] = d["/posterior"].drop_vars([v for v in ("practical_range_z", "practical_range")
                                                 if v in d["/posterior"]])
    out = xr.DataTree.from_dict(d)
    out.attrs = dict(tree.attrs)
    return out


def _zero_draws(tree):
    import xarray as xr

    d = {f"/{c}": tree[c].to_dataset() for c in tree.children}
    for g in ("/posterior", "/sample_stats"):
        if g in d:
            d[g] = d[g].isel(draw=slice(0, 0))
            for v in d[g].variables:
                d[g][v].encoding = {}  # the stored chunk sizes do not fit a zero-length dimension
    out = xr.DataTree.from_dict(d)
    out.attrs = dict(tree.attrs)
    return out


def _other_values(tree):
    import xarray as xr

    d = {f"/{c}": tree[c].to_dataset() for c in tree.children}
    d["/observed_data"] = d["/observed_data"] + 5.0
    out = xr.DataTree.from_dict(d)
    out.attrs = dict(tree.attrs)
    return out


NAN_DRAWS = damage_tree(_posterior_values(_nan_draws))
INF_DRAWS = damage_tree(_posterior_values(_inf_draws))
SPLIT_CHAINS = damage_tree(_posterior_values(_split_chains))


# --- study files ----------------------------------------------------------------------------------

STUDY = """\
title = "Reliability suite study (invented data)"

[data]
path = "data.csv"
coords = "xy"

[explore]
bins = 5
permutations = 0

[model]
covariance = "exponential"

[sampler]
chains = 2
draws = 20
tune = 20
seed = 3

[check]
replicates = 10

[prediction]
cell = 25.0
draws = 20

[output]
dir = "study-run"
"""


def study(text: str | bytes, name: str = "study.toml") -> Callable:
    return write(name, text)


def study_with(table: str, line: str) -> Callable:
    """The base study with ``line`` added at the top of ``[table]`` (a later same key would clash)."""
    text = STUDY
    if f"[{table}]\n" in text:
        text = text.replace(f"[{table}]\n", f"[{table}]\n{line}\n", 1)
    else:
        text += f"\n[{table}]\n{line}\n"
    return study(text)


def study_replace(old: str, new: str) -> Callable:
    assert old in STUDY
    return study(STUDY.replace(old, new, 1))


# --- place patterns -------------------------------------------------------------------------------

#: the damaged fit named as a file or folder: "fit/posterior.nc" or "fit: ..." (or fit2, its partner in compare)
FIT_FILE = r"\bfit2?/posterior\.nc\b|(^|[\s'\"])fit2?(: |/ |'|\"|$)"

def opt(name: str) -> str:
    return re.escape(name)


def col(name: str) -> str:
    return re.escape(name)


def row(n: int) -> str:
    """Row ``n`` (a spreadsheet row: the header is row 1; a CSV parser's line), alone or in a list."""
    return rf"\b(rows?|lines?)\b[^;]*?\b{n}\b"


def line(key: str) -> str:
    return rf"line \d+.*{re.escape(key)}|{re.escape(key)}.*line \d+"


# --- checks after a success -----------------------------------------------------------------------

def after_bom(box: Box, out: str, err: str) -> None:
    """A UTF-8 byte-order mark is not part of the first column's name (Unicode FAQ on the BOM:
    common practice to strip it from UTF-8 text)."""
    obj = json.loads((box.cwd / "ex" / "explore.json").read_text())
    assert obj["n"] == 30


def after_lon360(box: Box, out: str, err: str) -> None:
    """Longitudes written 0-360 (200-220 E = 160-140 W) give great-circle lags: every lag is at most
    half the largest haversine distance (Sinnott 1984, haversine formula, from memory; mean Earth
    radius 6371.0 km, IUGG, from memory), 1% tolerance for the radius the program uses."""
    obj = json.loads((box.cwd / "ex" / "explore.json").read_text())
    rows = np.array(LON360_ROWS, dtype=float)
    lon, lat = np.radians(rows[:, 0]), np.radians(rows[:, 1])
    dlat = lat[:, None] - lat[None, :]
    dlon = lon[:, None] - lon[None, :]
    h = np.sin(dlat / 2) ** 2 + np.cos(lat[:, None]) * np.cos(lat[None, :]) * np.sin(dlon / 2) ** 2
    dmax = float((2 * 6371.0 * np.arcsin(np.sqrt(h))).max())
    lags = [v for v in obj["semivariogram"]["lag"] if v is not None]
    assert lags and max(lags) <= 0.5 * dmax * 1.01, (max(lags), dmax)
    assert max(lags) > 0.2 * dmax, (max(lags), dmax)


def after_slash_sites(box: Box, out: str, err: str) -> None:
    """Sites 'a/b' and 'a_b' get two different sub-folders, each with its own explore files."""
    ex = box.cwd / "ex"
    subs = sorted(p.name for p in ex.iterdir() if p.is_dir())
    assert len(subs) == 2 and len(set(subs)) == 2, subs
    for s in subs:
        assert (ex / s / "semivariogram.csv").is_file()
    obj = json.loads((ex / "explore.json").read_text())
    assert set(obj["sites"]) == {"a/b", "a_b"}


def after_replaced(box: Box, out: str, err: str) -> None:
    """--overwrite on our own folder: the folder is there again, with its marker."""
    assert (box.cwd / "ex" / "explore.json").is_file()
    assert (box.cwd / "ex" / MARKER).is_file()


def after_stale_cleaned(box: Box, out: str, err: str) -> None:
    """The stale .ex.*.part folder of a killed run is gone and the new output is complete."""
    assert not list(box.cwd.glob(".ex.*.part")), list(box.cwd.glob(".ex.*.part"))
    assert (box.cwd / "ex" / "explore.json").is_file()


def after_crlf(box: Box, out: str, err: str) -> None:
    obj = json.loads((box.cwd / "ex" / "explore.json").read_text())
    assert obj["n"] == 30


def after_check_overwrite(box: Box, out: str, err: str) -> None:
    assert (box.cwd / "fit" / "diagnostics" / "diagnostics.json").is_file()


LONLAT_ROWS = [(10.0 + 20.0 * a / 200.0, 10.0 + 10.0 * b / 200.0, c) for a, b, c in good_rows()]
LON360_ROWS = [(200.0 + 20.0 * a / 200.0, 10.0 + 10.0 * b / 200.0, c) for a, b, c in good_rows()]


# --- the table ------------------------------------------------------------------------------------

def _cases() -> list[Case]:
    cs: list[Case] = []
    add = cs.append

    # usage: argparse-level mistakes common to every command
    add(Case("usage-no-command", "usage", "no command at all", (), status=2, places=(r"command|usage|COMMAND",), usage_ok=True))
    add(Case("usage-unknown-command", "usage", "an unknown command", ("frobnicate",), places=(r"frobnicate",), usage_ok=True))
    add(Case("usage-unknown-option", "usage", "an unknown option", (*EXPLORE, "--frobnicate"), (DATA,), places=(opt("--frobnicate"),), usage_ok=True))
    add(Case("usage-explore-no-data", "usage", "explore without DATA", ("explore",), places=(r"DATA|data",), usage_ok=True))
    add(Case("usage-fit-no-covariance", "usage", "fit without --covariance", ("fit", "data.csv", "--out", "fo"), (DATA,), places=(opt("--covariance"),), usage_ok=True))
    add(Case("usage-fit-no-out", "usage", "fit without --out", ("fit", "data.csv", "--covariance", "exponential"), (DATA,), places=(opt("--out"),), usage_ok=True))
    add(Case("usage-fit-bad-family", "usage", "fit --covariance with an unknown family", ("fit", "data.csv", "--covariance", "wavelet", "--out", "fo"), (DATA,), places=(opt("--covariance"),), usage_ok=True))
    add(Case("usage-explore-bad-coords", "usage", "--coords with an unknown choice", (*EXPLORE, "--coords", "utm"), (DATA,), places=(opt("--coords"),), usage_ok=True))
    add(Case("usage-explore-bad-estimator", "usage", "--estimator with an unknown choice", (*EXPLORE, "--estimator", "median"), (DATA,), places=(opt("--estimator"),), usage_ok=True))
    add(Case("usage-prior-one-number", "usage", "fit --range-below with one number of two", (*FIT, "--range-below", "30"), (DATA,), places=(opt("--range-below"),), usage_ok=True))
    add(Case("usage-compare-nothing", "usage", "compare without fit folders", ("compare",), places=(r"DIR|dirs",), usage_ok=True))

    # explore options
    ex_opts = [
        ("bins", [("zero", "0"), ("negative", "-3"), ("huge", HUGE), ("text", "abc"), ("empty", "")]),
        ("permutations", [("negative", "-1"), ("huge", HUGE), ("text", "ten")]),
        ("lag-limit", [("zero", "0"), ("negative", "-5"), ("nan", "nan"), ("inf", "inf"), ("text", "far"), ("empty", "")]),
        ("seed", [("negative", "-1"), ("2pow70", SEED70), ("text", "abc")]),
        ("trend", [("negative", "-1"), ("four", "4"), ("huge", HUGE)]),
    ]
    for name, vals in ex_opts:
        for tag, v in vals:
            add(Case(f"explore-{name}-{tag}", "option", f"explore --{name} {v or '(empty)'}", (*EXPLORE, f"--{name}", v), (DATA,),
                     places=(opt(f"--{name}"),), usage_ok=True))
    add(Case("explore-x-missing-column", "option", "explore --x naming no column", (*EXPLORE, "--x", "nope"), (DATA,), places=(col("nope"), r"data\.csv")))
    add(Case("explore-value-missing-column", "option", "explore --value naming no column", (*EXPLORE, "--value", "nope"), (DATA,), places=(col("nope"), r"data\.csv")))
    add(Case("explore-covariate-missing-column", "option", "explore --covariate naming no column", (*EXPLORE, "--covariate", "nope"), (DATA,), places=(col("nope"),)))
    add(Case("explore-site-missing-column", "option", "explore --site naming no column", (*EXPLORE, "--site", "nope"), (DATA,), places=(col("nope"),)))
    add(Case("explore-only-site-without-site", "option", "--only-site without --site", (*EXPLORE, "--only-site", "north"), (DATA,), places=(opt("--only-site"),)))
    add(Case("explore-only-site-unknown", "option", "--only-site naming no site", ("explore", "sites.csv", "--site", "parcel", "--only-site", "lake", "--permutations", "0", "--out", "ex"), (SITES,), places=(col("lake"), opt("--only-site"))))
    add(Case("explore-data-missing", "option", "DATA that does not exist", ("explore", "nothere.csv", "--out", "ex"), places=(r"nothere\.csv",)))
    add(Case("explore-data-directory", "option", "DATA that is a folder", ("explore", "adir", "--out", "ex"), (mkdir("adir"),), places=(r"adir",)))
    add(Case("explore-data-empty-string", "option", "DATA given as an empty string", ("explore", "", "--out", "ex"), places=(r"DATA|''|empty",), usage_ok=True))
    add(Case("explore-value-empty-string", "option", "--value given as an empty string", (*EXPLORE, "--value", ""), (DATA,), places=(opt("--value"),), usage_ok=True))
    add(Case("explore-x-empty-string", "option", "--x given as an empty string", (*EXPLORE, "--x", ""), (DATA,), places=(opt("--x"),), usage_ok=True))
    add(Case("explore-out-default-exists", "output", "explore without --out when the default <stem>-explore folder exists",
             EXPLORE[:-2], (DATA, run_first(*EXPLORE[:-2])), places=(r"data-explore", opt("--overwrite"))))
    add(Case("explore-out-empty-string", "option", "--out given as an empty string", (*EXPLORE[:-2], "--out", ""), (DATA,), places=(opt("--out"),), usage_ok=True))
    add(Case("explore-distance-units-lonlat", "option", "--distance-units m with --coords lonlat", (*EXPLORE, "--coords", "lonlat", "--distance-units", "m"), (write("data.csv", rows_csv(LON360_ROWS, "lon,lat,conc")),), places=(opt("--distance-units"),)))

    # fit options (each must be refused before any sampling)
    fit_opts = [
        ("chains", [("zero", "0"), ("negative", "-1"), ("huge", HUGE), ("text", "two")]),
        ("draws", [("zero", "0"), ("negative", "-5"), ("huge", HUGE), ("float", "1e3")]),
        ("tune", [("negative", "-1"), ("huge", HUGE)]),
        ("seed", [("2pow70", SEED70), ("negative", "-1"), ("text", "abc")]),
        ("target-accept", [("zero", "0"), ("one", "1"), ("above-one", "1.5"), ("nan", "nan"), ("inf", "inf")]),
        ("neighbours", [("zero", "0"), ("negative", "-3"), ("huge", HUGE)]),
        ("trend", [("five", "5"), ("negative", "-1")]),
    ]
    for name, vals in fit_opts:
        for tag, v in vals:
            add(Case(f"fit-{name}-{tag}", "option", f"fit --{name} {v}", (*FIT, f"--{name}", v), (DATA,),
                     places=(opt(f"--{name}"),), usage_ok=True))
    for tag, v in [("zero", "0"), ("negative", "-1"), ("nan", "nan"), ("inf", "inf")]:
        add(Case(f"fit-nu-{tag}", "option", f"fit --covariance matern --nu {v}", (*FIT, "--covariance", "matern", "--nu", v), (DATA,),
                 places=(opt("--nu"),), usage_ok=True))
    priors = [("range", "zero-r0", ("0", "0.05")), ("range", "negative-r0", ("-1", "0.05")), ("range", "zero-prob", ("30", "0")),
              ("range", "one-prob", ("30", "1")), ("range", "nan-prob", ("30", "nan")), ("range", "inf-r0", ("inf", "0.05")),
              ("sd", "zero-s0", ("0", "0.05")), ("sd", "prob-above-one", ("2", "1.5")), ("nugget", "negative-t0", ("-1", "0.05"))]
    prior_option = {"range": "--range-below", "sd": "--sd-above", "nugget": "--nugget-above"}
    for which, tag, vals in priors:
        o = prior_option[which]
        add(Case(f"fit-prior-{which}-{tag}", "option", f"fit {o} {' '.join(vals)}", (*FIT, o, *vals), (DATA,),
                 places=(opt(o) + r": the (value|probability)",), usage_ok=True))
    add(Case("fit-data-missing", "option", "fit on a DATA file that does not exist", ("fit", "nothere.csv", *FIT[2:]), places=(r"nothere\.csv",)))
    add(Case("fit-data-directory", "option", "fit on a folder given as DATA", ("fit", "adir", *FIT[2:]), (mkdir("adir"),), places=(r"adir",)))
    add(Case("fit-out-is-data", "output", "fit --out naming the input CSV", ("fit", "data.csv", "--covariance", "exponential", "--out", "data.csv"), (DATA,), places=(r"data\.csv",)))
    add(Case("fit-log-zeros", "csv", "fit --transform log with zero values", (*FIT, "--transform", "log"), (write("data.csv", with_cell(4, 2, "0")),), places=(r"data\.csv", row(5), col("conc"))))
    add(Case("fit-ragged-row", "csv", "fit on a CSV with a ragged row", FIT, (write("data.csv", with_cell(6, 2, "1.5,7")),), places=(r"data\.csv", row(7))))

    # check
    add(Case("check-dir-missing", "option", "check on a folder that does not exist", ("check", "nofit"), places=(r"nofit",)))
    add(Case("check-dir-is-file", "option", "check on a file instead of a fit folder", ("check", "data.csv"), (DATA,), places=(r"data\.csv",)))
    add(Case("check-dir-empty", "option", "check on an empty folder", ("check", "empty"), (mkdir("empty"),), places=(r"empty",)))
    for tag, v in [("zero", "0"), ("negative", "-1"), ("huge", HUGE), ("text", "abc")]:
        add(Case(f"check-lag-limit-{tag}", "option", f"check --lag-limit {v}", (*CHECK, "--lag-limit", v), (FIT_COPY,), places=(opt("--lag-limit"),), usage_ok=True, needs_fit=True))
    add(Case("check-var-unknown", "option", "check --var naming no posterior variable", (*CHECK, "--var", "nope"), (FIT_COPY,), places=(col("nope"),), needs_fit=True))
    add(Case("check-unconverged", "damaged", "check on a posterior whose chains disagree (R-hat >> 1.01)", CHECK, (FIT_COPY, SPLIT_CHAINS), status=3,
             writes=("fit/diagnostics", f"fit/{MARKER}", "fit/.diagnostics.*"), needs_fit=True, source=UNCONVERGED))

    # map
    map_opts = [
        ("cell", [("zero", "0"), ("negative", "-1"), ("nan", "nan"), ("inf", "inf"), ("text", "abc"), ("tiny", "1e-9")]),
        ("margin", [("negative", "-1"), ("nan", "nan"), ("inf", "inf")]),
        ("draws", [("zero", "0"), ("negative", "-1"), ("text", "many"), ("huge", HUGE)]),
        ("threshold", [("nan", "nan"), ("inf", "inf"), ("text", "high")]),
        ("chunk-cells", [("zero", "0"), ("negative", "-1"), ("huge", HUGE)]),
        ("simulate", [("negative", "-1"), ("huge", HUGE)]),
        ("seed", [("negative", "-1"), ("2pow70", SEED70)]),
    ]
    for name, vals in map_opts:
        for tag, v in vals:
            add(Case(f"map-{name}-{tag}", "option", f"map --{name} {v}", (*MAP, f"--{name}", v), (FIT_COPY,), places=(opt(f"--{name}"),),
                     usage_ok=True, needs_fit=True))
    for tag, v in [("three-numbers", "1,2,3"), ("reversed", "150,150,50,50"), ("text", "a,b,c,d"), ("missing-file", "nothere.csv"),
                   ("far-away", "1e7,1e7,1.0001e7,1.0001e7")]:
        add(Case(f"map-area-{tag}", "option", f"map --area {v}", (*MAP, "--area", v), (FIT_COPY,), places=(opt("--area") + "|" + re.escape(v),),
                 needs_fit=True))
    add(Case("map-points-missing", "option", "map --points naming no file", (*MAP, "--points", "nothere.csv"), (FIT_COPY,), places=(r"nothere\.csv",), needs_fit=True))
    add(Case("map-points-no-columns", "option", "map --points CSV without x,y columns", (*MAP, "--points", "t.csv"), (FIT_COPY, write("t.csv", "a,b\n1,2\n")),
             places=(r"t\.csv",), needs_fit=True))
    add(Case("map-points-empty", "option", "map --points CSV that is empty", (*MAP, "--points", "t.csv"), (FIT_COPY, write("t.csv", "")), places=(r"t\.csv",), needs_fit=True))
    add(Case("map-points-nan", "option", "map --points CSV with a NaN coordinate", (*MAP, "--points", "t.csv"), (FIT_COPY, write("t.csv", "x,y\n10,10\nnan,20\n")),
             places=(r"t\.csv", row(3)), needs_fit=True))
    add(Case("map-points-empty-string", "option", "map --points given as an empty string", (*MAP, "--points", ""), (FIT_COPY,), places=(opt("--points"),),
             usage_ok=True, needs_fit=True))
    add(Case("map-points-directory", "option", "map --points naming a folder", (*MAP, "--points", "adir"), (FIT_COPY, mkdir("adir")), places=(r"adir",),
             needs_fit=True))
    add(Case("map-area-empty-string", "option", "map --area given as an empty string", (*MAP, "--area", ""), (FIT_COPY,), places=(opt("--area"),),
             usage_ok=True, needs_fit=True))
    add(Case("map-scheduler-bogus", "option", "map --scheduler that is no address", (*MAP, "--scheduler", "bogus"), (FIT_COPY,), places=(opt("--scheduler"),), needs_fit=True))
    add(Case("map-site-on-single-fit", "option", "map --site on a single-site fit", (*MAP, "--site", "north"), (FIT_COPY,), places=(opt("--site"),), needs_fit=True))
    add(Case("map-unconverged", "damaged", "map of a posterior whose chains disagree, without --allow-unconverged", ("map", "fit", "--cell", "25", "--no-figures"),
             (FIT_COPY, SPLIT_CHAINS), status=3, places=(r"fit",), needs_fit=True, source=UNCONVERGED))
    add(Case("map-existing-result", "output", "map again without --overwrite keeps the first predictions.nc", MAP,
             (FIT_COPY, run_first(*MAP)), places=(r"predictions\.nc", opt("--overwrite")), needs_fit=True))

    # variogram-check
    vg_opts = [
        ("replicates", [("zero", "0"), ("negative", "-1"), ("huge", HUGE), ("text", "abc")]),
        ("bins", [("zero", "0"), ("negative", "-1"), ("huge", HUGE)]),
        ("lag-limit", [("zero", "0"), ("negative", "-1"), ("nan", "nan"), ("inf", "inf")]),
        ("seed", [("negative", "-1"), ("2pow70", SEED70)]),
    ]
    for name, vals in vg_opts:
        for tag, v in vals:
            add(Case(f"vgcheck-{name}-{tag}", "option", f"variogram-check --{name} {v}", (*VGC, f"--{name}", v), (FIT_COPY,),
                     places=(opt(f"--{name}"),), usage_ok=True, needs_fit=True))
    add(Case("vgcheck-site-on-single-fit", "option", "variogram-check --site on a single-site fit", (*VGC, "--site", "north"), (FIT_COPY,), places=(opt("--site"),), needs_fit=True))
    add(Case("vgcheck-existing-result", "output", "variogram-check again without --overwrite keeps the first result", VGC,
             (FIT_COPY, run_first(*VGC)), places=(r"variogram_check", opt("--overwrite")), needs_fit=True))

    # compare
    add(Case("compare-one-fit", "option", "compare with a single fit folder", ("compare", "fit"), (FIT_COPY,), places=(r"two|2",), needs_fit=True))
    add(Case("compare-same-twice", "option", "compare naming one folder twice", ("compare", "fit", "fit"), (FIT_COPY,), places=(r"twice|same",), needs_fit=True))
    add(Case("compare-missing-folder", "option", "compare with a folder that does not exist", ("compare", "fit", "nofit"), (FIT_COPY,), places=(r"nofit",), needs_fit=True))
    add(Case("compare-other-data", "damaged", "compare fits of different data (observed values changed)", COMPARE,
             (FIT_COPY, FIT2_COPY, damage_tree(_other_values, "fit2")), places=(r"fit2|same data|different",), needs_fit=True))
    add(Case("compare-site-on-single-fits", "option", "compare --site on single-site fits", (*COMPARE, "--site", "north"), (FIT_COPY, FIT2_COPY), places=(opt("--site"),), needs_fit=True))

    # demo-data
    for tag, v in [("negative", "-1"), ("2pow70", SEED70), ("text", "abc")]:
        add(Case(f"demo-data-seed-{tag}", "option", f"demo-data --seed {v}", (*DEMO_DATA, "--seed", v), places=(opt("--seed"),), usage_ok=True))
    add(Case("demo-data-out-exists", "output", "demo-data --out naming an existing file, no --overwrite", DEMO_DATA, (write("demo.csv", "mine\n"),), places=(r"demo\.csv",)))
    add(Case("demo-data-out-directory", "output", "demo-data --out naming a folder", ("demo-data", "--out", "adir"), (mkdir("adir"),), places=(r"adir",)))
    add(Case("demo-data-out-users-file", "output", "demo-data --out --overwrite over a CSV bayesgeo did not write", (*DEMO_DATA, "--overwrite"),
             (write("demo.csv", "x,y,conc\n1,2,3\n"),), places=(r"demo\.csv",), source="docs/outputs.md, rule 8 (standalone files)"))
    add(Case("demo-data-out-empty-string", "option", "demo-data --out given as an empty string", ("demo-data", "--out", ""), places=(opt("--out"),),
             usage_ok=True))

    # validate
    for name, tag, v in [("replicates", "zero", "0"), ("replicates", "huge", HUGE), ("points", "two", "2"), ("draws", "zero", "0"),
                         ("workers", "zero", "0"), ("seed", "2pow70", SEED70), ("tune", "negative", "-1"),
                         ("draws", "too-few", "20")]:
        add(Case(f"validate-{name}-{tag}", "option", f"validate --{name} {v}", (*VALIDATE, f"--{name}", v), places=(opt(f"--{name}"),), usage_ok=True))
    add(Case("validate-data-missing", "option", "validate --data naming no file", (*VALIDATE, "--data", "nothere.csv"), places=(r"nothere\.csv",)))
    add(Case("validate-data-directory", "option", "validate --data naming a folder", (*VALIDATE, "--data", "adir"), (mkdir("adir"),), places=(r"adir",)))
    add(Case("validate-study-missing", "option", "validate --study naming no file", (*VALIDATE, "--study", "nothere.toml"), places=(r"nothere\.toml",)))
    add(Case("validate-data-duplicate-header", "csv", "validate --data with a duplicated column name", (*VALIDATE, "--data", "data.csv", "--value", "conc"),
             (write("data.csv", DUP_X),), places=(r"data\.csv", r"'x'")))

    # CSV defects, through explore (read_points is shared by every command that reads data)
    def csv_case(cid, what, content, places, status=2, extra_argv=(), after=None, warn_ok="", name="data.csv", source=""):
        argv = ("explore", name, *EXPLORE[2:], *extra_argv)
        writes = ("ex", ".ex.*") if (status == 0 or (isinstance(status, tuple) and 0 in status)) else ()
        add(Case(f"csv-{cid}", "csv", what, argv, (write(name, content),), status=status, places=places, writes=writes,
                 after=after, warn_ok=warn_ok, source=source))

    D = r"data\.csv"
    csv_case("empty-file", "a 0-byte file", b"", (D,))
    csv_case("blank-lines-only", "a file of blank lines", "\n\n\n", (D,))
    csv_case("header-only", "a header and no rows", "x,y,conc\n", (D,))
    csv_case("one-row", "a single data row (planar coordinates)", rows_csv(good_rows(1)), (D, r"\b10\b"), extra_argv=("--coords", "xy"))
    csv_case("nine-rows", "nine data rows (fewer than 10 points)", rows_csv(good_rows(9)), (D, r"10"))
    csv_case("missing-value-column", "no value column besides x, y", "x,y\n" + "".join(f"{a},{b}\n" for a, b, _ in good_rows()), (D,))
    csv_case("missing-x-column", "no column recognisable as x", good_csv().replace("x,y,conc", "a,y,conc", 1), (D, opt("--x")))
    csv_case("duplicate-header-x", "header x,y,x,conc", DUP_X, (D, r"'x'"))
    csv_case("duplicate-header-value", "header x,y,conc,conc", "x,y,conc,conc\n" + "".join(f"{a},{b},{c},{c}\n" for a, b, c in good_rows()), (D, col("conc")))
    csv_case("duplicate-header-unused", "a duplicated column the analysis does not use", "x,y,conc,note,note\n" + "".join(f"{a},{b},{c},n,m\n" for a, b, c in good_rows()),
             (D, col("note")))
    csv_case("ragged-long-row", "a row with one cell too many", with_cell(6, 2, "1.5,7"), (D, row(7)))
    csv_case("ragged-short-row", "a row with one cell too few", rows_csv([*good_rows()[:5], (good_rows()[5][0], good_rows()[5][1]), *good_rows()[6:]]),
             (D, row(7)))
    csv_case("na-value", "NA in the value column", with_cell(4, 2, "NA"), (D, row(5), col("conc")))
    csv_case("text-value", "text in the value column", with_cell(4, 2, "high"), (D, row(5), col("conc")))
    csv_case("empty-value", "an empty value cell", with_cell(4, 2, ""), (D, row(5), col("conc")))
    csv_case("text-x", "text in the x column", with_cell(8, 0, "east"), (D, row(9), col("x")))
    csv_case("nan-x", "nan in the x column", with_cell(8, 0, "nan"), (D, row(9), col("x")))
    csv_case("non-utf8-cell", "a Latin-1 byte in a cell", good_csv().encode().replace(b"x,y,conc\n", b"x,y,conc\n", 1)[:-1] + b"\xb5\n", (D,))
    csv_case("non-utf8-header", "a Latin-1 byte in the header", b"x,y,conc\xb5\n" + good_csv().encode().split(b"\n", 1)[1], (D,))
    csv_case("nul-byte", "a NUL byte inside the file", good_csv().replace("\n", "\n\x00", 3), (D,))
    csv_case("binary-png", "a PNG image given as data", b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 4, (D,))
    csv_case("huge-field", "a 200 kB cell (over the CSV field limit)", with_cell(3, 2, "9" * 200_000), (D, row(4)))
    csv_case("underscore-digits", "a digit separator 1_000 in a value", with_cell(4, 2, "1_000"), (D, row(5), col("conc")))
    csv_case("comma-thousands", "a quoted \"1,000\" in a value", with_cell(4, 2, '"1,000"'), (D, row(5), col("conc")))
    csv_case("value-1e308", "a value of 1e308 (its square overflows)", with_cell(4, 2, "1e308"), (D, col("conc")))
    csv_case("values-times-1e200", "every value multiplied by 1e200",
             rows_csv([(a, b, f"{c * 1e200:.6g}") for a, b, c in good_rows()]), (D, col("conc")))
    csv_case("x-1e308", "a coordinate of 1e308", with_cell(4, 0, "1e308"), (D, col("x")))
    csv_case("inf-value", "inf in the value column", with_cell(4, 2, "inf"), (D, row(5), col("conc")))
    csv_case("minus-inf-value", "-inf in the value column", with_cell(4, 2, "-inf"), (D, row(5), col("conc")))
    csv_case("nan-value", "nan in the value column", with_cell(4, 2, "nan"), (D, row(5), col("conc")))
    csv_case("constant-values", "every value the same", rows_csv([(a, b, 5.0) for a, b, _ in good_rows()]), (D, col("conc")))
    csv_case("identical-points", "every point at the same location (planar coordinates)", rows_csv([(10.0, 10.0, c) for _, _, c in good_rows()]),
             (D, r"duplicate|same location|identical"), extra_argv=("--coords", "xy"))
    csv_case("duplicate-location", "two rows at the same location", rows_csv([*good_rows()[:10], (good_rows()[2][0], good_rows()[2][1], 12.0), *good_rows()[10:]]),
             (D, row(4), row(12)))
    csv_case("log-negative", "--transform log with a negative value", with_cell(4, 2, "-2"), (D, row(5), col("conc")), extra_argv=("--transform", "log"))
    csv_case("semicolon-separated", "a semicolon-separated file", good_csv().replace(",", ";"), (D,))
    csv_case("lonlat-in-xy", "lon/lat degrees (20 x 10 degrees) in columns x, y without --coords",
             rows_csv([(10 + 20 * a / 200, 45 + 10 * b / 200, c) for a, b, c in good_rows()]), (D, r"lonlat|--coords|degree"),
             status=(0, 2), warn_ok=r"lonlat|--coords|degree", source="issue #15 (lon/lat-looking coordinates without --coords: refused or warned)")
    csv_case("lon-above-360", "--coords lonlat with a longitude of 400", rows_csv([(400.0 if i == 3 else a, b, c) for i, (a, b, c) in enumerate(LON360_ROWS)], "lon,lat,conc"),
             (D, row(5), col("lon")), extra_argv=("--coords", "lonlat"))
    csv_case("lat-above-90", "--coords lonlat with a latitude of 95", rows_csv([(a, 95.0 if i == 3 else b, c) for i, (a, b, c) in enumerate(LONLAT_ROWS)], "lon,lat,conc"),
             (D, row(5), col("lat")), extra_argv=("--coords", "lonlat"))
    csv_case("site-whitespace", "site labels 'north' and 'north ' (differ by a space): refused, naming the rows of each spelling",
             sites_csv().replace(",north,", ",north ,", 3), (D, col("parcel"), r"rows? 2"), extra_argv=("--site", "parcel"),
             source="issue #15; docs/data_files.md")
    csv_case("site-empty-label", "an empty site label", sites_csv().replace(",south,", ",,", 1), (D, col("parcel")), extra_argv=("--site", "parcel"))
    csv_case("covariate-text", "text in a covariate column", "x,y,depth,conc\n" + "".join(f"{a},{b},{'deep' if i == 6 else 1.0},{c}\n" for i, (a, b, c) in enumerate(good_rows())),
             (D, row(8), col("depth")), extra_argv=("--covariate", "depth"))
    csv_case("netcdf-not-ours", "a NetCDF file that is not a bayesgeo point file", b"CDF\x01" + bytes(60), (r"data\.nc",), name="data.nc")
    # accepted inputs: the same checks apply (no traceback, inputs unchanged, writes only to --out)
    csv_case("bom", "a UTF-8 byte-order mark before the header (accepted)", b"\xef\xbb\xbf" + good_csv().encode(), (), status=0, after=after_bom,
             source="Unicode FAQ on the byte-order mark (a UTF-8 signature, not part of the text): common practice, from memory")
    csv_case("crlf", "Windows line ends (accepted)", good_csv().replace("\n", "\r\n"), (), status=0, after=after_crlf,
             source="RFC 4180 (CSV records end in CRLF), from memory")
    csv_case("lon-0-360", "--coords lonlat with longitudes written 0-360 (accepted; great-circle lags)", rows_csv(LON360_ROWS, "lon,lat,conc"), (), status=0,
             extra_argv=("--coords", "lonlat"), after=after_lon360,
             source="issue #15 (longitudes 0-360 accepted under --coords lonlat); haversine formula (Sinnott 1984), from memory")
    csv_case("site-slash-underscore", "sites 'a/b' and 'a_b' (accepted; two different sub-folders)", sites_csv(("a/b", "a_b")), (), status=0,
             extra_argv=("--site", "parcel"), after=after_slash_sites, source="issue #15 (two sites never share a file name)")

    # damaged saved files
    dmg = {
        "truncated": damage_bytes("truncate"), "empty": damage_bytes("empty"), "random-bytes": damage_bytes("random"),
        "directory": damage_bytes("directory"), "deleted": damage_bytes("delete"), "random-netcdf": random_netcdf,
        "settings-cut": damage_tree(_cut_settings), "settings-missing": damage_tree(_drop_settings),
        "unknown-family": damage_tree(_settings_edit(_unknown_family)), "settings-not-object": damage_tree(_settings_edit(_settings_list)),
        "constant-short": damage_tree(_short_constant), "no-posterior": damage_tree(_drop_group("posterior")),
        "no-observed": damage_tree(_drop_group("observed_data")), "no-constant": damage_tree(_drop_group("constant_data")),
        "nan-draws": NAN_DRAWS, "inf-draws": INF_DRAWS, "no-range-variable": damage_tree(_drop_posterior_var),
        "zero-draws": damage_tree(_zero_draws),
    }
    what = {
        "truncated": "posterior.nc cut to half its bytes", "empty": "posterior.nc of 0 bytes", "random-bytes": "posterior.nc of random bytes",
        "directory": "posterior.nc is a folder", "deleted": "posterior.nc missing", "random-netcdf": "posterior.nc is an unrelated NetCDF",
        "settings-cut": "the settings attribute cut short", "settings-missing": "no settings attribute",
        "unknown-family": "settings naming an unknown covariance family", "settings-not-object": "settings that are a JSON list",
        "constant-short": "constant_data shorter than observed_data", "no-posterior": "no posterior group",
        "no-observed": "no observed_data group", "no-constant": "no constant_data group", "nan-draws": "NaN draws in the posterior",
        "inf-draws": "an infinite draw in the posterior", "no-range-variable": "the range variables missing from the posterior",
        "zero-draws": "a posterior of zero draws",
    }
    per_command = {
        "check": (CHECK, ["truncated", "empty", "random-bytes", "directory", "deleted", "random-netcdf", "no-posterior", "nan-draws",
                          "inf-draws", "zero-draws", "no-range-variable"]),
        "map": (MAP, ["truncated", "random-netcdf", "settings-cut", "settings-missing", "unknown-family", "settings-not-object",
                      "constant-short", "no-posterior", "no-observed", "no-constant", "nan-draws", "inf-draws", "no-range-variable"]),
        "vgcheck": (VGC, ["settings-cut", "unknown-family", "constant-short", "nan-draws", "no-observed", "random-netcdf"]),
        "compare": (COMPARE, ["truncated", "settings-cut", "unknown-family", "constant-short", "nan-draws"]),
    }
    for cmd, (argv, kinds) in per_command.items():
        for k in kinds:
            setup = (FIT_COPY, FIT2_COPY, dmg[k]) if cmd == "compare" else (FIT_COPY, dmg[k])
            add(Case(f"{cmd}-damaged-{k}", "damaged", f"{argv[0]}: {what[k]}", argv, setup, places=(FIT_FILE,), needs_fit=True))

    # study files
    def study_case(cid, what, step, places, argv=RUN):
        add(Case(f"study-{cid}", "study", what, argv, (DATA, step), places=places))

    S = r"study\.toml"
    study_case("bad-toml", "not valid TOML", study(STUDY.replace("[sampler]", "[sampler", 1)), (S,))
    study_case("unknown-key", "an unknown key", study_with("sampler", "chain = 2"), (S, line("chain")))
    study_case("unknown-table", "an unknown table", study(STUDY + "\n[plotting]\ndpi = 300\n"), (S, r"plotting"))
    study_case("wrong-type", "a string where an integer belongs", study_replace("chains = 2", 'chains = "two"'), (S, line("chains")))
    study_case("huge-integer", "chains = 99999999999999999999", study_replace("chains = 2", f"chains = {HUGE}"), (S, line("chains")))
    study_case("seed-2pow70", "seed = 2**70", study_replace("seed = 3", f"seed = {SEED70}"), (S, line("seed")))
    study_case("negative-draws", "draws = -5", study_replace("draws = 20", "draws = -5"), (S, line("draws")))
    study_case("zero-bins", "[explore] bins = 0", study_replace("bins = 5", "bins = 0"), (S, line("bins")))
    study_case("target-accept-two", "[sampler] target_accept = 2", study_with("sampler", "target_accept = 2.0"), (S, line("target_accept")))
    study_case("cell-negative", "[prediction] cell = -1", study_replace("cell = 25.0", "cell = -1.0"), (S, line("cell")))
    study_case("cell-nan", "[prediction] cell = nan", study_replace("cell = 25.0", "cell = nan"), (S, line("cell")))
    study_case("thresholds-text", "thresholds given as a string", study_with("prediction", 'thresholds = "high"'), (S, line("thresholds")))
    study_case("area-reversed", "an area with xmin > xmax", study_with("prediction", "area = [150.0, 50.0, 50.0, 150.0]"), (S, line("area")))
    study_case("unknown-family", "an unknown covariance family", study_replace('covariance = "exponential"', 'covariance = "wavelet"'), (S, line("covariance")))
    study_case("no-data-path", "no [data] path", study(STUDY.replace('path = "data.csv"\n', "", 1)), (S, r"path"))
    study_case("data-missing", "[data] path naming no file", study_replace('path = "data.csv"', 'path = "nothere.csv"'), (r"nothere\.csv",))
    study_case("empty-file", "an empty study file", study(""), (S, r"path"))
    study_case("non-utf8", "a study file with a Latin-1 byte", study(STUDY.encode().replace(b"invented", b"invent\xe9d", 1)), (S,))
    study_case("is-directory", "a folder given as the study file", mkdir("study.toml"), (S,))
    study_case("missing", "a study file that does not exist", lambda box: None, (S,))
    study_case("duplicate-key", "a key given twice (invalid TOML)", study_with("sampler", "chains = 3"), (S,))
    add(Case("study-data-1e308", "study", "a study whose data hold 1e308", RUN, (write("data.csv", with_cell(4, 2, "1e308")), study(STUDY)),
             places=(r"data\.csv", col("conc"))))

    # output paths (docs/outputs.md)
    add(Case("out-dot-overwrite", "output", "explore --out . --overwrite", (*EXPLORE[:-2], "--out", ".", "--overwrite"), (DATA,), places=(opt("--out"), r"'\.'|\.")))
    add(Case("out-dot-slash-overwrite", "output", "explore --out ./ --overwrite", (*EXPLORE[:-2], "--out", "./", "--overwrite"), (DATA,), places=(opt("--out"),)))
    add(Case("out-dotdot-overwrite", "output", "explore --out .. --overwrite", (*EXPLORE[:-2], "--out", "..", "--overwrite"), (DATA,), places=(opt("--out"),)))
    add(Case("out-root-overwrite", "output", "explore --out / --overwrite", (*EXPLORE[:-2], "--out", "/", "--overwrite"), (DATA,), places=(opt("--out"),)))
    add(Case("out-home-overwrite", "output", "explore --out $HOME --overwrite", lambda box: (*EXPLORE[:-2], "--out", str(box.home), "--overwrite"), (DATA,),
             places=(opt("--out"),), home=True))
    add(Case("out-cwd-absolute-overwrite", "output", "explore --out <absolute path of the folder holding the data> --overwrite",
             lambda box: (*EXPLORE[:-2], "--out", str(box.cwd), "--overwrite"), (DATA,), places=(opt("--out"),)))
    add(Case("out-data-folder-overwrite", "output", "explore --out <folder holding the input CSV> --overwrite",
             ("explore", "in/data.csv", *EXPLORE[2:-2], "--out", "in", "--overwrite"), (write("in/data.csv", good_csv()),), places=(r"\bin\b",)))
    add(Case("out-is-input-overwrite", "output", "explore --out data.csv --overwrite (the input itself)",
             (*EXPLORE[:-2], "--out", "data.csv", "--overwrite"), (DATA,), places=(r"data\.csv",)))
    add(Case("out-symlink-to-data-folder", "output", "explore --out <symlink to the data's folder> --overwrite",
             ("explore", "in/data.csv", *EXPLORE[2:-2], "--out", "link", "--overwrite"), (write("in/data.csv", good_csv()), symlink("link", "in")),
             places=(r"link",)))
    add(Case("out-users-folder-overwrite", "output", "explore --out <a folder of the user's own files> --overwrite",
             (*EXPLORE, "--overwrite"), (DATA, write("ex/notes.txt", "my notes\n")), places=(r"\bex\b",)))
    add(Case("out-marker-plus-user-file", "output", "--overwrite on our folder to which the user added a file",
             (*EXPLORE, "--overwrite"), (DATA, run_first(*EXPLORE), write("ex/notes.txt", "my notes\n")), places=(r"\bex\b|notes\.txt",)))
    add(Case("out-fake-marker", "output", "--overwrite on a folder whose marker lists no files",
             (*EXPLORE, "--overwrite"), (DATA, write(f"ex/{MARKER}", "{}"), write("ex/results.csv", "a\n1\n")), places=(r"\bex\b",)))
    add(Case("out-exists-no-overwrite", "output", "explore --out <our own earlier folder> without --overwrite", EXPLORE,
             (DATA, run_first(*EXPLORE)), places=(r"\bex\b", opt("--overwrite"))))
    add(Case("out-own-folder-overwrite", "output", "explore --out <our own earlier folder> --overwrite (replaced)", (*EXPLORE, "--overwrite"),
             (DATA, run_first(*EXPLORE)), status=0, writes=("ex",), after=after_replaced))
    add(Case("out-is-users-file-overwrite", "output", "explore --out <a file of the user's> --overwrite", (*EXPLORE[:-2], "--out", "notes.txt", "--overwrite"),
             (DATA, write("notes.txt", "my notes\n")), places=(r"notes\.txt",)))
    add(Case("out-under-a-file", "output", "explore --out data.csv/sub (a path below a file)", (*EXPLORE[:-2], "--out", "data.csv/sub"), (DATA,),
             places=(r"data\.csv",)))
    add(Case("out-stale-part-cleaned", "output", "an empty .ex.*.part folder left by a killed run is removed by the next run", EXPLORE,
             (DATA, mkdir(".ex.k3j9x2qa.part")), status=0, writes=("ex", ".ex.*.part"), after=after_stale_cleaned,
             source="docs/outputs.md, rule 6"))
    add(Case("out-part-named-user-folder-kept", "output", "a folder named like a part but holding the user's file (no bayesgeo tag) is kept",
             EXPLORE, (DATA, write(".ex.k3j9x2qa.part/mine.txt", "mine\n")), status=0, writes=("ex",), source="docs/outputs.md, rules 1 and 6"))
    add(Case("out-empty-folder-overwrite", "output", "explore --out <an empty folder> --overwrite (nothing to lose: replaced)",
             (*EXPLORE, "--overwrite"), (DATA, mkdir("ex")), status=0, writes=("ex",), after=after_replaced, source="docs/outputs.md, rule 3"))
    add(Case("fit-out-dot-overwrite", "output", "fit --out . --overwrite", (*FIT[:-2], "--out", ".", "--overwrite"), (DATA,), places=(opt("--out"),)))
    add(Case("fit-out-data-folder-overwrite", "output", "fit --out <folder holding the CSV> --overwrite",
             ("fit", "in/data.csv", *FIT[2:-2], "--out", "in", "--overwrite"), (write("in/data.csv", good_csv()),), places=(r"\bin\b",)))
    add(Case("check-existing-diagnostics", "output", "check again without --overwrite prints its verdict and keeps the first diagnostics/ byte-identical",
             CHECK, (FIT_COPY, run_first(*CHECK)), status=(0, 3), writes=(f"fit/{MARKER}",), needs_fit=True,
             source="issue #15; docs/outputs.md, rule 7"))
    add(Case("check-users-diagnostics-overwrite", "output", "check --overwrite where diagnostics/ holds the user's files", (*CHECK, "--overwrite"),
             (FIT_COPY, write("fit/diagnostics/my_notes.txt", "mine\n")), places=(r"diagnostics|my_notes",), needs_fit=True))
    add(Case("map-users-maps-overwrite", "output", "map --overwrite where maps/ holds the user's files",
             ("map", "fit", "--cell", "25", "--draws", "20", "--allow-unconverged", "--overwrite"),
             (FIT_COPY, write("fit/maps/my_map.png", "mine\n")), places=(r"maps|my_map",), needs_fit=True))
    add(Case("check-overwrite-own", "output", "check --overwrite replaces its own diagnostics/", (*CHECK, "--overwrite"),
             (FIT_COPY, run_first(*CHECK)), status=(0, 3), writes=("fit/diagnostics", f"fit/{MARKER}", "fit/.diagnostics.*"),
             after=after_check_overwrite, needs_fit=True))
    add(Case("compare-out-dot-overwrite", "output", "compare --out . --overwrite", (*COMPARE, "--out", ".", "--overwrite"), (FIT_COPY, FIT2_COPY),
             places=(opt("--out"),), needs_fit=True))
    add(Case("compare-out-is-input", "output", "compare --out <one of the fit folders compared> --overwrite", (*COMPARE, "--out", "fit2", "--overwrite"),
             (FIT_COPY, FIT2_COPY), places=(r"fit2",), needs_fit=True))
    add(Case("compare-out-users-folder", "output", "compare --out <a folder of the user's> --overwrite", (*COMPARE, "--out", "mine", "--overwrite"),
             (FIT_COPY, FIT2_COPY, write("mine/report.docx", "mine\n")), places=(r"mine",), needs_fit=True))
    add(Case("study-output-dot-overwrite", "output", "study with [output] dir = \".\" and overwrite = true", RUN,
             (DATA, study(STUDY.replace('dir = "study-run"', 'dir = "."\noverwrite = true'))), places=(r"study\.toml|'\.'|output",)))
    add(Case("run-out-study-folder-overwrite", "output", "run --out <folder holding the study file> --overwrite", (*RUN, "--out", ".", "--overwrite"),
             (DATA, study(STUDY)), places=(opt("--out"),)))
    add(Case("validate-out-dot-overwrite", "output", "validate --out . --overwrite", (*VALIDATE[:-2], "--out", ".", "--overwrite"),
             (write("keep.txt", "mine\n"),), places=(opt("--out"),)))
    add(Case("demo-out-dot-overwrite", "output", "demo --out . --overwrite", ("demo", "--quick", "--out", ".", "--overwrite"),
             (write("keep.txt", "mine\n"),), places=(opt("--out"),)))
    add(Case("demo-out-is-file", "output", "demo --out <a file of the user's>", ("demo", "--quick", "--out", "keep.txt"),
             (write("keep.txt", "mine\n"),), places=(r"keep\.txt",)))
    return cs


CASES: list[Case] = _cases()


def markdown_table(cases: list[Case] | None = None) -> str:
    """The Markdown table of docs/reliability.md."""
    cases = CASES if cases is None else cases
    lines = ["| id | group | what | expected | source |", "| --- | --- | --- | --- | --- |"]
    for c in cases:
        st = c.status if isinstance(c.status, tuple) else (c.status,)
        exp = " or ".join(f"exit {s}" for s in st)
        if 2 in st:
            exp += ", one line naming the place"
        if 0 in st and c.writes:
            exp += "; writes only " + ", ".join(f"`{w}`" for w in c.writes)
        lines.append(f"| `{c.id}` | {c.group} | {c.what.replace('|', '/')} | {exp} | {c.src} |")
    return "\n".join(lines) + "\n"


TABLE_MARK = "<!-- the table below is generated: python tests/_reliability_cases.py --write -->\n"


def write_doc(path: Path) -> None:
    """Replace the table of docs/reliability.md (everything after TABLE_MARK)."""
    text = path.read_text(encoding="utf-8")
    head = text.split(TABLE_MARK)[0]
    path.write_text(head + TABLE_MARK + "\n" + markdown_table(), encoding="utf-8")


if __name__ == "__main__":  # pragma: no cover
    import sys

    if "--write" in sys.argv:
        write_doc(Path(__file__).resolve().parents[1] / "docs" / "reliability.md")
    else:
        print(markdown_table(), end="")
