"""Command line: a thin shell over the public Python API.

Each command lives in its own module ``bayesgeo.cli.<command>`` exposing ``HELP``,
``add_arguments(parser)`` and ``run(args) -> int``; modules are imported only when their command
runs, so ``bayesgeo explore`` does not pay for importing PyMC. Bad input prints one line on
stderr and exits with status 2; an unconverged posterior exits with status 3.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import sys
import warnings

__all__ = ["main", "COMMANDS", "EXIT_INPUT", "EXIT_NOT_CONVERGED"]

EXIT_INPUT = 2
EXIT_NOT_CONVERGED = 3

#: command name -> module under bayesgeo.cli
COMMANDS: dict[str, str] = {
    "demo-data": "demo_data",
    "explore": "explore",
    "fit": "fit",
    "check": "check",
    "map": "map",
    "compare": "compare",
    "variogram-check": "vgcheck",
    "run": "run",
    "demo": "demo",
    "validate": "validate",
}


class _Parser(argparse.ArgumentParser):
    """argparse whose usage errors are one line and exit 2 (argparse's own status too)."""

    def error(self, message: str):  # pragma: no cover - exercised through main()
        self.exit(EXIT_INPUT, f"bayesgeo: error: {message} (see '{self.prog} --help')\n")


def _build_parser() -> argparse.ArgumentParser:
    from bayesgeo import __version__

    parser = _Parser(prog="bayesgeo", description="Bayesian geostatistics: variograms, GP models, maps.")
    parser.add_argument("--version", action="version", version=f"bayesgeo {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, modname in COMMANDS.items():
        mod = importlib.import_module(f"bayesgeo.cli.{modname}")
        p = sub.add_parser(name, help=mod.HELP, description=mod.HELP)
        mod.add_arguments(p)
        p.set_defaults(_module=mod)
    return parser


@contextlib.contextmanager
def _one_line_warnings(command: str):
    """Print each :class:`bayesgeo.csvtable.InputWarning` as one stderr line and keep it for ``--json``."""
    from bayesgeo.cli import _common
    from bayesgeo.csvtable import InputWarning

    def show(message, category, filename, lineno, file=None, line=None):
        if not issubclass(category, InputWarning):
            return original(message, category, filename, lineno, file, line)
        text = " ".join(str(message).split())
        _common.WARNINGS.append(text)
        print(f"bayesgeo {command}: warning: {text}", file=sys.stderr)

    saved = _common.WARNINGS[:]  # a command run inside another (run -> stages) keeps its own list
    _common.WARNINGS.clear()
    with warnings.catch_warnings():
        warnings.simplefilter("always", InputWarning)
        original = warnings.showwarning
        warnings.showwarning = show
        try:
            yield
        finally:
            _common.WARNINGS[:] = saved


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``bayesgeo`` console script; returns the exit status."""
    from bayesgeo.validate import InputError

    parser = _build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_INPUT
    from bayesgeo import outputs

    outputs.set_command(sys.argv[1:] if argv is None else argv)
    try:
        with outputs.scope(), _one_line_warnings(args.command):
            return int(args._module.run(args) or 0)
    except InputError as err:
        print(f"bayesgeo {args.command}: error: {err}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print(f"bayesgeo {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
