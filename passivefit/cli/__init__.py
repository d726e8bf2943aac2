"""The `passivefit` command: analyze, batch, gui, db, watch, demo.

Every command lives in this package, and only here are errors turned into exit codes and
one-line messages: the rest of passivefit raises domain errors (`LoadError`,
`InputError`, `StoreError`). Heavy modules are imported inside each command so
`passivefit analyze` starts fast and never imports Qt.
"""

from __future__ import annotations

import argparse
import errno
import sys
import warnings
from collections.abc import Sequence

from passivefit import __version__, one_blas_thread

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
    ("watch", "passivefit.cli.watch", "analyse each recording as the acquisition program "
     "finishes it"),
    ("demo", "passivefit.cli.demo", "write the simulated sample recordings to a folder"),
]


def _command_module(module: str):
    import importlib

    return importlib.import_module(module)


def main(argv: Sequence[str] | None = None) -> int:
    one_blas_thread()   # before any command imports numpy
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
        with warnings.catch_warnings():
            # Numerical warnings (numpy, scipy) are handled where they matter; stderr
            # holds only our own lines.
            warnings.simplefilter("ignore")
            return int(_command_module(args._module).run(args) or 0)
    except LoadError as exc:
        print(error_line(exc.path, exc.reason), file=sys.stderr)
        return EXIT_BAD_INPUT
    except (UsageError, InputError) as exc:
        print(error_line(None, str(exc)), file=sys.stderr)
        return EXIT_BAD_INPUT
    except OSError as exc:
        print(error_line(_os_path(exc), os_reason(exc)), file=sys.stderr)
        return EXIT_BAD_INPUT
    except MemoryError:
        print(error_line(None, "out of memory; analyse fewer or smaller files at once"),
              file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("passivefit: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:
        if not _is_store_error(exc):
            raise
        print(error_line(None, f"database: {_one_line(exc)}"), file=sys.stderr)
        return EXIT_BAD_INPUT


_OS_HINTS = {errno.EACCES: "check its permissions", errno.EPERM: "check its permissions",
             errno.ENOSPC: "free some space and run again",
             errno.EROFS: "the file system is read-only; write elsewhere",
             errno.EDQUOT: "the disk quota is used up; free some space"}


def os_reason(exc: OSError) -> str:
    """`exc` in words: what failed and what to do."""
    reason = (exc.strerror or str(exc) or type(exc).__name__).strip()
    hint = _OS_HINTS.get(exc.errno)
    return f"{reason[:1].lower()}{reason[1:]}" + (f"; {hint}" if hint else "")


def _os_path(exc: OSError) -> str | None:
    return None if exc.filename is None else str(exc.filename)


def _is_store_error(exc: Exception) -> bool:
    """A StoreError or a database library error (only when the database was used)."""
    if type(exc).__name__ == "StoreError":
        return True
    return any(c.__module__.startswith("sqlalchemy") for c in type(exc).__mro__)


def _one_line(exc: Exception) -> str:
    orig = getattr(exc, "orig", None)
    text = str(orig if orig is not None else exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def check_writable(path: str, option: str) -> None:
    """UsageError unless `path` can be created or replaced (checked before any work;
    leaves no file behind)."""
    import os

    existed = os.path.lexists(path)
    try:
        if os.path.isdir(path):
            raise IsADirectoryError(errno.EISDIR, "Is a directory", path)
        with open(path, "ab"):
            pass
    except OSError as exc:
        raise UsageError(f"`{option}` {path}: cannot write it ({os_reason(exc)})") from None
    if not existed:
        os.remove(path)
