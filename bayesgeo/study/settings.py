"""Study files: one TOML file that states a whole analysis, read and checked before any work.

A study file names the data and every setting of every stage (see ``docs/study_file.md`` for the
reference). :func:`read_study` parses it with :mod:`tomllib`, fills in defaults and checks every
key and type; a mistake raises :class:`~bayesgeo.common.validate.InputError` naming the file, the line,
the table and the key, the bad value and what would be accepted. Paths inside the file are
relative to the folder of the study file. The result is a frozen :class:`Study` whose
:meth:`Study.to_dict` is the complete, resolved settings (recorded in the run's manifest).
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from bayesgeo.common.validate import INT_LIMITS, InputError, check_float, check_int, check_prior_pair
from bayesgeo.study.schema import KIND_TEXT, RENAMED, REQUIRED, SCHEMA

__all__ = ["Study", "read_study", "parse_study", "study_line", "areas_of"]

# --- locating keys in the text ------------------------------------------------------------------
_HEADER = re.compile(r"^\s*\[\s*([^\]\[]+?)\s*\]\s*(#.*)?$")


def _key_pattern(key: str) -> re.Pattern:
    return re.compile(r"^\s*(?:%s|\"%s\"|'%s')\s*=" % (re.escape(key), re.escape(key), re.escape(key)))


def study_line(text: str, table: str, key: str | None = None) -> int | None:
    """1-based line of ``key`` inside ``[table]`` of a TOML text (or of the table header when ``key`` is None).

    A key of a nested table written inline (``priors = {range = [...]}`` under ``[model]``) is
    found at the line of its parent key. Returns None if not found.
    """
    lines = text.splitlines()
    current = ""
    if key is None:
        for i, line in enumerate(lines, 1):
            m = _HEADER.match(line)
            if m and m.group(1).replace(" ", "") == table:
                return i
        if "." in table:
            parent, last = table.rsplit(".", 1)
            return study_line(text, parent, last)
        return None
    pat = _key_pattern(key)
    for i, line in enumerate(lines, 1):
        m = _HEADER.match(line)
        if m:
            current = m.group(1).replace(" ", "")
            continue
        if current == table and pat.match(line):
            return i
    if "." in table:  # inline sub-table, or dotted key ``priors.range = ...`` under the parent
        parent, last = table.rsplit(".", 1)
        dotted = re.compile(r"^\s*%s\s*\.\s*%s\s*=" % (re.escape(last), re.escape(key)))
        current = ""
        for i, line in enumerate(lines, 1):
            m = _HEADER.match(line)
            if m:
                current = m.group(1).replace(" ", "")
                continue
            if current == parent and dotted.match(line):
                return i
        return study_line(text, parent, last)
    return None


# --- the resolved study ------------------------------------------------------------------------
@dataclass(frozen=True)
class Study:
    """A checked study: the source file, its text, and every setting resolved (defaults filled in).

    Attributes
    ----------
    path : Path
        The study file (absolute).
    text : str
        The study file's text, as read.
    settings : dict
        ``{table: {key: value}}`` for every table of :data:`SCHEMA` (``""`` holds top-level keys;
        ``"model.priors"`` the prior pairs). Paths are absolute.
    """

    path: Path
    text: str
    settings: dict = field(default_factory=dict)

    def __getitem__(self, table: str) -> dict:
        return self.settings[table]

    @property
    def families(self) -> list[str]:
        """Covariance families to fit, in the order given."""
        return list(self.settings["model"]["covariance"])

    @property
    def several_sites(self) -> bool:
        """True for a several-site study (a site column and a several-site pooling)."""
        return self.settings["model"]["pooling"] != "single"

    @property
    def out_dir(self) -> Path:
        """The run folder."""
        return Path(self.settings["output"]["dir"])

    def to_dict(self) -> dict:
        """The resolved settings as plain JSON-able data (paths as strings)."""
        return {t: {k: _plain(v) for k, v in kv.items()} for t, kv in self.settings.items()}


def _plain(v):
    if isinstance(v, Path):
        return str(v)
    if isinstance(v, dict):
        return {k: _plain(x) for k, x in v.items()}
    if isinstance(v, list):
        return [_plain(x) for x in v]
    return v


def _where(src: str, text: str, table: str, key: str | None) -> str:
    line = study_line(text, table, key) if text else None
    if line is None and text and key is not None:  # a sub-table written as its own [table.key] header
        line = study_line(text, f"{table}.{key}" if table else key)
    name = f"[{table}]" if table else "top level"
    if key is not None:
        name = f"{name} {key}" if table else key
    return f"{src}, line {line}: {name}" if line else f"{src}: {name}"


def _convert(kind: str, value: Any, choices, where: str, base: Path):
    bad = InputError(f"{where}: expected {KIND_TEXT[kind]}, got {value!r}")
    if kind in ("str", "path"):
        if not isinstance(value, str):
            raise bad
        if kind == "path":
            p = Path(value).expanduser()
            return p if p.is_absolute() else (base / p)
        if choices is not None and value not in choices:
            raise InputError(f"{where}: {value!r} is not one of {', '.join(choices)}")
        return value
    if kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise bad
        return int(value)
    if kind == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad
        return float(value)
    if kind == "bool":
        if not isinstance(value, bool):
            raise bad
        return value
    if kind == "str_list":
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise bad
        return list(value)
    if kind == "float_list":
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                                  for v in value):
            raise bad
        return [float(v) for v in value]
    if kind == "float_pair":
        if (not isinstance(value, list) or len(value) != 2
                or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)):
            raise bad
        return [float(v) for v in value]
    if kind == "family_list":
        vals = [value] if isinstance(value, str) else value
        if not isinstance(vals, list) or not vals or not all(isinstance(v, str) for v in vals):
            raise bad
        for v in vals:
            if v not in choices:
                raise InputError(f"{where}: {v!r} is not one of {', '.join(choices)}")
        if len(set(vals)) < len(vals):
            raise InputError(f"{where}: a family is listed twice ({', '.join(vals)})")
        return list(vals)
    if kind == "int_or_all":
        if value == "all":
            return "all"
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise bad
        return int(value)
    if kind == "area":
        if isinstance(value, Mapping):
            if not value:
                raise bad
            return {str(k): _one_area(v, bad, where, base) for k, v in value.items()}
        if isinstance(value, list) and value and all(isinstance(v, (str, list)) for v in value):
            return [_one_area(v, bad, where, base) for v in value]
        return _one_area(value, bad, where, base)
    raise AssertionError(kind)  # pragma: no cover


def _one_area(value: Any, bad: InputError, where: str, base: Path) -> Path | list[float]:
    """One area: a polygon CSV path (absolute) or a checked rectangle [xmin, ymin, xmax, ymax]."""
    if isinstance(value, str):
        p = Path(value).expanduser()
        return p if p.is_absolute() else (base / p)
    if (isinstance(value, list) and len(value) == 4
            and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)):
        vals = [check_float(v, where) for v in value]
        if not (vals[0] < vals[2] and vals[1] < vals[3]):
            raise InputError(f"{where}: expected xmin < xmax and ymin < ymax, got {value!r}")
        return vals
    raise bad


def areas_of(area) -> list:
    """The areas of a ``[prediction] area`` setting as a list (empty when none)."""
    if area is None:
        return []
    if isinstance(area, dict):
        return list(area.values())
    if isinstance(area, list) and area and isinstance(area[0], (Path, list)):
        return list(area)
    return [area]


#: Integer keys -> (name in :data:`bayesgeo.common.validate.INT_LIMITS`, a stricter minimum for study files or 0).
_INT_KEYS = {
    ("explore", "bins"): ("bins", 0), ("explore", "permutations"): ("permutations", 0),
    ("explore", "trend"): ("trend", 0), ("explore", "seed"): ("seed", 0), ("model", "trend"): ("trend", 0),
    ("model", "neighbours"): ("neighbours", 0), ("sampler", "chains"): ("chains", 0),
    ("sampler", "draws"): ("draws", 10), ("sampler", "max_draws"): ("draws", 10), ("sampler", "tune"): ("tune", 0), ("sampler", "seed"): ("seed", 0),
    ("check", "replicates"): ("replicates", 10), ("check", "seed"): ("seed", 0),
    ("prediction", "draws"): ("prediction_draws", 0), ("prediction", "seed"): ("seed", 0),
}
#: Real-valued keys -> range name in :data:`bayesgeo.common.validate.FLOAT_LIMITS` (every value finite).
_FLOAT_KEYS = {
    ("explore", "lag_limit"): "positive", ("model", "nu"): "nu", ("sampler", "target_accept"): "probability",
    ("prediction", "cell"): "positive", ("prediction", "margin"): "nonnegative",
}


def _check_ranges(s: dict, src: str, text: str) -> None:
    """Value checks that go beyond types (each names its key and line)."""

    def fail(table, key, msg):
        raise InputError(f"{_where(src, text, table, key)}: {msg}")

    for (table, key), (limit, lo) in _INT_KEYS.items():
        v = s[table][key]
        if v is not None and v != "all":
            check_int(v, _where(src, text, table, key), minimum=max(lo, INT_LIMITS[limit][0]),
                      maximum=INT_LIMITS[limit][1])
    smp = s["sampler"]
    if smp["max_draws"] is not None:
        from bayesgeo.fitting.looks import longest_chain

        longest_chain(smp["draws"], smp["max_draws"], where=_where(src, text, "sampler", "max_draws"),
                      draws_name="draws")
    for (table, key), limit in _FLOAT_KEYS.items():
        if s[table][key] is not None:
            check_float(s[table][key], _where(src, text, table, key), limit)
    for v in s["prediction"]["thresholds"]:
        check_float(v, _where(src, text, "prediction", "thresholds"))
    fams = s["model"]["covariance"]
    if s["model"]["nu"] is not None and "matern" not in fams:
        fail("model", "nu", "nu applies to the 'matern' family only; add \"matern\" to covariance or drop nu")
    if "matern" in fams and s["model"]["nu"] is None:
        fail("model", "covariance", "family 'matern' needs nu (e.g. nu = 2.5) in [model]")
    readable = [*s["data"]["covariates"], *s["data"]["categories"]]
    missing = [c for c in s["model"]["covariates"] if c not in readable]
    if missing:
        fail("model", "covariates", f"{', '.join(missing)} not listed in [data] covariates or categories "
                                    f"({', '.join(readable) or 'none'})")
    both = [c for c in s["data"]["categories"] if c in s["data"]["covariates"]]
    if both:
        fail("data", "categories", f"{both[0]!r} is also in covariates: a column is numbers or labels, not both")
    for item in s["data"]["baselines"]:
        col = str(item).partition("=")[0].strip()
        if "=" not in str(item) or col not in s["data"]["categories"]:
            fail("data", "baselines", f"{item!r}: expected \"COL=LEVEL\" with COL in categories "
                                      f"({', '.join(s['data']['categories']) or 'none'})")
    for key, pair in s["model.priors"].items():
        if pair is not None:
            check_prior_pair(pair, _where(src, text, "model.priors", key))
    if s["model"]["approx"] == "dense" and s["model"]["neighbours"] is not None:
        fail("model", "neighbours", "neighbours applies to approx = 'nn' only")
    if not s["data"]["path"].exists():
        fail("data", "path", f"{s['data']['path']}: no such file")
    pts = s["prediction"]["points"]
    if pts is not None and not pts.exists():
        fail("prediction", "points", f"{pts}: no such file")
    area = s["prediction"]["area"]
    for a in areas_of(area):
        if isinstance(a, Path) and not a.exists():
            fail("prediction", "area", f"{a}: no such file")
    site, pooling = s["data"]["site"], s["model"]["pooling"]
    if pooling != "single" and not site:
        fail("model", "pooling", f"pooling {pooling!r} needs several sites: name the site column in [data] site")
    if pooling == "single" and site:
        fail("model", "pooling", "pooling 'single' fits one site; with [data] site choose hierarchical, "
                                 "independent or complete")
    if pooling == "single" and (isinstance(area, dict) or len(areas_of(area)) > 1):
        fail("prediction", "area", "a single-site study averages over one area; several areas (a list or a "
                                   "table {site = area}) need a several-site study")
    if pooling != "single" and s["model.priors"]["nugget_above"] is not None:
        fail("model.priors", "nugget_above", "the several-site model puts its prior on the nugget fraction of the sill "
                                       "(docs/hierarchical.md); drop the nugget prior")
    if pts is not None and area is not None:
        pass  # both allowed: point predictions plus an area average


def _subtables(table: str) -> list[str]:
    """Names of the tables nested directly under ``table`` ("" is the top level)."""
    out = []
    for t in SCHEMA:
        if not t:
            continue
        parent, _, last = t.rpartition(".")
        if parent == table:
            out.append(last)
    return out


def parse_study(text: str, *, path: str | Path = "study.toml") -> Study:
    """Check a study given as TOML ``text``; ``path`` anchors relative paths and names the file in messages."""
    path = Path(path).resolve()
    src, base = str(path), path.parent
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"{src}: not valid TOML ({' '.join(str(err).split())})") from None
    settings: dict[str, dict] = {t: {} for t in SCHEMA}

    def walk(table: str, obj: Mapping) -> None:
        known = SCHEMA[table]
        for key, value in obj.items():
            sub = f"{table}.{key}" if table else key
            if sub in SCHEMA:
                if not isinstance(value, Mapping):
                    raise InputError(f"{_where(src, text, table, key)}: expected a table, got {value!r}")
                walk(sub, value)
                continue
            if (table, key) in RENAMED:
                raise InputError(f"{_where(src, text, table, key)}: renamed; write {RENAMED[table, key]} instead")
            if key not in known:
                accepted = sorted([*known, *_subtables(table)])
                what = "table" if isinstance(value, Mapping) else "key"
                raise InputError(f"{_where(src, text, table, key)}: unknown {what}; accepted: {', '.join(accepted)}")
            kind, _, choices, _ = known[key]
            settings[table][key] = _convert(kind, value, choices, _where(src, text, table, key), base)

    walk("", raw)
    for table, keys in SCHEMA.items():
        for key, (kind, default, _, _) in keys.items():
            if key in settings[table]:
                continue
            if default is REQUIRED:
                line = study_line(text, table)
                at = f", line {line}" if line else ""
                raise InputError(f"{src}{at}: [{table}] {key} is required")
            settings[table][key] = list(default) if isinstance(default, list) else default
    s = settings
    if s["output"]["dir"] is None:
        s["output"]["dir"] = base / f"{path.stem}-run"
    if s["model"]["pooling"] is None:
        s["model"]["pooling"] = "hierarchical" if s["data"]["site"] else "single"
    if s["explore"]["trend"] is None:
        s["explore"]["trend"] = s["model"]["trend"]
    if s["explore"]["transform"] is None:
        s["explore"]["transform"] = s["model"]["transform"]
    _check_ranges(s, src, text)
    return Study(path=path, text=text, settings=s)


def read_study(path: str | Path) -> Study:
    """Read and check a study file.

    Parameters
    ----------
    path : str or Path
        A TOML file following ``docs/study_file.md``.

    Returns
    -------
    Study
        Every setting resolved; paths absolute (relative ones are taken from the study file's folder).

    Raises
    ------
    InputError
        Unreadable file, invalid TOML, unknown key or table, wrong type or value; the message names
        the file, the line, the table and the key.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such study file")
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: cannot be read as UTF-8 text ({err})") from None
    return parse_study(text, path=path)
