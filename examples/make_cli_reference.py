"""Write docs/cli.md from the argparse parsers of every ``bayesgeo`` command (keeps the reference in sync).

Usage: ``python examples/make_cli_reference.py [OUT]`` (default ``docs/cli.md`` beside this folder).
tests/test_examples.py checks that docs/cli.md names every command and option of the parsers.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

HEADER = """# Command-line reference

Generated from the command parsers by `examples/make_cli_reference.py`; do not edit by hand
(`tests/test_examples.py` checks that this page names every command and option).

Every command prints human tables by default and exactly one JSON object on stdout with `--json`
(nothing else goes to stdout then; progress goes to stderr). Exit status: 0 done; 2 bad input (one
line on stderr naming the file, row, column or option); 3 a posterior failed its convergence check;
1 an unexpected failure (one line; `BAYESGEO_DEBUG=1` shows the traceback; for `run` and `demo`, a stage failed); 141 stdout was closed by its reader (`bayesgeo ... | head`),
ended quietly. Outputs are written atomically and never replace existing files without `--overwrite`;
with it, only what bayesgeo itself wrote is replaced (docs/outputs.md). Input accepted with a change
or a doubt gives one stderr line `bayesgeo <command>: warning: ...`, also listed under `"warnings"` in
the `--json` object. What a data file must look like, and what is refused: [data_files.md](data_files.md).

Numeric options are checked where they enter, with the same ranges as in study files
(`bayesgeo.common.validate.INT_LIMITS`): seeds 0 to 2^63 - 1, `--chains` 1 to 64, `--draws` 1 to 1,000,000,
`--tune` 0 to 1,000,000, `--neighbours` 1 to 200, `--trend` 0 to 3, `--bins` 2 to 1,000,
`--permutations` 0 to 100,000, `variogram-check --replicates` 1 to 100,000; real numbers must be finite, `--target-accept`
and prior probabilities lie in (0, 1), prior values and `--cell`, `--lag-limit` are positive. A saved fit
that is damaged or foreign (settings cut short, an unknown covariance family, a missing group,
sizes that disagree, NaN or infinite draws) is refused with one line naming the file; a NaN or
infinite result (a map band, an elpd) stops the command with exit 2 instead of reaching a table.
`fit` and `explore` say on stderr before starting when an input is above the comfortable size
([large data](large_data.md#comfortable-sizes)), and put the same plan in the `--json` object as
`workload`.
"""


def _option_text(action) -> tuple[str, str]:
    if action.option_strings:
        names = ", ".join(f"`{s}`" for s in action.option_strings)
        if action.nargs == 0:
            usage = names
        else:
            meta = action.metavar or action.dest.upper()
            meta = " ".join(meta) if isinstance(meta, tuple) else meta
            usage = f"{names} `{meta}`"
    else:
        meta = action.metavar or action.dest
        usage = f"`{meta}`" + (" (one or more)" if action.nargs == "+" else "")
    helptext = (action.help or "").replace("%%", "%").strip()
    if helptext and not helptext.endswith((".", ")")):
        helptext += "."
    if action.choices and not action.option_strings == ["-h", "--help"]:
        helptext += f" Choices: {', '.join(str(c) for c in action.choices)}."
    if action.required and action.option_strings:
        helptext += " Required."
    return usage, helptext.replace("|", "\\|")


def cli_reference() -> str:
    """The Markdown text of the command-line reference."""
    from bayesgeo.cli import COMMANDS, _build_parser

    parser = _build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    out = [HEADER]
    out.append("| command | what it does |\n| --- | --- |")
    for name in COMMANDS:
        out.append(f"| [`bayesgeo {name}`](#bayesgeo-{name}) | {sub.choices[name].description} |")
    for name in COMMANDS:
        p = sub.choices[name]
        out.append(f"\n## bayesgeo {name}\n\n{p.description}\n")
        out.append("| argument or option | meaning |\n| --- | --- |")
        for action in p._actions:
            if isinstance(action, argparse._HelpAction) or action.help == argparse.SUPPRESS:
                continue
            usage, helptext = _option_text(action)
            out.append(f"| {usage} | {helptext} |")
    return "\n".join(out) + "\n"


def main(argv: list[str]) -> int:
    out = Path(argv[0]) if argv else Path(__file__).resolve().parent.parent / "docs" / "cli.md"
    out.write_text(cli_reference(), encoding="utf-8")
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
