"""`passivefit gui [PATH ...]`: open the review window (on the bundled sample without paths).

Without a display (Linux with neither DISPLAY nor WAYLAND_DISPLAY, and no
QT_QPA_PLATFORM chosen), or when Qt's platform plugin cannot load (missing system
libraries: Qt would abort the process), the command says so in one line and prints the
analysis as a table instead. `--snapshot FILE.png` needs no display: it
renders the window offscreen at 1400×900 and exits.
"""

from __future__ import annotations

import argparse
import os
import sys

from passivefit.cli.options import add_settings_arguments, settings_from


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("paths", nargs="*", metavar="PATH",
                   help="recordings or folders (default: the bundled simulated sample)")
    p.add_argument("--snapshot", metavar="FILE.png",
                   help="analyse, render the window offscreen at 1400×900 to FILE.png and exit")
    add_settings_arguments(p)


def display_available() -> bool:
    """False when Qt would find no screen: Linux without DISPLAY/WAYLAND_DISPLAY/QT_QPA_PLATFORM."""
    if os.environ.get("QT_QPA_PLATFORM") or not sys.platform.startswith("linux"):
        return True
    return bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))


def run(args: argparse.Namespace) -> int:
    settings = settings_from(args)
    paths = args.paths or [str(_bundled_sample())]
    if args.snapshot:
        if not args.snapshot.lower().endswith(".png"):
            from passivefit.cli import UsageError

            raise UsageError(f"`--snapshot` writes a PNG file; give a name ending in .png, "
                             f"not {args.snapshot!r}")
        from passivefit.cli import check_writable

        check_writable(args.snapshot, "--snapshot")
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    elif not display_available():
        print("passivefit: no display found (DISPLAY and WAYLAND_DISPLAY are unset), so no "
              "window; here is the analysis as text (use --snapshot FILE.png for a picture)",
              file=sys.stderr)
        return _print_tables(paths, settings)
    else:
        from passivefit.gui.platform import window_problem

        problem = window_problem()
        if problem is not None:
            print(f"passivefit: no window: {problem}; here is the analysis as text",
                  file=sys.stderr)
            return _print_tables(paths, settings)
    from passivefit.cli import EXIT_BAD_INPUT, error_line
    from passivefit.gui.app import WindowError, run_window

    try:
        return run_window(paths, settings, args.snapshot)
    except WindowError as exc:
        print(error_line(None, str(exc)), file=sys.stderr)
        return EXIT_BAD_INPUT


def _bundled_sample():
    from passivefit.samples import bundled_sample

    return bundled_sample()


def _print_tables(paths: list[str], settings) -> int:
    from pathlib import Path

    from passivefit.cli import EXIT_BAD_INPUT, error_line
    from passivefit.cli.analyze import format_table, load_and_analyze
    from passivefit.gui.state import expand_paths
    from passivefit.io.recording import LoadError

    status = 0
    for path in expand_paths([Path(p) for p in paths]):
        try:
            result = load_and_analyze(str(path), settings)
        except LoadError as exc:
            print(error_line(exc.path, exc.reason), file=sys.stderr)
            status = EXIT_BAD_INPUT
            continue
        sys.stdout.write(format_table(result.to_dict()))
    return status
