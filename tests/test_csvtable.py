"""Strict CSV intake: malformed tables are refused with file, row and column, and never modified.

These are input-handling tests (our own documented behaviour, docs/cli.md "Data files"); each
asserts the one-line message and that the input file is byte-identical afterwards.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

from bayesgeo.cli import main
from bayesgeo.common.csvtable import MAX_MAGNITUDE, InputWarning
from bayesgeo.data.points import read_points
from bayesgeo.common.validate import InputError


def _text(rows) -> str:
    return "\n".join(",".join(str(c) for c in r) for r in rows) + "\n"


def _refused(path, pattern, **kw):
    before = path.read_bytes()
    with pytest.raises(InputError, match=pattern) as info:
        read_points(path, **kw)
    assert "\n" not in str(info.value)
    assert path.read_bytes() == before
    return str(info.value)


def test_duplicate_column_names(tmp_path, grid_rows):
    """A header naming a column twice (x,y,x) is refused with both column positions (behaviour check)."""
    path = tmp_path / "dup.csv"
    path.write_text(_text([["x", "y", "x"]] + [[r[0], r[1], r[2]] for r in grid_rows[1:]]))
    _refused(path, r"dup\.csv: row 1 \(header\) names column 'x' twice \(columns 1 and 3\)", value="x")


def test_extra_field_refused_but_trailing_empty_cells_accepted(tmp_path, grid_rows):
    """A row with an extra filled field is refused naming the row; empty trailing cells (spreadsheet export) are not (behaviour check)."""
    rows = [list(r) for r in grid_rows]
    rows[5] = rows[5] + ["7"]
    path = tmp_path / "extra.csv"
    path.write_text(_text(rows))
    _refused(path, r"extra\.csv: row 6 has 4 fields but the header has 3 \(x, y, conc\); '7' is under no column",
             value="conc")
    padded = tmp_path / "padded.csv"
    padded.write_text(_text([r + [""] for r in grid_rows]))
    assert read_points(padded, value="conc").sizes["obs"] == 25


def test_missing_field_refused(tmp_path, grid_rows):
    """A row with a field fewer than the header is refused, naming the row and the column left without a cell (behaviour check)."""
    rows = [list(r) for r in grid_rows]
    rows[9] = rows[9][:2]
    path = tmp_path / "short.csv"
    path.write_text(_text(rows))
    _refused(path, r"short\.csv: row 10 has 2 fields but the header has 3; no cell for column 'conc'", value="conc")


@pytest.mark.parametrize("cell, reason", [
    ("1_000", r"'1_000' has digit separators \('_'\)"),
    ('"1,000"', r"'1,000' has digit separators \(','\)"),
    ('"12,5"', r"'12,5' has a decimal comma"),
    ("<", r"'<' is a censored value \(a non-detect\); non-detects are accepted in the value column only"),
    (">100", r"'>100' is a censored value \(above a limit\), which bayesgeo does not model"),
    ("١٢", r"'١٢' is not a plain decimal number \(it has non-ASCII characters\)"),
    ("0x1p3", r"'0x1p3' is not a number"),
])
def test_number_formats_refused_with_reason(tmp_path, grid_rows, cell, reason):
    """Cells Python's float() would accept or misread (1_000, Arabic-Indic digits) or that hide a decimal comma are refused with row, column and reason (behaviour check)."""
    rows = [list(r) for r in grid_rows]
    rows[3][2] = cell
    path = tmp_path / "num.csv"
    path.write_text(_text(rows), encoding="utf-8")
    _refused(path, rf"num\.csv: row 4, column 'conc': {reason}", value="conc")


def test_non_utf8_byte_named_by_row_and_column(tmp_path, grid_rows):
    """A Latin-1 byte (0xe9) is reported by row and column, not by byte offset (behaviour check)."""
    rows = [["x", "y", "conc", "site"]] + [r + ["A"] for r in grid_rows[1:]]
    text = _text(rows).encode()
    lines = text.split(b"\n")
    lines[6] = lines[6][:-1] + b"Caf\xe9"
    path = tmp_path / "latin1.csv"
    path.write_bytes(b"\n".join(lines))
    _refused(path, r"latin1\.csv: row 7, column 'site': byte 0xe9 is not UTF-8 text", value="conc")


def test_auto_value_column_names_the_text_cells(tmp_path, grid_rows):
    """With --value omitted, a value column holding 'NA' is named with the rows and values that are not numbers (behaviour check)."""
    rows = [list(r) for r in grid_rows]
    rows[4][2] = "NA"
    rows[8][2] = "n.d."
    path = tmp_path / "na.csv"
    path.write_text(_text(rows))
    _refused(path, r"no column is entirely numeric; 'conc' is numeric except 'NA', 'n\.d\.' at rows 5, 9\); "
                   r"name it with --value")


def test_site_labels_differing_only_in_spaces_are_refused(tmp_path, grid_rows):
    """Site labels 'A', ' A', 'A ' are refused, naming the rows of each spelling (issue #15: they were
    silently merged); a label padded the same way in every row is stripped with a warning."""
    rows = [["x", "y", "conc", "site"]] + [r + ["A"] for r in grid_rows[1:]]
    rows[3][3] = '" A"'
    rows[6][3] = '"A "'
    path = tmp_path / "sites.csv"
    path.write_text(_text(rows))
    before = path.read_bytes()
    with pytest.raises(InputError, match=r"column 'site' has labels differing only in spaces: 'A' \(rows 2, 3, 5, "
                                         r".*\) and ' A' \(rows 4\) and 'A ' \(rows 7\)"):
        read_points(path, value="conc", site="site")
    assert path.read_bytes() == before
    rows = [["x", "y", "conc", "site"]] + [r + ['" A"'] for r in grid_rows[1:]]
    path.write_text(_text(rows))
    with pytest.warns(InputWarning, match=r"column 'site' has labels with leading or trailing spaces "
                                          r"\(' A'\) at rows 2, 3, 4"):
        ds = read_points(path, value="conc", site="site")
    assert set(ds["site"].values) == {"A"}


def test_cli_warning_is_one_stderr_line_and_in_json(tmp_path, grid_rows, capsys):
    """The CLI prints an input warning as one 'bayesgeo <command>: warning:' line and adds it to --json (behaviour check)."""
    rows = [["x", "y", "conc", "site"]] + [r + ["A" if k < 12 else "B"] for k, r in enumerate(grid_rows[1:])]
    for k in range(1, 13):
        rows[k][3] = '" A"'  # padded the same way in every row: stripped, with a warning
    path = tmp_path / "sites.csv"
    path.write_text(_text(rows))
    status = main(["explore", str(path), "--value", "conc", "--site", "site", "--out", str(tmp_path / "ex"),
                   "--json", "--permutations", "0"])
    out, err = capsys.readouterr()
    assert status == 0, err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("bayesgeo explore: warning: ") and "rows 2, 3, 4" in lines[0]
    assert any("leading or trailing spaces" in w for w in json.loads(out)["warnings"])


@pytest.mark.parametrize("cell, col", [("1e308", "conc"), ("-2e51", "x")])
def test_extreme_magnitude_refused_at_intake(tmp_path, grid_rows, cell, col):
    """A value or coordinate beyond 1e50 is refused naming row and column: fourth powers (variances of the
    sill's draws) of 1e78 overflow doubles (IEEE 754 largest double 1.8e308), those of 1e50 times 1e8 do not."""
    rows = [list(r) for r in grid_rows]
    rows[6][0 if col == "x" else 2] = cell
    path = tmp_path / "big.csv"
    path.write_text(_text(rows))
    _refused(path, rf"big\.csv: row 7, column '{col}': {cell} is too large in magnitude \(limit 1e\+50", value="conc")
    with np.errstate(over="ignore"):
        assert np.isinf(np.float64(1e78) ** 4) and np.isfinite(np.float64(MAX_MAGNITUDE) ** 4 * 1e8)


def test_all_values_scaled_up_refused_and_tiny_spread_refused(tmp_path, grid_rows):
    """All values times 1e200 are refused (magnitude); a spread below 1e-50 is refused (fourth powers of
    1e-78 underflow below the IEEE 754 smallest normal double, 2.2e-308)."""
    rows = [list(r) for r in grid_rows]
    big = [rows[0]] + [[r[0], r[1], f"{r[2]}e200"] for r in rows[1:]]
    path = tmp_path / "scaled.csv"
    path.write_text(_text(big))
    _refused(path, r"row 2, column 'conc': .*too large in magnitude .*\(also rows 3, 4,", value="conc")
    tiny = [rows[0]] + [[r[0], r[1], f"{r[2]}e-200"] for r in rows[1:]]
    path = tmp_path / "tiny.csv"
    path.write_text(_text(tiny))
    _refused(path, r"tiny\.csv: column 'conc' varies by only .*underflow", value="conc")
    assert (1e-78) ** 4 < 2.2e-308 < (1.0 / MAX_MAGNITUDE) ** 4


def test_cli_refusal_exit_status_and_one_line(tmp_path, grid_rows, capsys):
    """The command line turns an intake refusal into exit status 2 and one stderr line (behaviour check)."""
    rows = [list(r) for r in grid_rows]
    rows[2][2] = "1_0"
    path = tmp_path / "sep.csv"
    path.write_text(_text(rows))
    before = path.read_bytes()
    status = main(["explore", str(path), "--value", "conc", "--out", str(tmp_path / "ex")])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(err) == 1
    assert err[0].startswith("bayesgeo explore: error: ") and "row 3, column 'conc'" in err[0]
    assert path.read_bytes() == before and not (tmp_path / "ex").exists()


def test_no_warning_for_clean_files(tmp_path, grid_rows):
    """A clean file raises no input warning (behaviour check)."""
    path = tmp_path / "clean.csv"
    path.write_text(_text(grid_rows))
    with warnings.catch_warnings():
        warnings.simplefilter("error", InputWarning)
        read_points(path, value="conc")


def test_warnings_do_not_leak_into_the_next_command(tmp_path, grid_rows, capsys):
    """A warning of one command is not repeated in the --json of the next command run in the same process (behaviour check)."""
    rows = [["x", "y", "conc", "site"]] + [r + ["A" if k < 12 else "B"] for k, r in enumerate(grid_rows[1:])]
    for k in range(1, 13):
        rows[k][3] = '" A"'  # padded the same way in every row: stripped, with a warning
    noisy, clean = tmp_path / "noisy.csv", tmp_path / "clean.csv"
    noisy.write_text(_text(rows))
    clean.write_text(_text(grid_rows))
    assert main(["explore", str(noisy), "--value", "conc", "--site", "site", "--out", str(tmp_path / "a"),
                 "--json", "--permutations", "0"]) == 0
    assert "warnings" in json.loads(capsys.readouterr().out)
    assert main(["explore", str(clean), "--value", "conc", "--out", str(tmp_path / "b"), "--json",
                 "--permutations", "0"]) == 0
    out, err = capsys.readouterr()
    assert "warnings" not in json.loads(out) and "warning" not in err


def test_netcdf_point_file_magnitude_refused(tmp_path, grid_rows):
    """Our own NetCDF point files obey the same 1e50 bound, naming the variable and rows (behaviour check)."""
    path = tmp_path / "p.csv"
    path.write_text(_text(grid_rows))
    ds = read_points(path, value="conc")
    ds["value"].values[4] = 1e60
    ds.to_netcdf(tmp_path / "p.nc")
    with pytest.raises(InputError, match=r"p\.nc: variable 'value' exceeds 1e\+50 in magnitude at rows 6"):
        read_points(tmp_path / "p.nc")


def test_overlong_number_and_header_byte(tmp_path, grid_rows):
    """A 400-digit number (beyond the largest double, IEEE 754) is refused as too large, shown shortened;
    a bad byte in the header is named by row 1 and field (behaviour check)."""
    rows = [list(r) for r in grid_rows]
    rows[2][2] = "1" * 400
    path = tmp_path / "long.csv"
    path.write_text(_text(rows))
    msg = _refused(path, r"row 3, column 'conc': 1{40}\.\.\. is too large in magnitude", value="conc")
    assert len(msg) < 300
    path = tmp_path / "head.csv"
    path.write_bytes(b"x,y,conc\xff\n" + _text(grid_rows[1:]).encode())
    _refused(path, r"head\.csv: row 1 \(header\), field 3: byte 0xff is not UTF-8", value="conc")
