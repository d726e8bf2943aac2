"""The `passivefit` command: analyze, batch, gui, db, demo.

Every command lives in this package, and only here are errors turned into exit codes and
one-line messages: the rest of passivefit raises domain errors (`LoadError`,
`InputError`, `StoreError`). Heavy modules are imported inside each command so
`passivefit analyze` starts fast and never imports Qt.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

from passivefit import __version__

EXIT_OK, EXIT_FAILED, EXIT_BAD_INPUT = 0, 1, 2


class UsageError(ValueError):
    """A problem with the command line, reported in one line (exit 2)."""


def error_line(path: str | None, message: str) -> str:
    where = f"{path}: " if path else ""
    return f"passivefit: error: {where}{message}"


def build_parser(command: str | None = None) -> argparse.ArgumentParser:
    """The argument parser; only `command`'s module is imported (all when None)."""
    parser = argparse.ArgumentParser(
        prog="passivefit",
        description="Passive membrane properties from whole-cell current-clamp recordings.",
    )
    parser.add_argument("--version", action="version", version=f"passivefit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, module, help_text in COMMANDS:
        p = sub.add_parser(name, help=help_text, description=help_text)
        if command in (None, name):
            _command_module(module).add_arguments(p)
        p.set_defaults(_module=module)
    return parser


# (name, module, one-line help). Each module has add_arguments(parser) and run(args) -> int.
COMMANDS = [
    ("analyze", "passivefit.cli.analyze", "fit one recording and print its passive properties"),
    ("gui", "passivefit.cli.gui", "open the review window on recordings"),
    ("batch", "passivefit.cli.batch", "analyse folders of recordings into a cell database"),
    ("db", "passivefit.cli.db", "list, export and plot the cell database"),
    ("demo", "passivefit.cli.demo", "write the simulated sample recordings to a folder"),
]


def _command_module(module: str):
    import importlib

    return importlib.import_module(module)


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv:
        argv = ["gui"]
    names = {name for name, _, _ in COMMANDS}
    parser = build_parser(next((a for a in argv if a in names), ""))
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_BAD_INPUT
    from passivefit.io.recording import LoadError
    from passivefit.model.errors import InputError

    try:
        return int(_command_module(args._module).run(args) or 0)
    except LoadError as exc:
        print(error_line(exc.path, exc.reason), file=sys.stderr)
        return EXIT_BAD_INPUT
    except (UsageError, InputError) as exc:
        print(error_line(None, str(exc)), file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("passivefit: interrupted", file=sys.stderr)
        return 130
