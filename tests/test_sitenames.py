"""Per-site file names: safe, distinct for distinct labels, and the label recorded inside the files."""

from __future__ import annotations

import re

import pytest

from bayesgeo.data.points import read_points
from bayesgeo.common.layout import prediction_names, site_part, vgcheck_names
from bayesgeo.common.sitenames import site_file_name
from bayesgeo.common.validate import InputError

# Characters portable in file names on Windows, macOS and Linux (the POSIX portable file name
# character set, IEEE Std 1003.1 sec. 3.282, plus '+'; from memory).
_PORTABLE = re.compile(r"[A-Za-z0-9._+-]+")


def test_labels_that_collided_get_distinct_safe_names():
    """Labels whose old slugs collided ('a/b', 'a_b', 'a b', 'a:b', 'a\\\\b') get distinct names of portable
    characters, also when compared ignoring case (case-insensitive file systems); safe labels stay as written."""
    labels = ["a/b", "a_b", "a b", "a:b", "a\\b", "A B", "a*b", "a_b_", "../x", ".", "", "con", "Aux", "é", "e"]
    names = [site_file_name(lb) for lb in labels]
    assert len({n.casefold() for n in names}) == len(labels)
    for n in names:
        assert _PORTABLE.fullmatch(n) and not n.startswith(".") and not n.endswith(".") and "/" not in n
    assert site_file_name("a_b") == "a_b" and site_file_name("north-yard") == "north-yard"
    assert site_file_name("a/b").startswith("a_b+")
    # every stage, the pipeline and the report name per-site files through bayesgeo.common.layout
    assert site_part("a/b") == site_file_name("a/b")
    assert prediction_names("a/b") == (f"predictions_{site_file_name('a/b')}.nc", f"maps_{site_file_name('a/b')}")
    assert vgcheck_names("a/b") == tuple(f"variogram_check_{site_file_name('a/b')}.{e}" for e in ("png", "csv"))
    assert prediction_names() == ("predictions.nc", "maps") and vgcheck_names()[0] == "variogram_check.png"


def test_long_labels_are_shortened_but_stay_distinct():
    """Labels longer than 64 characters are shortened to 40 plus a hash, distinct even with a common prefix (behaviour check)."""
    a, b = "x" * 80 + "1", "x" * 80 + "2"
    assert site_file_name(a) != site_file_name(b)
    assert len(site_file_name(a)) <= 49


def test_labels_differing_only_in_case_are_refused(tmp_path, grid_rows):
    """Site labels 'A' and 'a' would write files that collide on case-insensitive file systems: refused naming the rows (behaviour check)."""
    rows = [["x", "y", "conc", "site"]] + [r + ["A" if k < 13 else "a"] for k, r in enumerate(grid_rows[1:])]
    path = tmp_path / "case.csv"
    path.write_text("\n".join(",".join(map(str, r)) for r in rows) + "\n")
    before = path.read_bytes()
    with pytest.raises(InputError, match=r"case\.csv: column 'site' has labels differing only in letter case: "
                                         r"'A' \(rows 2, 3, 4, \.\.\. \(13 rows\)\) and 'a' \(rows 15, 16, 17"):
        read_points(path, value="conc", site="site")
    assert path.read_bytes() == before


def test_explore_writes_sites_a_slash_b_and_a_underscore_b_apart(tmp_path, capsys):
    """explore --site with sites 'a/b' and 'a_b' writes two sub-folders, each CSV naming its site in a
    'site' column; before, the second replaced the first (behaviour check)."""
    import json

    import numpy as np
    import pandas as pd

    from bayesgeo.cli import main

    rng = np.random.default_rng(8)
    lines = ["x,y,conc,site"]
    for label in ("a/b", "a_b"):
        for _ in range(30):
            lines.append(f"{1000 + 500 * rng.random():.2f},{2000 + 500 * rng.random():.2f},{rng.normal(5, 1):.3f},{label}")
    data = tmp_path / "two.csv"
    data.write_text("\n".join(lines) + "\n")
    out = tmp_path / "ex"
    assert main(["explore", str(data), "--value", "conc", "--site", "site", "--out", str(out), "--json",
                 "--permutations", "0"]) == 0
    obj = json.loads(capsys.readouterr().out)
    for label in ("a/b", "a_b"):
        sub = out / site_file_name(label)
        frame = pd.read_csv(sub / "fits.csv")
        assert set(frame["site"]) == {label}
        assert f"{site_file_name(label)}/fits.csv" in obj["files"]
    assert site_file_name("a/b") != site_file_name("a_b")
