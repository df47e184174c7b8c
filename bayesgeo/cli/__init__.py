"""Command line: a thin shell over the public Python API.

Each command lives in its own module ``bayesgeo.cli.<command>`` exposing ``HELP``,
``add_arguments(parser)`` and ``run(args) -> int``; modules are imported only when their command
runs, so ``bayesgeo explore`` does not pay for importing PyMC. Bad input prints one line on
stderr and exits with status 2; an unconverged posterior exits with status 3; an unexpected failure
prints one line (``BAYESGEO_DEBUG=1`` shows the traceback) and exits with status 1; a closed stdout
ends quietly with status 141.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import sys
import warnings

__all__ = ["main", "COMMANDS", "EXIT_INPUT", "EXIT_NOT_CONVERGED", "EXIT_FAILED", "EXIT_PIPE"]

EXIT_INPUT = 2
EXIT_NOT_CONVERGED = 3
#: Status of an unexpected failure (a bug, or the machine: disk full, out of memory); one stderr line.
EXIT_FAILED = 1
#: Status when stdout was closed by its reader (128 + SIGPIPE, as a shell reports a program ended by SIGPIPE).
EXIT_PIPE = 141

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
        message = " ".join(str(message).split())
        self.exit(EXIT_INPUT, f"{self.prog}: error: {message} (see '{self.prog} --help')\n")


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
    """Print each :class:`bayesgeo.common.csvtable.InputWarning` as one stderr line and keep it for ``--json``."""
    from bayesgeo.cli import _common
    from bayesgeo.common.csvtable import InputWarning

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


def _quiet_stdout() -> None:
    """Point stdout at the null device so the interpreter's final flush cannot fail again."""
    import os

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):  # pragma: no cover - stdout without a file descriptor
        pass


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``bayesgeo`` console script; returns the exit status (also for refused options).

    A reader that closes stdout early (``bayesgeo ... | head``) ends the command quietly with
    status :data:`EXIT_PIPE` instead of a BrokenPipeError traceback (Python documentation,
    "Note on SIGPIPE" in the ``signal`` module).
    """
    try:
        return _main(argv)
    except BrokenPipeError:
        _quiet_stdout()
        return EXIT_PIPE


def _empty_option(parser, args) -> str | None:
    """The option (or positional) given an empty or blank string, if any: an empty --value or --out
    would otherwise mean 'detect' or 'the current folder'."""
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices[args.command]
    for action in sub._actions:
        v = getattr(args, action.dest, None)
        values = v if isinstance(v, list) else [v]
        if any(isinstance(x, str) and not x.strip() for x in values):
            return action.option_strings[-1] if action.option_strings else action.metavar or action.dest.upper()
    return None


def _option_words(parser, args, message: str) -> str:
    """A library message that starts with an argument name (``margin: ...``) starts with the command's
    option instead (``--margin: ...``): the option of the same dest, or the command module's
    ``ARGUMENT_OPTIONS`` where the names differ (library errors speak in argument names)."""
    import re

    m = re.match(r"([a-z][a-z0-9_]*):", message)
    if not m:
        return message
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices[args.command]
    options = {a.dest: max(a.option_strings, key=len) for a in sub._actions if a.option_strings}
    options.update(getattr(args._module, "ARGUMENT_OPTIONS", {}))
    name = m.group(1)
    return options[name] + message[len(name):] if name in options else message


def _main(argv: list[str] | None) -> int:
    from bayesgeo.common.validate import InputError

    parser = _build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as stop:  # --help, --version, or a refused option (one line already printed)
        return stop.code if isinstance(stop.code, int) else EXIT_INPUT
    if args.command is None:
        print(f"bayesgeo: error: name a command ({', '.join(COMMANDS)}; see 'bayesgeo --help')", file=sys.stderr)
        return EXIT_INPUT
    empty = _empty_option(parser, args)
    if empty:
        print(f"bayesgeo {args.command}: error: {empty}: an empty value; give a value or leave the option out",
              file=sys.stderr)
        return EXIT_INPUT
    from bayesgeo.common import outputs
    outputs.set_command(sys.argv[1:] if argv is None else argv)
    try:
        with outputs.scope(), _one_line_warnings(args.command):
            status = int(args._module.run(args) or 0)
        sys.stdout.flush()  # a closed pipe shows here, inside the handler, not at interpreter exit
        return status
    except InputError as err:
        message = _option_words(parser, args, " ".join(str(err).split()))
        print(f"bayesgeo {args.command}: error: {message}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print(f"bayesgeo {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        raise
    except Exception as err:  # noqa: BLE001 - the last line of defence: a user never sees a traceback
        import os

        if os.environ.get("BAYESGEO_DEBUG"):
            raise
        text = " ".join(str(err).split()) or "(no message)"
        if isinstance(err, (OSError, MemoryError)):  # the machine, not the input: disk full, permissions, memory
            print(f"bayesgeo {args.command}: error: {type(err).__name__}: {text}", file=sys.stderr)
        else:
            print(f"bayesgeo {args.command}: internal error: {type(err).__name__}: {text} (a bug in bayesgeo: please "
                  "report it with the command line; BAYESGEO_DEBUG=1 shows the traceback)", file=sys.stderr)
        return EXIT_FAILED


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
