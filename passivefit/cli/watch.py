"""`passivefit watch FOLDER`: analyse each recording the acquisition program finishes.

A recording counts as finished when its size and modification time have stayed the same
for `--settle` seconds and it loads (see `passivefit.watch`). By default the review
window opens on each one and shows its cell card; `--no-window` prints one line per cell
instead. With `--db` each analysis is filed into the cell database as `batch` does.
Ctrl-C ends the watch (exit 0).
"""

from __future__ import annotations

import argparse
import math
import sys

from passivefit.cli.options import add_settings_arguments, settings_from


def add_arguments(p: argparse.ArgumentParser) -> None:
    from passivefit.watch import POLL_S, SETTLE_S

    p.add_argument("folder", metavar="FOLDER", help="the folder the acquisition program "
                   "writes recordings into (not its sub-folders)")
    p.add_argument("--db", metavar="URL",
                   help="also file each analysis into this database: an SQLite file path, "
                        "sqlite:///FILE or postgresql+psycopg://USER@HOST/DB")
    p.add_argument("--settle", type=float, default=SETTLE_S, metavar="S",
                   help=f"a file is read once its size and time have not changed for S "
                        f"seconds (default {SETTLE_S:g})")
    p.add_argument("--include-existing", action="store_true",
                   help="also analyse the recordings already in FOLDER (default: only new "
                        "ones)")
    p.add_argument("--no-window", action="store_true",
                   help="print one line per analysed cell instead of opening the window")
    p.add_argument("--poll", type=float, default=POLL_S, help=argparse.SUPPRESS)
    add_settings_arguments(p)


def run(args: argparse.Namespace) -> int:
    from passivefit.cli import UsageError
    from passivefit.watch import FolderWatcher

    for option, value in (("--settle", args.settle), ("--poll", args.poll)):
        if not (math.isfinite(value) and 0 <= value <= 3600):
            raise UsageError(f"`{option}` takes 0 to 3600 seconds, not {value:g}")
    settings = settings_from(args)
    # The folder and the database are checked first: one line and exit 2 (WatchError,
    # StoreError or the database library's error, through cli.main).
    FolderWatcher(args.folder, settle_s=args.settle)
    database = None
    if args.db:
        from passivefit.store.database import open_database

        database = open_database(args.db, create=True)
    try:
        if not args.no_window:
            if database is not None:
                database.close()
                database = None
            window_status = _run_window(args, settings)
            if window_status is not None:
                return window_status
            if args.db:
                database = open_database(args.db, create=True)
        watcher = FolderWatcher(args.folder, settle_s=args.settle,
                                include_existing=args.include_existing,
                                loader=_loader(settings))
        return _loop(watcher, settings, database, args.poll)
    finally:
        if database is not None:
            database.close()


def _loader(settings):
    def load_one(path):
        from passivefit.io import load

        return load(path, channel=settings.reader_channel)

    return load_one


def _run_window(args: argparse.Namespace, settings) -> int | None:
    """The window's watch; None when there is no usable display (then lines are printed)."""
    from passivefit.cli.gui import display_available

    if not display_available():
        print("passivefit: no display found (DISPLAY and WAYLAND_DISPLAY are unset), so no "
              "window; printing one line per cell instead", file=sys.stderr)
        return None
    from passivefit.gui.platform import window_problem

    problem = window_problem()
    if problem is not None:
        print(f"passivefit: no window: {problem}; printing one line per cell instead",
              file=sys.stderr)
        return None
    from passivefit.cli import EXIT_BAD_INPUT, error_line
    from passivefit.gui.app import WindowError, run_watch_window

    print(f"watching {args.folder} in the window (Ctrl-C or closing the window ends)",
          file=sys.stderr, flush=True)
    try:
        status = run_watch_window(args.folder, settings, settle_s=args.settle,
                                  include_existing=args.include_existing, database=args.db)
    except WindowError as exc:
        print(error_line(None, str(exc)), file=sys.stderr)
        return EXIT_BAD_INPUT
    print("watch: stopped", file=sys.stderr, flush=True)
    return status


def _loop(watcher, settings, database, poll_s: float) -> int:
    import time

    print(f"watching {watcher.folder} for finished recordings (Ctrl-C ends)",
          file=sys.stderr, flush=True)
    analysed = [0]      # counted before its line is printed: Ctrl-C may come at any point
    try:
        while True:
            for item in watcher.poll():
                _handle(item, settings, database, analysed)
            time.sleep(poll_s)
    except KeyboardInterrupt:
        n = analysed[0]
        print(f"watch: stopped; {n} recording{'s' if n != 1 else ''} analysed",
              file=sys.stderr, flush=True)
    return 0


def _handle(item, settings, database, analysed: list[int]) -> None:
    """Analyse (and file) one finished recording, counting it in `analysed`. Problems are
    one line each and the watch goes on."""
    import time

    from passivefit.cli import error_line, os_reason
    from passivefit.cli.options import check_against, check_fitted
    from passivefit.model.errors import LoadError
    from passivefit.watch import Unreadable, file_result, summary_line

    if isinstance(item, Unreadable):
        print(error_line(str(item.path), item.reason), file=sys.stderr, flush=True)
        return
    from passivefit.analysis import analyze

    try:
        check_against(item.recording, settings)
        data = analyze(item.recording, settings).to_dict()
        check_fitted(str(item.path), data, settings)
    except LoadError as exc:
        print(error_line(exc.path, exc.reason), file=sys.stderr, flush=True)
        return
    except Exception as exc:  # noqa: BLE001 - one bad file must not end the watch
        print(error_line(str(item.path), f"analysis failed ({type(exc).__name__}: {exc})"),
              file=sys.stderr, flush=True)
        return
    line = f"{time.strftime('%H:%M:%S')}  {summary_line(item.path, data)}"
    if database is not None:
        try:
            status = file_result(database, item.recording, data, settings)
            line += "  [filed]" if status == "stored" else "  [already in the database]"
        except OSError as exc:
            print(error_line(str(item.path), f"not filed: {os_reason(exc)}"), file=sys.stderr)
        except Exception as exc:  # noqa: BLE001 - the watch goes on; said in one line
            reason = str(getattr(exc, "orig", None) or exc).strip().splitlines()
            print(error_line(str(item.path), f"not filed: {reason[0] if reason else exc}"),
                  file=sys.stderr)
    analysed[0] += 1
    print(line, flush=True)
